// Tests of stream ownership (daemon/protocol/ownership.h, PROTOCOL.md §13) and of its BLAKE2b
// (daemon/protocol/blake2b.h) against: the BLAKE2b-512("abc") example of RFC 7693 Appendix A;
// Python's hashlib.blake2b (a third-party implementation, through /usr/bin/python3) on random
// inputs of every length around the 128-byte block; the test vectors PROTOCOL.md §13.3 publishes
// (read from the document itself, so the document and the code cannot drift apart); and the
// property of rendezvous hashing published by Thaler & Ravishankar (1998): a new member takes about
// 1/(N+1) of the keys, and only keys that go to it move.
#include "protocol/ownership.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <random>
#include <regex>
#include <sstream>
#include <string>
#include <vector>

#include "nuwatch/types.h"
#include "protocol/blake2b.h"

namespace nuwatch {
namespace {

namespace fs = std::filesystem;
using ::testing::HasSubstr;

std::string Hex(std::span<const std::uint8_t> bytes) {
  static constexpr char kDigits[] = "0123456789abcdef";
  std::string out;
  for (const std::uint8_t b : bytes) {
    out += kDigits[b >> 4];
    out += kDigits[b & 15];
  }
  return out;
}

std::string Hex64(std::uint64_t value) {
  char text[17];
  std::snprintf(text, sizeof text, "%016llx", static_cast<unsigned long long>(value));
  return text;
}

// Runs /usr/bin/python3 with `script` on `input` (a file), returns its standard output lines.
std::vector<std::string> RunPython(const std::string& script, const std::string& input) {
  const fs::path path =
      fs::temp_directory_path() / ("nuwatch_ownership_" + std::to_string(::getpid()));
  std::ofstream(path, std::ios::binary) << input;
  const std::string command = std::string(NUWATCH_PYTHON) + " -c '" + script + "' " + path.string();
  std::FILE* pipe = ::popen(command.c_str(), "r");
  EXPECT_NE(pipe, nullptr);
  std::vector<std::string> lines;
  if (pipe == nullptr) return lines;
  char buffer[512];
  std::string line;
  while (std::fgets(buffer, sizeof buffer, pipe) != nullptr) {
    line += buffer;
    if (!line.empty() && line.back() == '\n') {
      line.pop_back();
      lines.push_back(line);
      line.clear();
    }
  }
  EXPECT_EQ(::pclose(pipe), 0) << command;
  fs::remove(path);
  return lines;
}

TEST(Blake2b, MatchesTheExampleOfRfc7693AppendixA) {
  // RFC 7693, Appendix A: BLAKE2b-512("abc").
  std::uint8_t digest[64];
  Blake2b("abc", digest);
  EXPECT_EQ(Hex(digest),
            "ba80a53f981c4d0d6a2797b69f12f6e94c212f14685ac4b74b12bb6fdbffa2d1"
            "7d87c5392aab792dc252d5de4533cc9518d38aa8dbf1925ab92386edd4009923");
}

TEST(Blake2b, AgreesWithPythonHashlibForEveryLengthAroundTheBlocks) {
  // Message lengths 0..300 (0, 127, 128, 129, 255, 256, 257: the block edges) and digest sizes
  // 1..64 in turn; hashlib.blake2b(data, digest_size=n) is Python's binding of the BLAKE2
  // reference code.
  std::mt19937 random(7);
  std::string data(300, '\0');
  for (char& c : data) c = static_cast<char>(random());
  std::vector<std::string> expected = RunPython(
      "import sys, hashlib; d = open(sys.argv[1], \"rb\").read(); "
      "print(\"\\n\".join(hashlib.blake2b(d[:n], digest_size=n % 64 + 1).hexdigest() "
      "for n in range(len(d) + 1)))",
      data);
  ASSERT_EQ(expected.size(), data.size() + 1);
  for (std::size_t n = 0; n <= data.size(); ++n) {
    std::vector<std::uint8_t> digest(n % 64 + 1);
    Blake2b(std::string_view(data).substr(0, n), digest);
    EXPECT_EQ(Hex(digest), expected[n]) << "length " << n;
  }
}

TEST(Blake2b, RefusesDigestsOutsideOneToSixtyFourBytes) {
  std::uint8_t digest[65];
  EXPECT_THROW(Blake2b("x", std::span<std::uint8_t>(digest, 0)), PreconditionError);
  EXPECT_THROW(Blake2b("x", std::span<std::uint8_t>(digest, 65)), PreconditionError);
}

TEST(RendezvousWeight, AgreesWithPythonHashlibOnRandomMembersAndKeys) {
  // PROTOCOL.md §13.2's Python line, computed by Python at test time.
  std::mt19937 random(12);
  const std::string key_bytes =
      "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789._:/-";
  std::vector<std::pair<std::string, std::string>> pairs;
  std::string input;
  for (int i = 0; i < 400; ++i) {
    std::string member = "nuwatchd-" + std::to_string(random() % 1000);
    std::string key(1 + random() % 260, 'x');  // past 128: the key lengths a daemon can raise to
    for (char& c : key) c = key_bytes[random() % key_bytes.size()];
    input += member + " " + key + "\n";
    pairs.emplace_back(std::move(member), std::move(key));
  }
  const std::vector<std::string> expected = RunPython(
      "import sys, hashlib\n"
      "for line in open(sys.argv[1], \"rb\"):\n"
      "    m, k = line.split()\n"
      "    print(hashlib.blake2b(m + b\"\\0\" + k, digest_size=8).hexdigest())",
      input);
  ASSERT_EQ(expected.size(), pairs.size());
  for (std::size_t i = 0; i < pairs.size(); ++i) {
    EXPECT_EQ(Hex64(RendezvousWeight(pairs[i].first, pairs[i].second)), expected[i])
        << pairs[i].first << " " << pairs[i].second;
  }
}

std::string ReadProtocolDocument() {
  std::ifstream in(NUWATCH_SOURCE_DIR "/daemon/protocol/PROTOCOL.md");
  std::stringstream text;
  text << in.rdbuf();
  return text.str();
}

std::vector<std::string> SplitCommas(const std::string& list) {
  std::vector<std::string> out;
  std::stringstream in(list);
  for (std::string item; std::getline(in, item, ',');) out.push_back(item);
  return out;
}

TEST(RendezvousWeight, ReproducesTheVectorsOfProtocolSection13) {
  const std::string document = ReadProtocolDocument();
  const std::size_t section = document.find("### 13.3 Test vectors");
  ASSERT_NE(section, std::string::npos);
  const std::string text = document.substr(section);
  // | `member` | `key` or `N × C` | `weight` |
  const std::regex weight_row(
      R"(\| `([^`]+)` \| (?:`([^`]+)`|(\d+) × `(.)`) \| `([0-9a-f]{16})` \|)");
  int weights = 0;
  for (std::sregex_iterator it(text.begin(), text.end(), weight_row), end; it != end; ++it) {
    const std::smatch& m = *it;
    const std::string key =
        m[2].matched ? m[2].str() : std::string(std::stoul(m[3].str()), m[4].str()[0]);
    EXPECT_EQ(Hex64(RendezvousWeight(m[1].str(), key)), m[5].str()) << m[0].str();
    ++weights;
  }
  EXPECT_GE(weights, 10);
  // | `key` | `m1,m2,...` | `owner` |
  const std::regex owner_row(R"(\| `([^`]+)` \| `([^`]*,[^`]*)` \| `([^`]+)` \|)");
  int owners = 0;
  for (std::sregex_iterator it(text.begin(), text.end(), owner_row), end; it != end; ++it) {
    const std::smatch& m = *it;
    const std::vector<std::string> members = SplitCommas(m[2].str());
    EXPECT_EQ(members[OwnerOf(m[1].str(), members)], m[3].str()) << m[0].str();
    ++owners;
  }
  EXPECT_GE(owners, 8);
}

TEST(OwnerOf, TakesTheLargestWeightWhateverTheOrderOfTheList) {
  std::vector<std::string> members = {"nuwatchd-0", "nuwatchd-1", "nuwatchd-2", "nuwatchd-3"};
  for (int k = 0; k < 200; ++k) {
    const std::string key = "stream-" + std::to_string(k);
    const std::string owner = members[OwnerOf(key, members)];
    for (const std::string& m : members) {
      EXPECT_GE(RendezvousWeight(owner, key), RendezvousWeight(m, key));
    }
    std::vector<std::string> reversed(members.rbegin(), members.rend());
    EXPECT_EQ(reversed[OwnerOf(key, reversed)], owner);
  }
}

TEST(OwnerOf, EqualWeightsGoToTheFirstOfEqualNamesAndAnEmptyListIsRefused) {
  // Two distinct names with equal weights would take a 64-bit BLAKE2b collision, so §13.2's tie
  // rule cannot be shown with a real tie; equal names (which §13.1 forbids in a member list, and
  // MemberListError refuses) have equal weights and show that a later equal weight never wins.
  const std::vector<std::string> twice = {"nuwatchd-1", "nuwatchd-1"};
  EXPECT_EQ(OwnerOf("k", twice), 0u);
  EXPECT_THROW(OwnerOf("k", std::vector<std::string>{}), PreconditionError);
}

TEST(OwnerOf, AFourthMemberTakesAboutAQuarterOfTheKeysAndNoOtherKeyMoves) {
  // Thaler & Ravishankar (1998), and PROTOCOL.md §13.2: going from N to N+1 members moves only
  // keys to the new member, each key with probability 1/(N+1). Over n = 20000 keys the count that
  // moves is Binomial(n, 1/4): mean 5000, standard deviation sqrt(n p (1-p)) = 61.2. The bound is
  // 5 standard deviations (306), which a fair hash misses with probability below 1e-6; the keys are
  // fixed, so the test is deterministic, and a biased hash (e.g. one that ignores the member)
  // fails it by thousands.
  const std::vector<std::string> three = {"nuwatchd-0", "nuwatchd-1", "nuwatchd-2"};
  const std::vector<std::string> four = {"nuwatchd-0", "nuwatchd-1", "nuwatchd-2", "nuwatchd-3"};
  constexpr int kKeys = 20000;
  int moved = 0;
  std::vector<int> owned_before(3, 0);
  for (int k = 0; k < kKeys; ++k) {
    const std::string key = "pump-" + std::to_string(k);
    const std::size_t before = OwnerOf(key, three);
    const std::size_t after = OwnerOf(key, four);
    ++owned_before[before];
    if (after != before) {
      ++moved;
      EXPECT_EQ(after, 3u) << key << " moved between two old members";
    }
  }
  const double mean = kKeys / 4.0;
  const double sd = std::sqrt(kKeys * 0.25 * 0.75);
  EXPECT_NEAR(moved, mean, 5 * sd) << moved << " of " << kKeys << " keys moved";
  // The same bound for the three shares before the change: Binomial(n, 1/3), sd 66.7.
  const double sd3 = std::sqrt(kKeys * (1.0 / 3) * (2.0 / 3));
  for (int share : owned_before) EXPECT_NEAR(share, kKeys / 3.0, 5 * sd3);
}

TEST(MemberNames, AcceptPodNamesAndRefuseWhitespaceEqualsSignsAndDuplicates) {
  EXPECT_EQ(MemberNameError("nuwatchd-0"), "");
  EXPECT_EQ(MemberNameError("replica.eu-west_1:a"), "");
  EXPECT_THAT(MemberNameError(""), HasSubstr("empty"));
  EXPECT_THAT(MemberNameError("nuwatchd 0"), HasSubstr("0x20 at offset 8"));
  EXPECT_THAT(MemberNameError("a=b"), HasSubstr("0x3D at offset 1"));
  EXPECT_THAT(MemberNameError("tab\there"), HasSubstr("0x09"));
  EXPECT_THAT(MemberNameError("caf\xC3\xA9"), HasSubstr("0xC3"));
  EXPECT_THAT(MemberNameError(std::string(254, 'a')), HasSubstr("at most 253"));
  EXPECT_EQ(MemberNameError(std::string(253, 'a')), "");
  const std::vector<std::string> ok = {"nuwatchd-0", "nuwatchd-1"};
  EXPECT_EQ(MemberListError(ok), "");
  EXPECT_EQ(MemberListError(std::vector<std::string>{}), "");
  const std::vector<std::string> twice = {"nuwatchd-0", "nuwatchd-1", "nuwatchd-0"};
  EXPECT_THAT(MemberListError(twice), HasSubstr("\"nuwatchd-0\" appears twice"));
}

}  // namespace
}  // namespace nuwatch
