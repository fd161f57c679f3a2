// The shared pieces of nuwatch's binary files: the byte writer's layout, the bounds-checked reader
// (every truncation of a payload is reported with the field it cut, never read past), and the
// checksummed envelope (hand-built layout with the CRC-32 check value, round trips, every
// truncation, every single-byte change, newer / invalid versions, a foreign magic, size fields
// that would overflow).
#include "nuwatch/checked_file.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <cstring>
#include <limits>
#include <string>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

constexpr char kTestMagic[4] = {'T', 'E', 'S', 'T'};
constexpr uint64_t kNoLimit = std::numeric_limits<uint64_t>::max();

std::vector<uint8_t> Bytes(const std::string& s) {
  return std::vector<uint8_t>(s.begin(), s.end());
}

std::string UnwrapError(const std::vector<uint8_t>& file, uint32_t newest = 3,
                        uint64_t max_payload = kNoLimit) {
  try {
    UnwrapChecksummed(file.data(), file.size(), kTestMagic, newest, "test", max_payload);
  } catch (const ChecksummedFileError& e) {
    return e.what();
  }
  return "accepted";
}

// ---------------------------------------------------------------------------------------------
// ByteWriter and ByteReader.

// Hand-worked little-endian layout: a u32 0x01020304 is stored 04 03 02 01; a string is a u32
// length then its bytes; 1.0 is the IEEE 754 binary64 pattern 0x3FF0000000000000, stored
// 00 00 00 00 00 00 F0 3F (IEEE 754-2008, section 3.4).
TEST(ByteWriter, LaysOutValuesLittleEndian) {
  ByteWriter w;
  w.Put<uint32_t>(0x01020304u);
  w.PutString("ab");
  const double one = 1.0;
  w.PutArray(&one, 1);
  w.PutBytes("xy", 2);
  w.PutArray<double>(nullptr, 0);  // an empty array writes nothing
  const std::vector<uint8_t> expected = {0x04, 0x03, 0x02, 0x01, 2, 0, 0,    0,    'a', 'b',
                                         0,    0,    0,    0,    0, 0, 0xF0, 0x3F, 'x', 'y'};
  EXPECT_EQ(w.bytes, expected);
}

ByteWriter SampleWriter() {
  ByteWriter w;
  w.Put<uint8_t>(7);
  w.Put<int64_t>(-5);
  const double values[3] = {0.5, -2.25, 1e300};
  w.PutArray(values, 3);
  w.PutString("pressure");
  w.PutBytes("zz", 2);
  return w;
}

// Reads back what SampleWriter wrote, naming each field; throws at the first field cut short.
void ReadSample(ByteReader& r) {
  EXPECT_EQ(r.Get<uint8_t>("the flag"), 7);
  EXPECT_EQ(r.Get<int64_t>("the count"), -5);
  double values[3];
  r.GetArray(values, 3, "the values");
  EXPECT_EQ(values[0], 0.5);
  EXPECT_EQ(values[1], -2.25);
  EXPECT_EQ(values[2], 1e300);
  EXPECT_EQ(r.GetString("the name"), "pressure");
  const uint8_t* tail = r.Take(2, "the tail");
  EXPECT_EQ(std::string(reinterpret_cast<const char*>(tail), 2), "zz");
}

TEST(ByteReader, ReadsBackWhatTheWriterWrote) {
  const ByteWriter w = SampleWriter();
  ByteReader r(w.bytes.data(), w.bytes.size(), "test");
  ReadSample(r);
  EXPECT_EQ(r.remaining(), 0u);
}

// Field boundaries of SampleWriter: flag [0,1), count [1,9), values [9,33), name length [33,37),
// name [37,45), tail [45,47). A prefix ending inside a field is reported as that field.
std::string FieldCutAt(std::size_t length) {
  if (length < 1) return "the flag";
  if (length < 9) return "the count";
  if (length < 33) return "the values";
  if (length < 45) return "the name";
  return "the tail";
}

TEST(ByteReader, EveryTruncationNamesTheFieldItCuts) {
  const ByteWriter w = SampleWriter();
  ASSERT_EQ(w.bytes.size(), 47u);
  for (std::size_t length = 0; length < w.bytes.size(); ++length) {
    // An exact copy, so that a read past its end would touch unowned memory (and show up under a
    // sanitizer) rather than the rest of the original buffer.
    const std::vector<uint8_t> prefix(w.bytes.begin(), w.bytes.begin() + length);
    ByteReader r(prefix.data(), prefix.size(), "test");
    try {
      ReadSample(r);
      ADD_FAILURE() << "length " << length << " was accepted";
    } catch (const ChecksummedFileError& e) {
      EXPECT_EQ(std::string(e.what()), "test payload ends inside " + FieldCutAt(length))
          << "length " << length;
    }
  }
}

TEST(ByteReader, HugeCountsDoNotOverflowTheBoundsCheck) {
  const std::vector<uint8_t> bytes(16, 0);
  ByteReader r(bytes.data(), bytes.size(), "test");
  EXPECT_THROW(r.Need(kNoLimit, 8, "a huge array"), ChecksummedFileError);
  // 2^61 doubles are 2^64 bytes: the product wraps to 0, the check must not.
  double out[2];
  EXPECT_THROW(r.GetArray(out, uint64_t{1} << 61, "a wrapping array"), ChecksummedFileError);
  EXPECT_THROW(r.Take(kNoLimit, "a huge block"), ChecksummedFileError);
  EXPECT_NO_THROW(r.Need(2, 8, "two doubles"));
  EXPECT_EQ(r.remaining(), 16u);  // failed reads consume nothing
}

// ---------------------------------------------------------------------------------------------
// The envelope.

// Hand-built: magic | u32 version 3 | u64 size 9 | "123456789" | u32 CRC. 0xCBF43926 is the
// CRC-32 (IEEE, reflected, as zlib) of "123456789", the standard check value (Greg Cook,
// "Catalogue of parametrised CRC algorithms", entry CRC-32/ISO-HDLC; also zlib.crc32 in Python).
TEST(Checksummed, EnvelopeLayoutMatchesAHandBuiltFile) {
  const std::vector<uint8_t> file = WrapChecksummed(kTestMagic, 3, Bytes("123456789"));
  const std::vector<uint8_t> expected = {'T', 'E', 'S', 'T', 3,   0,    0,    0,    9,   0,
                                         0,   0,   0,   0,   0,   0,    '1',  '2',  '3', '4',
                                         '5', '6', '7', '8', '9', 0x26, 0x39, 0xF4, 0xCB};
  EXPECT_EQ(file, expected);
}

TEST(Checksummed, RoundTripsAndPointsIntoTheBuffer) {
  const std::vector<uint8_t> payload = Bytes("some payload bytes");
  const std::vector<uint8_t> file = WrapChecksummed(kTestMagic, 2, payload);
  const ChecksummedPayload p =
      UnwrapChecksummed(file.data(), file.size(), kTestMagic, 3, "test", kNoLimit);
  EXPECT_EQ(p.version, 2u);  // older versions are read and reported
  EXPECT_EQ(p.data, file.data() + kChecksummedHeaderBytes);
  EXPECT_EQ(std::vector<uint8_t>(p.data, p.data + p.size), payload);
}

TEST(Checksummed, AnEmptyPayloadRoundTrips) {
  const std::vector<uint8_t> file = WrapChecksummed(kTestMagic, 1, {});
  ASSERT_EQ(file.size(), kChecksummedEnvelopeBytes);
  const ChecksummedPayload p =
      UnwrapChecksummed(file.data(), file.size(), kTestMagic, 1, "test", kNoLimit);
  EXPECT_EQ(p.size, 0u);
}

TEST(Checksummed, EveryTruncationAndPaddingIsRejected) {
  const std::vector<uint8_t> file = WrapChecksummed(kTestMagic, 1, Bytes("0123456789abcdef"));
  for (std::size_t length = 0; length < file.size(); ++length) {
    const std::vector<uint8_t> prefix(file.begin(), file.begin() + length);
    EXPECT_THAT(UnwrapError(prefix), HasSubstr("truncated")) << "length " << length;
  }
  EXPECT_EQ(UnwrapError(std::vector<uint8_t>(file.begin(), file.begin() + 19)),
            "truncated: 19 bytes, not even a header");
  std::vector<uint8_t> padded = file;
  padded.push_back(0);
  EXPECT_EQ(UnwrapError(padded),
            "truncated or padded: header announces 16 payload bytes, the file holds 37 bytes");
}

// A CRC with a degree-32 generator detects every burst of length <= 32 (Koopman, "32-bit cyclic
// redundancy codes for Internet applications", DSN 2002), so every change within one payload byte
// is caught; changes to the header are caught by the magic, version and size checks.
TEST(Checksummed, EverySingleByteChangeIsRejected) {
  const std::vector<uint8_t> file = WrapChecksummed(kTestMagic, 1, Bytes("a short payload"));
  std::vector<uint8_t> damaged = file;
  int accepted = 0;
  for (std::size_t position = 0; position < file.size(); ++position) {
    for (int change = 1; change < 256; ++change) {
      damaged[position] = static_cast<uint8_t>(file[position] ^ change);
      if (UnwrapError(damaged, 1) == "accepted" && ++accepted <= 5) {
        ADD_FAILURE() << "byte " << position << " xor " << change << " was accepted";
      }
    }
    damaged[position] = file[position];
  }
  EXPECT_EQ(accepted, 0);
  damaged[kChecksummedHeaderBytes] ^= 0x01;
  EXPECT_EQ(UnwrapError(damaged, 1), "checksum mismatch: the file is corrupted");
}

TEST(Checksummed, NewerAndZeroVersionsSaySo) {
  const std::vector<uint8_t> newer = WrapChecksummed(kTestMagic, 4, Bytes("x"));
  EXPECT_EQ(UnwrapError(newer, 3), "format version 4 is newer than this program reads (3)");
  const std::vector<uint8_t> zero = WrapChecksummed(kTestMagic, 0, Bytes("x"));
  EXPECT_EQ(UnwrapError(zero, 3), "format version 0 is invalid");
}

TEST(Checksummed, AnotherMagicNamesTheKind) {
  const char other[4] = {'N', 'U', 'W', 'M'};
  const std::vector<uint8_t> file = WrapChecksummed(other, 1, Bytes("x"));
  try {
    UnwrapChecksummed(file.data(), file.size(), kTestMagic, 1, "state", kNoLimit);
    FAIL() << "expected ChecksummedFileError";
  } catch (const ChecksummedFileError& e) {
    EXPECT_EQ(std::string(e.what()), "not a nuwatch state file");
  }
}

TEST(Checksummed, PayloadSizesAboveTheLimitOrWrappingAreRejected) {
  const std::vector<uint8_t> file = WrapChecksummed(kTestMagic, 1, Bytes("0123456789"));
  EXPECT_THAT(UnwrapError(file, 1, 9), HasSubstr("truncated or padded"));
  EXPECT_EQ(UnwrapError(file, 1, 10), "accepted");
  // A size of 2^64 - 20, for which size + envelope wraps to 0, is rejected as well.
  std::vector<uint8_t> lying = file;
  const uint64_t wrapping = kNoLimit - kChecksummedEnvelopeBytes + 1;
  std::memcpy(lying.data() + 8, &wrapping, 8);
  EXPECT_THAT(UnwrapError(lying, 1, kNoLimit), HasSubstr("truncated or padded"));
}

// ---------------------------------------------------------------------------------------------
// Durable replacement.

TEST(CommitFileDurably, ReplacesThePathWithTheTemporaryFile) {
  const std::string dir = ::testing::TempDir();
  const std::string path = dir + "/nuwatch_commit_" + std::to_string(::getpid());
  const std::string temporary = path + ".tmp";
  std::FILE* old_file = std::fopen(path.c_str(), "wb");
  std::fputs("old", old_file);
  std::fclose(old_file);
  std::FILE* new_file = std::fopen(temporary.c_str(), "wb");
  std::fputs("new", new_file);
  std::fclose(new_file);
  CommitFileDurably(temporary, path);
  char text[8] = {};
  std::FILE* read = std::fopen(path.c_str(), "rb");
  ASSERT_NE(read, nullptr);
  EXPECT_EQ(std::fread(text, 1, sizeof text, read), 3u);
  std::fclose(read);
  EXPECT_STREQ(text, "new");
  EXPECT_EQ(std::fopen(temporary.c_str(), "rb"), nullptr);  // renamed away
  std::remove(path.c_str());
  // A temporary file that is not there: the error names the path being replaced.
  try {
    CommitFileDurably(temporary, path);
    FAIL() << "no error";
  } catch (const ModelFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr(path + ": cannot open the temporary file"));
  }
}

}  // namespace
}  // namespace nuwatch
