// The nuwatch wire protocol, version 1: stream keys, ingest payloads (JSON and binary), rejection
// reasons, and the JSON of results and incident events. daemon/protocol/PROTOCOL.md is the
// normative text; the section numbers below (§) refer to it.
//
// Decoding never throws and never reads outside the given bytes; the binary form is decoded
// without copying or allocating (the values stay in the message buffer). Encoders write into a
// caller-owned std::string that is cleared first, so a reused buffer stops allocating once its
// capacity has grown to the largest message.
//
// Thread safety: every function is reentrant and touches only its arguments; a JsonScratch or an
// output string must not be used by two calls at the same time.
#pragma once

#include <cstddef>
#include <cstdint>
#include <memory>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

namespace nuwatch {

inline constexpr std::uint8_t kWireProtocolVersion = 1;
inline constexpr std::size_t kIngestFrameCount = 2;       // §2
inline constexpr std::size_t kBinaryHeaderBytes = 16;     // §6.1
inline constexpr std::string_view kBinaryMagic = "NUWB";  // §6.1, bytes 0..3
inline constexpr int kMaxJsonDepth = 32;                  // §5
inline constexpr std::size_t kProtocolMaxKeyBytes = 128;  // §3

// Why an ingest message was rejected (§8). Each reason has a stable snake_case label, used as the
// value of the `reason` label of the daemon's rejection counter. kNone means "accepted" and is not
// a reason. New reasons are appended; none is renamed or removed.
enum class RejectReason : std::uint8_t {
  kNone = 0,
  kWrongFrameCount,
  kBadStreamKey,
  kEmptyPayload,
  kMessageTooLarge,
  kUnknownFormat,
  kBadJson,
  kMissingField,
  kBadFieldType,
  kBatchLengthMismatch,
  kRaggedRows,
  kEmptyVector,
  kEmptyBatch,
  kBadHeader,
  kUnsupportedVersion,
  kBadDtype,
  kSizeMismatch,
  kNonFinite,
  kDimsLimit,
  kCountLimit,
  kDimsMismatch,     // not produced here: the daemon's check against a stream's fixed dims
  kStreamLimit,      // not produced here: the daemon's cap on the number of streams
  kNotOwner,         // not produced here: another replica owns the key (§13, ownership.h)
  kAwaitingHandoff,  // not produced here: the key's state is on its way from its previous owner
                     // and the vectors held meanwhile are at their bound (§13.4)
};

// Ensures: the §8 label ("bad_json", ...), "none" for kNone, "unknown" for a value outside the
// enum.
std::string_view RejectReasonLabel(RejectReason reason) noexcept;

// Every reason except kNone, in enum order (for pre-creating one counter per reason).
std::span<const RejectReason> AllRejectReasons() noexcept;

// What the receiver accepts (§7). The defaults are the protocol's defaults.
struct WireLimits {
  std::size_t max_key_bytes = 128;           // 1..128
  int max_dims = 1024;                       // 1..65535 (the binary dims field is a u16)
  int max_vectors_per_message = 4096;        // >= 1
  std::size_t max_message_bytes = 4u << 20;  // payload frame; >= 28 (the smallest binary message)
};

// Ensures: "" when `limits` keeps to the bounds above, else a message naming the first field out of
// bounds and its value, e.g. "max_dims = 0 is outside [1, 65535]".
std::string WireLimitsError(const WireLimits& limits);

enum class PayloadFormat : std::uint8_t { kJson, kBinary };
enum class Dtype : std::uint8_t { kFloat32 = 1, kFloat64 = 2 };  // the §6.1 dtype codes

constexpr std::size_t DtypeBytes(Dtype dtype) { return dtype == Dtype::kFloat32 ? 4 : 8; }

// A decoded batch: `count` vectors of `dims` values, borrowed, not copied. Timestamps are f64 at
// times + i * time_stride; value (row, column) is a `dtype` at
// values + row * row_stride + column * value_stride. Both are little-endian, at any alignment.
// Valid while the bytes it was decoded from (the payload, or the JsonScratch for the JSON form)
// are alive and unchanged.
struct PayloadView {
  PayloadFormat format = PayloadFormat::kBinary;
  Dtype dtype = Dtype::kFloat64;
  int dims = 0;
  int count = 0;
  const std::byte* times = nullptr;
  const std::byte* values = nullptr;
  std::size_t time_stride = 8;
  std::size_t row_stride = 0;
  std::size_t value_stride = 0;

  // Requires: 0 <= i < count. Reads through memcpy, so unaligned buffers are fine.
  double time(int i) const noexcept;
  // Requires: 0 <= row < count, 0 <= column < dims. f32 values are widened exactly.
  double value(int row, int column) const noexcept;
  // Requires: 0 <= row < count, out.size() == dims. Ensures: out[j] == value(row, j).
  void CopyRow(int row, std::span<double> out) const noexcept;
};

// Where the JSON form's numbers are stored while a view of them is in use, with the JSON parser's
// own buffers. Keep one per receiving thread and reuse it: everything keeps its capacity, so
// steady-state decoding reuses memory. Movable, not copyable.
struct JsonScratch {
  JsonScratch();
  ~JsonScratch();
  JsonScratch(JsonScratch&&) noexcept;
  JsonScratch& operator=(JsonScratch&&) noexcept;

  std::vector<double> times;
  std::vector<double> values;
  struct Parser;  // simdjson's DOM parser and a padded copy of the payload (wire_protocol.cc)
  std::unique_ptr<Parser> parser;
};

struct DecodeResult {
  RejectReason reason = RejectReason::kNone;
  std::string_view detail;  // a fixed text saying what was wrong, for logs; empty when accepted
  PayloadView payload;      // meaningful only when ok()

  bool ok() const noexcept { return reason == RejectReason::kNone; }
};

// §3. Ensures: kNone if `key` is 1..limits.max_key_bytes bytes of [A-Za-z0-9._:/-], else
// kBadStreamKey.
RejectReason ValidateStreamKey(std::string_view key, const WireLimits& limits) noexcept;

// §2. Ensures: kNone for 2 frames, else kWrongFrameCount. The caller must still receive (and drop)
// every frame of a rejected multipart message.
constexpr RejectReason CheckFrameCount(std::size_t frames) {
  return frames == kIngestFrameCount ? RejectReason::kNone : RejectReason::kWrongFrameCount;
}

// Decodes frame 2 (§4-§6). Requires: `scratch` non-null (used, and overwritten, only by the JSON
// form); `limits` valid (WireLimitsError(limits) == ""). Ensures: either ok() and a view of
// 1..max_vectors_per_message vectors of 1..max_dims finite values with finite timestamps, or a
// reason from §8. The binary form allocates nothing; the JSON form may allocate (the parser's
// token buffer, and scratch growth). Never throws (an allocation failure terminates).
DecodeResult DecodePayload(std::string_view payload, const WireLimits& limits,
                           JsonScratch* scratch) noexcept;

// The JSON form (§5) decoded by the reference reader alone (nlohmann's SAX parser, which stops at
// the first defect). DecodePayload parses JSON with simdjson, which is several times faster, and
// asks this reader for the verdict whenever simdjson or the §5 shape check refuses a payload, so
// every rejection reason and detail is this reader's. Exposed so that tests and the fuzzer can
// check that both paths agree. Requires and ensures as DecodePayload, for a payload of at most
// limits.max_message_bytes bytes.
DecodeResult DecodeJsonWithReferenceReader(std::string_view payload, const WireLimits& limits,
                                           JsonScratch* scratch) noexcept;

// Both frames of an ingest message: ValidateStreamKey, then DecodePayload.
DecodeResult DecodeIngest(std::string_view key, std::string_view payload, const WireLimits& limits,
                          JsonScratch* scratch) noexcept;

// Ingest payload encoders, for `nuwatch send` and tests. `values` holds times.size() * dims
// doubles, row-major. Requires: times non-empty, at most 2^32 - 1 entries; dims in [1, 65535];
// every time and value finite (for kFloat32 also after rounding to float). Throws PreconditionError
// naming the function and the offending value otherwise. Ensures: *out is exactly the payload
// (previous contents discarded); DecodePayload of it, with limits that admit its size, count and
// dims, gives back the same numbers (rounded to float for kFloat32).
void EncodeBinaryPayload(std::span<const double> times, const double* values, int dims, Dtype dtype,
                         std::string* out);

enum class JsonPayloadShape : std::uint8_t {
  kSingleWhenOne,  // the single shape for one vector, the batch shape for more
  kBatch,          // always the batch shape
};
// The JSON form (§5), numbers in shortest round-trip form.
void EncodeJsonPayload(std::span<const double> times, const double* values, int dims,
                       std::string* out, JsonPayloadShape shape = JsonPayloadShape::kSingleWhenOne);

// One entry of a result's top_features (§9.1). The caller resolves names: an empty name writes the
// column index in decimal instead.
struct FeatureShareView {
  std::string_view name;
  int index = 0;
  double share = 0;
};

// The input of one result (§9.1).
struct ScoredVector {
  double t = 0;
  bool learning = true;  // true: not scored, decision and p_value null (state "learning")
  bool history = false;  // with learning: state "history" (a transform refills its history)
  double decision = 0;   // ignored while learning
  double p_value = 0;    // ignored while learning; NaN: null (an uncalibrated model)
  bool anomaly = false;  // written as false while learning
  std::int64_t incident_id = -1;  // < 0: no open incident (null)
  std::uint64_t model_version = 0;
  std::int64_t support_vectors = 0;
  std::span<const FeatureShareView> top_features;  // written when anomaly (and not learning)
};

// Ensures: *out is the §9.1 JSON object (previous contents discarded), one line, no newline.
// Names are JSON-escaped; bytes that are not valid UTF-8 become U+FFFD. Allocates only when *out
// must grow. Never throws except std::bad_alloc.
void EncodeResultJson(const ScoredVector& result, std::string* out);

enum class IncidentEventKind : std::uint8_t { kOpen, kClose };

// Ensures: "incident_open" or "incident_close".
std::string_view IncidentEventName(IncidentEventKind kind) noexcept;

// The input of one incident event (§9.2).
struct IncidentEvent {
  IncidentEventKind kind = IncidentEventKind::kOpen;
  std::int64_t incident_id = 0;  // >= 0
  double t = 0;
  double start = 0;
  double end = 0;  // written for kClose only
  std::optional<double> peak_decision;
};

// Ensures: *out is the §9.2 JSON object (previous contents discarded). Allocates only when *out
// must grow.
void EncodeIncidentEventJson(const IncidentEvent& event, std::string* out);

}  // namespace nuwatch
