// Fuzz target for the model file (nuwatch/model_file.h): bytes -> DecodeModel.
// Build and run: DEVELOPERS.md, "Sanitizers and fuzzing"; seeds in corpus/model_fuzz/ and, from
// the current encoder, make_seeds (the ctest fuzz_make_seeds writes them into the build dir).
//
// Each input is decoded twice: as it is (so the envelope's checks are fuzzed) and with its length
// and checksum made valid (so mutations reach the payload's parser). Besides the sanitizers'
// checks it traps when DecodeModel throws anything but ModelFileError, or when an accepted model
// cannot be used: it must score and explain a vector of its dimension, and encode to bytes that
// decode to a model that encodes to the same bytes.
#include <cstddef>
#include <cstdint>
#include <vector>

#include "fuzz_support.h"
#include "nuwatch/model_file.h"
#include "nuwatch/types.h"

using nuwatch::fuzz::Require;

namespace {

void DecodeAndUse(const std::uint8_t* data, std::size_t size) {
  std::optional<nuwatch::Model> model;
  try {
    model.emplace(nuwatch::DecodeModel(data, size));
  } catch (const nuwatch::ModelFileError&) {
    return;
  }
  const std::vector<uint8_t> encoded = nuwatch::EncodeModel(*model);
  std::optional<nuwatch::Model> again;
  try {
    again.emplace(nuwatch::DecodeModel(encoded.data(), encoded.size()));
  } catch (const nuwatch::ModelFileError&) {
    Require(false);  // the encoder wrote what the decoder refuses
  }
  Require(nuwatch::EncodeModel(*again) == encoded);

  // Decoding bounds every size by the input's, so the dimension is small enough to score with.
  const std::vector<double> x(static_cast<std::size_t>(model->dims()), 0.5);
  const nuwatch::Score score = model->Evaluate(x);
  (void)model->PValue(score);
  (void)model->Flagged(score);
  Require(model->Explain(x, 3).size() <= 3);
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  DecodeAndUse(data, size);
  const std::vector<uint8_t> fixed = nuwatch::fuzz::WithValidEnvelope(data, size);
  if (!fixed.empty()) DecodeAndUse(fixed.data(), fixed.size());
  return 0;
}
