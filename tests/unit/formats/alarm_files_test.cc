// Tests of reading the alarm, incident and sample files of `nuwatch evaluate` (alarm_files.h),
// and of the command itself on small files whose figures are worked out by hand beside the checks
// (definitions in /work/shared/methods.md, conventions in nuwatch/evaluation.h).
#include "formats/alarm_files.h"

#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <array>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <functional>
#include <nlohmann/json.hpp>
#include <string>

#include "common/run_command.h"
#include "formats/csv_table.h"

namespace nuwatch {
namespace {

// 2026-03-01T00:00:00Z in seconds since the epoch: 20513 days * 86400 s (days counted with
// Python's calendar.timegm).
constexpr double kMarch1 = 1772323200.0;

std::string ErrorOf(const std::function<void()>& action) {
  try {
    action();
  } catch (const CsvError& e) {
    return e.what();
  }
  return "(no error)";
}

bool StartsWith(const std::string& text, const std::string& prefix) {
  return text.rfind(prefix, 0) == 0;
}

TEST(AlarmFilesTest, ReadsReplayOutput) {
  // Two interleaved streams, mixed time notations, a learning row with an empty outlier field
  // and a learning row marked 1 (neither is an alarm), extra columns ignored.
  const CsvTable table = ParseCsv(
      "time,stream,score,outlier,incident,state\n"
      "1772323200,p1,0.1,,0,learning\n"
      "2026-03-01T00:00:00Z,p2,0.2,1,0,learning\n"
      "2026-03-01T00:00:10Z,p1,-0.3,1,1,scoring\n"
      "1772323210,p2,0.2,0,0,scoring\n"
      "\n"
      "2026-03-01T00:00:20.5Z,p1,0.4,0,0,scoring\n",
      "replay.csv");
  const AlarmFile file = AlarmsFromTable(table);
  EXPECT_EQ(file.form, AlarmFileForm::kReplay);
  ASSERT_EQ(file.streams.size(), 2u);
  const StreamAlarms& p1 = file.streams[0];
  EXPECT_EQ(p1.stream, "p1");
  EXPECT_FALSE(p1.events_given);
  ASSERT_EQ(p1.times.size(), 3u);
  EXPECT_DOUBLE_EQ(p1.times[0], kMarch1);
  EXPECT_DOUBLE_EQ(p1.times[1], kMarch1 + 10);
  EXPECT_DOUBLE_EQ(p1.times[2], kMarch1 + 20.5);
  EXPECT_EQ(p1.flagged, (std::vector<bool>{false, true, false}));
  const StreamAlarms& p2 = file.streams[1];
  EXPECT_EQ(p2.stream, "p2");
  EXPECT_EQ(p2.flagged, (std::vector<bool>{false, false}));  // the learning row's 1 is not an alarm
}

// Replay output as nuwatch replay writes it now: `anomaly` (not `outlier`), `history` rows (a
// transform refilling) carry no alarm, and with AlarmSource::kIncident the flag is whether an
// incident is open (its id in `incident`), the rule nuwatch tune scores by default.
TEST(AlarmFilesTest, ReadsAnomalyAndIncidentColumns) {
  const std::string text =
      "time,stream,state,decision,p_value,anomaly,incident\n"
      "0,p1,scoring,0.1,0.5,0,\n"
      "10,p1,scoring,-0.2,0.0005,1,\n"
      "20,p1,history,,,0,3\n"
      "30,p1,scoring,-0.3,0.0001,1,3\n"
      "40,p1,scoring,0.2,0.6,0,3\n"
      "50,p1,scoring,0.2,0.7,0,0\n";
  const AlarmFile anomalies = AlarmsFromTable(ParseCsv(text, "replay.csv"), AlarmSource::kAnomaly);
  EXPECT_EQ(anomalies.streams.at(0).flagged,
            (std::vector<bool>{false, true, false, true, false, false}));
  const AlarmFile incidents = AlarmsFromTable(ParseCsv(text, "replay.csv"), AlarmSource::kIncident);
  EXPECT_EQ(incidents.streams.at(0).flagged,
            (std::vector<bool>{false, false, true, true, true, false}));
  EXPECT_THROW(AlarmsFromTable(ParseCsv("time,anomaly,incident\n0,0,x\n", "bad.csv"),
                               AlarmSource::kIncident),
               CsvError);
  EXPECT_EQ(ParseAlarmSource("outlier"), AlarmSource::kAnomaly);  // the older word
  EXPECT_EQ(ParseAlarmSource("incident"), AlarmSource::kIncident);
  EXPECT_FALSE(ParseAlarmSource("all"));
}

TEST(AlarmFilesTest, ReplayWithoutStreamColumnIsTheUnnamedStream) {
  const AlarmFile file =
      AlarmsFromTable(ParseCsv("time,outlier\n0,0\n10,true\n20,false\n", "replay.csv"));
  ASSERT_EQ(file.streams.size(), 1u);
  EXPECT_EQ(file.streams[0].stream, "");
  EXPECT_EQ(file.streams[0].flagged, (std::vector<bool>{false, true, false}));
}

TEST(AlarmFilesTest, ReadsAnEventList) {
  const AlarmFile file =
      AlarmsFromTable(ParseCsv("stream,start,end\n"
                               "p1,2026-03-01T00:00:00Z,2026-03-01T00:01:00Z\n"
                               "p2,100,100\n"
                               "p1,1772323300,1772323400\n",
                               "events.csv"));
  EXPECT_EQ(file.form, AlarmFileForm::kEventList);
  ASSERT_EQ(file.streams.size(), 2u);
  EXPECT_TRUE(file.streams[0].events_given);
  EXPECT_TRUE(file.streams[0].times.empty());
  ASSERT_EQ(file.streams[0].events.size(), 2u);
  EXPECT_DOUBLE_EQ(file.streams[0].events[0].start_seconds, kMarch1);
  EXPECT_DOUBLE_EQ(file.streams[0].events[0].end_seconds, kMarch1 + 60);
  EXPECT_DOUBLE_EQ(file.streams[0].events[1].start_seconds, kMarch1 + 100);
  ASSERT_EQ(file.streams[1].events.size(), 1u);
  EXPECT_DOUBLE_EQ(file.streams[1].events[0].end_seconds, 100);
}

TEST(AlarmFilesTest, ReadsIncidents) {
  const std::vector<Incident> incidents =
      IncidentsFromTable(ParseCsv("stream,start,end,kind\n"
                                  "p1,2026-03-01T00:00:00Z,2026-03-01T01:00:00+01:00,bearing wear\n"
                                  "p2,5,5,\n",
                                  "incidents.csv"));
  ASSERT_EQ(incidents.size(), 2u);
  EXPECT_EQ(incidents[0].stream, "p1");
  EXPECT_DOUBLE_EQ(incidents[0].start_seconds, kMarch1);
  EXPECT_DOUBLE_EQ(incidents[0].end_seconds, kMarch1);  // 01:00+01:00 is 00:00Z
  EXPECT_EQ(incidents[0].kind, "bearing wear");
  EXPECT_EQ(incidents[1].kind, "");
  // No stream column: the unnamed stream. A header-only file: no incidents.
  EXPECT_EQ(IncidentsFromTable(ParseCsv("start,end\n1,2\n", "i.csv"))[0].stream, "");
  EXPECT_TRUE(IncidentsFromTable(ParseCsv("stream,start,end\n", "i.csv")).empty());
}

TEST(AlarmFilesTest, AttachesSampleTimesToAnEventList) {
  AlarmFile file = AlarmsFromTable(ParseCsv("stream,start,end\np1,10,20\n", "events.csv"));
  AttachSampleTimes(ParseCsv("time,stream,x\n0,p1,1\n0,p3,1\n10,p1,1\n20,p1,1\n", "samples.csv"),
                    &file);
  ASSERT_EQ(file.streams.size(), 2u);
  EXPECT_EQ(file.streams[0].times, (std::vector<double>{0, 10, 20}));
  EXPECT_EQ(file.streams[1].stream, "p3");  // a stream with samples and no alarm event
  EXPECT_TRUE(file.streams[1].events_given);
  EXPECT_TRUE(file.streams[1].events.empty());
  // A stream with alarm events but no samples is an error, not a silent mix of conventions.
  AlarmFile other = AlarmsFromTable(ParseCsv("stream,start,end\np9,10,20\n", "events.csv"));
  EXPECT_EQ(ErrorOf([&] { AttachSampleTimes(ParseCsv("time\n0\n", "samples.csv"), &other); }),
            "samples.csv: no samples of stream 'p9', which has alarm events in events.csv");
}

TEST(AlarmFilesTest, RejectsBadFilesNamingFileAndLine) {
  const auto alarms = [](const std::string& text) {
    return ErrorOf([&] { AlarmsFromTable(ParseCsv(text, "alarms.csv")); });
  };
  const auto incidents = [](const std::string& text) {
    return ErrorOf([&] { IncidentsFromTable(ParseCsv(text, "incidents.csv")); });
  };
  EXPECT_EQ(alarms("time,outlier\n0,0\n1,2\n"), "alarms.csv:3: column outlier: '2' is not 0 or 1");
  EXPECT_EQ(alarms("time,outlier\n0,0\nyesterday,1\n"),
            "alarms.csv:3: column time: 'yesterday' is not a timestamp (ISO-8601 or seconds since "
            "the epoch)");
  EXPECT_TRUE(StartsWith(alarms("time,stream,outlier\n10,a,0\n5,b,0\n4,a,1\n"),
                         "alarms.csv:4: time 4 is before the previous sample of stream 'a' "
                         "(line 2)"));
  EXPECT_EQ(alarms("stream,start,end\na,10,9\n"), "alarms.csv:2: end 9 is before start 10");
  EXPECT_EQ(alarms("stream,start,end\na,10,\n"),
            "alarms.csv:2: column end: '' is not a timestamp (ISO-8601 or seconds since the "
            "epoch)");
  EXPECT_TRUE(StartsWith(alarms("stream,time,score\na,1,0\n"), "alarms.csv: neither replay"));
  EXPECT_EQ(alarms("stream,outlier\na,1\n"), "alarms.csv: no column named time");
  EXPECT_EQ(incidents("stream,start,end\na,1,2\n\nb,2026-03-01T00:00:00Z,1\n"),
            "incidents.csv:4: end 1 is before start 2026-03-01T00:00:00Z");
  EXPECT_EQ(incidents("stream,start\na,1\n"), "incidents.csv: no column named end");
  // Sample times are for event lists only.
  AlarmFile replay = AlarmsFromTable(ParseCsv("time,outlier\n0,0\n", "replay.csv"));
  EXPECT_TRUE(
      StartsWith(ErrorOf([&] { AttachSampleTimes(ParseCsv("time\n0\n", "samples.csv"), &replay); }),
                 "samples.csv: sample times apply to an alarm event list only"));
}

// --- the `nuwatch evaluate` command on files ---

using nuwatch::testing_data::CommandResult;

CommandResult RunEvaluate(const std::string& arguments) {
  return nuwatch::testing_data::RunCommand(std::string(NUWATCH_PROGRAM) + " evaluate " + arguments);
}

class EvaluateCommandTest : public ::testing::Test {
 protected:
  void SetUp() override {
    if (!std::filesystem::exists(std::string(NUWATCH_PROGRAM))) {
      GTEST_SKIP() << "the nuwatch program is not built";
    }
    directory_ = std::filesystem::temp_directory_path() /
                 ("nuwatch_alarm_files_test_" + std::to_string(::getpid()));
    std::filesystem::create_directories(directory_);
  }
  void TearDown() override {
    if (!directory_.empty()) std::filesystem::remove_all(directory_);
  }
  std::string Write(const std::string& name, const std::string& text) {
    const std::filesystem::path path = directory_ / name;
    std::ofstream(path) << text;
    return path.string();
  }
  std::filesystem::path directory_;
};

TEST_F(EvaluateCommandTest, JsonFiguresOfAReplayFile) {
  // Stream p1: samples at t = 0..9 s flagged at 1, 4, 5, 6, 8, 9; incident [3, 6].
  // By hand: TP 3, FP 3, FN 1 -> precision 0.5, recall 0.75, F1 0.6; detected with delay 1 s;
  // false alarm events {1}, {8, 9}; incident-free time 10 - 3 = 7 s -> 2 / (7 / 86400) per day;
  // range recall 3/4, range precision 1/3. Stream p2 (in the incidents only) is missed.
  std::string replay = "time,stream,outlier,state\n";
  for (int t = 0; t < 10; ++t) {
    const bool flagged = t == 1 || (t >= 4 && t <= 6) || t >= 8;
    replay += std::to_string(t) + ",p1," + (flagged ? "1" : "0") + ",scoring\n";
  }
  const std::string alarms = Write("replay.csv", replay);
  const std::string incidents =
      Write("incidents.csv", "stream,start,end,kind\np1,3,6,x\np2,0,1,y\n");
  const CommandResult result = RunEvaluate("--alarm-kind anomaly --alarms " + alarms +
                                           " --incidents " + incidents + " --json");
  ASSERT_EQ(result.exit_code, 0) << result.output;
  const nlohmann::json json = nlohmann::json::parse(result.output);
  const nlohmann::json& p1 = json["streams"]["p1"];
  EXPECT_DOUBLE_EQ(p1["point_precision"].get<double>(), 0.5);
  EXPECT_DOUBLE_EQ(p1["point_recall"].get<double>(), 0.75);
  EXPECT_DOUBLE_EQ(p1["point_f1"].get<double>(), 0.6);
  EXPECT_DOUBLE_EQ(p1["detection_delay_median_seconds"].get<double>(), 1.0);
  EXPECT_DOUBLE_EQ(p1["false_alarms_per_day"].get<double>(), 172800.0 / 7.0);
  EXPECT_DOUBLE_EQ(p1["range_recall"].get<double>(), 0.75);
  EXPECT_DOUBLE_EQ(p1["range_precision"].get<double>(), 1.0 / 3.0);
  EXPECT_TRUE(json["streams"]["p2"]["point_recall"].is_null());
  EXPECT_EQ(json["overall"]["incidents_detected"].get<int>(), 1);
  EXPECT_EQ(json["overall"]["incidents_missed"].get<int>(), 1);
}

TEST_F(EvaluateCommandTest, EventListWithoutSamplesReportsNullForSampleFigures) {
  const std::string alarms = Write("events.csv", "stream,start,end\np1,100,110\np1,200,205\n");
  const std::string incidents = Write("incidents.csv", "stream,start,end\np1,105,150\n");
  const CommandResult result =
      RunEvaluate("--alarms " + alarms + " --incidents " + incidents + " --json");
  ASSERT_EQ(result.exit_code, 0) << result.output;
  const nlohmann::json overall = nlohmann::json::parse(result.output)["overall"];
  // [100, 110] meets [105, 150] at 105: delay 0; [200, 205] is a false alarm.
  EXPECT_EQ(overall["incidents_detected"].get<int>(), 1);
  EXPECT_EQ(overall["false_alarm_events"].get<int>(), 1);
  EXPECT_TRUE(overall["point_precision"].is_null());
  EXPECT_TRUE(overall["range_recall"].is_null());
  EXPECT_TRUE(overall["false_alarms_per_day"].is_null());
}

TEST_F(EvaluateCommandTest, BadInputIsOneLineAndExitCodeOne) {
  const std::string alarms = Write("replay.csv", "time,outlier\n0,0\n1,maybe\n");
  const std::string incidents = Write("incidents.csv", "stream,start,end\n,0,1\n");
  const CommandResult bad_file =
      RunEvaluate("--alarm-kind anomaly --alarms " + alarms + " --incidents " + incidents);
  EXPECT_EQ(bad_file.exit_code, 1);
  EXPECT_EQ(bad_file.output,
            "nuwatch evaluate: " + alarms + ":3: column outlier: 'maybe' is not 0 or 1\n");
  const std::string good = Write("good.csv", "time,outlier\n0,0\n1,1\n");
  const CommandResult bad_bias =
      RunEvaluate("--alarms " + good + " --incidents " + incidents + " --bias sideways");
  EXPECT_EQ(bad_bias.exit_code, 1);
  EXPECT_EQ(bad_bias.output,
            "nuwatch evaluate: --bias: 'sideways' is not one of: flat, front, back, middle\n");
}

}  // namespace
}  // namespace nuwatch
