// libFuzzer target for the wire protocol (daemon/protocol/PROTOCOL.md): DecodeIngest, the
// binary result batch decoder (§9.5) and the encoders. Build and run: DEVELOPERS.md, "Sanitizers
// and fuzzing"; seeds in corpus/wire_protocol_fuzz/.
//
// Input layout: byte 0 gives the key length k (mod 131), the next k bytes are the stream key, the
// rest is the payload. Besides the sanitizers' checks it traps when a decoded message breaks the
// decoder's contract, when the simdjson path and the reference JSON reader disagree, when
// re-encoding an accepted message and decoding it again changes a number, or when the result
// encoder writes something that is not valid JSON. The payload is also read as a §9.5 result
// batch: an accepted one must keep every row's entries within its entries, and encoding its rows
// again and decoding that must give the same rows.
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <nlohmann/json.hpp>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "protocol/result_batch.h"
#include "protocol/wire_protocol.h"

namespace {

void Require(bool condition) {
  if (!condition) __builtin_trap();
}

bool SameBits(double a, double b) { return std::memcmp(&a, &b, sizeof a) == 0; }

// Decodes `encoded` and checks that it holds exactly `times` and `values` (bit for bit, except
// that the sign of zero may be lost in JSON, which §5 allows).
void RequireSameNumbers(const std::string& encoded, const std::vector<double>& times,
                        const std::vector<double>& values, int dims, bool exact_zero_sign) {
  nuwatch::WireLimits limits;
  limits.max_message_bytes = encoded.size() + 1;
  limits.max_dims = 65535;
  limits.max_vectors_per_message = static_cast<int>(times.size());
  nuwatch::JsonScratch scratch;
  const nuwatch::DecodeResult again = nuwatch::DecodePayload(encoded, limits, &scratch);
  Require(again.ok());
  Require(again.payload.count == static_cast<int>(times.size()));
  Require(again.payload.dims == dims);
  for (int i = 0; i < again.payload.count; ++i) {
    Require(SameBits(again.payload.time(i), times[i]) ||
            (!exact_zero_sign && times[i] == 0 && again.payload.time(i) == 0));
    for (int j = 0; j < dims; ++j) {
      const double v = values[static_cast<std::size_t>(i) * dims + j];
      const double w = again.payload.value(i, j);
      Require(SameBits(v, w) || (!exact_zero_sign && v == 0 && w == 0));
    }
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  if (size == 0) return 0;
  const std::size_t key_length = std::min<std::size_t>(data[0] % 131, size - 1);
  const std::string_view key(reinterpret_cast<const char*>(data) + 1, key_length);
  const std::string_view payload(reinterpret_cast<const char*>(data) + 1 + key_length,
                                 size - 1 - key_length);

  const nuwatch::WireLimits limits;
  nuwatch::JsonScratch scratch;
  const nuwatch::DecodeResult result = nuwatch::DecodeIngest(key, payload, limits, &scratch);
  Require(!nuwatch::RejectReasonLabel(result.reason).empty());
  // A JSON payload that reached the JSON decoder: the simdjson path and the reference reader
  // (nlohmann's SAX parser) agree on the verdict, the detail and every number, bit for bit.
  if (nuwatch::ValidateStreamKey(key, limits) == nuwatch::RejectReason::kNone && !payload.empty() &&
      payload.size() <= limits.max_message_bytes &&
      std::string_view("{ \t\r\n").find(payload.front()) != std::string_view::npos) {
    nuwatch::JsonScratch reference_scratch;
    const nuwatch::DecodeResult reference =
        nuwatch::DecodeJsonWithReferenceReader(payload, limits, &reference_scratch);
    Require(reference.reason == result.reason && reference.detail == result.detail);
    if (result.ok()) {
      Require(reference.payload.count == result.payload.count &&
              reference.payload.dims == result.payload.dims);
      for (int i = 0; i < result.payload.count; ++i) {
        Require(SameBits(reference.payload.time(i), result.payload.time(i)));
        for (int j = 0; j < result.payload.dims; ++j) {
          Require(SameBits(reference.payload.value(i, j), result.payload.value(i, j)));
        }
      }
    }
  }
  if (result.ok()) {
    const nuwatch::PayloadView& view = result.payload;
    Require(view.count >= 1 && view.count <= limits.max_vectors_per_message);
    Require(view.dims >= 1 && view.dims <= limits.max_dims);
    std::vector<double> times(view.count);
    std::vector<double> values(static_cast<std::size_t>(view.count) * view.dims);
    for (int i = 0; i < view.count; ++i) {
      times[i] = view.time(i);
      Require(std::isfinite(times[i]));
      view.CopyRow(
          i, std::span<double>(values).subspan(static_cast<std::size_t>(i) * view.dims, view.dims));
      for (int j = 0; j < view.dims; ++j) {
        Require(std::isfinite(values[static_cast<std::size_t>(i) * view.dims + j]));
      }
    }
    std::string encoded;
    nuwatch::EncodeBinaryPayload(times, values.data(), view.dims, nuwatch::Dtype::kFloat64,
                                 &encoded);
    RequireSameNumbers(encoded, times, values, view.dims, /*exact_zero_sign=*/true);
    nuwatch::EncodeJsonPayload(times, values.data(), view.dims, &encoded);
    RequireSameNumbers(encoded, times, values, view.dims, /*exact_zero_sign=*/true);
  }

  // §9.5: the payload as a binary result batch.
  nuwatch::ResultBatch batch;
  if (nuwatch::DecodeResultBatch(payload, &batch).empty()) {
    Require(!batch.rows.empty());
    nuwatch::ResultBatchEncoder encoder;
    encoder.Begin();
    std::vector<nuwatch::FeatureShareView> entries;
    for (const nuwatch::ResultBatchRow& row : batch.rows) {
      Require(std::size_t{row.first_feature} + row.feature_count <= batch.features.size());
      Require(row.feature_count == 0 || row.anomaly);
      entries.clear();
      for (std::uint32_t k = 0; k < row.feature_count; ++k) {
        const nuwatch::ResultBatchFeature& f = batch.features[row.first_feature + k];
        // The encoder takes an int index (the daemon's columns); larger ones cannot come back.
        entries.push_back(
            {"", static_cast<int>(std::min<std::uint32_t>(f.index, 0x7FFFFFFF)), f.share});
      }
      nuwatch::ScoredVector scored;
      scored.t = row.t;
      scored.learning = row.state != nuwatch::ResultState::kScoring;
      scored.history = row.state == nuwatch::ResultState::kHistory;
      scored.decision = row.decision;
      scored.p_value = row.p_value;
      scored.anomaly = row.anomaly;
      scored.incident_id = row.incident_id;
      scored.model_version = row.model_version;
      scored.support_vectors = row.support_vectors;
      scored.top_features = entries;
      encoder.Add(scored);
    }
    nuwatch::ResultBatch again;
    Require(nuwatch::DecodeResultBatch(encoder.Finish(), &again).empty());
    Require(again.rows.size() == batch.rows.size() &&
            again.features.size() == batch.features.size());
    for (std::size_t i = 0; i < batch.rows.size(); ++i) {
      const nuwatch::ResultBatchRow& a = batch.rows[i];
      const nuwatch::ResultBatchRow& b = again.rows[i];
      const bool scoring = a.state == nuwatch::ResultState::kScoring;
      Require(SameBits(a.t, b.t) && a.state == b.state && a.anomaly == b.anomaly &&
              a.incident_id == b.incident_id && a.model_version == b.model_version &&
              a.support_vectors == b.support_vectors && a.feature_count == b.feature_count &&
              a.first_feature == b.first_feature);
      // Not scoring: the encoder writes NaN whatever the frame held (§9.5.2).
      Require(scoring ? SameBits(a.decision, b.decision) && SameBits(a.p_value, b.p_value)
                      : std::isnan(b.decision) && std::isnan(b.p_value));
    }
    for (std::size_t k = 0; k < batch.features.size(); ++k) {
      Require(SameBits(batch.features[k].share, again.features[k].share));
      Require(again.features[k].index ==
              std::min<std::uint32_t>(batch.features[k].index, 0x7FFFFFFF));
    }
  }

  // The payload bytes as a feature name: whatever they are, the result must be valid JSON.
  const nuwatch::FeatureShareView top[] = {{payload, 0, 0.5}, {"", static_cast<int>(size), 0.25}};
  nuwatch::ScoredVector scored;
  scored.learning = false;
  scored.anomaly = true;
  // Any 8 bytes as the decision, NaN and infinities included (written as null).
  scored.decision = -1.0;
  if (size >= 8) std::memcpy(&scored.decision, data, sizeof scored.decision);
  scored.top_features = top;
  std::string out;
  nuwatch::EncodeResultJson(scored, &out);
  Require(nlohmann::json::accept(out));
  return 0;
}
