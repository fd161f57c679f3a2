// Fuzz target for nuwatchd's state files (daemon/service/state_store.h): bytes ->
// DecodeStreamState -> Detector::ImportState, the path a restarting daemon takes.
// Build and run: DEVELOPERS.md, "Sanitizers and fuzzing"; seeds in corpus/state_fuzz/ and, from
// the current encoder, make_seeds (the ctest fuzz_make_seeds writes them into the build dir).
//
// Each input is decoded twice: as it is, and with its length and checksum made valid (so that
// mutations reach the payload's parser; an embedded model keeps its own checksum). Besides the
// sanitizers' checks it traps when decoding throws anything but StateFileError, when an accepted
// file does not encode back to bytes that decode to the same bytes, or when importing it into a
// detector (as RestoreStreams does, with the default options) throws anything but
// PreconditionError. A detector that took the state must then score a vector.
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <optional>
#include <vector>

#include "fuzz_support.h"
#include "nuwatch/detector.h"
#include "service/state_store.h"

using nuwatch::fuzz::Require;

namespace {

// Larger dimensions only cost memory per run (the window's buffer grows with them); the decoder's
// bounds do not depend on them.
constexpr int kMaxImportDims = 16;

void DecodeAndImport(const std::uint8_t* data, std::size_t size) {
  std::optional<nuwatch::StreamStateFile> file;
  try {
    file.emplace(nuwatch::DecodeStreamState(data, size));
  } catch (const nuwatch::StateFileError&) {
    return;
  }
  std::vector<uint8_t> encoded;
  try {
    encoded = nuwatch::EncodeStreamState(file->stream_key, file->dims, file->state);
    const nuwatch::StreamStateFile again =
        nuwatch::DecodeStreamState(encoded.data(), encoded.size());
    Require(nuwatch::EncodeStreamState(again.stream_key, again.dims, again.state) == encoded);
  } catch (const nuwatch::StateFileError&) {
    Require(false);  // what the decoder accepted, the encoder refuses, or the reverse
  }

  if (file->dims > kMaxImportDims) return;
  nuwatch::Detector detector(nuwatch::DetectorOptions{}, file->dims);
  try {
    detector.ImportState(file->state);
  } catch (const nuwatch::PreconditionError&) {
    return;  // refused whole: the daemon quarantines the file
  }
  // The daemon snapshots a restored stream again: its state must encode (a StateFileError
  // escaping here is a finding).
  (void)nuwatch::EncodeStreamState(file->stream_key, file->dims, detector.ExportState());
  const auto& times = file->state.window_times;
  const double next_time = times.empty() ? 0.0 : times.back() + 1.0;
  if (!std::isfinite(next_time)) return;
  const std::vector<double> x(static_cast<std::size_t>(file->dims), 0.5);
  try {
    (void)detector.Observe(next_time, x);
  } catch (const nuwatch::PreconditionError&) {
    // e.g. time going backwards relative to the imported window: refused, state unchanged
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  DecodeAndImport(data, size);
  const std::vector<uint8_t> fixed = nuwatch::fuzz::WithValidEnvelope(data, size);
  if (!fixed.empty()) DecodeAndImport(fixed.data(), fixed.size());
  return 0;
}
