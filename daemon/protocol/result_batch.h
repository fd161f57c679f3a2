// The binary form of a batch of results (daemon/protocol/PROTOCOL.md §9.5): what nuwatchd
// publishes for one ingest message when publish.result_form = "binary", and the decoder that
// `nuwatch tail` and the tests read it with. Section numbers (§) refer to PROTOCOL.md.
//
// Encoding is incremental (Begin, Add per result, Finish) into buffers the encoder owns and keeps,
// so a long-lived encoder stops allocating once its buffers have grown to the largest batch.
// Decoding checks every count and size against the frame before reading, never reads outside
// it, never throws except std::bad_alloc, and names what is wrong in a one-line message.
//
// Thread safety: ResultBatchEncoder is not thread-safe (one per publishing thread); the free
// functions are reentrant.
#pragma once

#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

#include "protocol/wire_protocol.h"

namespace nuwatch {

inline constexpr std::string_view kResultBatchMagic = "NUWR";  // §9.5.1, bytes 0..3
inline constexpr std::uint8_t kResultBatchVersion = 1;
inline constexpr std::size_t kResultBatchHeaderBytes = 16;   // §9.5.1
inline constexpr std::size_t kResultBatchRowBytes = 48;      // §9.5.2
inline constexpr std::size_t kResultBatchFeatureBytes = 16;  // §9.5.3
// The row's top-feature count is a u8 (§9.5.2).
inline constexpr std::size_t kResultBatchMaxFeaturesPerRow = 255;

// The §9.5.2 state codes.
enum class ResultState : std::uint8_t { kLearning = 0, kHistory = 1, kScoring = 2 };

// Ensures: "learning", "history" or "scoring" (the §9.1 strings).
std::string_view ResultStateName(ResultState state) noexcept;

class ResultBatchEncoder {
 public:
  // Starts a new batch; the previous one, if any, is discarded. Keeps the buffers' capacity.
  void Begin();

  // Appends the §9.1 result `result` as the next row. Its top features (their `index`, not their
  // name) are written when it is scored and flagged (!learning && anomaly), as in the JSON form.
  // Requires: Begin() was called; rows() < 2^32 - 1; result.support_vectors in [0, 2^32 - 1];
  // at most kResultBatchMaxFeaturesPerRow top features, each index in [0, 2^32 - 1]. Throws
  // PreconditionError naming the offending value otherwise (the batch is then unusable until the
  // next Begin). Allocates only when a buffer must grow.
  void Add(const ScoredVector& result);

  std::int64_t rows() const noexcept { return rows_; }

  // Ensures: the §9.5 frame of the rows added since Begin(), valid until the next Begin() or Add().
  // Requires: rows() >= 1 (a batch is never empty).
  const std::string& Finish();

 private:
  std::string frame_;     // header and rows, then the feature entries at Finish
  std::string features_;  // the feature entries, in row order
  std::int64_t rows_ = 0;
  std::int64_t feature_entries_ = 0;
};

// One decoded row (§9.5.2). `decision` and `p_value` are NaN where the JSON form writes null.
struct ResultBatchRow {
  double t = 0;
  double decision = 0;
  double p_value = 0;
  std::int64_t incident_id = -1;  // -1: none
  std::uint64_t model_version = 0;
  std::uint32_t support_vectors = 0;
  ResultState state = ResultState::kLearning;
  bool anomaly = false;
  std::uint32_t first_feature = 0;  // its entries are features[first_feature, + feature_count)
  std::uint32_t feature_count = 0;
};

struct ResultBatchFeature {
  std::uint32_t index = 0;  // the 0-based column (§9.5.3)
  double share = 0;
};

struct ResultBatch {
  std::vector<ResultBatchRow> rows;
  std::vector<ResultBatchFeature> features;
};

// True when `frame` starts with the §9.5 magic, i.e. it is meant as a binary batch (a JSON result,
// batch or event starts with '{'). Says nothing about the rest.
bool LooksLikeResultBatch(std::string_view frame) noexcept;

// Decodes frame 2 of a §9.5 message into *out (its previous contents are replaced). Ensures: ""
// and a batch of >= 1 rows whose feature ranges lie within out->features, or a one-line message
// saying what is wrong (e.g. "binary result batch: version 2 is not supported (this reader knows
// 1)") and *out empty. Never reads outside `frame`.
std::string DecodeResultBatch(std::string_view frame, ResultBatch* out);

}  // namespace nuwatch
