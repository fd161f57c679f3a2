// Tests of the binary result batch (daemon/protocol/PROTOCOL.md §9.5, cited by section, "§"):
// the encoder against the document's worked example byte for byte, round trips, the decoder's
// checks (§9.5.4) on broken frames, allocation in the steady state, and agreement with
// tests/integration/python_codec_check.py, a second decoder written in Python from the document
// alone (its struct formats are the §9.5 tables).
#include "protocol/result_batch.h"

#include <gtest/gtest.h>
#include <unistd.h>

#include <atomic>
#include <cmath>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <limits>
#include <new>
#include <nlohmann/json.hpp>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "common/run_command.h"
#include "nuwatch/types.h"

// Every allocation is counted (g_allocations), for the tests that a path allocates nothing.
#include "common/counting_allocator.h"

namespace nuwatch {
namespace {

using nlohmann::json;

std::string Hex(std::string_view hex) {
  std::string digits;
  for (char c : hex)
    if (c != ' ' && c != '\n') digits.push_back(c);
  std::string bytes;
  for (std::size_t i = 0; i + 1 < digits.size(); i += 2)
    bytes.push_back(static_cast<char>(std::stoi(digits.substr(i, 2), nullptr, 16)));
  return bytes;
}

bool SameBits(double a, double b) { return std::memcmp(&a, &b, sizeof a) == 0; }

// §9.5.5, copied from the document's table (the bytes column, in order).
const std::string kExample =
    Hex("4E 55 57 52 01 00 00 00 02 00 00 00 02 00 00 00"
        "00 00 10 40 6E 55 DA 41 00 00 00 00 00 00 E0 3F 00 00 00 00 00 00 D0 3F"
        "FF FF FF FF FF FF FF FF 04 00 00 00 00 00 00 00 76 00 00 00 02 00 00 00"
        "00 00 90 42 6E 55 DA 41 00 00 00 00 00 00 E0 BF 00 00 00 00 00 00 80 3F"
        "07 00 00 00 00 00 00 00 04 00 00 00 00 00 00 00 76 00 00 00 02 01 02 00"
        "00 00 00 00 00 00 E8 3F 03 00 00 00 00 00 00 00"
        "00 00 00 00 00 00 D0 3F 04 00 00 00 00 00 00 00");

// The example's two results, as the daemon describes them.
const FeatureShareView kExampleTop[] = {{"", 3, 0.75}, {"", 4, 0.25}};
std::vector<ScoredVector> ExampleResults() {
  ScoredVector normal;
  normal.t = 1767225600.25;
  normal.learning = false;
  normal.decision = 0.5;
  normal.p_value = 0.25;
  normal.model_version = 4;
  normal.support_vectors = 118;
  ScoredVector flagged = normal;
  flagged.t = 1767225610.25;
  flagged.decision = -0.5;
  flagged.p_value = 0.0078125;
  flagged.anomaly = true;
  flagged.incident_id = 7;
  flagged.top_features = kExampleTop;
  return {normal, flagged};
}

std::string Encode(const std::vector<ScoredVector>& results) {
  ResultBatchEncoder encoder;
  encoder.Begin();
  for (const ScoredVector& r : results) encoder.Add(r);
  return encoder.Finish();
}

template <class T>
void Put(std::string* frame, std::size_t offset, T value) {
  std::memcpy(frame->data() + offset, &value, sizeof value);
}

// The decoder refuses `frame` with a message that names the form and contains `expected`, and
// leaves the batch empty.
void ExpectRejected(const std::string& frame, std::string_view expected) {
  ResultBatch batch;
  batch.rows.resize(3);  // overwritten: a failed decode leaves the batch empty
  const std::string problem = DecodeResultBatch(frame, &batch);
  EXPECT_NE(problem.find("binary result batch: "), std::string::npos) << problem;
  EXPECT_NE(problem.find(expected), std::string::npos)
      << problem << " (expected: " << expected << ")";
  EXPECT_TRUE(batch.rows.empty());
  EXPECT_TRUE(batch.features.empty());
}

TEST(ResultBatch, EncoderWritesTheDocumentExampleByteForByte) {
  ASSERT_EQ(kExample.size(), 144u);  // §9.5.5: 16 + 2 x 48 + 2 x 16
  EXPECT_EQ(Encode(ExampleResults()), kExample);
}

TEST(ResultBatch, DecoderReadsTheDocumentExample) {
  ResultBatch batch;
  ASSERT_EQ(DecodeResultBatch(kExample, &batch), "");
  ASSERT_EQ(batch.rows.size(), 2u);
  const ResultBatchRow& a = batch.rows[0];
  EXPECT_EQ(a.t, 1767225600.25);
  EXPECT_EQ(a.state, ResultState::kScoring);
  EXPECT_EQ(a.decision, 0.5);
  EXPECT_EQ(a.p_value, 0.25);
  EXPECT_FALSE(a.anomaly);
  EXPECT_EQ(a.incident_id, -1);
  EXPECT_EQ(a.model_version, 4u);
  EXPECT_EQ(a.support_vectors, 118u);
  EXPECT_EQ(a.feature_count, 0u);
  const ResultBatchRow& b = batch.rows[1];
  EXPECT_EQ(b.t, 1767225610.25);
  EXPECT_EQ(b.decision, -0.5);
  EXPECT_EQ(b.p_value, 0.0078125);
  EXPECT_TRUE(b.anomaly);
  EXPECT_EQ(b.incident_id, 7);
  ASSERT_EQ(b.feature_count, 2u);
  EXPECT_EQ(b.first_feature, 0u);
  ASSERT_EQ(batch.features.size(), 2u);
  EXPECT_EQ(batch.features[0].index, 3u);
  EXPECT_EQ(batch.features[0].share, 0.75);
  EXPECT_EQ(batch.features[1].index, 4u);
  EXPECT_EQ(batch.features[1].share, 0.25);
}

TEST(ResultBatch, LearningAndHistoryRowsCarryNaNAndNoFlagAsTheJsonFormsNulls) {
  // §9.5.2: decision and p_value NaN unless scoring; anomaly and top features only when scoring,
  // whatever the verdict held (the JSON form writes null and false there, §9.1).
  ScoredVector learning;
  learning.t = 1767225600.5;
  learning.decision = 1.5;  // ignored while learning
  learning.anomaly = true;  // likewise
  learning.top_features = kExampleTop;
  ScoredVector history = learning;
  history.history = true;
  ScoredVector uncalibrated;
  uncalibrated.learning = false;
  uncalibrated.decision = -0.25;
  uncalibrated.p_value = std::numeric_limits<double>::quiet_NaN();
  uncalibrated.anomaly = true;  // flagged, with an empty top_features list
  ResultBatch batch;
  ASSERT_EQ(DecodeResultBatch(Encode({learning, history, uncalibrated}), &batch), "");
  ASSERT_EQ(batch.rows.size(), 3u);
  EXPECT_EQ(batch.rows[0].state, ResultState::kLearning);
  EXPECT_EQ(batch.rows[1].state, ResultState::kHistory);
  for (int i : {0, 1}) {
    EXPECT_TRUE(std::isnan(batch.rows[i].decision));
    EXPECT_TRUE(std::isnan(batch.rows[i].p_value));
    EXPECT_FALSE(batch.rows[i].anomaly);
    EXPECT_EQ(batch.rows[i].feature_count, 0u);
    EXPECT_EQ(batch.rows[i].incident_id, -1);
  }
  EXPECT_EQ(batch.rows[2].state, ResultState::kScoring);
  EXPECT_EQ(batch.rows[2].decision, -0.25);
  EXPECT_TRUE(std::isnan(batch.rows[2].p_value));
  EXPECT_TRUE(batch.rows[2].anomaly);
  EXPECT_EQ(batch.rows[2].feature_count, 0u);
  EXPECT_TRUE(batch.features.empty());
}

// Random batches of every kind of row, decoded bit for bit.
TEST(ResultBatch, RandomBatchesRoundTripBitForBit) {
  std::mt19937_64 random(41);
  std::uniform_real_distribution<double> uniform(-3, 3);
  ResultBatchEncoder encoder;  // reused, as the daemon reuses it
  for (int round = 0; round < 200; ++round) {
    const int n = 1 + static_cast<int>(random() % 70);
    std::vector<ScoredVector> results(static_cast<std::size_t>(n));
    std::vector<std::vector<FeatureShareView>> tops(static_cast<std::size_t>(n));
    encoder.Begin();
    for (int i = 0; i < n; ++i) {
      ScoredVector& r = results[static_cast<std::size_t>(i)];
      r.t = 1767225600 + 10.0 * i + uniform(random);
      r.learning = random() % 4 == 0;
      r.history = r.learning && random() % 2 == 0;
      r.decision = uniform(random);
      r.p_value = random() % 5 == 0 ? std::nan("") : std::abs(uniform(random)) / 3;
      r.anomaly = random() % 3 == 0;
      r.incident_id = random() % 2 == 0 ? -1 : static_cast<std::int64_t>(random() % 1000);
      r.model_version = random();
      r.support_vectors = static_cast<std::int64_t>(random() % 5000);
      auto& top = tops[static_cast<std::size_t>(i)];
      for (int k = static_cast<int>(random() % 4); k > 0; --k)
        top.push_back({"", static_cast<int>(random() % 100000), std::abs(uniform(random)) / 3});
      r.top_features = top;
      encoder.Add(r);
    }
    const std::string frame = encoder.Finish();
    ResultBatch batch;
    ASSERT_EQ(DecodeResultBatch(frame, &batch), "") << "round " << round;
    ASSERT_EQ(batch.rows.size(), results.size());
    std::size_t entries = 0;
    for (int i = 0; i < n; ++i) {
      const ScoredVector& r = results[static_cast<std::size_t>(i)];
      const ResultBatchRow& row = batch.rows[static_cast<std::size_t>(i)];
      const bool scoring = !r.learning;
      EXPECT_TRUE(SameBits(row.t, r.t));
      EXPECT_EQ(row.state, scoring     ? ResultState::kScoring
                           : r.history ? ResultState::kHistory
                                       : ResultState::kLearning);
      if (scoring) {
        EXPECT_TRUE(SameBits(row.decision, r.decision));
        EXPECT_TRUE(SameBits(row.p_value, r.p_value));
      } else {
        EXPECT_TRUE(std::isnan(row.decision) && std::isnan(row.p_value));
      }
      EXPECT_EQ(row.anomaly, scoring && r.anomaly);
      EXPECT_EQ(row.incident_id, r.incident_id);
      EXPECT_EQ(row.model_version, r.model_version);
      EXPECT_EQ(row.support_vectors, static_cast<std::uint32_t>(r.support_vectors));
      const std::size_t expected = scoring && r.anomaly ? r.top_features.size() : 0;
      ASSERT_EQ(row.feature_count, expected);
      EXPECT_EQ(row.first_feature, entries);
      for (std::size_t k = 0; k < expected; ++k) {
        const ResultBatchFeature& f = batch.features[row.first_feature + k];
        EXPECT_EQ(f.index, static_cast<std::uint32_t>(r.top_features[k].index));
        EXPECT_TRUE(SameBits(f.share, r.top_features[k].share));
      }
      entries += expected;
    }
    EXPECT_EQ(batch.features.size(), entries);
  }
}

TEST(ResultBatch, EncoderRefusesWhatTheLayoutCannotCarry) {
  ResultBatchEncoder encoder;
  ScoredVector r;
  EXPECT_THROW(encoder.Add(r), PreconditionError);  // before Begin
  encoder.Begin();
  EXPECT_THROW(encoder.Finish(), PreconditionError);  // a batch is never empty
  r.support_vectors = -1;
  EXPECT_THROW(encoder.Add(r), PreconditionError);
  r.support_vectors = std::int64_t{1} << 32;
  EXPECT_THROW(encoder.Add(r), PreconditionError);
  r.support_vectors = 1;
  r.learning = false;
  r.anomaly = true;
  std::vector<FeatureShareView> many(256, FeatureShareView{"", 1, 0.001});
  r.top_features = many;
  EXPECT_THROW(encoder.Add(r), PreconditionError);  // the per-row count is a u8
  many.resize(1);
  many[0].index = -2;
  r.top_features = many;
  EXPECT_THROW(encoder.Add(r), PreconditionError);
}

TEST(ResultBatch, EncoderAllocatesNothingOnceItsBuffersAreWarm) {
  ResultBatchEncoder encoder;
  const std::vector<ScoredVector> results = ExampleResults();
  std::size_t size = 0;
  for (int warm = 0; warm < 2; ++warm) {
    encoder.Begin();
    for (int i = 0; i < 64; ++i) encoder.Add(results[static_cast<std::size_t>(i % 2)]);
    size = encoder.Finish().size();
  }
  const long before = g_allocations.load();
  for (int round = 0; round < 100; ++round) {
    encoder.Begin();
    for (int i = 0; i < 64; ++i) encoder.Add(results[static_cast<std::size_t>(i % 2)]);
    EXPECT_EQ(encoder.Finish().size(), size);
  }
  EXPECT_EQ(g_allocations.load() - before, 0);
}

// §9.5.4, one check at a time, each with a frame that passes every earlier check.
TEST(ResultBatch, EachCheckOfSection954RejectsItsDefectWithAClearMessage) {
  ExpectRejected("", "magic NUWR");
  ExpectRejected("NUWR", "magic NUWR");
  ExpectRejected(std::string("NUWB\x01\x02\x02\x00", 8), "magic NUWR");  // an ingest payload
  ExpectRejected("{\"results\":[]}", "magic NUWR");                      // the JSON form
  std::string frame = kExample;
  frame[4] = 2;
  ExpectRejected(frame, "version 2 is not supported");
  ExpectRejected(kExample.substr(0, 15), "header is cut short: 15 of 16 bytes");
  frame = kExample;
  frame[5] = 1;
  ExpectRejected(frame, "flags = 1");
  frame = kExample;
  frame[7] = 1;
  ExpectRejected(frame, "reserved header field is 256");
  frame = kExample;
  Put<std::uint32_t>(&frame, 8, 0);
  ExpectRejected(frame, "no rows (count = 0)");
  // Counts that overrun the frame: caught by the size before any row is read, without overflow.
  frame = kExample;
  Put<std::uint32_t>(&frame, 8, 0xFFFFFFFFu);
  Put<std::uint32_t>(&frame, 12, 0xFFFFFFFFu);
  ExpectRejected(frame, "count = 4294967295 and features = 4294967295 make 274877906896");
  frame = kExample;
  Put<std::uint32_t>(&frame, 12, 3);
  ExpectRejected(frame, "the frame has 144 bytes");
  frame = kExample + std::string(1, '\0');
  ExpectRejected(frame, "the frame has 145 bytes");
  // Row checks (row 1 starts at 64: state at 108, anomaly 109, top_features 110, reserved 111).
  frame = kExample;
  frame[108] = 3;
  ExpectRejected(frame, "row 1: state 3 is not 0, 1 or 2");
  frame = kExample;
  frame[109] = 2;
  ExpectRejected(frame, "row 1: anomaly 2");
  frame = kExample;
  frame[108] = 0;  // learning, yet flagged
  ExpectRejected(frame, "row 1: anomaly 1 with state 0");
  frame = kExample;
  frame[62] = 1;  // row 0: one top feature, not flagged
  ExpectRejected(frame, "row 0: 1 top features on a row not flagged");
  frame = kExample;
  frame[111] = 9;
  ExpectRejected(frame, "row 1: the reserved byte is 9");
  frame = kExample;
  Put<std::int64_t>(&frame, 88, -5);
  ExpectRejected(frame, "row 1: incident -5");
  // Per-row counts that overrun the announced entries, and counts that fall short of them.
  frame = kExample;
  frame[110] = 3;
  ExpectRejected(frame, "row 1: its 3 top features run past the 2 entries");
  frame = kExample;
  frame[110] = 1;
  ExpectRejected(frame, "the rows claim 1 top features, the header 2");
  frame = kExample;
  frame[140] = 1;  // entry 1's reserved field
  ExpectRejected(frame, "feature entry 1: the reserved field is 1");
}

TEST(ResultBatch, EveryTruncationAndRandomMutationIsRejectedOrDecodedWithinItsBounds) {
  for (std::size_t n = 0; n < kExample.size(); ++n) {
    ResultBatch batch;
    EXPECT_NE(DecodeResultBatch(kExample.substr(0, n), &batch), "") << n << " bytes";
  }
  // Single- and multi-byte corruptions of encoded batches: a decoder that accepts one still
  // keeps every row's entries inside the entries it returns.
  std::mt19937_64 random(5);
  const std::string base = Encode(ExampleResults());
  for (int round = 0; round < 20000; ++round) {
    std::string frame = base;
    for (int flips = 1 + static_cast<int>(random() % 4); flips > 0; --flips)
      frame[random() % frame.size()] = static_cast<char>(random());
    if (random() % 8 == 0) frame.resize(random() % (frame.size() + 1));
    ResultBatch batch;
    const std::string problem = DecodeResultBatch(frame, &batch);
    if (!problem.empty()) {
      EXPECT_TRUE(batch.rows.empty());
      continue;
    }
    ASSERT_FALSE(batch.rows.empty());
    for (const ResultBatchRow& row : batch.rows) {
      ASSERT_LE(std::size_t{row.first_feature} + row.feature_count, batch.features.size());
      EXPECT_TRUE(row.anomaly || row.feature_count == 0);
      EXPECT_TRUE(!row.anomaly || row.state == ResultState::kScoring);
    }
  }
}

// The Python decoder (python_codec_check.py, from PROTOCOL.md §9.5 alone) reads what the C++
// encoder writes as the C++ decoder does, and agrees with the document's example (its self-test).
TEST(ResultBatch, PythonDecoderWrittenFromTheDocumentReadsTheEncodersBatches) {
  const std::string script = NUWATCH_SOURCE_DIR "/tests/integration/python_codec_check.py";
  const auto self_test =
      testing_data::RunCommand(std::string(NUWATCH_PYTHON) + " " + script + " --self-test");
  ASSERT_EQ(self_test.exit_code, 0) << self_test.output;

  const auto dir =
      std::filesystem::temp_directory_path() / ("result_batch_test_" + std::to_string(::getpid()));
  std::filesystem::create_directories(dir);
  std::vector<ScoredVector> results = ExampleResults();
  ScoredVector learning;
  learning.t = 1767225590.125;
  learning.history = true;
  results.insert(results.begin(), learning);
  results[2].p_value = std::numeric_limits<double>::quiet_NaN();
  results[2].decision = -1.0 / 3;
  {
    std::ofstream out(dir / "batch.bin", std::ios::binary);
    const std::string frame = Encode(results);
    out.write(frame.data(), static_cast<std::streamsize>(frame.size()));
  }
  const auto run =
      testing_data::RunCommand(std::string(NUWATCH_PYTHON) + " " + script +
                               " --decode-result-batch " + (dir / "batch.bin").string());
  std::filesystem::remove_all(dir);
  ASSERT_EQ(run.exit_code, 0) << run.output;
  std::vector<json> rows;
  std::istringstream lines(run.output);
  for (std::string line; std::getline(lines, line);)
    if (!line.empty()) rows.push_back(json::parse(line));
  ASSERT_EQ(rows.size(), 3u) << run.output;
  EXPECT_EQ(rows[0]["state"], "history");
  EXPECT_EQ(rows[0]["t"].get<double>(), 1767225590.125);
  EXPECT_TRUE(rows[0]["decision"].is_null());
  EXPECT_TRUE(rows[0]["p_value"].is_null());
  EXPECT_EQ(rows[1]["state"], "scoring");
  EXPECT_EQ(rows[1]["p_value"].get<double>(), 0.25);
  EXPECT_TRUE(rows[1]["incident"].is_null());
  EXPECT_FALSE(rows[1].contains("top_features"));
  EXPECT_EQ(rows[2]["decision"].get<double>(), -1.0 / 3);  // every bit: json prints repr()
  EXPECT_TRUE(rows[2]["p_value"].is_null());
  EXPECT_EQ(rows[2]["incident"], 7);
  EXPECT_EQ(rows[2]["model_version"], 4);
  EXPECT_EQ(rows[2]["support_vectors"], 118);
  ASSERT_EQ(rows[2]["top_features"].size(), 2u);
  EXPECT_EQ(rows[2]["top_features"][0]["feature"], "3");
  EXPECT_EQ(rows[2]["top_features"][0]["share"].get<double>(), 0.75);
  EXPECT_EQ(rows[2]["top_features"][1]["feature"], "4");
}

}  // namespace
}  // namespace nuwatch
