// Tests of the wire protocol codec against daemon/protocol/PROTOCOL.md (cited by section, "§"),
// against an independent JSON parser (nlohmann_json's DOM parser reads back what the encoders
// write), and against tests/integration/python_codec_check.py, a second implementation written in
// Python from PROTOCOL.md alone.
#include "protocol/wire_protocol.h"

#include <gtest/gtest.h>

#include <atomic>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <limits>
#include <new>
#include <nlohmann/json.hpp>
#include <random>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "nuwatch/types.h"

// Every allocation is counted (g_allocations), for the tests that a path allocates nothing.
#include "common/counting_allocator.h"

namespace nuwatch {
namespace {

using nlohmann::json;

std::string Hex(std::string_view hex) {
  std::string bytes;
  std::string digits;
  for (char c : hex) {
    if (c != ' ') digits.push_back(c);
  }
  for (std::size_t i = 0; i + 1 < digits.size(); i += 2) {
    bytes.push_back(static_cast<char>(std::stoi(digits.substr(i, 2), nullptr, 16)));
  }
  return bytes;
}

RejectReason ReasonOf(std::string_view payload, const WireLimits& limits = {}) {
  JsonScratch scratch;
  return DecodePayload(payload, limits, &scratch).reason;
}

std::string Label(RejectReason reason) { return std::string(RejectReasonLabel(reason)); }

std::vector<double> Row(const PayloadView& view, int row) {
  std::vector<double> out(view.dims);
  view.CopyRow(row, out);
  return out;
}

bool SameBits(double a, double b) { return std::memcmp(&a, &b, sizeof a) == 0; }

std::string ReadFile(const std::filesystem::path& path) {
  std::ifstream in(path, std::ios::binary);
  std::ostringstream text;
  text << in.rdbuf();
  return text.str();
}

void WriteFile(const std::filesystem::path& path, std::string_view bytes) {
  std::ofstream out(path, std::ios::binary);
  out.write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
}

// A fresh directory under the system temp dir, removed at the end of the test.
class TempDir {
 public:
  TempDir() {
    std::random_device seed;
    path_ = std::filesystem::temp_directory_path() /
            ("nuwatch_wire_" + std::to_string(seed()) + std::to_string(seed()));
    std::filesystem::create_directories(path_);
  }
  ~TempDir() {
    std::error_code ignored;
    std::filesystem::remove_all(path_, ignored);
  }
  const std::filesystem::path& path() const { return path_; }

 private:
  std::filesystem::path path_;
};

// --- Reasons (§8) -----------------------------------------------------------------------------

// The allocation tests below (and those of result_batch_test, feature_transform_test, which use
// the same header) could not fail if the replaced operator new were not the one called.
std::vector<int>* volatile g_kept = nullptr;
TEST(CountingAllocator, CountsAnAllocation) {
  const long before = g_allocations.load();
  g_kept = new std::vector<int>(100);
  EXPECT_GE(g_allocations.load() - before, 2);  // the vector object and its elements
  delete g_kept;
}

TEST(RejectReasons, LabelsAreTheOnesInTheProtocolDocument) {
  // The §8 table of PROTOCOL.md lists each label as the first cell of a row: "| `label` | ...".
  const std::string doc = ReadFile(NUWATCH_SOURCE_DIR "/daemon/protocol/PROTOCOL.md");
  const std::size_t section = doc.find("## 8. Rejections");
  const std::size_t next = doc.find("## 9.", section);
  ASSERT_NE(section, std::string::npos);
  std::set<std::string> documented;
  std::istringstream lines(doc.substr(section, next - section));
  for (std::string line; std::getline(lines, line);) {
    if (line.rfind("| `", 0) == 0) {
      documented.insert(line.substr(3, line.find('`', 3) - 3));
    }
  }
  std::set<std::string> implemented;
  for (RejectReason reason : AllRejectReasons()) {
    const std::string label = Label(reason);
    EXPECT_TRUE(implemented.insert(label).second) << "duplicate label " << label;
    EXPECT_NE(reason, RejectReason::kNone);
  }
  EXPECT_EQ(implemented, documented);
  EXPECT_EQ(Label(RejectReason::kNone), "none");
}

TEST(RejectReasons, LabelsAreSnakeCase) {
  // Prometheus label values may be anything, but §8 promises snake_case.
  for (RejectReason reason : AllRejectReasons()) {
    const std::string label = Label(reason);
    ASSERT_FALSE(label.empty());
    EXPECT_TRUE(label.front() >= 'a' && label.front() <= 'z') << label;
    for (char c : label) EXPECT_TRUE((c >= 'a' && c <= 'z') || c == '_') << label;
  }
}

TEST(FrameCount, OnlyTwoFramesAreAnIngestMessage) {
  // §2: exactly two frames.
  EXPECT_EQ(CheckFrameCount(2), RejectReason::kNone);
  EXPECT_EQ(CheckFrameCount(0), RejectReason::kWrongFrameCount);
  EXPECT_EQ(CheckFrameCount(1), RejectReason::kWrongFrameCount);
  EXPECT_EQ(CheckFrameCount(3), RejectReason::kWrongFrameCount);
}

// --- Stream keys (§3) -------------------------------------------------------------------------

TEST(StreamKey, EachSingleByteIsAcceptedExactlyWhenInTheKeySet) {
  const std::string allowed =
      "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789._:/-";  // §3, listed
  const WireLimits limits;
  for (int b = 0; b < 256; ++b) {
    const std::string key(1, static_cast<char>(b));
    const bool expected = allowed.find(static_cast<char>(b)) != std::string::npos;
    EXPECT_EQ(ValidateStreamKey(key, limits) == RejectReason::kNone, expected) << "byte " << b;
  }
}

TEST(StreamKey, LengthIsOneTo128BytesOrTheConfiguredMaximum) {
  const WireLimits limits;
  EXPECT_EQ(ValidateStreamKey("", limits), RejectReason::kBadStreamKey);
  EXPECT_EQ(ValidateStreamKey(std::string(128, 'k'), limits), RejectReason::kNone);
  EXPECT_EQ(ValidateStreamKey(std::string(129, 'k'), limits), RejectReason::kBadStreamKey);
  EXPECT_EQ(ValidateStreamKey("plant/line-2:pump_01.bearing", limits), RejectReason::kNone);
  EXPECT_EQ(ValidateStreamKey("pump 01", limits), RejectReason::kBadStreamKey);
  EXPECT_EQ(ValidateStreamKey("pump\xC3\xA9", limits), RejectReason::kBadStreamKey);  // "pumpé"
  WireLimits short_keys;
  short_keys.max_key_bytes = 8;
  EXPECT_EQ(ValidateStreamKey("pump-001", short_keys), RejectReason::kNone);
  EXPECT_EQ(ValidateStreamKey("pump-0001", short_keys), RejectReason::kBadStreamKey);
}

TEST(StreamKey, DecodeIngestChecksTheKeyBeforeThePayload) {
  JsonScratch scratch;
  EXPECT_EQ(DecodeIngest("a b", "", WireLimits{}, &scratch).reason, RejectReason::kBadStreamKey);
  EXPECT_EQ(DecodeIngest("ab", "", WireLimits{}, &scratch).reason, RejectReason::kEmptyPayload);
  const DecodeResult ok = DecodeIngest("ab", R"({"t":1,"x":[2]})", WireLimits{}, &scratch);
  ASSERT_TRUE(ok.ok()) << ok.detail;
  EXPECT_EQ(ok.payload.value(0, 0), 2.0);
}

// --- Limits (§7) ------------------------------------------------------------------------------

TEST(WireLimits, DefaultsAreTheProtocolDefaultsAndValid) {
  const WireLimits limits;
  EXPECT_EQ(limits.max_key_bytes, 128u);  // §7 table
  EXPECT_EQ(limits.max_dims, 1024);
  EXPECT_EQ(limits.max_vectors_per_message, 4096);
  EXPECT_EQ(limits.max_message_bytes, 4194304u);
  EXPECT_EQ(WireLimitsError(limits), "");
}

TEST(WireLimits, OutOfBoundsFieldsAreNamedWithTheirValue) {
  WireLimits limits;
  limits.max_dims = 70000;
  EXPECT_EQ(WireLimitsError(limits), "max_dims = 70000 is outside [1, 65535]");
  limits = WireLimits{};
  limits.max_key_bytes = 0;
  EXPECT_EQ(WireLimitsError(limits), "max_key_bytes = 0 is outside [1, 128]");
  limits = WireLimits{};
  limits.max_vectors_per_message = 0;
  EXPECT_EQ(WireLimitsError(limits), "max_vectors_per_message = 0 is below 1");
  limits = WireLimits{};
  limits.max_message_bytes = 27;  // §7: >= 28 = 16 header + 8 timestamp + 4 (one f32)
  EXPECT_EQ(WireLimitsError(limits), "max_message_bytes = 27 is below 28");
  limits.max_message_bytes = 28;
  EXPECT_EQ(WireLimitsError(limits), "");
}

// --- Binary form (§6) -------------------------------------------------------------------------

// The §6.4 example of PROTOCOL.md, assembled here byte by byte.
const std::string kDocExample =
    Hex("4E 55 57 42"                // 0: magic "NUWB"
        "01"                         // 4: version 1
        "02"                         // 5: dtype 2 = f64
        "02 00"                      // 6: dims 2 (u16 LE)
        "01 00 00 00"                // 8: count 1 (u32 LE)
        "00 00 00 00"                // 12: reserved
        "00 00 10 40 6E 55 DA 41"    // 16: t = 1767225600.25 (f64 LE, as listed in §6.4)
        "00 00 00 00 00 00 F8 3F"    // 24: 1.5 = 0x3FF8000000000000 (sign 0, exp 1023, frac .1b)
        "00 00 00 00 00 00 00 C0");  // 32: -2.0 = 0xC000000000000000 (sign 1, exp 1024, frac 0)

TEST(BinaryPayload, EncoderWritesTheDocumentExampleByteForByte) {
  const double times[] = {1767225600.25};
  const double values[] = {1.5, -2.0};
  std::string out;
  EncodeBinaryPayload(times, values, 2, Dtype::kFloat64, &out);
  ASSERT_EQ(out.size(), 40u);  // §6.4: 16 + 8 + 16
  EXPECT_EQ(out, kDocExample);
}

TEST(BinaryPayload, DecoderReadsTheDocumentExample) {
  JsonScratch scratch;
  const DecodeResult result = DecodePayload(kDocExample, WireLimits{}, &scratch);
  ASSERT_TRUE(result.ok()) << result.detail;
  const PayloadView& view = result.payload;
  EXPECT_EQ(view.format, PayloadFormat::kBinary);
  EXPECT_EQ(view.dtype, Dtype::kFloat64);
  EXPECT_EQ(view.count, 1);
  EXPECT_EQ(view.dims, 2);
  EXPECT_EQ(view.time(0), 1767225600.25);
  EXPECT_EQ(view.value(0, 0), 1.5);
  EXPECT_EQ(view.value(0, 1), -2.0);
  // Zero copy: the view points into the payload at the §6.2 and §6.3 offsets.
  EXPECT_EQ(reinterpret_cast<const char*>(view.times), kDocExample.data() + 16);
  EXPECT_EQ(reinterpret_cast<const char*>(view.values), kDocExample.data() + 24);
}

TEST(BinaryPayload, HandAssembledFloat32Message) {
  // One f32 vector [1.0, -0.5] at t = 0.5; IEEE 754 by hand: 1.0f = 0x3F800000 (exp 127),
  // -0.5f = 0xBF000000 (sign 1, exp 126), 0.5 = 0x3FE0000000000000 (exp 1022). 16 + 8 + 8 bytes.
  const std::string bytes =
      Hex("4E 55 57 42 01 01 02 00 01 00 00 00 00 00 00 00"  // §6.1, dtype 1 = f32
          "00 00 00 00 00 00 E0 3F"                          // §6.2: t
          "00 00 80 3F 00 00 00 BF");                        // §6.3: values, 4 bytes each
  JsonScratch scratch;
  const DecodeResult result = DecodePayload(bytes, WireLimits{}, &scratch);
  ASSERT_TRUE(result.ok()) << result.detail;
  EXPECT_EQ(result.payload.dtype, Dtype::kFloat32);
  EXPECT_EQ(result.payload.time(0), 0.5);
  EXPECT_EQ(Row(result.payload, 0), (std::vector<double>{1.0, -0.5}));
  std::string encoded;
  const double times[] = {0.5};
  const double values[] = {1.0, -0.5};
  EncodeBinaryPayload(times, values, 2, Dtype::kFloat32, &encoded);
  EXPECT_EQ(encoded, bytes);
}

TEST(BinaryPayload, RoundTripsBothDtypesAtAnyAlignment) {
  std::mt19937_64 rng(7);
  std::uniform_real_distribution<double> uniform(-1e6, 1e6);
  for (Dtype dtype : {Dtype::kFloat32, Dtype::kFloat64}) {
    for (int dims : {1, 3, 17}) {
      for (int count : {1, 2, 50}) {
        std::vector<double> times(count), values(count * dims);
        for (int i = 0; i < count; ++i) times[i] = 1.7e9 + 10.0 * i + uniform(rng) * 1e-7;
        for (double& v : values) v = uniform(rng);
        values[0] = -0.0;
        std::string encoded;
        EncodeBinaryPayload(times, values.data(), dims, dtype, &encoded);
        ASSERT_EQ(encoded.size(), 16 + 8 * count + count * dims * DtypeBytes(dtype));  // §6.3
        // Shift the message by one byte so that no field is aligned: reads must not care.
        const std::string shifted = "?" + encoded;
        JsonScratch scratch;
        const DecodeResult result =
            DecodePayload(std::string_view(shifted).substr(1), WireLimits{}, &scratch);
        ASSERT_TRUE(result.ok()) << result.detail;
        ASSERT_EQ(result.payload.count, count);
        ASSERT_EQ(result.payload.dims, dims);
        for (int i = 0; i < count; ++i) {
          EXPECT_TRUE(SameBits(result.payload.time(i), times[i]));
          const std::vector<double> row = Row(result.payload, i);
          for (int j = 0; j < dims; ++j) {
            const double sent = values[i * dims + j];
            const double expected =
                dtype == Dtype::kFloat32 ? static_cast<double>(static_cast<float>(sent)) : sent;
            EXPECT_TRUE(SameBits(row[j], expected)) << i << "," << j;
            EXPECT_TRUE(SameBits(result.payload.value(i, j), expected));
          }
        }
      }
    }
  }
}

TEST(BinaryPayload, EveryTruncationIsRejectedWithTheReasonOfSection65) {
  const std::vector<double> times = {1.0, 2.0, 3.0};
  const std::vector<double> values = {1, 2, 3, 4, 5, 6};
  for (Dtype dtype : {Dtype::kFloat32, Dtype::kFloat64}) {
    std::string full;
    EncodeBinaryPayload(times, values.data(), 2, dtype, &full);
    for (std::size_t length = 0; length < full.size(); ++length) {
      // An exact-size heap copy, so that a read past the end is a read past the allocation.
      std::vector<char> prefix(full.begin(), full.begin() + static_cast<std::ptrdiff_t>(length));
      const RejectReason reason = ReasonOf(std::string_view(prefix.data(), prefix.size()));
      // §4: empty; §6.5 step 1 and 3: shorter than the header; step 8: size.
      const RejectReason expected = length == 0   ? RejectReason::kEmptyPayload
                                    : length < 16 ? RejectReason::kBadHeader
                                                  : RejectReason::kSizeMismatch;
      EXPECT_EQ(Label(reason), Label(expected)) << "length " << length;
    }
  }
}

TEST(BinaryPayload, ExpectedSizeDoesNotOverflowWithHugeHeaderFields) {
  // dims = 65535 and count = 2^32 - 1 imply about 2^51 bytes; limits wide open so that only the
  // size check stands between the header and a read.
  WireLimits limits;
  limits.max_dims = 65535;
  limits.max_vectors_per_message = std::numeric_limits<int>::max();
  const std::string header = Hex("4E 55 57 42 01 02 FF FF FF FF FF FF 00 00 00 00");
  EXPECT_EQ(ReasonOf(header + std::string(64, '\0'), limits), RejectReason::kCountLimit);
  const std::string big_dims = Hex("4E 55 57 42 01 02 FF FF 01 00 00 00 00 00 00 00");
  EXPECT_EQ(ReasonOf(big_dims + std::string(64, '\0'), limits), RejectReason::kSizeMismatch);
}

// --- JSON form (§5) ---------------------------------------------------------------------------

TEST(JsonPayload, RoundTripsBothShapesExactly) {
  std::mt19937_64 rng(11);
  std::uniform_real_distribution<double> uniform(-1.0, 1.0);
  for (int count : {1, 2, 30}) {
    for (JsonPayloadShape shape : {JsonPayloadShape::kSingleWhenOne, JsonPayloadShape::kBatch}) {
      const int dims = 5;
      std::vector<double> times(count), values(count * dims);
      for (int i = 0; i < count; ++i) times[i] = 1767225600.0 + i * 0.1;
      for (double& v : values) v = uniform(rng) * std::pow(10.0, uniform(rng) * 300);
      values[1] = 5e-324;                  // the smallest subnormal
      values[2] = 1.7976931348623157e308;  // the largest double
      values[3] = -0.0;
      std::string encoded;
      EncodeJsonPayload(times, values.data(), dims, &encoded, shape);
      const bool single = count == 1 && shape == JsonPayloadShape::kSingleWhenOne;
      // §5: the single shape has a number t, the batch shape an array.
      EXPECT_EQ(encoded.rfind(single ? "{\"t\":1" : "{\"t\":[", 0), 0u) << encoded;
      JsonScratch scratch;
      const DecodeResult result = DecodePayload(encoded, WireLimits{}, &scratch);
      ASSERT_TRUE(result.ok()) << result.detail << " in " << encoded;
      EXPECT_EQ(result.payload.format, PayloadFormat::kJson);
      ASSERT_EQ(result.payload.count, count);
      ASSERT_EQ(result.payload.dims, dims);
      for (int i = 0; i < count; ++i) {
        EXPECT_TRUE(SameBits(result.payload.time(i), times[i]));
        for (int j = 0; j < dims; ++j) {
          EXPECT_TRUE(SameBits(result.payload.value(i, j), values[i * dims + j])) << encoded;
        }
      }
      // An independent parser reads the same numbers.
      const json parsed = json::parse(encoded);
      EXPECT_EQ(single ? parsed["x"][0].get<double>() : parsed["x"][0][0].get<double>(), values[0]);
    }
  }
}

TEST(JsonPayload, IgnoresUnknownMembersWhateverTheyHold) {
  // §5: members other than t and x are ignored, in any order, however nested (up to depth 32).
  const std::string payload =
      " \n\t{\"seq\": 17, \"meta\": {\"t\": \"not this t\", \"x\": [[\"nor\", {\"this\": null}]]},"
      " \"x\": [1, 2.5], \"flag\": true, \"note\": \"caf\xC3\xA9 \\u00e9 \\ud83d\\ude00\","
      " \"t\": 1767225600, \"list\": [[], {}, [[1e300]]]}\r\n";
  JsonScratch scratch;
  const DecodeResult result = DecodePayload(payload, WireLimits{}, &scratch);
  ASSERT_TRUE(result.ok()) << result.detail;
  EXPECT_EQ(result.payload.time(0), 1767225600.0);
  EXPECT_EQ(Row(result.payload, 0), (std::vector<double>{1.0, 2.5}));
}

TEST(JsonPayload, NumbersReadAsTheNearestDouble) {
  // §5: integers and decimals alike read as the nearest IEEE double; -0 (integer) reads as 0,
  // -0.0 as negative zero; underflow reads as 0.
  JsonScratch scratch;
  const DecodeResult result = DecodePayload(
      R"({"t": 1e9, "x": [1, 1.0, 1e0, 10E-1, -0, -0.0, 1e-400, 18446744073709551615,
                          -9223372036854775808, 123456789012345678901234567890, 0.1]})",
      WireLimits{}, &scratch);
  ASSERT_TRUE(result.ok()) << result.detail;
  const std::vector<double> x = Row(result.payload, 0);
  ASSERT_EQ(x.size(), 11u);
  for (int k = 0; k < 4; ++k) EXPECT_EQ(x[k], 1.0) << k;
  EXPECT_EQ(x[4], 0.0);
  EXPECT_FALSE(std::signbit(x[4]));
  EXPECT_EQ(x[5], 0.0);
  EXPECT_TRUE(std::signbit(x[5]));
  EXPECT_EQ(x[6], 0.0);
  EXPECT_EQ(x[7], 18446744073709551616.0);  // 2^64 - 1 rounds to 2^64
  EXPECT_EQ(x[8], -9223372036854775808.0);  // -2^63 exactly
  EXPECT_EQ(x[9], 1.2345678901234568e29);   // nearest double, as Python's float() gives
  EXPECT_EQ(x[10], 0.1);
  EXPECT_EQ(result.payload.time(0), 1e9);
}

TEST(JsonPayload, NestingUpTo32IsAcceptedAndDeeperIsBadJson) {
  // §5: the top-level object is depth 1, so 31 nested arrays inside a member reach depth 32.
  const auto nested = [](int arrays) {
    return R"({"t":1,"x":[1],"deep":)" + std::string(arrays, '[') + std::string(arrays, ']') + "}";
  };
  EXPECT_EQ(ReasonOf(nested(31)), RejectReason::kNone);
  EXPECT_EQ(ReasonOf(nested(32)), RejectReason::kBadJson);
  // Far deeper than any stack could recurse: still a clean rejection.
  EXPECT_EQ(ReasonOf(nested(200000)), RejectReason::kBadJson);
}

TEST(JsonPayload, HugeArraysBeyondTheLimitsAreRejected) {
  // §7 defaults: 1024 dims, 4096 vectors.
  std::string wide = R"({"t":1,"x":[)";
  for (int j = 0; j < 1025; ++j) wide += (j ? ",1" : "1");
  EXPECT_EQ(ReasonOf(wide + "]}"), RejectReason::kDimsLimit);
  std::string wide_ok = R"({"t":1,"x":[)";
  for (int j = 0; j < 1024; ++j) wide_ok += (j ? ",1" : "1");
  EXPECT_EQ(ReasonOf(wide_ok + "]}"), RejectReason::kNone);

  std::string t = "[", x = "[";
  for (int i = 0; i < 4097; ++i) {
    t += (i ? ",1" : "1");
    x += (i ? ",[1]" : "[1]");
  }
  EXPECT_EQ(ReasonOf(R"({"t":)" + t + R"(],"x":)" + x + "]}"), RejectReason::kCountLimit);
  EXPECT_EQ(ReasonOf(R"({"x":)" + x + R"(],"t":)" + t + "]}"), RejectReason::kCountLimit);
}

TEST(JsonPayload, ConfiguredLimitsApply) {
  WireLimits limits;
  limits.max_dims = 2;
  limits.max_vectors_per_message = 2;
  limits.max_message_bytes = 64;
  EXPECT_EQ(ReasonOf(R"({"t":1,"x":[1,2]})", limits), RejectReason::kNone);
  EXPECT_EQ(ReasonOf(R"({"t":1,"x":[1,2,3]})", limits), RejectReason::kDimsLimit);
  EXPECT_EQ(ReasonOf(R"({"t":[1,2,3],"x":[[1],[2],[3]]})", limits), RejectReason::kCountLimit);
  EXPECT_EQ(ReasonOf(R"({"t":1,"x":[1],"pad":")" + std::string(60, 'a') + "\"}", limits),
            RejectReason::kMessageTooLarge);
}

TEST(JsonPayload, EveryTruncationIsRejected) {
  const std::string full = R"({"t": [1.5, 2], "x": [[1, -2e3], [3.25, 4]], "meta": {"a": [true]}})";
  for (std::size_t length = 0; length < full.size(); ++length) {
    std::vector<char> prefix(full.begin(), full.begin() + static_cast<std::ptrdiff_t>(length));
    const RejectReason reason = ReasonOf(std::string_view(prefix.data(), prefix.size()));
    EXPECT_EQ(Label(reason), length == 0 ? "empty_payload" : "bad_json") << "length " << length;
  }
  EXPECT_EQ(ReasonOf(full), RejectReason::kNone);
}

// --- Every rejection reason from a crafted input (§8) ------------------------------------------

struct CraftedCase {
  const char* name;
  std::string payload;
  RejectReason expected;
};

std::vector<CraftedCase> CraftedCases() {
  // A valid two-vector f64 message to corrupt: header | t0 t1 | 4 values.
  std::string good;
  const double times[] = {10.0, 20.0};
  const double values[] = {1, 2, 3, 4};
  EncodeBinaryPayload(times, values, 2, Dtype::kFloat64, &good);
  const auto with_byte = [&](std::size_t offset, char byte) {
    std::string copy = good;
    copy[offset] = byte;
    return copy;
  };
  const double nan = std::numeric_limits<double>::quiet_NaN();
  std::string nan_value = good;
  std::memcpy(nan_value.data() + good.size() - 8, &nan, 8);
  const double inf = std::numeric_limits<double>::infinity();
  std::string inf_time = good;
  std::memcpy(inf_time.data() + 16, &inf, 8);
  std::string f32;
  EncodeBinaryPayload(times, values, 2, Dtype::kFloat32, &f32);
  const float f32_nan = std::numeric_limits<float>::signaling_NaN();
  std::memcpy(f32.data() + f32.size() - 4, &f32_nan, 4);
  return {
      {"empty", "", RejectReason::kEmptyPayload},
      {"too large", "{" + std::string(4194304, ' ') + "}", RejectReason::kMessageTooLarge},
      {"byte order mark", "\xEF\xBB\xBF{\"t\":1,\"x\":[1]}", RejectReason::kUnknownFormat},
      {"digit first", "1", RejectReason::kUnknownFormat},
      {"syntax", R"({"t":1,"x":[1,]})", RejectReason::kBadJson},
      {"NaN literal", R"({"t":1,"x":[NaN]})", RejectReason::kBadJson},
      {"top-level array", " [1]", RejectReason::kBadJson},
      {"trailing bytes", R"({"t":1,"x":[1]} {})", RejectReason::kBadJson},
      {"duplicate x", R"({"t":1,"x":[1],"x":[2]})", RejectReason::kBadJson},
      {"invalid UTF-8", "{\"t\":1,\"x\":[1],\"s\":\"\xFF\"}", RejectReason::kBadJson},
      {"unpaired surrogate", R"({"t":1,"x":[1],"s":"\ud800"})", RejectReason::kBadJson},
      {"missing t", R"({"x":[1]})", RejectReason::kMissingField},
      {"missing x", R"({"t":1})", RejectReason::kMissingField},
      {"string t", R"({"t":"1","x":[1]})", RejectReason::kBadFieldType},
      {"null in x", R"({"t":1,"x":[1,null]})", RejectReason::kBadFieldType},
      {"bool in t", R"({"t":[true],"x":[[1]]})", RejectReason::kBadFieldType},
      {"x object", R"({"t":1,"x":{"a":1}})", RejectReason::kBadFieldType},
      {"x number", R"({"t":1,"x":1})", RejectReason::kBadFieldType},
      {"mixed x", R"({"t":[1,2],"x":[[1],2]})", RejectReason::kBadFieldType},
      {"rows with number t", R"({"t":1,"x":[[1]]})", RejectReason::kBadFieldType},
      {"flat x with array t", R"({"t":[1],"x":[1]})", RejectReason::kBadFieldType},
      {"too deep row", R"({"t":[1],"x":[[[1]]]})", RejectReason::kBadFieldType},
      {"batch lengths", R"({"t":[1,2],"x":[[1]]})", RejectReason::kBatchLengthMismatch},
      {"ragged", R"({"t":[1,2],"x":[[1,2],[3]]})", RejectReason::kRaggedRows},
      {"empty x", R"({"t":1,"x":[]})", RejectReason::kEmptyVector},
      {"empty row", R"({"t":[1],"x":[[]]})", RejectReason::kEmptyVector},
      {"empty batch", R"({"t":[],"x":[]})", RejectReason::kEmptyBatch},
      {"1e999", R"({"t":1,"x":[1e999]})", RejectReason::kNonFinite},
      {"-1e999 in t", R"({"t":-1e999,"x":[1]})", RejectReason::kNonFinite},
      {"overflow in ignored member", R"({"t":1,"x":[1],"y":2e308})", RejectReason::kNonFinite},
      {"400-digit integer", "{\"t\":1,\"x\":[1" + std::string(400, '0') + "]}",
       RejectReason::kNonFinite},
      {"bad magic", with_byte(3, 'X'), RejectReason::kBadHeader},
      {"4 bytes", good.substr(0, 4), RejectReason::kBadHeader},
      {"short header", good.substr(0, 15), RejectReason::kBadHeader},
      {"reserved", with_byte(14, 1), RejectReason::kBadHeader},
      {"version 2", with_byte(4, 2), RejectReason::kUnsupportedVersion},
      {"version 2, 5 bytes", with_byte(4, 2).substr(0, 5), RejectReason::kUnsupportedVersion},
      {"version 0", with_byte(4, 0), RejectReason::kUnsupportedVersion},
      {"dtype 0", with_byte(5, 0), RejectReason::kBadDtype},
      {"dtype 3", with_byte(5, 3), RejectReason::kBadDtype},
      {"trailing byte", good + '\0', RejectReason::kSizeMismatch},
      {"dims says 3", with_byte(6, 3), RejectReason::kSizeMismatch},
      {"dtype says f32", with_byte(5, 1), RejectReason::kSizeMismatch},
      {"dims 0", with_byte(6, 0), RejectReason::kEmptyVector},
      {"count 0", with_byte(8, 0), RejectReason::kEmptyBatch},
      {"dims 1025", Hex("4E 55 57 42 01 02 01 04 01 00 00 00 00 00 00 00"),
       RejectReason::kDimsLimit},
      {"count 4097", Hex("4E 55 57 42 01 02 01 00 01 10 00 00 00 00 00 00"),
       RejectReason::kCountLimit},
      {"NaN value", nan_value, RejectReason::kNonFinite},
      {"infinite time", inf_time, RejectReason::kNonFinite},
      {"f32 NaN", f32, RejectReason::kNonFinite},
  };
}

TEST(Rejections, EachCraftedInputGetsItsReason) {
  std::set<RejectReason> triggered;
  JsonScratch scratch;
  for (const CraftedCase& c : CraftedCases()) {
    const DecodeResult result = DecodePayload(c.payload, WireLimits{}, &scratch);
    EXPECT_EQ(Label(result.reason), Label(c.expected)) << c.name << ": " << result.detail;
    EXPECT_FALSE(result.detail.empty()) << c.name;
    triggered.insert(result.reason);
  }
  JsonScratch key_scratch;
  triggered.insert(
      DecodeIngest("bad key", R"({"t":1,"x":[1]})", WireLimits{}, &key_scratch).reason);
  triggered.insert(CheckFrameCount(3));
  // Every reason of §8 is reachable, except the four that only the daemon can tell.
  for (RejectReason reason : AllRejectReasons()) {
    if (reason == RejectReason::kDimsMismatch || reason == RejectReason::kStreamLimit ||
        reason == RejectReason::kNotOwner || reason == RejectReason::kAwaitingHandoff)
      continue;
    EXPECT_TRUE(triggered.count(reason)) << Label(reason) << " was not triggered";
  }
}

TEST(Rejections, RandomBytesNeverCrashAndAcceptedPayloadsKeepTheContract) {
  // 100k inputs from a fixed seed: raw random bytes after a form-selecting first byte, and
  // random byte mutations of valid messages (which reach deep into both decoders).
  std::mt19937_64 rng(20260101);
  std::string binary;
  const double times[] = {1.0, 2.0};
  const double values[] = {1, 2, 3, 4, 5, 6};
  EncodeBinaryPayload(times, values, 3, Dtype::kFloat32, &binary);
  const std::vector<std::string> seeds = {
      binary, kDocExample, R"({"t":[1,2],"x":[[1,2,3],[4,5,6]],"m":{"k":[null,"s"]}})",
      R"({"t":1.5,"x":[1e3,-2,3.25]})"};
  const WireLimits limits;
  JsonScratch scratch;
  int accepted = 0;
  std::vector<char> input;
  for (int n = 0; n < 100000; ++n) {
    if (n % 2 == 0) {
      const std::size_t length = rng() % 48;
      input.resize(length);
      for (char& c : input) c = static_cast<char>(rng());
      const char firsts[] = {'N', '{', ' ', static_cast<char>(rng())};
      if (length > 0) input[0] = firsts[rng() % 4];
      if (length > 4 && rng() % 2) std::memcpy(input.data(), "NUWB\x01", 5);
    } else {
      const std::string& seed = seeds[rng() % seeds.size()];
      input.assign(seed.begin(), seed.end());
      const int mutations = 1 + static_cast<int>(rng() % 3);
      for (int m = 0; m < mutations; ++m) {
        input[rng() % input.size()] = static_cast<char>(rng());
      }
      if (rng() % 4 == 0) input.resize(rng() % (input.size() + 1));
    }
    const std::string_view payload(input.data(), input.size());
    const DecodeResult result = DecodePayload(payload, limits, &scratch);
    if (!result.ok()) {
      ASSERT_FALSE(result.detail.empty());
      continue;
    }
    ++accepted;
    const PayloadView& view = result.payload;
    ASSERT_GE(view.count, 1);
    ASSERT_LE(view.count, limits.max_vectors_per_message);
    ASSERT_GE(view.dims, 1);
    ASSERT_LE(view.dims, limits.max_dims);
    if (view.format == PayloadFormat::kBinary) {
      ASSERT_EQ(payload.size(),
                16 + 8 * view.count + view.count * view.dims * DtypeBytes(view.dtype));  // §6.3
    }
    for (int i = 0; i < view.count; ++i) {
      ASSERT_TRUE(std::isfinite(view.time(i)));
      for (int j = 0; j < view.dims; ++j) ASSERT_TRUE(std::isfinite(view.value(i, j)));
    }
  }
  // Mutating a digit of the JSON seeds or a value byte of the binary ones keeps them valid.
  EXPECT_GT(accepted, 100);
}

// --- The simdjson path against the reference reader ------------------------------------------

// DecodePayload parses JSON with simdjson and leaves every refusal to nlohmann's SAX reader
// (DecodeJsonWithReferenceReader). The two must agree on every input: the same reason and detail,
// and for an accepted payload the same shape and the same doubles, bit for bit.
void ExpectSameAsReference(std::string_view payload, const WireLimits& limits,
                           JsonScratch* fast_scratch, JsonScratch* reference_scratch) {
  const DecodeResult fast = DecodePayload(payload, limits, fast_scratch);
  const DecodeResult reference = DecodeJsonWithReferenceReader(payload, limits, reference_scratch);
  ASSERT_EQ(Label(fast.reason), Label(reference.reason)) << payload;
  ASSERT_EQ(fast.detail, reference.detail) << payload;
  if (!fast.ok()) return;
  ASSERT_EQ(fast.payload.count, reference.payload.count) << payload;
  ASSERT_EQ(fast.payload.dims, reference.payload.dims) << payload;
  for (int i = 0; i < fast.payload.count; ++i) {
    const double a = fast.payload.time(i);
    const double b = reference.payload.time(i);
    ASSERT_EQ(std::memcmp(&a, &b, sizeof a), 0) << payload;
    for (int j = 0; j < fast.payload.dims; ++j) {
      const double v = fast.payload.value(i, j);
      const double w = reference.payload.value(i, j);
      ASSERT_EQ(std::memcmp(&v, &w, sizeof v), 0) << payload;
    }
  }
}

TEST(JsonPayload, SimdjsonPathAgreesWithTheReferenceReaderOnCraftedInputs) {
  JsonScratch fast, reference;
  std::vector<std::string> payloads;
  for (const CraftedCase& c : CraftedCases()) {
    // The JSON ones that reach the JSON decoder (DecodePayload checks size and first byte).
    if (!c.payload.empty() &&
        std::string_view("{ \t\r\n").find(c.payload.front()) != std::string_view::npos &&
        c.payload.size() <= WireLimits{}.max_message_bytes) {
      payloads.push_back(c.payload);
    }
  }
  // Shapes near each boundary of §5, and numbers each parser reads in its own way.
  for (int depth = 30; depth <= 34; ++depth) {
    payloads.push_back(R"({"t":1,"x":[1],"m":)" + std::string(depth - 1, '[') +
                       std::string(depth - 1, ']') + "}");
  }
  const std::string many(1024, '1');
  for (const std::string& p : {
           std::string(
               R"({"t":-0,"x":[-0,0.0,-0.0,1e-400,-1e-400,4.9e-324,2.2250738585072014e-308]})"),
           std::string(
               R"({"t":18446744073709551615,"x":[9223372036854775807,-9223372036854775808]})"),
           std::string(R"({"t":18446744073709551616,"x":[-9223372036854775809]})"),
           std::string(R"({"t":1.7976931348623157e308,"x":[1.7976931348623159e308]})"),
           std::string(R"({"t":0.1,"x":[3.0000000000000004,9007199254740993,1E2,1e+2,1.5e-7]})"),
           std::string(R"({"\u0074":1,"x":[1]})"),
           std::string(R"({"t":1,"x":[1],"t":2})"),
           std::string(R"({"t":1,"x":[1],"s":"\udc00"})"),
           std::string(R"({"t":1,"x":[1],"s":"\ud83d\ude00"})"),
           std::string(R"({"t":1,"x":[1],"o":{"t":[],"x":{}}})"),
           std::string(R"({"t":[1,2,3],"x":[[1,2],[3,4],[5,6]],"t2":null})"),
           std::string(R"({"t":[1],"x":[[1,2],[3]]})"),
           std::string(R"({"t":[[1]],"x":[[1]]})"),
           std::string(" \t\r\n{\"t\" : 1 , \"x\" : [ 1 ] } \n"),
           std::string("{\"t\":1,\"x\":[1]}\0"),
           std::string(R"({"t":1,"x":[01]})"),
           std::string(R"({"t":1,"x":[1.]})"),
           std::string(R"({"t":1,"x":[.5]})"),
           std::string(R"({"t":1,"x":[+1]})"),
           std::string(R"({"t":1,"x":[1],})"),
           std::string("{\"t\":1,\"x\":[" + many + "]}"),
       }) {
    payloads.push_back(p);
  }
  for (const std::string& payload : payloads) {
    ExpectSameAsReference(payload, WireLimits{}, &fast, &reference);
  }
  // The configured limits, one below and at the boundary.
  WireLimits small;
  small.max_dims = 2;
  small.max_vectors_per_message = 2;
  for (const char* payload :
       {R"({"t":1,"x":[1,2]})", R"({"t":1,"x":[1,2,3]})", R"({"t":[1,2],"x":[[1,2],[3,4]]})",
        R"({"t":[1,2,3],"x":[[1],[2],[3]]})", R"({"t":[1,2],"x":[[1,2,3],[4,5,6]]})"}) {
    ExpectSameAsReference(payload, small, &fast, &reference);
  }
}

TEST(JsonPayload, SimdjsonPathAgreesWithTheReferenceReaderOnMutatedPayloads) {
  // 200k mutations of valid payloads with the characters that change JSON's structure, from a
  // fixed seed; most are refused (the reference reader names why), many stay valid.
  std::mt19937_64 rng(20261202);
  const std::vector<std::string> seeds = {
      R"({"t":[1,2],"x":[[1,2,3],[4,5,6]],"m":{"k":[null,"s\u00e9"]}})",
      R"({"t":1767225600.5,"x":[1e3,-2,3.25,0,-0.0,12345678901234567890]})",
      R"({"x":[[1],[2]],"t":[1,2],"t0":true})"};
  const char alphabet[] = "[]{}\",:0123456789.eE+-tx nul\\";
  JsonScratch fast, reference;
  int accepted = 0;
  std::string input;
  for (int n = 0; n < 200000; ++n) {
    input = seeds[rng() % seeds.size()];
    const int mutations = 1 + static_cast<int>(rng() % 3);
    for (int m = 0; m < mutations; ++m) {
      const std::size_t at = rng() % input.size();
      const char c = alphabet[rng() % (sizeof alphabet - 1)];
      switch (rng() % 3) {
        case 0:
          input[at] = c;
          break;
        case 1:
          input.insert(input.begin() + static_cast<std::ptrdiff_t>(at), c);
          break;
        default:
          if (input.size() > 1) input.erase(at, 1);
      }
    }
    if (input.front() != '{') continue;
    ExpectSameAsReference(input, WireLimits{}, &fast, &reference);
    if (HasFatalFailure()) return;
    accepted += DecodePayload(input, WireLimits{}, &fast).ok();
  }
  EXPECT_GT(accepted, 1000);
}

// --- Encoders' preconditions ------------------------------------------------------------------

TEST(Encoders, RefuseInputsThePayloadCannotCarry) {
  std::string out;
  const double one[] = {1.0};
  const double nan[] = {std::nan("")};
  const double big[] = {1e300};
  EXPECT_THROW(EncodeBinaryPayload({}, one, 1, Dtype::kFloat64, &out), PreconditionError);
  EXPECT_THROW(EncodeBinaryPayload(one, one, 0, Dtype::kFloat64, &out), PreconditionError);
  EXPECT_THROW(EncodeBinaryPayload(one, one, 65536, Dtype::kFloat64, &out), PreconditionError);
  EXPECT_THROW(EncodeBinaryPayload(one, nan, 1, Dtype::kFloat64, &out), PreconditionError);
  EXPECT_THROW(EncodeBinaryPayload(nan, one, 1, Dtype::kFloat64, &out), PreconditionError);
  EXPECT_THROW(EncodeJsonPayload(one, nan, 1, &out), PreconditionError);
  try {
    EncodeBinaryPayload(one, big, 1, Dtype::kFloat32, &out);  // 1e300 overflows a float
    FAIL() << "no exception";
  } catch (const PreconditionError& e) {
    EXPECT_STREQ(e.what(), "EncodeBinaryPayload: value [0][0] = 1e+300 is not finite as a float");
  }
  EXPECT_NO_THROW(EncodeBinaryPayload(one, big, 1, Dtype::kFloat64, &out));
}

// --- Results and incident events (§9) ---------------------------------------------------------

TEST(ResultJson, LearningResultHasTheSection91Members) {
  ScoredVector result;
  result.t = 1767225600.5;
  result.learning = true;
  result.decision = 3.0;  // ignored while learning
  result.anomaly = true;  // ignored while learning
  std::string out;
  EncodeResultJson(result, &out);
  const json parsed = json::parse(out);
  EXPECT_EQ(parsed["t"].get<double>(), 1767225600.5);
  EXPECT_EQ(parsed["state"], "learning");
  EXPECT_TRUE(parsed["decision"].is_null());
  EXPECT_TRUE(parsed["p_value"].is_null());
  EXPECT_EQ(parsed["anomaly"], false);
  EXPECT_TRUE(parsed["incident"].is_null());
  EXPECT_EQ(parsed["model_version"], 0);
  EXPECT_EQ(parsed["support_vectors"], 0);
  EXPECT_FALSE(parsed.contains("top_features"));
  EXPECT_EQ(parsed.size(), 8u);
  // A stream whose transform refills its history says so, with no score either.
  result.history = true;
  EncodeResultJson(result, &out);
  EXPECT_EQ(json::parse(out)["state"], "history");
  EXPECT_TRUE(json::parse(out)["p_value"].is_null());
  EXPECT_EQ(out.find('\n'), std::string::npos);  // §9: one line
}

TEST(ResultJson, AnomalyCarriesTopFeaturesWithEscapedNamesOrIndices) {
  const FeatureShareView top[] = {
      {"bearing \"vib\"\\rms", 0, 0.58},
      {"", 3, 0.27},                      // no name: the index, as a string
      {"tab\there\x01", 1, 0.1},          // control bytes escaped
      {"caf\xC3\xA9 \xFF end", 2, 0.05},  // é kept, the stray 0xFF replaced by U+FFFD
  };
  ScoredVector result;
  result.t = 1767229220;
  result.learning = false;
  result.decision = -0.27410000000000001;
  result.p_value = 1.32e-05;
  result.anomaly = true;
  result.incident_id = 7;
  result.model_version = 4;
  result.support_vectors = 118;
  result.top_features = top;
  std::string out;
  EncodeResultJson(result, &out);
  const json parsed = json::parse(out);  // an independent parser, strict about UTF-8
  EXPECT_EQ(parsed["t"].get<double>(), 1767229220.0);
  EXPECT_EQ(parsed["state"], "scoring");
  EXPECT_EQ(parsed["decision"].get<double>(), -0.2741);  // shortest round trip, read back exactly
  EXPECT_EQ(parsed["p_value"].get<double>(), 1.32e-05);
  EXPECT_EQ(parsed["anomaly"], true);
  EXPECT_EQ(parsed["incident"], 7);
  EXPECT_EQ(parsed["model_version"], 4);
  EXPECT_EQ(parsed["support_vectors"], 118);
  ASSERT_EQ(parsed["top_features"].size(), 4u);
  EXPECT_EQ(parsed["top_features"][0]["feature"], "bearing \"vib\"\\rms");
  EXPECT_EQ(parsed["top_features"][0]["share"].get<double>(), 0.58);
  EXPECT_EQ(parsed["top_features"][1]["feature"], "3");
  EXPECT_EQ(parsed["top_features"][1]["share"].get<double>(), 0.27);
  EXPECT_EQ(parsed["top_features"][2]["feature"], "tab\there\x01");
  EXPECT_EQ(parsed["top_features"][3]["feature"], "caf\xC3\xA9 \xEF\xBF\xBD end");
  EXPECT_NE(out.find("\"decision\":-0.2741,"), std::string::npos) << out;
}

TEST(ResultJson, ScoringWithoutAnomalyHasNoTopFeaturesAndNonFiniteIsNull) {
  const FeatureShareView top[] = {{"a", 0, 1.0}};
  ScoredVector result;
  result.learning = false;
  result.decision = std::numeric_limits<double>::quiet_NaN();
  result.p_value = std::numeric_limits<double>::quiet_NaN();  // an uncalibrated model
  result.anomaly = false;
  result.top_features = top;  // not written: no anomaly
  result.model_version = std::numeric_limits<std::uint64_t>::max();
  std::string out;
  EncodeResultJson(result, &out);
  const json parsed = json::parse(out);
  EXPECT_TRUE(parsed["decision"].is_null());  // §9: non-finite numbers are null

  EXPECT_FALSE(parsed.contains("top_features"));
  EXPECT_EQ(parsed["model_version"].get<std::uint64_t>(), 18446744073709551615ull);
}

TEST(EventJson, OpenAndCloseHaveTheSection92Members) {
  IncidentEvent open;
  open.kind = IncidentEventKind::kOpen;
  open.incident_id = 7;
  open.t = 1767229240;
  open.start = 1767229220;
  open.end = 5;  // not written for an open event
  std::string out;
  EncodeIncidentEventJson(open, &out);
  json parsed = json::parse(out);
  EXPECT_EQ(parsed["event"], "incident_open");
  EXPECT_EQ(parsed["incident"], 7);
  EXPECT_EQ(parsed["t"].get<double>(), 1767229240.0);
  EXPECT_EQ(parsed["start"].get<double>(), 1767229220.0);
  EXPECT_FALSE(parsed.contains("end"));
  EXPECT_FALSE(parsed.contains("peak_decision"));
  EXPECT_EQ(out, R"({"event":"incident_open","incident":7,"t":1767229240,"start":1767229220})");

  IncidentEvent close = open;
  close.kind = IncidentEventKind::kClose;
  close.t = 1767229400.125;
  close.end = 1767229300;
  close.peak_decision = -0.5102;
  EncodeIncidentEventJson(close, &out);
  parsed = json::parse(out);
  EXPECT_EQ(parsed["event"], "incident_close");
  EXPECT_EQ(parsed["t"].get<double>(), 1767229400.125);
  EXPECT_EQ(parsed["end"].get<double>(), 1767229300.0);
  EXPECT_EQ(parsed["peak_decision"].get<double>(), -0.5102);
  EXPECT_EQ(parsed.size(), 6u);
}

// --- Allocation behaviour -----------------------------------------------------------------------

TEST(Allocation, BinaryDecodeAllocatesNothing) {
  std::vector<double> times(64, 1.0), values(64 * 8, 2.0);
  std::string payload;
  EncodeBinaryPayload(times, values.data(), 8, Dtype::kFloat32, &payload);
  JsonScratch scratch;
  const long before = g_allocations.load();
  double sum = 0;
  for (int n = 0; n < 1000; ++n) {
    const DecodeResult result = DecodePayload(payload, WireLimits{}, &scratch);
    sum += result.payload.value(63, 7);
  }
  EXPECT_EQ(g_allocations.load() - before, 0);
  EXPECT_EQ(sum, 2000.0);
}

TEST(Allocation, JsonDecodeAllocatesNothingOnceWarm) {
  std::vector<double> times(64, 1.0), values(64 * 8, 2.0);
  std::string payload;
  EncodeJsonPayload(times, values.data(), 8, &payload);
  JsonScratch scratch;
  ASSERT_TRUE(DecodePayload(payload, WireLimits{}, &scratch).ok());  // grows the buffers
  const long before = g_allocations.load();
  double sum = 0;
  for (int n = 0; n < 1000; ++n) {
    const DecodeResult result = DecodePayload(payload, WireLimits{}, &scratch);
    sum += result.payload.value(63, 7);
  }
  EXPECT_EQ(g_allocations.load() - before, 0);
  EXPECT_EQ(sum, 2000.0);
}

TEST(Allocation, EncodersReuseTheirBufferInTheSteadyState) {
  const FeatureShareView top[] = {{"discharge_pressure", 0, 0.5}, {"", 12, 0.25}};
  std::string out;
  ScoredVector result;
  result.learning = false;
  result.anomaly = true;
  result.top_features = top;
  // Warm up with the longest message of the loop below, then vary the numbers.
  result.t = -1.2345678901234567e-300;
  result.decision = -1.2345678901234567e-300;
  result.incident_id = std::numeric_limits<std::int64_t>::max();
  EncodeResultJson(result, &out);
  const std::size_t capacity = out.capacity();
  const char* data = out.data();
  std::string event_out;
  IncidentEvent event;
  event.kind = IncidentEventKind::kClose;
  event.peak_decision = -1.2345678901234567e-300;
  event.t = event.start = event.end = -1.2345678901234567e-300;
  EncodeIncidentEventJson(event, &event_out);
  std::string binary_out;
  const std::vector<double> times(16, 1.0), values(16 * 4, 0.5);
  EncodeBinaryPayload(times, values.data(), 4, Dtype::kFloat64, &binary_out);

  const long before = g_allocations.load();
  for (int n = 0; n < 10000; ++n) {
    result.t = 1767225600.0 + n * 0.37;
    result.decision = -0.001 * n;
    result.incident_id = n;
    EncodeResultJson(result, &out);
    event.t = result.t;
    EncodeIncidentEventJson(event, &event_out);
    EncodeBinaryPayload(times, values.data(), 4, Dtype::kFloat64, &binary_out);
  }
  EXPECT_EQ(g_allocations.load() - before, 0);
  EXPECT_EQ(out.capacity(), capacity);
  EXPECT_EQ(out.data(), data);
  EXPECT_EQ(json::parse(out)["incident"], 9999);
}

// --- The independent Python implementation ------------------------------------------------------

const char* const kPythonCodec = NUWATCH_SOURCE_DIR "/tests/integration/python_codec_check.py";

std::string Quote(const std::string& s) { return "'" + s + "'"; }

// Runs a command, returns its standard output; fails the test if it exits non-zero.
std::string RunCommand(const std::string& command) {
  std::string output;
  FILE* pipe = popen(command.c_str(), "r");
  if (pipe == nullptr) {
    ADD_FAILURE() << "cannot run " << command;
    return output;
  }
  char buffer[4096];
  std::size_t n;
  while ((n = std::fread(buffer, 1, sizeof buffer, pipe)) > 0) output.append(buffer, n);
  const int status = pclose(pipe);
  EXPECT_EQ(status, 0) << command;
  return output;
}

std::vector<json> JsonLines(const std::string& text) {
  std::vector<json> lines;
  std::istringstream in(text);
  for (std::string line; std::getline(in, line);) {
    if (!line.empty()) lines.push_back(json::parse(line));
  }
  return lines;
}

TEST(PythonImplementation, CppDecodesWhatPythonEncodes) {
  TempDir dir;
  RunCommand(std::string(NUWATCH_PYTHON) + " " + kPythonCodec + " --emit " +
             Quote(dir.path().string()));
  const json manifest = json::parse(ReadFile(dir.path() / "manifest.json"));
  ASSERT_GE(manifest["payloads"].size(), 30u);
  JsonScratch scratch;
  for (const json& entry : manifest["payloads"]) {
    const std::string name = entry["file"];
    const std::string bytes = ReadFile(dir.path() / name);
    const DecodeResult result = DecodePayload(bytes, WireLimits{}, &scratch);
    if (!entry["ok"].get<bool>()) {
      EXPECT_EQ(Label(result.reason), entry["reason"].get<std::string>()) << name;
      continue;
    }
    ASSERT_TRUE(result.ok()) << name << ": " << result.detail;
    const PayloadView& view = result.payload;
    const std::string dtype = entry["dtype"];
    EXPECT_EQ(view.format, dtype == "json" ? PayloadFormat::kJson : PayloadFormat::kBinary);
    if (dtype != "json") {
      EXPECT_EQ(view.dtype, dtype == "f32" ? Dtype::kFloat32 : Dtype::kFloat64) << name;
    }
    ASSERT_EQ(view.count, static_cast<int>(entry["times"].size())) << name;
    for (int i = 0; i < view.count; ++i) {
      EXPECT_EQ(view.time(i), entry["times"][i].get<double>()) << name;
      ASSERT_EQ(view.dims, static_cast<int>(entry["values"][i].size())) << name;
      for (int j = 0; j < view.dims; ++j) {
        EXPECT_EQ(view.value(i, j), entry["values"][i][j].get<double>()) << name << " " << i;
      }
    }
  }
  for (const json& entry : manifest["keys"]) {
    const std::string key = entry["key"];
    EXPECT_EQ(ValidateStreamKey(key, WireLimits{}) == RejectReason::kNone, entry["ok"].get<bool>())
        << key;
  }
}

TEST(PythonImplementation, PythonDecodesWhatCppEncodesAndAgreesOnRejections) {
  TempDir dir;
  std::vector<std::string> files;
  std::vector<std::pair<std::vector<double>, std::vector<double>>> sent;  // times, values
  std::vector<RejectReason> expected;
  const auto add = [&](const std::string& name, const std::string& bytes, RejectReason reason,
                       std::vector<double> times = {}, std::vector<double> values = {}) {
    WriteFile(dir.path() / name, bytes);
    files.push_back(name);
    expected.push_back(reason);
    sent.emplace_back(std::move(times), std::move(values));
  };
  std::mt19937_64 rng(3);
  std::uniform_real_distribution<double> uniform(-1e4, 1e4);
  std::vector<double> times = {1767225600.0, 1767225610.5, 1767225620.25};
  std::vector<double> values(3 * 4);
  for (double& v : values) v = uniform(rng);
  std::vector<double> as_float = values;
  for (double& v : as_float) v = static_cast<float>(v);
  std::string bytes;
  EncodeBinaryPayload(times, values.data(), 4, Dtype::kFloat64, &bytes);
  add("cpp_f64.bin", bytes, RejectReason::kNone, times, values);
  EncodeBinaryPayload(times, values.data(), 4, Dtype::kFloat32, &bytes);
  add("cpp_f32.bin", bytes, RejectReason::kNone, times, as_float);
  EncodeJsonPayload(times, values.data(), 4, &bytes);
  add("cpp_batch.json", bytes, RejectReason::kNone, times, values);
  EncodeJsonPayload(std::span(times).first(1), values.data(), 4, &bytes);
  add("cpp_single.json", bytes, RejectReason::kNone, {times[0]},
      std::vector<double>(values.begin(), values.begin() + 4));
  int n = 0;
  for (const CraftedCase& c : CraftedCases()) {
    add("crafted_" + std::to_string(n++) + ".payload", c.payload, c.expected);
  }

  std::string command = std::string(NUWATCH_PYTHON) + " " + kPythonCodec + " --decode";
  for (const std::string& file : files) command += " " + Quote((dir.path() / file).string());
  const std::vector<json> lines = JsonLines(RunCommand(command));
  ASSERT_EQ(lines.size(), files.size());
  const std::vector<CraftedCase> crafted = CraftedCases();
  for (std::size_t k = 0; k < files.size(); ++k) {
    const json& line = lines[k];
    const std::string what = k >= 4 ? crafted[k - 4].name : files[k];
    if (expected[k] != RejectReason::kNone) {
      EXPECT_EQ(line["reason"], Label(expected[k])) << what;
      continue;
    }
    ASSERT_TRUE(line["reason"].is_null()) << what << ": " << line["reason"];
    const auto& [sent_times, sent_values] = sent[k];
    const int dims = line["dims"];
    ASSERT_EQ(line["times"].size(), sent_times.size()) << what;
    for (std::size_t i = 0; i < sent_times.size(); ++i) {
      EXPECT_EQ(line["times"][i].get<double>(), sent_times[i]) << what;
      for (int j = 0; j < dims; ++j) {
        EXPECT_EQ(line["values"][i][j].get<double>(), sent_values[i * dims + j]) << what;
      }
    }
  }

  // Stream keys, one JSON string per line.
  const std::vector<std::string> keys = {
      "pump-01", "a/b:c.d_e", std::string(128, 'z'), std::string(129, 'z'), "pump 01",
      "x=y",     "\xC3\xA9"};
  std::string key_lines;
  for (const std::string& key : keys) key_lines += json(key).dump() + "\n";
  WriteFile(dir.path() / "keys.jsonl", key_lines);
  const std::vector<json> verdicts =
      JsonLines(RunCommand(std::string(NUWATCH_PYTHON) + " " + kPythonCodec + " --check-keys " +
                           Quote((dir.path() / "keys.jsonl").string())));
  ASSERT_EQ(verdicts.size(), keys.size());
  for (std::size_t k = 0; k < keys.size(); ++k) {
    EXPECT_EQ(verdicts[k]["ok"].get<bool>(),
              ValidateStreamKey(keys[k], WireLimits{}) == RejectReason::kNone)
        << keys[k];
  }
}

TEST(PythonImplementation, PythonReadsCppResultsAndEventsAsSection9Describes) {
  TempDir dir;
  const FeatureShareView top[] = {{"bearing_vibration", 0, 0.58}, {"", 4, 0.27}};
  std::string lines, out;
  ScoredVector learning;
  learning.t = 1767225600.5;
  EncodeResultJson(learning, &out);
  lines += out + "\n";
  ScoredVector normal;
  normal.t = 1767229210;
  normal.learning = false;
  normal.decision = 0.0312;
  normal.model_version = 4;
  normal.support_vectors = 118;
  EncodeResultJson(normal, &out);
  lines += out + "\n";
  ScoredVector anomaly = normal;
  anomaly.t = 1767229220.75;
  anomaly.decision = -0.2741;
  anomaly.anomaly = true;
  anomaly.incident_id = 7;
  anomaly.top_features = top;
  EncodeResultJson(anomaly, &out);
  lines += out + "\n";
  IncidentEvent open;
  open.incident_id = 7;
  open.t = 1767229240;
  open.start = 1767229220.75;
  open.peak_decision = -0.2741;
  EncodeIncidentEventJson(open, &out);
  lines += out + "\n";
  IncidentEvent close = open;
  close.kind = IncidentEventKind::kClose;
  close.t = 1767229400;
  close.end = 1767229300;
  close.peak_decision.reset();
  EncodeIncidentEventJson(close, &out);
  lines += out + "\n";
  WriteFile(dir.path() / "published.jsonl", lines);

  const std::vector<json> parsed =
      JsonLines(RunCommand(std::string(NUWATCH_PYTHON) + " " + kPythonCodec + " --check-results " +
                           Quote((dir.path() / "published.jsonl").string())));
  ASSERT_EQ(parsed.size(), 5u);
  EXPECT_EQ(parsed[0]["kind"], "result");
  EXPECT_EQ(parsed[0]["state"], "learning");
  EXPECT_EQ(parsed[0]["t"].get<double>(), 1767225600.5);
  EXPECT_EQ(parsed[1]["state"], "scoring");
  EXPECT_EQ(parsed[1]["decision"].get<double>(), 0.0312);
  EXPECT_EQ(parsed[1]["anomaly"], false);
  EXPECT_EQ(parsed[1]["model_version"], 4);
  EXPECT_EQ(parsed[1]["support_vectors"], 118);
  EXPECT_EQ(parsed[2]["incident"], 7);
  ASSERT_EQ(parsed[2]["top_features"].size(), 2u);
  EXPECT_EQ(parsed[2]["top_features"][0]["feature"], "bearing_vibration");
  EXPECT_EQ(parsed[2]["top_features"][1]["feature"], "4");
  EXPECT_EQ(parsed[2]["top_features"][1]["share"].get<double>(), 0.27);
  EXPECT_EQ(parsed[3]["kind"], "event");
  EXPECT_EQ(parsed[3]["event"], "incident_open");
  EXPECT_EQ(parsed[3]["start"].get<double>(), 1767229220.75);
  EXPECT_EQ(parsed[3]["peak_decision"].get<double>(), -0.2741);
  EXPECT_EQ(parsed[4]["event"], "incident_close");
  EXPECT_EQ(parsed[4]["end"].get<double>(), 1767229300.0);
  EXPECT_FALSE(parsed[4].contains("peak_decision"));
}

}  // namespace
}  // namespace nuwatch
