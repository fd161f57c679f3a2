#include "protocol/wire_protocol.h"

#include <simdjson.h>

#include <bit>
#include <charconv>
#include <cmath>
#include <cstring>
#include <limits>
#include <nlohmann/json.hpp>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

// The binary form is little-endian (§6) and is read in place with memcpy; on a big-endian host
// every load would need a byte swap, which nothing here does.
static_assert(std::endian::native == std::endian::little,
              "the wire protocol code assumes a little-endian host");

constexpr RejectReason kAllRejectReasons[] = {
    RejectReason::kWrongFrameCount,
    RejectReason::kBadStreamKey,
    RejectReason::kEmptyPayload,
    RejectReason::kMessageTooLarge,
    RejectReason::kUnknownFormat,
    RejectReason::kBadJson,
    RejectReason::kMissingField,
    RejectReason::kBadFieldType,
    RejectReason::kBatchLengthMismatch,
    RejectReason::kRaggedRows,
    RejectReason::kEmptyVector,
    RejectReason::kEmptyBatch,
    RejectReason::kBadHeader,
    RejectReason::kUnsupportedVersion,
    RejectReason::kBadDtype,
    RejectReason::kSizeMismatch,
    RejectReason::kNonFinite,
    RejectReason::kDimsLimit,
    RejectReason::kCountLimit,
    RejectReason::kDimsMismatch,
    RejectReason::kStreamLimit,
    RejectReason::kNotOwner,
    RejectReason::kAwaitingHandoff,
};

// §6.1: offsets of the binary ingest header's fields.
namespace ingest_header {
constexpr std::size_t kVersion = 4;
constexpr std::size_t kDtype = 5;
constexpr std::size_t kDims = 6;
constexpr std::size_t kCount = 8;
constexpr std::size_t kReserved = 12;
}  // namespace ingest_header
constexpr std::size_t kTimestampBytes = 8;

DecodeResult Reject(RejectReason reason, std::string_view detail) {
  DecodeResult result;
  result.reason = reason;
  result.detail = detail;
  return result;
}

template <typename T>
T LoadLittleEndian(const std::byte* at) {
  T value;
  std::memcpy(&value, at, sizeof value);
  return value;
}

template <typename T>
void StoreLittleEndian(T value, char* at) {
  std::memcpy(at, &value, sizeof value);
}

bool IsStreamKeyByte(unsigned char c) {
  return (c >= 'A' && c <= 'Z') || (c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') || c == '.' ||
         c == '_' || c == ':' || c == '/' || c == '-';
}

// Checks the exponent bits: all ones is NaN or infinity in both IEEE formats.
bool AllFiniteF64(const std::byte* at, std::size_t n) {
  constexpr std::uint64_t kExponent = 0x7FF0000000000000ull;
  for (std::size_t i = 0; i < n; ++i) {
    if ((LoadLittleEndian<std::uint64_t>(at + 8 * i) & kExponent) == kExponent) return false;
  }
  return true;
}

bool AllFiniteF32(const std::byte* at, std::size_t n) {
  constexpr std::uint32_t kExponent = 0x7F800000u;
  for (std::size_t i = 0; i < n; ++i) {
    if ((LoadLittleEndian<std::uint32_t>(at + 4 * i) & kExponent) == kExponent) return false;
  }
  return true;
}

// §6, with the checks in the §6.5 order.
DecodeResult DecodeBinary(std::string_view payload, const WireLimits& limits) {
  const auto* bytes = reinterpret_cast<const std::byte*>(payload.data());
  const std::size_t size = payload.size();
  if (size < ingest_header::kVersion + 1)
    return Reject(RejectReason::kBadHeader, "binary header truncated");
  if (payload.substr(0, kBinaryMagic.size()) != kBinaryMagic) {
    return Reject(RejectReason::kBadHeader, "binary magic is not NUWB");
  }
  if (static_cast<std::uint8_t>(payload[ingest_header::kVersion]) != kWireProtocolVersion) {
    return Reject(RejectReason::kUnsupportedVersion, "binary version byte is not 1");
  }
  if (size < kBinaryHeaderBytes) {
    return Reject(RejectReason::kBadHeader, "binary header truncated");
  }
  const auto dtype_code = static_cast<std::uint8_t>(payload[ingest_header::kDtype]);
  if (dtype_code != static_cast<std::uint8_t>(Dtype::kFloat32) &&
      dtype_code != static_cast<std::uint8_t>(Dtype::kFloat64)) {
    return Reject(RejectReason::kBadDtype, "binary dtype is not 1 (f32) or 2 (f64)");
  }
  const auto dtype = static_cast<Dtype>(dtype_code);
  const auto dims = LoadLittleEndian<std::uint16_t>(bytes + ingest_header::kDims);
  const auto count = LoadLittleEndian<std::uint32_t>(bytes + ingest_header::kCount);
  if (LoadLittleEndian<std::uint32_t>(bytes + ingest_header::kReserved) != 0) {
    return Reject(RejectReason::kBadHeader, "binary reserved bytes 12..15 are not zero");
  }
  if (dims == 0) return Reject(RejectReason::kEmptyVector, "binary dims is 0");
  if (count == 0) return Reject(RejectReason::kEmptyBatch, "binary count is 0");
  if (dims > static_cast<std::uint64_t>(limits.max_dims)) {
    return Reject(RejectReason::kDimsLimit, "binary dims exceeds max_dims");
  }
  if (count > static_cast<std::uint64_t>(limits.max_vectors_per_message)) {
    return Reject(RejectReason::kCountLimit, "binary count exceeds max_vectors_per_message");
  }
  // At most 16 + 8 * (2^32 - 1) + (2^32 - 1) * 65535 * 8 < 2^52: no overflow in 64 bits.
  const std::uint64_t value_count = std::uint64_t{count} * dims;
  const std::uint64_t expected =
      kBinaryHeaderBytes + kTimestampBytes * count + value_count * DtypeBytes(dtype);
  if (size != expected) {
    return Reject(RejectReason::kSizeMismatch, "binary payload size differs from the header's");
  }
  const std::byte* times = bytes + kBinaryHeaderBytes;
  const std::byte* values = times + kTimestampBytes * count;
  if (!AllFiniteF64(times, count)) {
    return Reject(RejectReason::kNonFinite, "a timestamp is NaN or infinite");
  }
  const bool values_finite = dtype == Dtype::kFloat32 ? AllFiniteF32(values, value_count)
                                                      : AllFiniteF64(values, value_count);
  if (!values_finite) return Reject(RejectReason::kNonFinite, "a value is NaN or infinite");

  DecodeResult result;
  PayloadView& view = result.payload;
  view.format = PayloadFormat::kBinary;
  view.dtype = dtype;
  view.dims = dims;
  view.count = static_cast<int>(count);
  view.times = times;
  view.values = values;
  view.time_stride = kTimestampBytes;
  view.value_stride = DtypeBytes(dtype);
  view.row_stride = view.value_stride * dims;
  return result;
}

// A SAX handler for nlohmann::json::sax_parse that reads the §5 object straight into a
// JsonScratch: no document tree, and it stops at the first defect, so a huge or hostile payload
// costs no more than the bytes read up to its first problem.
class IngestJsonReader {
 public:
  IngestJsonReader(const WireLimits& limits, JsonScratch* scratch)
      : limits_(limits), scratch_(scratch) {
    scratch_->times.clear();
    scratch_->values.clear();
  }

  // The nlohmann SAX interface.
  bool null() { return NonNumber(); }
  bool boolean(bool) { return NonNumber(); }
  bool number_integer(nlohmann::json::number_integer_t v) { return Number(static_cast<double>(v)); }
  bool number_unsigned(nlohmann::json::number_unsigned_t v) {
    return Number(static_cast<double>(v));
  }
  bool number_float(nlohmann::json::number_float_t v, const std::string&) { return Number(v); }
  bool string(std::string&) { return NonNumber(); }
  bool binary(nlohmann::json::binary_t&) { return NonNumber(); }
  bool start_object(std::size_t) { return Open(/*is_array=*/false); }
  bool end_object() { return Close(); }
  bool start_array(std::size_t) { return Open(/*is_array=*/true); }
  bool end_array() { return Close(); }
  bool key(std::string& name) {
    if (depth_ != 1) return true;  // a key inside an ignored member's object
    if (name == "t") {
      if (seen_t_) return Fail(RejectReason::kBadJson, "member t appears twice");
      seen_t_ = true;
      member_ = Member::kT;
    } else if (name == "x") {
      if (seen_x_) return Fail(RejectReason::kBadJson, "member x appears twice");
      seen_x_ = true;
      member_ = Member::kX;
    } else {
      member_ = Member::kOther;
    }
    return true;
  }
  bool parse_error(std::size_t, const std::string&, const nlohmann::detail::exception& error) {
    // 406 is nlohmann's "number overflow": a literal beyond the double range, e.g. 1e999.
    if (error.id == 406) return Fail(RejectReason::kNonFinite, "a number exceeds the double range");
    return Fail(RejectReason::kBadJson, "not valid JSON");
  }

  // After sax_parse: the checks that need the whole object.
  DecodeResult Finish(bool parsed) {
    if (reason_ != RejectReason::kNone) return Reject(reason_, detail_);
    if (!parsed) return Reject(RejectReason::kBadJson, "not valid JSON");
    if (!seen_t_) return Reject(RejectReason::kMissingField, "member t is absent");
    if (!seen_x_) return Reject(RejectReason::kMissingField, "member x is absent");
    std::size_t count = 0;
    std::size_t dims = 0;
    if (!t_is_array_) {
      if (x_shape_ == XShape::kRows) {
        return Reject(RejectReason::kBadFieldType, "x is an array of arrays but t is a number");
      }
      if (scratch_->values.empty()) return Reject(RejectReason::kEmptyVector, "x is empty");
      count = 1;
      dims = scratch_->values.size();
    } else {
      if (x_shape_ == XShape::kFlat) {
        return Reject(RejectReason::kBadFieldType, "t is an array but x is not an array of arrays");
      }
      if (scratch_->times.empty() && rows_ == 0) {
        return Reject(RejectReason::kEmptyBatch, "t and x are empty");
      }
      if (scratch_->times.size() != rows_) {
        return Reject(RejectReason::kBatchLengthMismatch, "t and x have different lengths");
      }
      count = rows_;
      dims = static_cast<std::size_t>(row_dims_);
    }
    DecodeResult result;
    PayloadView& view = result.payload;
    view.format = PayloadFormat::kJson;
    view.dtype = Dtype::kFloat64;
    view.count = static_cast<int>(count);
    view.dims = static_cast<int>(dims);
    view.times = reinterpret_cast<const std::byte*>(scratch_->times.data());
    view.values = reinterpret_cast<const std::byte*>(scratch_->values.data());
    view.time_stride = sizeof(double);
    view.value_stride = sizeof(double);
    view.row_stride = sizeof(double) * dims;
    return result;
  }

 private:
  enum class Member { kNone, kT, kX, kOther };
  enum class XShape { kUnknown, kFlat, kRows };

  bool Fail(RejectReason reason, std::string_view detail) {
    if (reason_ == RejectReason::kNone) {
      reason_ = reason;
      detail_ = detail;
    }
    return false;
  }

  bool InT() const { return member_ == Member::kT && depth_ >= 1; }
  bool InX() const { return member_ == Member::kX && depth_ >= 1; }

  bool Number(double v) {
    if (depth_ == 0) return Fail(RejectReason::kBadJson, "the payload is not a JSON object");
    if (member_ != Member::kT && member_ != Member::kX) return true;  // an ignored member
    if (!std::isfinite(v)) return Fail(RejectReason::kNonFinite, "a number is not finite");
    if (member_ == Member::kT) {
      if (depth_ == 1) {
        scratch_->times.push_back(v);
        return true;
      }
      if (scratch_->times.size() >= static_cast<std::size_t>(limits_.max_vectors_per_message)) {
        return Fail(RejectReason::kCountLimit, "t has more than max_vectors_per_message entries");
      }
      scratch_->times.push_back(v);
      return true;
    }
    // member_ == Member::kX
    if (depth_ == 1) return Fail(RejectReason::kBadFieldType, "x is not an array");
    if (depth_ == 2) {
      if (x_shape_ == XShape::kRows) {
        return Fail(RejectReason::kBadFieldType, "x mixes numbers and arrays");
      }
      x_shape_ = XShape::kFlat;
      if (scratch_->values.size() >= static_cast<std::size_t>(limits_.max_dims)) {
        return Fail(RejectReason::kDimsLimit, "x has more than max_dims values");
      }
      scratch_->values.push_back(v);
      return true;
    }
    // depth_ == 3: inside a row.
    if (row_length_ >= limits_.max_dims) {
      return Fail(RejectReason::kDimsLimit, "a row of x has more than max_dims values");
    }
    ++row_length_;
    scratch_->values.push_back(v);
    return true;
  }

  bool NonNumber() {
    if (depth_ == 0) return Fail(RejectReason::kBadJson, "the payload is not a JSON object");
    if (InT()) return Fail(RejectReason::kBadFieldType, "t holds something other than a number");
    if (InX()) {
      return Fail(RejectReason::kBadFieldType,
                  depth_ == 1 ? "x is not an array" : "x holds something other than a number");
    }
    return true;
  }

  bool Open(bool is_array) {
    if (depth_ + 1 > kMaxJsonDepth) {
      return Fail(RejectReason::kBadJson, "arrays and objects nest deeper than 32");
    }
    if (depth_ == 0) {
      if (is_array) return Fail(RejectReason::kBadJson, "the payload is not a JSON object");
      depth_ = 1;
      return true;
    }
    if (depth_ == 1 && (member_ == Member::kT || member_ == Member::kX)) {
      if (!is_array) {
        return Fail(RejectReason::kBadFieldType,
                    member_ == Member::kT ? "t is an object" : "x is not an array");
      }
      if (member_ == Member::kT) t_is_array_ = true;
      ++depth_;
      return true;
    }
    if (InT()) return Fail(RejectReason::kBadFieldType, "t holds something other than a number");
    if (InX()) {
      if (depth_ != 2 || !is_array) {
        return Fail(RejectReason::kBadFieldType, "x holds something other than numbers or rows");
      }
      if (x_shape_ == XShape::kFlat) {
        return Fail(RejectReason::kBadFieldType, "x mixes numbers and arrays");
      }
      x_shape_ = XShape::kRows;
      if (rows_ >= static_cast<std::size_t>(limits_.max_vectors_per_message)) {
        return Fail(RejectReason::kCountLimit, "x has more than max_vectors_per_message rows");
      }
      ++rows_;
      row_length_ = 0;
      ++depth_;
      return true;
    }
    ++depth_;  // inside an ignored member
    return true;
  }

  bool Close() {
    if (InX() && depth_ == 3) {
      if (row_length_ == 0) return Fail(RejectReason::kEmptyVector, "a row of x is empty");
      if (row_dims_ < 0) {
        row_dims_ = row_length_;
      } else if (row_length_ != row_dims_) {
        return Fail(RejectReason::kRaggedRows, "rows of x have different lengths");
      }
    }
    --depth_;
    if (depth_ == 1) member_ = Member::kNone;
    return true;
  }

  const WireLimits& limits_;
  JsonScratch* scratch_;
  int depth_ = 0;  // open arrays and objects; the top-level object is depth 1
  Member member_ = Member::kNone;
  bool seen_t_ = false;
  bool seen_x_ = false;
  bool t_is_array_ = false;
  XShape x_shape_ = XShape::kUnknown;
  std::size_t rows_ = 0;
  int row_length_ = 0;
  int row_dims_ = -1;
  RejectReason reason_ = RejectReason::kNone;
  std::string_view detail_;
};

DecodeResult DecodeJsonReference(std::string_view payload, const WireLimits& limits,
                                 JsonScratch* scratch) {
  IngestJsonReader reader(limits, scratch);
  const bool parsed = nlohmann::json::sax_parse(payload.data(), payload.data() + payload.size(),
                                                &reader, nlohmann::json::input_format_t::json,
                                                /*strict=*/true, /*ignore_comments=*/false);
  return reader.Finish(parsed);
}

}  // namespace

// simdjson needs SIMDJSON_PADDING readable bytes after the document, which a ZeroMQ message
// buffer does not promise, so each payload is copied into `padded` (grown, never shrunk).
struct JsonScratch::Parser {
  simdjson::dom::parser dom;
  std::unique_ptr<char[]> padded;
  std::size_t padded_capacity = 0;
};

JsonScratch::JsonScratch() = default;
JsonScratch::~JsonScratch() = default;
JsonScratch::JsonScratch(JsonScratch&&) noexcept = default;
JsonScratch& JsonScratch::operator=(JsonScratch&&) noexcept = default;

namespace {

// A number of the §5 object as a double, as the reference reader converts it (int64 and uint64
// are cast; simdjson refuses a number outside the double range, so none here is infinite).
bool AsFiniteNumber(simdjson::dom::element element, double* out) {
  switch (element.type()) {
    case simdjson::dom::element_type::DOUBLE:
      *out = element.get_double().value_unsafe();
      return std::isfinite(*out);
    case simdjson::dom::element_type::INT64:
      *out = static_cast<double>(element.get_int64().value_unsafe());
      return true;
    case simdjson::dom::element_type::UINT64:
      *out = static_cast<double>(element.get_uint64().value_unsafe());
      return true;
    default:
      return false;
  }
}

// The §5 shapes that are accepted, read from simdjson's document into `scratch`. Returns false
// for anything else, without saying why: the reference reader then gives the reason. Accepts
// exactly what IngestJsonReader accepts: an object whose members t and x appear once each
// (other members ignored), either t a number and x 1..max_dims numbers, or t n numbers and x n
// rows of the same 1..max_dims numbers, 1 <= n <= max_vectors_per_message, all finite.
bool ReadAcceptedShape(simdjson::dom::element document, const WireLimits& limits,
                       JsonScratch* scratch) {
  simdjson::dom::object object;
  if (document.get_object().get(object) != simdjson::SUCCESS) return false;
  scratch->times.clear();
  scratch->values.clear();
  simdjson::dom::element t;
  simdjson::dom::element x;
  bool seen_t = false;
  bool seen_x = false;
  for (const simdjson::dom::key_value_pair member : object) {
    if (member.key == "t") {
      if (seen_t) return false;
      seen_t = true;
      t = member.value;
    } else if (member.key == "x") {
      if (seen_x) return false;
      seen_x = true;
      x = member.value;
    }
  }
  if (!seen_t || !seen_x) return false;
  simdjson::dom::array x_array;
  if (x.get_array().get(x_array) != simdjson::SUCCESS) return false;
  double number = 0;
  if (AsFiniteNumber(t, &number)) {
    scratch->times.push_back(number);
    for (const simdjson::dom::element value : x_array) {
      if (scratch->values.size() >= static_cast<std::size_t>(limits.max_dims)) return false;
      if (!AsFiniteNumber(value, &number)) return false;
      scratch->values.push_back(number);
    }
    return !scratch->values.empty();
  }
  simdjson::dom::array t_array;
  if (t.get_array().get(t_array) != simdjson::SUCCESS) return false;
  const std::size_t rows = t_array.size();
  if (rows == 0 || rows > static_cast<std::size_t>(limits.max_vectors_per_message) ||
      x_array.size() != rows) {
    return false;
  }
  for (const simdjson::dom::element time : t_array) {
    if (!AsFiniteNumber(time, &number)) return false;
    scratch->times.push_back(number);
  }
  std::size_t dims = 0;
  for (const simdjson::dom::element row : x_array) {
    simdjson::dom::array row_array;
    if (row.get_array().get(row_array) != simdjson::SUCCESS) return false;
    const std::size_t length = row_array.size();
    if (length == 0 || length > static_cast<std::size_t>(limits.max_dims)) return false;
    if (dims == 0) dims = length;
    if (length != dims) return false;
    for (const simdjson::dom::element value : row_array) {
      if (!AsFiniteNumber(value, &number)) return false;
      scratch->values.push_back(number);
    }
  }
  return true;
}

DecodeResult DecodeJson(std::string_view payload, const WireLimits& limits, JsonScratch* scratch) {
  if (!scratch->parser) {
    scratch->parser = std::make_unique<JsonScratch::Parser>();
    // The depth limit of §5, counted as the reference reader counts it (the top-level object is
    // depth 1); a deeper document is refused here and the reference reader names it.
    if (scratch->parser->dom.allocate(0, kMaxJsonDepth) != simdjson::SUCCESS) {
      return DecodeJsonReference(payload, limits, scratch);
    }
  }
  JsonScratch::Parser& parser = *scratch->parser;
  const std::size_t needed = payload.size() + simdjson::SIMDJSON_PADDING;
  if (parser.padded_capacity < needed) {
    parser.padded = std::make_unique<char[]>(needed);
    parser.padded_capacity = needed;
  }
  std::memcpy(parser.padded.get(), payload.data(), payload.size());
  std::memset(parser.padded.get() + payload.size(), 0, simdjson::SIMDJSON_PADDING);
  simdjson::dom::element document;
  if (parser.dom.parse(parser.padded.get(), payload.size(), /*realloc_if_needed=*/false)
              .get(document) != simdjson::SUCCESS ||
      !ReadAcceptedShape(document, limits, scratch)) {
    return DecodeJsonReference(payload, limits, scratch);
  }
  DecodeResult result;
  PayloadView& view = result.payload;
  const std::size_t dims = scratch->values.size() / scratch->times.size();
  view.format = PayloadFormat::kJson;
  view.dtype = Dtype::kFloat64;
  view.count = static_cast<int>(scratch->times.size());
  view.dims = static_cast<int>(dims);
  view.times = reinterpret_cast<const std::byte*>(scratch->times.data());
  view.values = reinterpret_cast<const std::byte*>(scratch->values.data());
  view.time_stride = sizeof(double);
  view.value_stride = sizeof(double);
  view.row_stride = sizeof(double) * dims;
  return result;
}

// --- Encoding ---------------------------------------------------------------------------------

void AppendDouble(double v, std::string* out) {
  if (!std::isfinite(v)) {
    out->append("null");  // §9: JSON has no NaN or infinity
    return;
  }
  if (v == 0 && std::signbit(v)) {
    out->append("-0.0");  // to_chars gives "-0", which §5 reads as the integer 0
    return;
  }
  char buffer[32];  // the longest shortest-form double, "-2.2250738585072014e-308", is 24
  const auto result = std::to_chars(buffer, buffer + sizeof buffer, v);
  out->append(buffer, result.ptr);
}

template <typename Integer>
void AppendInteger(Integer v, std::string* out) {
  char buffer[24];
  const auto result = std::to_chars(buffer, buffer + sizeof buffer, v);
  out->append(buffer, result.ptr);
}

// Length of the valid UTF-8 sequence starting at text[i], or 0 if it is not one (RFC 3629:
// no overlong forms, no surrogates, nothing above U+10FFFF).
std::size_t Utf8SequenceLength(std::string_view text, std::size_t i) {
  const auto byte = [&](std::size_t k) { return static_cast<unsigned char>(text[k]); };
  const unsigned char lead = byte(i);
  std::size_t length = 0;
  unsigned char low = 0x80;
  unsigned char high = 0xBF;
  if (lead >= 0xC2 && lead <= 0xDF) {
    length = 2;
  } else if (lead >= 0xE0 && lead <= 0xEF) {
    length = 3;
    if (lead == 0xE0) low = 0xA0;
    if (lead == 0xED) high = 0x9F;
  } else if (lead >= 0xF0 && lead <= 0xF4) {
    length = 4;
    if (lead == 0xF0) low = 0x90;
    if (lead == 0xF4) high = 0x8F;
  } else {
    return 0;
  }
  if (i + length > text.size()) return 0;
  if (byte(i + 1) < low || byte(i + 1) > high) return 0;
  for (std::size_t k = 2; k < length; ++k) {
    if (byte(i + k) < 0x80 || byte(i + k) > 0xBF) return 0;
  }
  return length;
}

void AppendJsonString(std::string_view text, std::string* out) {
  static constexpr char kHex[] = "0123456789abcdef";
  out->push_back('"');
  std::size_t i = 0;
  while (i < text.size()) {
    const auto c = static_cast<unsigned char>(text[i]);
    if (c == '"' || c == '\\') {
      out->push_back('\\');
      out->push_back(static_cast<char>(c));
      ++i;
    } else if (c < 0x20) {
      const char escape[] = {'\\', 'u', '0', '0', kHex[c >> 4], kHex[c & 0xF]};
      out->append(escape, sizeof escape);
      ++i;
    } else if (c < 0x80) {
      out->push_back(static_cast<char>(c));
      ++i;
    } else if (const std::size_t length = Utf8SequenceLength(text, i); length > 0) {
      out->append(text.substr(i, length));
      i += length;
    } else {
      out->append("\xEF\xBF\xBD");  // U+FFFD REPLACEMENT CHARACTER
      ++i;
    }
  }
  out->push_back('"');
}

std::string FormatForMessage(double v) {
  char buffer[32];
  const auto result = std::to_chars(buffer, buffer + sizeof buffer, v);
  return std::string(buffer, result.ptr);
}

// The encoders' shared preconditions; `function` names the caller in the message.
void CheckEncoderInput(const char* function, std::span<const double> times, const double* values,
                       int dims, bool as_float) {
  if (times.empty()) throw PreconditionError(std::string(function) + ": no vectors to encode");
  if (times.size() > std::numeric_limits<std::uint32_t>::max()) {
    throw PreconditionError(std::string(function) + ": " + std::to_string(times.size()) +
                            " vectors exceed the u32 count field");
  }
  if (dims < 1 || dims > std::numeric_limits<std::uint16_t>::max()) {
    throw PreconditionError(std::string(function) + ": dims = " + std::to_string(dims) +
                            " is outside [1, 65535]");
  }
  if (values == nullptr) throw PreconditionError(std::string(function) + ": values is null");
  for (std::size_t i = 0; i < times.size(); ++i) {
    if (!std::isfinite(times[i])) {
      throw PreconditionError(std::string(function) + ": time [" + std::to_string(i) +
                              "] = " + FormatForMessage(times[i]) + " is not finite");
    }
    for (int j = 0; j < dims; ++j) {
      const double v = values[i * dims + j];
      const bool finite = as_float ? std::isfinite(static_cast<float>(v)) : std::isfinite(v);
      if (!finite) {
        throw PreconditionError(std::string(function) + ": value [" + std::to_string(i) + "][" +
                                std::to_string(j) + "] = " + FormatForMessage(v) +
                                (as_float ? " is not finite as a float" : " is not finite"));
      }
    }
  }
}

void AppendNumberArray(const double* begin, std::size_t n, std::string* out) {
  out->push_back('[');
  for (std::size_t k = 0; k < n; ++k) {
    if (k > 0) out->push_back(',');
    AppendDouble(begin[k], out);
  }
  out->push_back(']');
}

}  // namespace

std::string_view RejectReasonLabel(RejectReason reason) noexcept {
  switch (reason) {
    case RejectReason::kNone:
      return "none";
    case RejectReason::kWrongFrameCount:
      return "wrong_frame_count";
    case RejectReason::kBadStreamKey:
      return "bad_stream_key";
    case RejectReason::kEmptyPayload:
      return "empty_payload";
    case RejectReason::kMessageTooLarge:
      return "message_too_large";
    case RejectReason::kUnknownFormat:
      return "unknown_format";
    case RejectReason::kBadJson:
      return "bad_json";
    case RejectReason::kMissingField:
      return "missing_field";
    case RejectReason::kBadFieldType:
      return "bad_field_type";
    case RejectReason::kBatchLengthMismatch:
      return "batch_length_mismatch";
    case RejectReason::kRaggedRows:
      return "ragged_rows";
    case RejectReason::kEmptyVector:
      return "empty_vector";
    case RejectReason::kEmptyBatch:
      return "empty_batch";
    case RejectReason::kBadHeader:
      return "bad_header";
    case RejectReason::kUnsupportedVersion:
      return "unsupported_version";
    case RejectReason::kBadDtype:
      return "bad_dtype";
    case RejectReason::kSizeMismatch:
      return "size_mismatch";
    case RejectReason::kNonFinite:
      return "non_finite";
    case RejectReason::kDimsLimit:
      return "dims_limit";
    case RejectReason::kCountLimit:
      return "count_limit";
    case RejectReason::kDimsMismatch:
      return "dims_mismatch";
    case RejectReason::kStreamLimit:
      return "stream_limit";
    case RejectReason::kNotOwner:
      return "not_owner";
    case RejectReason::kAwaitingHandoff:
      return "awaiting_handoff";
  }
  return "unknown";
}

std::span<const RejectReason> AllRejectReasons() noexcept { return kAllRejectReasons; }

std::string WireLimitsError(const WireLimits& limits) {
  if (limits.max_key_bytes < 1 || limits.max_key_bytes > kProtocolMaxKeyBytes) {
    return "max_key_bytes = " + std::to_string(limits.max_key_bytes) + " is outside [1, 128]";
  }
  if (limits.max_dims < 1 || limits.max_dims > std::numeric_limits<std::uint16_t>::max()) {
    return "max_dims = " + std::to_string(limits.max_dims) + " is outside [1, 65535]";
  }
  if (limits.max_vectors_per_message < 1) {
    return "max_vectors_per_message = " + std::to_string(limits.max_vectors_per_message) +
           " is below 1";
  }
  constexpr std::size_t kSmallestBinaryMessage = kBinaryHeaderBytes + kTimestampBytes + 4;
  if (limits.max_message_bytes < kSmallestBinaryMessage) {
    return "max_message_bytes = " + std::to_string(limits.max_message_bytes) + " is below " +
           std::to_string(kSmallestBinaryMessage);
  }
  return "";
}

double PayloadView::time(int i) const noexcept {
  return LoadLittleEndian<double>(times + static_cast<std::size_t>(i) * time_stride);
}

double PayloadView::value(int row, int column) const noexcept {
  const std::byte* at = values + static_cast<std::size_t>(row) * row_stride +
                        static_cast<std::size_t>(column) * value_stride;
  if (dtype == Dtype::kFloat32) return LoadLittleEndian<float>(at);
  return LoadLittleEndian<double>(at);
}

void PayloadView::CopyRow(int row, std::span<double> out) const noexcept {
  const std::byte* at = values + static_cast<std::size_t>(row) * row_stride;
  if (dtype == Dtype::kFloat64 && value_stride == sizeof(double)) {
    std::memcpy(out.data(), at, out.size() * sizeof(double));
    return;
  }
  for (std::size_t j = 0; j < out.size(); ++j) out[j] = value(row, static_cast<int>(j));
}

RejectReason ValidateStreamKey(std::string_view key, const WireLimits& limits) noexcept {
  if (key.empty() || key.size() > limits.max_key_bytes) return RejectReason::kBadStreamKey;
  for (const char c : key) {
    if (!IsStreamKeyByte(static_cast<unsigned char>(c))) return RejectReason::kBadStreamKey;
  }
  return RejectReason::kNone;
}

DecodeResult DecodePayload(std::string_view payload, const WireLimits& limits,
                           JsonScratch* scratch) noexcept {
  if (payload.empty()) return Reject(RejectReason::kEmptyPayload, "payload frame is empty");
  if (payload.size() > limits.max_message_bytes) {
    return Reject(RejectReason::kMessageTooLarge, "payload frame exceeds max_message_bytes");
  }
  switch (payload.front()) {
    case '{':
    case ' ':
    case '\t':
    case '\n':
    case '\r':
      return DecodeJson(payload, limits, scratch);
    case 'N':
      return DecodeBinary(payload, limits);
    default:
      return Reject(RejectReason::kUnknownFormat, "payload starts with neither '{' nor 'N'");
  }
}

DecodeResult DecodeJsonWithReferenceReader(std::string_view payload, const WireLimits& limits,
                                           JsonScratch* scratch) noexcept {
  return DecodeJsonReference(payload, limits, scratch);
}

DecodeResult DecodeIngest(std::string_view key, std::string_view payload, const WireLimits& limits,
                          JsonScratch* scratch) noexcept {
  if (ValidateStreamKey(key, limits) != RejectReason::kNone) {
    return Reject(RejectReason::kBadStreamKey,
                  "stream key is empty, too long, or has a byte outside [A-Za-z0-9._:/-]");
  }
  return DecodePayload(payload, limits, scratch);
}

void EncodeBinaryPayload(std::span<const double> times, const double* values, int dims, Dtype dtype,
                         std::string* out) {
  if (dtype != Dtype::kFloat32 && dtype != Dtype::kFloat64) {
    throw PreconditionError("EncodeBinaryPayload: dtype " +
                            std::to_string(static_cast<int>(dtype)) + " is not 1 or 2");
  }
  const bool as_float = dtype == Dtype::kFloat32;
  CheckEncoderInput("EncodeBinaryPayload", times, values, dims, as_float);
  const std::size_t count = times.size();
  const std::size_t value_count = count * static_cast<std::size_t>(dims);
  out->clear();
  out->resize(kBinaryHeaderBytes + kTimestampBytes * count + value_count * DtypeBytes(dtype));
  char* at = out->data();
  std::memcpy(at, kBinaryMagic.data(), kBinaryMagic.size());
  at[ingest_header::kVersion] = static_cast<char>(kWireProtocolVersion);
  at[ingest_header::kDtype] = static_cast<char>(dtype);
  StoreLittleEndian(static_cast<std::uint16_t>(dims), at + ingest_header::kDims);
  StoreLittleEndian(static_cast<std::uint32_t>(count), at + ingest_header::kCount);
  StoreLittleEndian(std::uint32_t{0}, at + ingest_header::kReserved);
  at += kBinaryHeaderBytes;
  std::memcpy(at, times.data(), kTimestampBytes * count);
  at += kTimestampBytes * count;
  if (as_float) {
    for (std::size_t k = 0; k < value_count; ++k) {
      StoreLittleEndian(static_cast<float>(values[k]), at + 4 * k);
    }
  } else {
    std::memcpy(at, values, value_count * sizeof(double));
  }
}

void EncodeJsonPayload(std::span<const double> times, const double* values, int dims,
                       std::string* out, JsonPayloadShape shape) {
  CheckEncoderInput("EncodeJsonPayload", times, values, dims, /*as_float=*/false);
  out->clear();
  const auto row = [&](std::size_t i) { return values + i * static_cast<std::size_t>(dims); };
  if (times.size() == 1 && shape == JsonPayloadShape::kSingleWhenOne) {
    out->append("{\"t\":");
    AppendDouble(times[0], out);
    out->append(",\"x\":");
    AppendNumberArray(row(0), dims, out);
    out->push_back('}');
    return;
  }
  out->append("{\"t\":");
  AppendNumberArray(times.data(), times.size(), out);
  out->append(",\"x\":[");
  for (std::size_t i = 0; i < times.size(); ++i) {
    if (i > 0) out->push_back(',');
    AppendNumberArray(row(i), dims, out);
  }
  out->append("]}");
}

void EncodeResultJson(const ScoredVector& result, std::string* out) {
  out->clear();
  out->append("{\"t\":");
  AppendDouble(result.t, out);
  if (result.learning) {
    out->append(result.history ? ",\"state\":\"history\"" : ",\"state\":\"learning\"");
    out->append(",\"decision\":null,\"p_value\":null,\"anomaly\":false");
  } else {
    out->append(",\"state\":\"scoring\",\"decision\":");
    AppendDouble(result.decision, out);
    out->append(",\"p_value\":");
    if (std::isnan(result.p_value)) {
      out->append("null");
    } else {
      AppendDouble(result.p_value, out);
    }
    out->append(result.anomaly ? ",\"anomaly\":true" : ",\"anomaly\":false");
  }
  out->append(",\"incident\":");
  if (result.incident_id < 0) {
    out->append("null");
  } else {
    AppendInteger(result.incident_id, out);
  }
  out->append(",\"model_version\":");
  AppendInteger(result.model_version, out);
  out->append(",\"support_vectors\":");
  AppendInteger(result.support_vectors, out);
  if (!result.learning && result.anomaly) {
    out->append(",\"top_features\":[");
    bool first = true;
    for (const FeatureShareView& feature : result.top_features) {
      if (!first) out->push_back(',');
      first = false;
      out->append("{\"feature\":");
      if (feature.name.empty()) {
        out->push_back('"');
        AppendInteger(feature.index, out);
        out->push_back('"');
      } else {
        AppendJsonString(feature.name, out);
      }
      out->append(",\"share\":");
      AppendDouble(feature.share, out);
      out->push_back('}');
    }
    out->push_back(']');
  }
  out->push_back('}');
}

std::string_view IncidentEventName(IncidentEventKind kind) noexcept {
  return kind == IncidentEventKind::kOpen ? "incident_open" : "incident_close";
}

void EncodeIncidentEventJson(const IncidentEvent& event, std::string* out) {
  out->clear();
  out->append("{\"event\":\"");
  out->append(IncidentEventName(event.kind));
  out->append("\",\"incident\":");
  AppendInteger(event.incident_id, out);
  out->append(",\"t\":");
  AppendDouble(event.t, out);
  out->append(",\"start\":");
  AppendDouble(event.start, out);
  if (event.kind == IncidentEventKind::kClose) {
    out->append(",\"end\":");
    AppendDouble(event.end, out);
  }
  if (event.peak_decision.has_value()) {
    out->append(",\"peak_decision\":");
    AppendDouble(*event.peak_decision, out);
  }
  out->push_back('}');
}

}  // namespace nuwatch
