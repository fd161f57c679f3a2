// `nuwatch tune` as a user runs it: the built binary on a small `nuwatch simulate` recording (two
// pumps, two days at one vector a minute), checking the report directory's files, that best.toml
// is a config the daemon accepts, that the pictures are real images, that tune scores a setting
// exactly as `nuwatch replay` + `nuwatch evaluate` do, and the one-line errors on bad input.
#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cstdint>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <nlohmann/json.hpp>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "charts/charts.h"
#include "common/program_test.h"
#include "formats/csv_table.h"
#include "settings/config.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
using ::testing::Not;

const std::string kBinary = std::string(NUWATCH_PROGRAM);

using nuwatch::testing_data::ProgramRun;

std::string ReadBytes(const std::string& path) {
  return nuwatch::testing_data::ReadWholeFile(path);
}

// Runs `nuwatch ARGS` with stdout and stderr captured in files (stderr is not a terminal, so
// tune prints a one-line summary instead of a progress bar).
ProgramRun Nuwatch(const std::string& arguments, const std::string& dir) {
  return nuwatch::testing_data::RunProgram(kBinary, arguments, dir);
}

class TuneCliTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    dir_ = new std::string(::testing::TempDir() + "tune_cli_" + std::to_string(::getpid()));
    std::filesystem::remove_all(*dir_);
    std::filesystem::create_directories(*dir_);
    const ProgramRun simulate = Nuwatch(
        "simulate --output " + *dir_ + "/plant --duration 2d --interval 60s --pumps 2 --seed 5",
        *dir_);
    ASSERT_EQ(simulate.exit_code, 0) << simulate.err;
  }
  static void TearDownTestSuite() {
    std::filesystem::remove_all(*dir_);
    delete dir_;
    dir_ = nullptr;
  }

  static std::string Dir() { return *dir_; }
  static std::string Stream() { return *dir_ + "/plant/stream.csv"; }
  static std::string Incidents() { return *dir_ + "/plant/incidents.csv"; }
  // Five hours of one-minute vectors per window: the first model comes after 300 of the 2880
  // vectors of each pump, and each replay takes a fraction of a second.
  static std::string SmallDetector() {
    return " --warmup 300 --refit-every 30 --support-vector-budget 64";
  }
  // `extra` may give its own --window and --false-alarm-rate lists; else the window is 300 and
  // the budget the detector's default, 0.001 (as replay's).
  static std::string Tune(const std::string& report, const std::string& extra) {
    const bool window_given = extra.find("--window") != std::string::npos;
    const bool rate_given = extra.find("--false-alarm-rate") != std::string::npos;
    return "tune --input " + Stream() + " --incidents " + Incidents() + " --report " + report +
           SmallDetector() + (window_given ? " " : " --window 300 ") +
           (rate_given ? "" : "--false-alarm-rate 0.001 ") + extra;
  }

 private:
  static std::string* dir_;
};

std::string* TuneCliTest::dir_ = nullptr;

std::uint32_t BigEndian32(const std::string& bytes, std::size_t offset) {
  std::uint32_t value = 0;
  for (std::size_t i = 0; i < 4; ++i) {
    value = (value << 8) | static_cast<unsigned char>(bytes[offset + i]);
  }
  return value;
}

// PNG (RFC 2083 / ISO 15948): the signature 89 50 4E 47 0D 0A 1A 0A, then the IHDR chunk: type
// at offset 12, width at 16 and height at 20, big-endian. Then decoded: not a blank canvas, and
// it holds the colour charts.h promises for the data lines (Okabe-Ito blue, series 0 and the
// timeline's value line).
void ExpectPicture(const std::string& path) {
  SCOPED_TRACE(path);
  const std::string bytes = ReadBytes(path);
  ASSERT_GE(bytes.size(), 24u);
  EXPECT_EQ(bytes.substr(0, 8), std::string("\x89PNG\r\n\x1a\n", 8));
  EXPECT_EQ(bytes.substr(12, 4), "IHDR");
  const std::uint32_t width = BigEndian32(bytes, 16), height = BigEndian32(bytes, 20);
  EXPECT_GE(width, 200u);
  EXPECT_GE(height, 200u);
  const charts::RasterImage image = charts::ReadPng(path);
  EXPECT_EQ(static_cast<std::uint32_t>(image.width), width);
  EXPECT_EQ(static_cast<std::uint32_t>(image.height), height);
  std::size_t ink = 0, blue = 0;
  for (const std::uint32_t pixel : image.pixels) {
    ink += pixel != 0xFFFFFF;
    blue += pixel == charts::okabe_ito::kBlue;
  }
  EXPECT_GT(ink, image.pixels.size() / 100) << "less than 1% of the pixels are not white";
  EXPECT_GT(blue, 0u) << "no pixel has the data line colour";

  const std::string svg_path = path.substr(0, path.size() - 4) + ".svg";
  const std::string svg = ReadBytes(svg_path);
  EXPECT_THAT(svg, HasSubstr("<svg")) << svg_path;
  EXPECT_THAT(svg, HasSubstr("</svg>")) << svg_path;
  EXPECT_GT(svg.size(), 5000u) << svg_path;
}

const std::vector<std::string> kMetricColumns = {"nu",
                                                 "gamma",
                                                 "window",
                                                 "support_vector_budget",
                                                 "point_precision",
                                                 "point_recall",
                                                 "point_f1",
                                                 "range_precision",
                                                 "range_recall",
                                                 "incidents_detected",
                                                 "incidents_missed",
                                                 "detection_delay_median_seconds",
                                                 "false_alarms_per_day",
                                                 "replay_seconds"};

TEST_F(TuneCliTest, WritesTheReportDirectory) {
  const std::string report = Dir() + "/report";
  const ProgramRun run =
      Nuwatch(Tune(report, "--nu 0.01,0.05,0.2 --max-false-alarms-per-day 5 --jobs 2"), Dir());
  ASSERT_EQ(run.exit_code, 0) << run.err;
  // Not a terminal: one summary line, no progress bar redraws.
  EXPECT_THAT(run.err, HasSubstr("tune: 3 setting(s) x 5760 rows replayed in"));
  EXPECT_THAT(run.err, Not(HasSubstr("\r")));
  EXPECT_THAT(run.out, HasSubstr("chosen: nu "));

  // results.csv: one row per setting, every metric column.
  const CsvTable csv = ReadCsv(report + "/results.csv");
  ASSERT_EQ(csv.rows.size(), 3u);
  for (const std::string& column : kMetricColumns) EXPECT_GE(csv.Column(column), 0) << column;
  std::set<std::string> nus;
  for (const auto& row : csv.rows) nus.insert(row[csv.RequireColumn("nu")]);
  EXPECT_EQ(nus, (std::set<std::string>{"0.01", "0.05", "0.2"}));

  // results.json: the same settings, exactly one chosen, the limit honoured when met.
  const nlohmann::json json = nlohmann::json::parse(ReadBytes(report + "/results.json"));
  ASSERT_EQ(json.at("settings").size(), 3u);
  int chosen = 0;
  for (const nlohmann::json& setting : json.at("settings")) {
    for (const std::string& column : kMetricColumns)
      EXPECT_TRUE(setting.contains(column)) << column;
    chosen += setting.at("chosen").get<bool>();
  }
  EXPECT_EQ(chosen, 1);
  const nlohmann::json& best = json.at("chosen");
  EXPECT_EQ(json.at("objective"), "f1");
  EXPECT_EQ(json.at("alarms"), "incident");
  EXPECT_EQ(json.at("max_false_alarms_per_day"), 5.0);
  if (json.at("limit_met").get<bool>()) {
    EXPECT_LE(best.at("false_alarms_per_day").get<double>(), 5.0);
  } else {
    EXPECT_THAT(run.err, HasSubstr("warning: no setting meets"));
  }

  // best.toml: a config the daemon accepts, holding the chosen setting.
  const Config config = LoadConfig(report + "/best.toml");
  EXPECT_EQ(config.detector.nu, best.at("nu").get<double>());
  EXPECT_EQ(config.detector.window, 300);
  EXPECT_EQ(config.detector.warmup, 300);
  EXPECT_EQ(config.detector.refit_every, 30);
  EXPECT_EQ(config.detector.support_vector_budget, 64);
  EXPECT_THAT(ReadBytes(report + "/best.toml"), HasSubstr("# Written by `nuwatch tune`"));

  ExpectPicture(report + "/sweep.png");
  ExpectPicture(report + "/timeline.png");
}

// Tune's figures for one setting are those of `nuwatch replay` with the same flags, scored by
// `nuwatch evaluate`: a path through the written files, the CSV readers and a second process.
TEST_F(TuneCliTest, ScoresAsReplayAndEvaluateDo) {
  const std::string report = Dir() + "/single";
  const ProgramRun tune = Nuwatch(Tune(report, "--nu 0.05 --alarm-kind anomaly --jobs 1"), Dir());
  ASSERT_EQ(tune.exit_code, 0) << tune.err;
  const std::string replayed = Dir() + "/replayed.csv";
  const ProgramRun replay = Nuwatch("replay --input " + Stream() + " --output " + replayed +
                                        " --nu 0.05 --window 300" + SmallDetector(),
                                    Dir());
  ASSERT_EQ(replay.exit_code, 0) << replay.err;
  const ProgramRun evaluate = Nuwatch(
      "evaluate --json --alarm-kind anomaly --alarms " + replayed + " --incidents " + Incidents(),
      Dir());
  ASSERT_EQ(evaluate.exit_code, 0) << evaluate.err;

  const nlohmann::json tuned =
      nlohmann::json::parse(ReadBytes(report + "/results.json")).at("chosen");
  const nlohmann::json overall = nlohmann::json::parse(evaluate.out).at("overall");
  for (const char* key : {"point_precision", "point_recall", "point_f1", "range_precision",
                          "range_recall", "incidents_detected", "false_alarms_per_day",
                          "detection_delay_median_seconds", "flagged_samples"}) {
    EXPECT_EQ(tuned.at(key), overall.at(key)) << key;
  }
  EXPECT_GT(overall.at("flagged_samples").get<int64_t>(), 0);
}

TEST_F(TuneCliTest, GivesTheSameResultsWithOneAndTwoJobs) {
  const auto results = [&](const std::string& jobs) {
    const std::string report = Dir() + "/jobs" + jobs;
    const ProgramRun run =
        Nuwatch(Tune(report, "--nu 0.02,0.1 --window 200,300 --jobs " + jobs), Dir());
    EXPECT_EQ(run.exit_code, 0) << run.err;
    nlohmann::json json = nlohmann::json::parse(ReadBytes(report + "/results.json"));
    // Wall time is the one figure that may differ.
    for (nlohmann::json& setting : json.at("settings")) setting.erase("replay_seconds");
    json.at("chosen").erase("replay_seconds");
    return json;
  };
  const nlohmann::json one = results("1");
  const nlohmann::json two = results("2");
  EXPECT_EQ(one.at("settings").size(), 4u);
  EXPECT_EQ(one, two);
}

TEST_F(TuneCliTest, RejectsBadInputWithOneLine) {
  const auto expect_error = [&](const std::string& arguments, const std::string& message) {
    SCOPED_TRACE(arguments);
    const ProgramRun run = Nuwatch(arguments, Dir());
    EXPECT_EQ(run.exit_code, 1);
    EXPECT_THAT(run.err, HasSubstr(message));
    EXPECT_EQ(std::count(run.err.begin(), run.err.end(), '\n'), 1) << run.err;
  };
  const std::string report = Dir() + "/bad";
  expect_error(Tune(report, "--nu 0.01,1.5"), "nuwatch tune: --nu: nu = 1.5 is outside (0, 1]");
  expect_error(Tune(report, "--nu 0.01,,0.02"), "--nu: '0.01,,0.02' has an empty item");
  expect_error(Tune(report, "--window 100,x"), "--window: 'x' is not a whole number");
  expect_error(Tune(report, "--objective precision"),
               "--objective: 'precision' is not one of: f1, range-f1, recall");
  expect_error(Tune(report, "--alarm-kind all"), "--alarm-kind: 'all' is not one of");
  expect_error(Tune(report, "--jobs 0"), "--jobs: 0 is out of range (1..1024)");
  expect_error(Tune(report, "--max-false-alarms-per-day lots"), "--max-false-alarms-per-day");
  expect_error(
      "tune --input " + Dir() + "/missing.csv --incidents " + Incidents() + " --report " + report,
      "missing.csv: cannot open for reading");
  std::ofstream(Dir() + "/broken.csv") << "time,stream,a\n2026-01-01T00:00:00Z,p,1\n"
                                       << "2026-01-01T00:01:00Z,p,oops\n";
  expect_error(
      "tune --input " + Dir() + "/broken.csv --incidents " + Incidents() + " --report " + report,
      "broken.csv:3: column a: 'oops' is not a finite number");
  EXPECT_FALSE(std::filesystem::exists(report + "/results.csv"));
}

}  // namespace
}  // namespace nuwatch
