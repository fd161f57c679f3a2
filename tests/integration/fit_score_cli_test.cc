// `nuwatch fit`, `score`, `inspect` and `bench` run as programs: the output formats the README and
// the issue fix (later checks call them exactly as written), the agreement of `score` with the
// model's own decision rule, and one-line errors naming the file, the line and the problem for
// every kind of bad input.
#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/wait.h>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <limits>
#include <nlohmann/json.hpp>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "common/program_test.h"

namespace {

using ::testing::HasSubstr;

const std::string kNuwatch = NUWATCH_PROGRAM;

using nuwatch::testing_data::ProgramRun;
using nuwatch::testing_data::ReadWholeFile;

class FitScoreCli : public nuwatch::testing_data::ProgramTest {
 protected:
  ProgramRun Nuwatch(const std::string& args) const { return Run(kNuwatch, args); }

  // Gaussian training data with a time column, which fit must skip.
  std::string TrainingFile(int rows) const {
    std::mt19937_64 generator(3);
    std::normal_distribution<double> normal;
    std::ostringstream csv;
    csv << "time,pressure,flow,current\n";
    for (int i = 0; i < rows; ++i)
      csv << 1767225600 + 60 * i << "," << 4 + 0.1 * normal(generator) << ","
          << 300 + 5 * normal(generator) << "," << 50 + normal(generator) << "\n";
    return Write("train.csv", csv.str());
  }
};

int CountLines(const std::string& text) {
  return static_cast<int>(std::count(text.begin(), text.end(), '\n'));
}

TEST_F(FitScoreCli, FitScoreInspectRoundTrip) {
  const std::string train = TrainingFile(400);
  ProgramRun fit = Nuwatch("fit --input " + train + " --output " + Path("m.nuw") + " --nu 0.1");
  ASSERT_EQ(fit.exit_code, 0) << fit.err;
  EXPECT_EQ(fit.err.rfind("fitted ", 0), 0u) << "a summary on stderr: " << fit.err;
  EXPECT_THAT(fit.err, HasSubstr("\ncalibrated (conformal"));

  // Two rows: a typical one and one far outside on `current`.
  const std::string queries =
      Write("q.csv", "time,pressure,flow,current\n1,4.0,300,50\n2,4.0,300,95\n");
  ProgramRun score =
      Nuwatch("score --model " + Path("m.nuw") + " --input " + queries + " --explain 2");
  ASSERT_EQ(score.exit_code, 0) << score.err;
  std::istringstream lines(score.out);
  std::string header, inside, outside;
  std::getline(lines, header);
  std::getline(lines, inside);
  std::getline(lines, outside);
  // The time column is kept; the scores follow.
  EXPECT_EQ(header, "time,decision,p_value,anomaly,feature_1,share_1,feature_2,share_2");
  const auto fields = [](const std::string& line) {
    std::vector<std::string> out;
    std::istringstream in(line);
    for (std::string f; std::getline(in, f, ',');) out.push_back(f);
    return out;
  };
  const std::vector<std::string> a = fields(inside), b = fields(outside);
  ASSERT_EQ(a.size(), 8u);
  ASSERT_EQ(b.size(), 8u);
  // The stranger vector has the lower decision and the lower p-value; 45 standard deviations out
  // on `current` it is flagged, and that feature explains most of the decision.
  EXPECT_GT(std::stod(a[1]), std::stod(b[1]));
  EXPECT_GT(std::stod(a[2]), std::stod(b[2]));
  EXPECT_GT(std::stod(a[2]), 0.0);
  EXPECT_LE(std::stod(a[2]), 1.0);
  EXPECT_EQ(b[3], "1");
  EXPECT_EQ(b[4], "current");

  ProgramRun inspect = Nuwatch("inspect " + Path("m.nuw") + " --json");
  ASSERT_EQ(inspect.exit_code, 0) << inspect.err;
  const auto j = nlohmann::json::parse(inspect.out);
  for (const char* key : {"format_version", "kernel", "gamma", "nu", "dims", "n_train", "n_support",
                          "n_bounded", "rho", "iterations", "objective"})
    EXPECT_TRUE(j.contains(key)) << key;
  EXPECT_EQ(j["dims"], 3);
  EXPECT_EQ(j["n_train"], 400);
  // The nu-property (Schölkopf et al. 2001, Prop. 4): n_bounded <= nu l <= n_support.
  EXPECT_LE(j["n_bounded"].get<int>(), 40);
  EXPECT_GE(j["n_support"].get<int>(), 40);
  // The calibration travels with the model: the level in force is within the budget asked for.
  EXPECT_TRUE(j["calibrated"].get<bool>());
  EXPECT_EQ(j["calibration_scores"], 400);
  EXPECT_DOUBLE_EQ(j["false_alarm_rate"].get<double>(), 0.001);
  EXPECT_LE(j["alarm_level"].get<double>(), 0.001);
  EXPECT_GT(j["alarm_level"].get<double>(), 0.0);
}

// gamma = min_volume through the flag, the model file and inspect (kernel_width.h): the width kept
// is one of the five candidates, scale x 1/4 .. 4, the one of least log volume, and the choice is
// printed by fit; a config-style mistake (a linear kernel) is refused naming both keys.
TEST_F(FitScoreCli, MinVolumeWidthIsChosenKeptAndShown) {
  const std::string train = TrainingFile(300);
  ProgramRun fit = Nuwatch("fit --input " + train + " --output " + Path("m.nuw") +
                           " --gamma min_volume --false-alarm-rate 0.01");
  ASSERT_EQ(fit.exit_code, 0) << fit.err;
  EXPECT_THAT(fit.err, HasSubstr("\ngamma min_volume: log volume of the calibrated envelope"));
  ProgramRun inspect = Nuwatch("inspect --json " + Path("m.nuw"));
  ASSERT_EQ(inspect.exit_code, 0) << inspect.err;
  const auto j = nlohmann::json::parse(inspect.out);
  EXPECT_EQ(j["gamma_rule"], "min_volume");
  ASSERT_TRUE(j.contains("gamma_candidates"));
  const auto& rows = j["gamma_candidates"];
  ASSERT_EQ(rows.size(), 5u);
  // scale = 1 / (d Var) = 1 / 3 on 3 whitened features (kernel.h; whitened data has unit
  // variance along every axis), so the grid is 1/12 .. 4/3.
  EXPECT_NEAR(rows[2]["gamma"].get<double>(), 1.0 / 3.0, 1e-2);
  double least = std::numeric_limits<double>::infinity(), least_gamma = 0;
  for (const auto& row : rows) {
    ASSERT_TRUE(row["log_volume"].is_number()) << row.dump();
    if (row["log_volume"].get<double>() < least) {
      least = row["log_volume"].get<double>();
      least_gamma = row["gamma"].get<double>();
    }
  }
  EXPECT_EQ(j["gamma"].get<double>(), least_gamma);
  ProgramRun linear = Nuwatch("fit --input " + train + " --output " + Path("l.nuw") +
                              " --gamma min_volume --kernel linear");
  EXPECT_EQ(linear.exit_code, 1);
  EXPECT_THAT(linear.err, HasSubstr("min_volume"));
  EXPECT_THAT(linear.err, HasSubstr("rbf"));
}

// Through the programs: fit on 400 vectors, score 4000 fresh ones of the same distribution. At a
// 5% budget (incident budget off) the realised flagged fraction is near 5%: conformal validity
// (Vovk, Gammerman & Shafer 2005) bounds it by the level for exchangeable data, and the models
// fitted for calibration on 80% of the data make it somewhat conservative. The band [0.4, 1.6]
// times the level covers the scatter of one calibration set of 400 (about +-22% relative at one
// standard deviation for 20 exceedances) and that conservatism.
TEST_F(FitScoreCli, FreshVectorsAreFlaggedAtTheBudgetedRate) {
  const std::string train = TrainingFile(400);
  ProgramRun fit = Nuwatch("fit --input " + train + " --output " + Path("m.nuw") +
                           " --false-alarm-rate 0.05 --false-incidents-per-day 0");
  ASSERT_EQ(fit.exit_code, 0) << fit.err;
  std::mt19937_64 generator(4);  // fresh draws: another seed than the training file's
  std::normal_distribution<double> normal;
  std::ostringstream csv;
  csv << "pressure,flow,current\n";
  for (int i = 0; i < 4000; ++i)
    csv << 4 + 0.1 * normal(generator) << "," << 300 + 5 * normal(generator) << ","
        << 50 + normal(generator) << "\n";
  ProgramRun score =
      Nuwatch("score --model " + Path("m.nuw") + " --input " + Write("fresh.csv", csv.str()));
  ASSERT_EQ(score.exit_code, 0) << score.err;
  std::istringstream lines(score.out);
  std::string line;
  std::getline(lines, line);
  ASSERT_EQ(line, "decision,p_value,anomaly");
  int flagged = 0, rows = 0;
  while (std::getline(lines, line)) {
    ++rows;
    const double p = std::stod(line.substr(line.find(',') + 1));
    const bool anomaly = line.back() == '1';
    EXPECT_EQ(anomaly, p <= 0.05) << line;
    flagged += anomaly;
  }
  ASSERT_EQ(rows, 4000);
  EXPECT_GE(flagged, 0.4 * 0.05 * rows);
  EXPECT_LE(flagged, 1.6 * 0.05 * rows);
}

TEST_F(FitScoreCli, BenchJsonHasTheCapacityPlanningKeys) {
  ProgramRun bench = Nuwatch("bench --dims 4 --window 300 --support-vector-budget 16 --json");
  ASSERT_EQ(bench.exit_code, 0) << bench.err;
  const auto j = nlohmann::json::parse(bench.out);
  for (const char* key : {"fit_seconds", "score_vectors_per_second", "score_p50_seconds",
                          "score_p99_seconds", "model_bytes", "refit_seconds", "compress_seconds",
                          "stream_bytes", "window_cold_fit_min_volume_seconds"})
    EXPECT_TRUE(j.contains(key)) << key;
  EXPECT_LE(j["support_vectors"].get<int>(), 16);
  EXPECT_LE(j["score_p50_seconds"].get<double>(), j["score_p99_seconds"].get<double>());
}

// Every bad input exits 1 with one line that names the file and, where there is one, the line.
TEST_F(FitScoreCli, BadInputsGiveOneLineNamingFileAndLine) {
  struct Case {
    std::string name, csv, expected;
  };
  const std::vector<Case> cases = {
      {"nan.csv", "a,b\n1,2\nnan,3\n", "nan.csv:3: column a: 'nan' is not a finite number"},
      {"text.csv", "a,b\n1,2\n3,high\n", "text.csv:3: column b: 'high' is not a finite number"},
      {"ragged.csv", "a,b\n1,2\n3\n", "ragged.csv:3: 1 fields, the header has 2"},
      {"empty.csv", "", "empty.csv: empty file"},
      {"header.csv", "a,b\n", "header.csv: no data rows"},
      // Regression: a one-row file used to give a model of one support vector.
      {"one.csv", "a,b\n1,2\n", "one.csv: 1 vector(s) to fit"},
  };
  for (const Case& c : cases) {
    ProgramRun run = Nuwatch("fit --input " + Write(c.name, c.csv) + " --output " + Path("x.nuw"));
    EXPECT_EQ(run.exit_code, 1) << c.name;
    EXPECT_EQ(CountLines(run.err), 1) << c.name << ": " << run.err;
    EXPECT_THAT(run.err, HasSubstr(c.expected)) << c.name;
  }
  const std::string train = TrainingFile(50);
  struct Flag {
    std::string flags, expected;
  };
  // The ranges are the detector key table's (nuwatch/detector_settings.h), as in the config file;
  // a value that is not of the key's type names the flag.
  for (const Flag& f : std::vector<Flag>{
           {"--nu 1.5", "nu = 1.5 is outside (0, 1]"},
           {"--nu 0", "nu = 0 is outside (0, 1]"},
           {"--gamma 0", "--gamma: '0' is not scale, median, min_volume or a number > 0"},
           {"--gamma -2", "--gamma: '-2'"},
           {"--kernel sigmoid", "--kernel: 'sigmoid' is not one of rbf, linear, poly"},
           {"--cache-bytes 100", "--cache-bytes = 100 must be at least 1048576"},
           {"--tolerance 0", "tolerance = 0 must be positive"},
           {"--nu abc", "--nu: 'abc' is not a number"},
           // Regression: the flags had names of their own; they are the keys' now.
           {"--tol 0.01", "--tol"},
           {"--cache-mb 10", "--cache-mb"},
           {"--scale none", "--scale"}}) {
    ProgramRun run = Nuwatch("fit --input " + train + " --output " + Path("x.nuw") + " " + f.flags);
    EXPECT_EQ(run.exit_code, 1) << f.flags;
    EXPECT_EQ(CountLines(run.err), 1) << f.flags << ": " << run.err;
    EXPECT_THAT(run.err, HasSubstr(f.expected)) << f.flags;
  }
  // A model whose dimensions differ from the input.
  ASSERT_EQ(Nuwatch("fit --input " + train + " --output " + Path("m.nuw")).exit_code, 0);
  ProgramRun mismatch = Nuwatch("score --model " + Path("m.nuw") + " --input " +
                                Write("two.csv", "pressure,flow\n4,300\n"));
  EXPECT_EQ(mismatch.exit_code, 1);
  EXPECT_THAT(mismatch.err, HasSubstr("two.csv: 2 feature columns, the model"));
  // A corrupted model file.
  std::string bytes = ReadWholeFile(Path("m.nuw"));
  bytes[bytes.size() / 2] ^= 0x40;
  std::ofstream(Path("bad.nuw"), std::ios::binary) << bytes;
  ProgramRun corrupt = Nuwatch("inspect " + Path("bad.nuw"));
  EXPECT_EQ(corrupt.exit_code, 1);
  EXPECT_THAT(corrupt.err, HasSubstr("bad.nuw: checksum mismatch"));
}

// Regression: the CSV readers split at every comma, so a quoted header "pressure" gave a feature
// named with its quotes and a stream key with a comma broke the row. Quoting as RFC 4180 defines
// it; score copies the time and stream fields, quoted again where they need it.
TEST_F(FitScoreCli, ReadsQuotedFieldsAndWritesThemBack) {
  std::ostringstream csv;
  csv << "\"time\",\"stream\",\"pressure\",\"flow\"\n";
  std::mt19937_64 generator(5);
  std::normal_distribution<double> normal;
  for (int i = 0; i < 200; ++i)
    csv << 1767225600 + 60 * i << ",\"line 1, pump \"\"a\"\"\"," << 4 + 0.1 * normal(generator)
        << "," << 300 + 5 * normal(generator) << "\n";
  const std::string input = Write("quoted.csv", csv.str());
  ASSERT_EQ(Nuwatch("fit --input " + input + " --output " + Path("q.nuw")).exit_code, 0);
  ProgramRun inspect = Nuwatch("inspect --json " + Path("q.nuw"));
  const nlohmann::json model = nlohmann::json::parse(inspect.out);
  EXPECT_EQ(model["feature_names"], (std::vector<std::string>{"pressure", "flow"}));
  ProgramRun score = Nuwatch("score --model " + Path("q.nuw") + " --input " + input);
  ASSERT_EQ(score.exit_code, 0) << score.err;
  std::istringstream lines(score.out);
  std::string header, first;
  std::getline(lines, header);
  std::getline(lines, first);
  EXPECT_EQ(header, "time,stream,decision,p_value,anomaly");
  EXPECT_EQ(first.rfind("1767225600,\"line 1, pump \"\"a\"\"\",", 0), 0u) << first;
}

// `score` reads a file of more than one block (8192 rows) on a second thread while it scores the
// block before. Block boundaries must not show: the scores of a 20,000-row file equal those of its
// rows scored as three files of one block or less each, row for row, with the time and stream
// fields copied in order. A bad row in the third block ends the command with the usual one-line
// error naming the file and line, after the rows before it.
TEST_F(FitScoreCli, AFileOfManyBlocksScoresAsItsPartsDo) {
  const std::string train = TrainingFile(300);
  ASSERT_EQ(Nuwatch("fit --input " + train + " --output " + Path("m.nuw")).exit_code, 0);
  std::mt19937_64 generator(9);
  std::normal_distribution<double> normal;
  constexpr int kRows = 20000;
  std::vector<std::string> rows;
  for (int i = 0; i < kRows; ++i) {
    std::ostringstream row;
    row.precision(17);
    row << 1767225600 + i << "," << 4 + 0.1 * normal(generator) << ","
        << 300 + 5 * normal(generator) << "," << 50 + normal(generator) << "\n";
    rows.push_back(row.str());
  }
  const std::string header = "time,pressure,flow,current\n";
  std::string whole = header;
  for (const std::string& row : rows) whole += row;
  ProgramRun all = Nuwatch("score --model " + Path("m.nuw") + " --input " +
                           Write("all.csv", whole) + " --output " + Path("all.out"));
  ASSERT_EQ(all.exit_code, 0) << all.err;
  std::string parts_out;
  for (int part = 0, begin = 0; begin < kRows; ++part, begin += 7000) {
    std::string text = header;
    for (int i = begin; i < std::min(kRows, begin + 7000); ++i) text += rows[i];
    ProgramRun run = Nuwatch("score --model " + Path("m.nuw") + " --input " +
                             Write("part" + std::to_string(part) + ".csv", text));
    ASSERT_EQ(run.exit_code, 0) << run.err;
    // Each part's header once, at the top.
    parts_out += part == 0 ? run.out : run.out.substr(run.out.find('\n') + 1);
  }
  const std::string all_out = ReadWholeFile(Path("all.out"));
  EXPECT_EQ(CountLines(all_out), kRows + 1);
  EXPECT_TRUE(all_out == parts_out) << "the block-by-block scores differ from the parts'";
  EXPECT_EQ(all_out.substr(all_out.rfind('\n', all_out.size() - 2) + 1, 11),
            std::to_string(1767225600 + kRows - 1) + ",");

  std::string bad = header;
  for (int i = 0; i < kRows; ++i) bad += i == 17000 ? "1,4,300,high\n" : rows[i];
  ProgramRun broken = Nuwatch("score --model " + Path("m.nuw") + " --input " +
                              Write("bad.csv", bad) + " --output " + Path("bad.out"));
  EXPECT_EQ(broken.exit_code, 1);
  EXPECT_EQ(CountLines(broken.err), 1) << broken.err;
  EXPECT_THAT(broken.err,
              HasSubstr("bad.csv:17002: column current: 'high' is not a finite number"));
  EXPECT_LE(CountLines(ReadWholeFile(Path("bad.out"))), 17001);
}

}  // namespace
