#include "protocol/result_batch.h"

#include <bit>
#include <cmath>
#include <cstring>
#include <limits>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

// The layout is little-endian (§9.5) and written and read with memcpy; a big-endian host would
// need byte swaps, which nothing here does.
static_assert(std::endian::native == std::endian::little,
              "the result batch code assumes a little-endian host");

// §9.5.1: offsets of the result batch header's fields.
namespace batch_header {
constexpr std::size_t kVersion = 4;
constexpr std::size_t kFlags = 5;
constexpr std::size_t kReserved = 6;
constexpr std::size_t kCount = 8;
constexpr std::size_t kFeatures = 12;
}  // namespace batch_header
// §9.5.2 row offsets.
constexpr std::size_t kRowT = 0;
constexpr std::size_t kRowDecision = 8;
constexpr std::size_t kRowPValue = 16;
constexpr std::size_t kRowIncident = 24;
constexpr std::size_t kRowModelVersion = 32;
constexpr std::size_t kRowSupportVectors = 40;
constexpr std::size_t kRowState = 44;
constexpr std::size_t kRowAnomaly = 45;
constexpr std::size_t kRowFeatureCount = 46;
constexpr std::size_t kRowReserved = 47;
// §9.5.3 feature entry offsets.
constexpr std::size_t kFeatureShare = 0;
constexpr std::size_t kFeatureIndex = 8;
constexpr std::size_t kFeatureReserved = 12;

template <class T>
void Store(T value, char* at) {
  std::memcpy(at, &value, sizeof value);
}

template <class T>
T Load(const char* at) {
  T value;
  std::memcpy(&value, at, sizeof value);
  return value;
}

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

std::string Problem(std::string_view what) { return "binary result batch: " + std::string(what); }

}  // namespace

std::string_view ResultStateName(ResultState state) noexcept {
  switch (state) {
    case ResultState::kLearning:
      return "learning";
    case ResultState::kHistory:
      return "history";
    case ResultState::kScoring:
      return "scoring";
  }
  return "unknown";
}

void ResultBatchEncoder::Begin() {
  frame_.assign(kResultBatchHeaderBytes, '\0');
  std::memcpy(frame_.data(), kResultBatchMagic.data(), kResultBatchMagic.size());
  frame_[batch_header::kVersion] = static_cast<char>(kResultBatchVersion);
  features_.clear();
  rows_ = 0;
  feature_entries_ = 0;
}

void ResultBatchEncoder::Add(const ScoredVector& result) {
  if (frame_.size() < kResultBatchHeaderBytes)
    throw PreconditionError("ResultBatchEncoder::Add: Begin() was not called");
  if (rows_ >= std::numeric_limits<std::uint32_t>::max())
    throw PreconditionError("ResultBatchEncoder::Add: " + std::to_string(rows_) +
                            " rows already fill the u32 count field");
  if (result.support_vectors < 0 ||
      result.support_vectors > std::numeric_limits<std::uint32_t>::max())
    throw PreconditionError("ResultBatchEncoder::Add: support_vectors = " +
                            std::to_string(result.support_vectors) + " is outside [0, 4294967295]");
  const bool scoring = !result.learning;
  const bool explained = scoring && result.anomaly;
  const std::size_t entries = explained ? result.top_features.size() : 0;
  if (entries > kResultBatchMaxFeaturesPerRow)
    throw PreconditionError("ResultBatchEncoder::Add: " + std::to_string(entries) +
                            " top features exceed the u8 count field (at most 255)");

  char row[kResultBatchRowBytes] = {};
  Store(result.t, row + kRowT);
  Store(scoring ? result.decision : kNaN, row + kRowDecision);
  Store(scoring ? result.p_value : kNaN, row + kRowPValue);
  Store<std::int64_t>(result.incident_id < 0 ? -1 : result.incident_id, row + kRowIncident);
  Store<std::uint64_t>(result.model_version, row + kRowModelVersion);
  Store(static_cast<std::uint32_t>(result.support_vectors), row + kRowSupportVectors);
  const ResultState state = scoring          ? ResultState::kScoring
                            : result.history ? ResultState::kHistory
                                             : ResultState::kLearning;
  row[kRowState] = static_cast<char>(state);
  row[kRowAnomaly] = explained ? 1 : 0;
  row[kRowFeatureCount] = static_cast<char>(static_cast<std::uint8_t>(entries));
  row[kRowReserved] = 0;

  for (std::size_t k = 0; k < entries; ++k) {
    const FeatureShareView& feature = result.top_features[k];
    if (feature.index < 0)
      throw PreconditionError("ResultBatchEncoder::Add: feature index " +
                              std::to_string(feature.index) + " is negative");
    char entry[kResultBatchFeatureBytes] = {};
    Store(feature.share, entry + kFeatureShare);
    Store(static_cast<std::uint32_t>(feature.index), entry + kFeatureIndex);
    Store<std::uint32_t>(0, entry + kFeatureReserved);
    features_.append(entry, sizeof entry);
  }
  frame_.append(row, sizeof row);
  ++rows_;
  feature_entries_ += static_cast<std::int64_t>(entries);
}

const std::string& ResultBatchEncoder::Finish() {
  if (rows_ < 1) throw PreconditionError("ResultBatchEncoder::Finish: the batch has no rows");
  if (feature_entries_ > std::numeric_limits<std::uint32_t>::max())
    throw PreconditionError("ResultBatchEncoder::Finish: " + std::to_string(feature_entries_) +
                            " feature entries exceed the u32 field");
  Store(static_cast<std::uint32_t>(rows_), frame_.data() + batch_header::kCount);
  Store(static_cast<std::uint32_t>(feature_entries_), frame_.data() + batch_header::kFeatures);
  frame_.append(features_);
  features_.clear();
  return frame_;
}

bool LooksLikeResultBatch(std::string_view frame) noexcept {
  return frame.starts_with(kResultBatchMagic);
}

std::string DecodeResultBatch(std::string_view frame, ResultBatch* out) {
  out->rows.clear();
  out->features.clear();
  // §9.5.4, in order: magic, version, header, counts, size, rows, entries.
  if (frame.size() < batch_header::kVersion + 1 || !LooksLikeResultBatch(frame))
    return Problem("the frame does not start with the magic NUWR");
  const auto version = static_cast<std::uint8_t>(frame[batch_header::kVersion]);
  if (version != kResultBatchVersion)
    return Problem("version " + std::to_string(version) + " is not supported (this reader knows " +
                   std::to_string(kResultBatchVersion) + ")");
  if (frame.size() < kResultBatchHeaderBytes)
    return Problem("the header is cut short: " + std::to_string(frame.size()) + " of " +
                   std::to_string(kResultBatchHeaderBytes) + " bytes");
  const char* data = frame.data();
  if (const auto flags = static_cast<std::uint8_t>(frame[batch_header::kFlags]); flags != 0)
    return Problem("flags = " + std::to_string(flags) + ", version 1 defines none (0 expected)");
  if (const auto reserved = Load<std::uint16_t>(data + batch_header::kReserved); reserved != 0)
    return Problem("the reserved header field is " + std::to_string(reserved) + ", not 0");
  const auto count = Load<std::uint32_t>(data + batch_header::kCount);
  const auto features = Load<std::uint32_t>(data + batch_header::kFeatures);
  if (count == 0) return Problem("the batch has no rows (count = 0)");
  // At most 16 + 48 * (2^32 - 1) + 16 * (2^32 - 1) < 2^39: no overflow in 64 bits.
  const std::uint64_t expected = kResultBatchHeaderBytes +
                                 std::uint64_t{count} * kResultBatchRowBytes +
                                 std::uint64_t{features} * kResultBatchFeatureBytes;
  if (frame.size() != expected)
    return Problem("the frame has " + std::to_string(frame.size()) + " bytes, but count = " +
                   std::to_string(count) + " and features = " + std::to_string(features) +
                   " make " + std::to_string(expected));

  out->rows.resize(count);
  std::uint64_t claimed = 0;
  for (std::uint32_t i = 0; i < count; ++i) {
    const char* row = data + kResultBatchHeaderBytes + std::size_t{i} * kResultBatchRowBytes;
    ResultBatchRow& r = out->rows[i];
    const auto state = static_cast<std::uint8_t>(row[kRowState]);
    const auto anomaly = static_cast<std::uint8_t>(row[kRowAnomaly]);
    const auto entries = static_cast<std::uint8_t>(row[kRowFeatureCount]);
    const auto reserved = static_cast<std::uint8_t>(row[kRowReserved]);
    const auto where = [i] { return "row " + std::to_string(i) + ": "; };
    if (state > static_cast<std::uint8_t>(ResultState::kScoring)) {
      out->rows.clear();
      return Problem(where() + "state " + std::to_string(state) + " is not 0, 1 or 2");
    }
    if (anomaly > 1 ||
        (anomaly == 1 && state != static_cast<std::uint8_t>(ResultState::kScoring))) {
      out->rows.clear();
      return Problem(where() + "anomaly " + std::to_string(anomaly) + " with state " +
                     std::to_string(state) + " (1 only when scoring, else 0)");
    }
    if (entries > 0 && anomaly == 0) {
      out->rows.clear();
      return Problem(where() + std::to_string(entries) + " top features on a row not flagged");
    }
    if (reserved != 0) {
      out->rows.clear();
      return Problem(where() + "the reserved byte is " + std::to_string(reserved) + ", not 0");
    }
    if (claimed + entries > features) {
      out->rows.clear();
      return Problem(where() + "its " + std::to_string(entries) + " top features run past the " +
                     std::to_string(features) + " entries the header announces");
    }
    r.incident_id = Load<std::int64_t>(row + kRowIncident);
    if (r.incident_id < -1) {
      out->rows.clear();
      return Problem(where() + "incident " + std::to_string(r.incident_id) +
                     " is neither -1 (none) nor an id >= 0");
    }
    r.t = Load<double>(row + kRowT);
    r.decision = Load<double>(row + kRowDecision);
    r.p_value = Load<double>(row + kRowPValue);
    r.model_version = Load<std::uint64_t>(row + kRowModelVersion);
    r.support_vectors = Load<std::uint32_t>(row + kRowSupportVectors);
    r.state = static_cast<ResultState>(state);
    r.anomaly = anomaly == 1;
    r.first_feature = static_cast<std::uint32_t>(claimed);
    r.feature_count = entries;
    claimed += entries;
  }
  if (claimed != features) {
    out->rows.clear();
    return Problem("the rows claim " + std::to_string(claimed) + " top features, the header " +
                   std::to_string(features));
  }
  out->features.resize(features);
  const char* entry_base =
      data + kResultBatchHeaderBytes + std::size_t{count} * kResultBatchRowBytes;
  for (std::uint32_t k = 0; k < features; ++k) {
    const char* entry = entry_base + std::size_t{k} * kResultBatchFeatureBytes;
    if (const auto reserved = Load<std::uint32_t>(entry + kFeatureReserved); reserved != 0) {
      out->rows.clear();
      out->features.clear();
      return Problem("feature entry " + std::to_string(k) + ": the reserved field is " +
                     std::to_string(reserved) + ", not 0");
    }
    out->features[k].share = Load<double>(entry + kFeatureShare);
    out->features[k].index = Load<std::uint32_t>(entry + kFeatureIndex);
  }
  return "";
}

}  // namespace nuwatch
