// Tests of `nuwatch replay` (daemon/cli/cmd_replay.cc) run as a program on a plant recording
// made by `nuwatch simulate`: determinism, the output format and its relation to the input, the
// budget, a frozen model with --refit-every 0, and one-line errors for bad input.
// The expected values come from the detector's contract (core/include/nuwatch/detector.h): the
// warm-up fit runs inside the Observe call of the warmup-th vector, after that vector was
// reported as learning; anomaly means p_value <= the model's calibrated level (calibration.h), so
// it falls as p_value falls; model versions only grow.
#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/wait.h>

#include <algorithm>
#include <charconv>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <limits>
#include <map>
#include <sstream>
#include <string>
#include <vector>

#include "common/program_test.h"
#include "nuwatch/detector_settings.h"

namespace {

using ::testing::AllOf;
using ::testing::HasSubstr;
using ::testing::Not;

const std::string kNuwatch = NUWATCH_PROGRAM;
const std::string kHeader =
    "time,stream,state,decision,p_value,anomaly,incident,support_vectors,model_version";
constexpr int kWarmup = 720;
constexpr int kBudget = 64;

using RunResult = nuwatch::testing_data::ProgramRun;
using nuwatch::testing_data::RunProgram;

std::string ReadFile(const std::string& path) { return nuwatch::testing_data::ReadWholeFile(path); }

std::vector<std::string> Split(const std::string& line) {
  std::vector<std::string> fields;
  std::size_t start = 0;
  while (true) {
    const std::size_t comma = line.find(',', start);
    fields.push_back(line.substr(start, comma - start));
    if (comma == std::string::npos) return fields;
    start = comma + 1;
  }
}

// Header and rows of a comma-separated file without quoting (all files here are such).
std::vector<std::vector<std::string>> ReadRows(const std::string& path) {
  std::ifstream in(path);
  std::vector<std::vector<std::string>> rows;
  std::string line;
  while (std::getline(in, line)) rows.push_back(Split(line));
  return rows;
}

double ParseDouble(const std::string& text) {
  double value = std::numeric_limits<double>::quiet_NaN();
  const auto [ptr, error] = std::from_chars(text.data(), text.data() + text.size(), value);
  if (error != std::errc() || ptr != text.data() + text.size())
    return std::numeric_limits<double>::quiet_NaN();
  return value;
}

class ReplayCliTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    std::string pattern = ::testing::TempDir() + "nuwatch_replay_cli_XXXXXX";
    ASSERT_NE(::mkdtemp(pattern.data()), nullptr);
    dir_ = pattern;
    const RunResult sim = Run("simulate --output " + dir_ + "/plant" +
                              " --duration 2d --interval 60s --pumps 3 --seed 4");
    ASSERT_EQ(sim.exit_code, 0) << sim.err;
    stream_ = dir_ + "/plant/stream.csv";
  }
  static void TearDownTestSuite() { std::filesystem::remove_all(dir_); }

  static RunResult Run(const std::string& args) { return RunProgram(kNuwatch, args, dir_); }

  // The replay of the brief's settings, with `extra` flags appended, into dir_/name.
  static std::string Replay(const std::string& name, const std::string& extra = "") {
    const std::string out = dir_ + "/" + name;
    const RunResult r =
        Run("replay --input " + stream_ + " --output " + out +
            " --window 720 --warmup 720 --support-vector-budget 64 --nu 0.02 " + extra);
    EXPECT_EQ(r.exit_code, 0) << r.err;
    return out;
  }

  std::string WriteInput(const std::string& name, const std::string& text) {
    const std::string path = dir_ + "/" + name;
    std::ofstream(path, std::ios::binary) << text;
    return path;
  }

  // Runs replay on a bad input file and returns stderr; the run must fail with exit code 1 and
  // write exactly one line.
  std::string ExpectOneLineFailure(const std::string& args) {
    const RunResult r = Run(args);
    EXPECT_EQ(r.exit_code, 1) << r.err;
    EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
    EXPECT_TRUE(!r.err.empty() && r.err.back() == '\n') << r.err;
    return r.err;
  }

  static std::string dir_;
  static std::string stream_;
};

std::string ReplayCliTest::dir_;
std::string ReplayCliTest::stream_;

TEST_F(ReplayCliTest, TwoRunsAreByteIdentical) {
  const std::string a = Replay("a.csv", "--refit-every 60");
  const std::string b = Replay("b.csv", "--refit-every 60");
  const std::string text_a = ReadFile(a);
  ASSERT_GT(text_a.size(), 100000u);
  EXPECT_TRUE(text_a == ReadFile(b)) << "replay is not deterministic";
}

TEST_F(ReplayCliTest, OneRowPerInputRowInOrderWithTheDocumentedColumns) {
  const auto input = ReadRows(stream_);
  const auto output = ReadRows(Replay("rows.csv", "--refit-every 60"));
  ASSERT_GE(input.size(), 2u);
  ASSERT_EQ(input[0][0], "time");
  ASSERT_EQ(input[0][1], "stream");
  ASSERT_EQ(output.size(), input.size());
  std::ifstream first(dir_ + "/rows.csv");
  std::string header;
  std::getline(first, header);
  EXPECT_EQ(header, kHeader);

  std::map<std::string, int> rows_seen, learning_rows;
  std::map<std::string, uint64_t> last_version;
  // Per model version: the largest p-value flagged and the smallest not flagged. One level per
  // model, so the first must lie below the second.
  std::map<std::pair<std::string, uint64_t>, std::pair<double, double>> p_range;
  int incident_rows = 0;
  for (std::size_t i = 1; i < output.size(); ++i) {
    const auto& in = input[i];
    const auto& out = output[i];
    ASSERT_EQ(out.size(), 9u) << "output line " << i + 1;
    ASSERT_EQ(out[0], in[0]) << "line " << i + 1;  // same time text, same order
    ASSERT_EQ(out[1], in[1]) << "line " << i + 1;
    const std::string& stream = out[1];
    const int seen = ++rows_seen[stream];
    if (out[2] == "learning") {
      // Learning rows carry no score.
      EXPECT_EQ(out[3], "") << "line " << i + 1;
      EXPECT_EQ(out[4], "") << "line " << i + 1;
      EXPECT_EQ(out[5], "0");
      EXPECT_EQ(out[6], "");
      EXPECT_EQ(out[7], "0");
      EXPECT_EQ(out[8], "0");
      ++learning_rows[stream];
      // The first kWarmup vectors of a stream learn, and only those (detector.h).
      EXPECT_LE(seen, kWarmup) << "line " << i + 1;
      continue;
    }
    ASSERT_EQ(out[2], "scoring") << "line " << i + 1;
    EXPECT_GT(seen, kWarmup) << "line " << i + 1;
    const double decision = ParseDouble(out[3]);
    ASSERT_TRUE(std::isfinite(decision)) << "line " << i + 1 << ": '" << out[3] << "'";
    const double p = ParseDouble(out[4]);
    ASSERT_TRUE(p >= 0 && p <= 1) << "line " << i + 1 << ": '" << out[4] << "'";
    ASSERT_TRUE(out[5] == "0" || out[5] == "1") << "line " << i + 1;
    incident_rows += !out[6].empty();
    const int support = std::stoi(out[7]);
    EXPECT_GE(support, 1);
    EXPECT_LE(support, kBudget) << "line " << i + 1;
    const uint64_t version = std::stoull(out[8]);
    auto& range = p_range.try_emplace({stream, version}, -1.0, 2.0).first->second;
    if (out[5] == "1") {
      range.first = std::max(range.first, p);
    } else {
      range.second = std::min(range.second, p);
    }
    EXPECT_GE(version, 1u);
    EXPECT_GE(version, last_version[stream]) << "line " << i + 1;
    last_version[stream] = version;
  }
  ASSERT_EQ(rows_seen.size(), 3u);
  for (const auto& [stream, n] : rows_seen) {
    EXPECT_EQ(n, 2880) << stream;  // 2 days at 60 s
    EXPECT_EQ(learning_rows[stream], kWarmup) << stream;
    EXPECT_GT(last_version[stream], 1u) << stream << " never refitted";
  }
  EXPECT_GT(incident_rows, 0);  // the recording holds an injected fault
  for (const auto& [model, range] : p_range) {
    EXPECT_LT(range.first, range.second) << model.first << " model " << model.second;
  }
}

TEST_F(ReplayCliTest, RefitEveryZeroKeepsOneModelPerStream) {
  const auto output = ReadRows(Replay("frozen.csv", "--refit-every 0"));
  std::map<std::string, std::string> version;
  int scored = 0;
  for (std::size_t i = 1; i < output.size(); ++i) {
    const auto& out = output[i];
    if (out[2] != "scoring") continue;
    ++scored;
    const auto [it, first] = version.emplace(out[1], out[7]);
    EXPECT_EQ(out[7], it->second) << "line " << i + 1 << ": the model changed";
  }
  EXPECT_EQ(scored, 3 * (2880 - kWarmup));
  EXPECT_EQ(version.size(), 3u);
}

TEST_F(ReplayCliTest, BadInputExitsOneWithOneLineNamingFileAndLine) {
  const std::string no_time = WriteInput("no_time.csv", "when,stream,a\n1,s,2\n");
  EXPECT_THAT(ExpectOneLineFailure("replay --input " + no_time + " --output " + dir_ + "/x.csv"),
              AllOf(HasSubstr("no_time.csv"), HasSubstr("time")));

  const std::string nan = WriteInput("nan.csv", "time,stream,a,b\n1,s,2,3\n2,s,nan,3\n3,s,1,1\n");
  EXPECT_THAT(ExpectOneLineFailure("replay --input " + nan + " --output " + dir_ + "/x.csv"),
              AllOf(HasSubstr("nan.csv:3"), HasSubstr("nan")));

  const std::string ragged = WriteInput("ragged.csv", "time,stream,a,b\n1,s,2,3\n2,s,2,3\n3,s,2\n");
  EXPECT_THAT(ExpectOneLineFailure("replay --input " + ragged + " --output " + dir_ + "/x.csv"),
              HasSubstr("ragged.csv:4"));

  EXPECT_THAT(
      ExpectOneLineFailure("replay --input " + stream_ + " --output " + dir_ + "/x.csv --nu 1.5"),
      HasSubstr("nu = 1.5"));
  EXPECT_THAT(
      ExpectOneLineFailure("replay --input " + stream_ + " --output " + dir_ + "/x.csv --nu 0"),
      HasSubstr("nu = 0"));
  // A failed replay leaves no output behind.
  EXPECT_FALSE(std::filesystem::exists(dir_ + "/x.csv"));
}

// A recording whose writer stopped mid-row (kill -9, a full disk) ends in a line without its line
// end. replay reads the rows before it, warns once on stderr naming the file and line, and gives
// exactly the output of the same file without that line (issue 10 section 2).
TEST_F(ReplayCliTest, ALastLineCutMidRowIsSkippedWithAWarning) {
  std::istringstream plant(ReadFile(stream_));
  std::string whole, line;
  for (int i = 0; i < 400 && std::getline(plant, line); ++i) whole += line + "\n";
  ASSERT_TRUE(std::getline(plant, line));
  const std::string cut_row = line.substr(0, line.rfind(','));  // one field short, no line end
  const std::string whole_path = WriteInput("whole.csv", whole);
  const std::string cut_path = WriteInput("cut.csv", whole + cut_row);
  const std::string flags = " --window 100 --warmup 100 --support-vector-budget 32 --nu 0.05";
  const RunResult a =
      Run("replay --input " + whole_path + " --output " + dir_ + "/whole_out.csv" + flags);
  ASSERT_EQ(a.exit_code, 0) << a.err;
  const RunResult b =
      Run("replay --input " + cut_path + " --output " + dir_ + "/cut_out.csv" + flags);
  ASSERT_EQ(b.exit_code, 0) << b.err;
  EXPECT_THAT(b.err, HasSubstr("warning: " + cut_path + ":401: "));
  EXPECT_THAT(b.err, HasSubstr("the last line, cut: it has no line end; skipped"));
  EXPECT_THAT(a.err, Not(HasSubstr("cut")));
  EXPECT_EQ(ReadFile(dir_ + "/cut_out.csv"), ReadFile(dir_ + "/whole_out.csv"));
  // A cut line anywhere but at the end is an error as before (the ragged case above); so is a
  // last line that has its line end but not its fields.
  const std::string ended = WriteInput("ended.csv", whole + cut_row + "\n");
  EXPECT_THAT(ExpectOneLineFailure("replay --input " + ended + " --output " + dir_ + "/x.csv"),
              HasSubstr("ended.csv:401"));
}

// The flags follow the detector's key table (nuwatch/detector_settings.h): one per key, named as
// the key with '_' -> '-', as detector_options.h promises ("key for key").
TEST_F(ReplayCliTest, EveryDetectorKeyIsAFlagNamedAsTheKey) {
  ASSERT_EQ(Run("replay --help").exit_code, 0);
  const std::string help = ReadFile(dir_ + "/stdout.txt");
  for (const auto& key : nuwatch::DetectorKeys()) {
    std::string flag = "--" + std::string(key.name);
    std::replace(flag.begin(), flag.end(), '_', '-');
    EXPECT_THAT(help, HasSubstr(flag + " ")) << key.name << " has no flag";
  }
  // The defaults shown are the table's (DetectorOptions' initialisers).
  EXPECT_THAT(help, HasSubstr("--window INTEGER=8640"));
  // Regression: the flags had names of their own (--budget, --drift); they are the keys' now.
  for (const std::string old : {"--budget 64", "--drift", "--scale none", "--tol 0.01"}) {
    const RunResult r = Run("replay --input " + stream_ + " --output " + dir_ + "/x.csv " + old);
    EXPECT_EQ(r.exit_code, 1) << old;
    // "--budget: unknown flag (see --help)", or with the closest flag when one is near.
    EXPECT_THAT(r.err, HasSubstr(old.substr(0, old.find(' ')) + ": unknown flag")) << old;
  }
}

// Most command lines let the last of a repeated flag win (common practice, e.g. GNU tools), so a
// wrapper script can append an override. Replay is deterministic, so the run with --nu twice must
// be byte-identical to the run with the last value alone.
TEST_F(ReplayCliTest, TheLastRepeatedFlagWins) {
  const std::string twice = Replay("nu_twice.csv", "--refit-every 60 --nu 0.1");
  const std::string once = dir_ + "/nu_once.csv";
  const RunResult r = Run("replay --input " + stream_ + " --output " + once +
                          " --window 720 --warmup 720 --support-vector-budget 64 --nu 0.1 "
                          "--refit-every 60");
  ASSERT_EQ(r.exit_code, 0) << r.err;
  EXPECT_EQ(ReadFile(twice), ReadFile(once));
  EXPECT_NE(ReadFile(twice), ReadFile(Replay("nu_first.csv", "--refit-every 60")));
}

TEST_F(ReplayCliTest, BooleanKeysAreFlagsThatTakeAValueToo) {
  // drift_detection = true refits on Page-Hinkley alarms, so the model versions differ from a
  // run without it on this drifting plant; =false is the default run.
  const std::string off = ReadFile(Replay("drift_off.csv", "--refit-every 0"));
  EXPECT_EQ(ReadFile(Replay("drift_false.csv", "--refit-every 0 --drift-detection=false")), off);
  EXPECT_NE(ReadFile(Replay("drift_on.csv", "--refit-every 0 --drift-detection")), off);
  EXPECT_THAT(ExpectOneLineFailure("replay --input " + stream_ + " --output " + dir_ +
                                   "/x.csv --drift-detection=maybe"),
              HasSubstr("--drift-detection: 'maybe' is not true or false"));
  EXPECT_THAT(ExpectOneLineFailure("replay --input " + stream_ + " --output " + dir_ +
                                   "/x.csv --refit-every abc"),
              HasSubstr("--refit-every: 'abc' is not a whole number"));
}

}  // namespace
