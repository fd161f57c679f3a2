// Tests of the tuning library (daemon/offline/tuning.h): grid expansion, list parsing, selection
// under a false-alarm limit, determinism across thread counts, and end-to-end choices on crafted
// streams whose best setting follows from published properties of the nu one-class SVM:
// - the nu-property (Schölkopf, Platt, Shawe-Taylor, Smola, Williamson, "Estimating the support of
//   a high-dimensional distribution", Neural Computation 13(7), 2001, Prop. 4): nu is an upper
//   bound on the fraction of training outliers and tends to it, so a detector with nu = 0.5 flags
//   about half of the normal vectors it is trained on, and about as many of fresh ones;
// - far from every support vector an RBF decision function tends to -rho < 0 (f(x) = sum_i a_i
//   exp(-gamma ||x - s_i||^2) - rho, with every kernel term -> 0), so a vector shifted by six
//   standard deviations is flagged by any setting;
// - a small nu makes the envelope hug the training window, so the alarm rate on fresh normal data
//   exceeds nu (our /work/shared/methods.md, "Kernel width and scaling"; common practice).
// The streams are Gaussian noise from a fixed-seed generator written here (Box-Muller), so each
// run sees the same data.
#include "offline/tuning.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <limits>
#include <numbers>
#include <random>
#include <string>
#include <vector>

#include "formats/csv_table.h"
#include "settings/config.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

constexpr double kStart = 1.7e9;  // seconds since the epoch
constexpr double kInterval = 60;  // one vector per stream per minute
constexpr int kSamplesPerStream = 3000;

// Standard normal deviates by the Box-Muller transform (Box & Muller, Ann. Math. Statist. 29,
// 1958), from a 64-bit Mersenne Twister, whose output sequence the C++ standard fixes.
class Gaussian {
 public:
  explicit Gaussian(uint64_t seed) : engine_(seed) {}
  double Next() {
    const double u1 = static_cast<double>(engine_() >> 11) * 0x1.0p-53;
    const double u2 = static_cast<double>(engine_() >> 11) * 0x1.0p-53;
    return std::sqrt(-2 * std::log(1 - u1)) * std::cos(2 * std::numbers::pi * u2);
  }

 private:
  std::mt19937_64 engine_;
};

// Samples [first, last] of a stream, whose first feature is shifted by `shift` standard
// deviations (0: the labelled window holds normal data).
struct InjectedWindow {
  int stream = 0;
  int first = 0, last = 0;
  double shift = 0;
};

// Streams "a", "b", ... of two N(0, 1) features, interleaved one row per stream per interval.
StreamRecording MakeRecording(int streams, const std::vector<InjectedWindow>& windows,
                              uint64_t seed = 7) {
  StreamRecording r;
  r.path = "synthetic.csv";
  r.feature_names = {"x", "y"};
  for (int s = 0; s < streams; ++s) r.streams.push_back(std::string(1, static_cast<char>('a' + s)));
  r.values.resize(static_cast<int64_t>(streams) * kSamplesPerStream, 2);
  Gaussian noise(seed);
  for (int i = 0; i < kSamplesPerStream; ++i) {
    for (int s = 0; s < streams; ++s) {
      const int64_t row = static_cast<int64_t>(i) * streams + s;
      double x = noise.Next();
      const double y = noise.Next();
      for (const InjectedWindow& w : windows) {
        if (w.stream == s && i >= w.first && i <= w.last) x += w.shift;
      }
      r.times.push_back(kStart + kInterval * i);
      r.time_text.push_back(std::to_string(kStart + kInterval * i));
      r.stream_of_row.push_back(s);
      r.values(row, 0) = x;
      r.values(row, 1) = y;
    }
  }
  return r;
}

std::vector<Incident> IncidentsOf(const std::vector<InjectedWindow>& windows) {
  std::vector<Incident> incidents;
  for (const InjectedWindow& w : windows) {
    incidents.push_back({std::string(1, static_cast<char>('a' + w.stream)),
                         kStart + kInterval * w.first, kStart + kInterval * w.last, "injected"});
  }
  return incidents;
}

// A window of 400 vectors (6 h 40 min) with a refit every 100: small enough for a quick replay.
// The in-sample rule (calibration_folds = 0: flag decision < 0), so that nu alone decides how much
// a setting flags: these tests are about the grid, the scoring and the choice, and nu is the one
// knob whose effect on the flags is known in advance (the nu-property).
Config SmallDetectorConfig() {
  Config config = DefaultConfig();
  config.detector.window = 400;
  config.detector.warmup = 400;
  config.detector.refit_every = 100;
  config.detector.support_vector_budget = 64;
  config.detector.calibration_folds = 0;
  return config;
}

const SettingResult& ResultWithNu(const TuningReport& report, double nu) {
  for (const SettingResult& r : report.results) {
    if (r.detector.nu == nu) return r;
  }
  throw std::runtime_error("no result with nu " + std::to_string(nu));
}

// ---------------------------------------------------------------------------------------------
// Lists and the grid

TEST(TuningListsTest, ParsesCommaSeparatedValues) {
  EXPECT_EQ(ParseNuList(" 0.01, 0.02 ,1"), (std::vector<double>{0.01, 0.02, 1.0}));
  EXPECT_EQ(ParseWindowList("2,1440"), (std::vector<int64_t>{2, 1440}));
  EXPECT_EQ(ParseSupportVectorBudgetList("1, 64"), (std::vector<int64_t>{1, 64}));
  EXPECT_EQ(ParseGammaList("min_volume,scale")[0].mode, GammaSpec::Mode::kMinVolume);
  const std::vector<GammaSpec> gammas = ParseGammaList("scale,median,0.25");
  ASSERT_EQ(gammas.size(), 3u);
  EXPECT_EQ(gammas[0].mode, GammaSpec::Mode::kScale);
  EXPECT_EQ(gammas[1].mode, GammaSpec::Mode::kMedian);
  EXPECT_EQ(gammas[2].mode, GammaSpec::Mode::kValue);
  EXPECT_EQ(gammas[2].value, 0.25);
}

// The message for a rejected list; fails the test when the list is accepted.
template <typename Parse>
std::string ErrorOf(Parse parse, const std::string& text) {
  try {
    parse(text);
  } catch (const TuningError& e) {
    return e.what();
  }
  ADD_FAILURE() << "accepted: '" << text << "'";
  return "";
}

TEST(TuningListsTest, RejectsBadListsNamingTheItem) {
  // nu is in (0, 1] (the dual's box 0 <= a_i <= 1/(nu l) needs nu > 0; nu > 1 is infeasible).
  EXPECT_THAT(ErrorOf(ParseNuList, "0.01,0"), HasSubstr("nu = 0 is outside (0, 1]"));
  EXPECT_THAT(ErrorOf(ParseNuList, "1.5"), HasSubstr("nu = 1.5 is outside (0, 1]"));
  EXPECT_THAT(ErrorOf(ParseNuList, "-0.1"), HasSubstr("outside (0, 1]"));
  EXPECT_THAT(ErrorOf(ParseNuList, "nan"), HasSubstr("'nan' is not a number"));
  EXPECT_THAT(ErrorOf(ParseNuList, "0.1;0.2"), HasSubstr("'0.1;0.2' is not a number"));
  EXPECT_THAT(ErrorOf(ParseNuList, "0.1,,0.2"), HasSubstr("empty item (item 2)"));
  EXPECT_THAT(ErrorOf(ParseNuList, "0.1,"), HasSubstr("empty item"));
  EXPECT_THAT(ErrorOf(ParseNuList, ""), HasSubstr("empty"));
  EXPECT_THAT(ErrorOf(ParseNuList, "0.1,0.10"), HasSubstr("'0.10' is listed twice"));
  EXPECT_THAT(ErrorOf(ParseWindowList, "1"), HasSubstr("'1' is below the minimum 2"));
  EXPECT_THAT(ErrorOf(ParseWindowList, "100,2.5"), HasSubstr("'2.5' is not a whole number"));
  EXPECT_THAT(ErrorOf(ParseSupportVectorBudgetList, "0"), HasSubstr("'0' is below the minimum 1"));
  EXPECT_THAT(ErrorOf(ParseSupportVectorBudgetList, "64,64"), HasSubstr("listed twice"));
  EXPECT_THAT(ErrorOf(ParseGammaList, "scale,wide"), HasSubstr("gamma 'wide'"));
  EXPECT_THAT(ErrorOf(ParseGammaList, "-1"), HasSubstr("gamma '-1'"));
  EXPECT_THAT(ErrorOf(ParseGammaList, "median,median"), HasSubstr("listed twice"));
}

TEST(TuningGridTest, ExpandsTheCartesianProductNuFastest) {
  TuningGrid grid;
  grid.nu = {0.01, 0.02};
  grid.window = {100, 200, 300};
  grid.support_vector_budget = {64};
  const std::vector<TuningSetting> settings = ExpandGrid(grid);
  // 2 nu x 1 (gamma not tuned) x 3 windows x 1 budget.
  ASSERT_EQ(settings.size(), 6u);
  const std::vector<std::pair<double, int64_t>> expected = {{0.01, 100}, {0.02, 100}, {0.01, 200},
                                                            {0.02, 200}, {0.01, 300}, {0.02, 300}};
  for (std::size_t i = 0; i < settings.size(); ++i) {
    ASSERT_TRUE(settings[i].nu && settings[i].window && settings[i].support_vector_budget) << i;
    EXPECT_EQ(*settings[i].nu, expected[i].first) << i;
    EXPECT_EQ(*settings[i].window, expected[i].second) << i;
    EXPECT_EQ(*settings[i].support_vector_budget, 64) << i;
    EXPECT_FALSE(settings[i].gamma) << i;
  }
  // Every list empty: one setting that keeps the configuration.
  const std::vector<TuningSetting> none = ExpandGrid(TuningGrid{});
  ASSERT_EQ(none.size(), 1u);
  EXPECT_FALSE(none[0].nu || none[0].gamma || none[0].window || none[0].support_vector_budget);
}

TEST(TuningGridTest, ApplySettingReplacesOnlyTheTunedKeysAndClampsWarmup) {
  DetectorOptions base;
  base.nu = 0.05;
  base.window = 2000;
  base.warmup = 500;
  base.support_vector_budget = 256;
  base.refit_every = 77;
  TuningSetting setting;
  setting.window = 300;
  const DetectorOptions applied = ApplySetting(base, setting);
  EXPECT_EQ(applied.window, 300);
  EXPECT_EQ(applied.warmup,
            0);  // 500 > 300: the whole window (the detector needs warmup <= window)
  EXPECT_EQ(applied.nu, 0.05);
  EXPECT_EQ(applied.support_vector_budget, 256);
  EXPECT_EQ(applied.refit_every, 77);
  setting.window = 1000;
  EXPECT_EQ(ApplySetting(base, setting).warmup, 500);
}

// ---------------------------------------------------------------------------------------------
// Scoring and selection on hand-made figures

SettingResult Made(std::size_t index, double nu, std::optional<double> objective,
                   std::optional<double> false_alarms_per_day) {
  SettingResult r;
  r.index = index;
  r.detector.nu = nu;
  r.objective = objective;
  r.overall.false_alarms_per_day = false_alarms_per_day;
  return r;
}

TEST(TuningSelectionTest, ScoreSettingComputesTheObjectives) {
  SettingResult r;
  r.overall.point_f1 = 0.6;
  r.overall.range_precision = 0.5;
  r.overall.range_recall = 0.25;
  r.overall.incidents = 3;
  r.overall.incidents_detected = 2;
  ScoreSetting(TuningObjective::kRangeF1, &r);
  // 2 P R / (P + R) = 2 * 0.5 * 0.25 / 0.75 = 1/3.
  ASSERT_TRUE(r.range_f1 && r.objective);
  EXPECT_DOUBLE_EQ(*r.range_f1, 1.0 / 3.0);
  EXPECT_DOUBLE_EQ(*r.objective, 1.0 / 3.0);
  ASSERT_TRUE(r.incident_recall);
  EXPECT_DOUBLE_EQ(*r.incident_recall, 2.0 / 3.0);
  ScoreSetting(TuningObjective::kIncidentRecall, &r);
  EXPECT_DOUBLE_EQ(*r.objective, 2.0 / 3.0);
  ScoreSetting(TuningObjective::kPointF1, &r);
  EXPECT_DOUBLE_EQ(*r.objective, 0.6);

  // No alarm at all (no predicted range) while there are incident samples: nothing was caught.
  SettingResult silent;
  silent.overall.range_recall = 0.0;
  silent.overall.incidents = 1;
  ScoreSetting(TuningObjective::kRangeF1, &silent);
  ASSERT_TRUE(silent.objective);
  EXPECT_EQ(*silent.objective, 0.0);
  // No incident: recall is undefined.
  SettingResult unlabelled;
  ScoreSetting(TuningObjective::kIncidentRecall, &unlabelled);
  EXPECT_FALSE(unlabelled.objective);
}

TEST(TuningSelectionTest, HonoursTheLimitAndBreaksTiesDeterministically) {
  std::vector<SettingResult> results = {
      Made(0, 0.10, 0.9, 3.0),           // best objective, over a limit of 2
      Made(1, 0.05, 0.8, 1.0),           //
      Made(2, 0.02, 0.8, 0.5),           // same objective, fewer false alarms
      Made(3, 0.01, std::nullopt, 0.1),  // undefined objective
      Made(4, 0.03, 0.8, 0.5),           // ties with 2 except for nu
      Made(5, 0.20, 0.95, std::nullopt)  // false alarms undefined: cannot be within a limit
  };
  TuningSelection s = SelectSetting(&results, 2.0);
  EXPECT_TRUE(s.limit_met);
  EXPECT_EQ(s.ranking, (std::vector<std::size_t>{2, 4, 1, 3, 0, 5}));
  EXPECT_EQ(s.chosen, 2u);
  EXPECT_FALSE(results[0].within_limit);
  EXPECT_FALSE(results[5].within_limit);
  EXPECT_TRUE(results[3].within_limit);

  // Without a limit the best objective wins.
  s = SelectSetting(&results, std::nullopt);
  EXPECT_EQ(s.chosen, 5u);
  EXPECT_TRUE(s.limit_met);

  // No setting meets 0.05 per day: the fewest false alarms is chosen, and limit_met says so.
  s = SelectSetting(&results, 0.05);
  EXPECT_FALSE(s.limit_met);
  EXPECT_EQ(s.chosen, 3u);
  EXPECT_EQ(s.ranking, (std::vector<std::size_t>{3, 2, 4, 1, 0, 5}));

  // Equal in everything but grid order.
  std::vector<SettingResult> twins = {Made(0, 0.05, 0.5, 1.0), Made(1, 0.05, 0.5, 1.0)};
  EXPECT_EQ(SelectSetting(&twins, std::nullopt).chosen, 0u);

  EXPECT_THROW(SelectSetting(&results, -1.0), TuningError);
  std::vector<SettingResult> empty;
  EXPECT_THROW(SelectSetting(&empty, std::nullopt), TuningError);
}

// ---------------------------------------------------------------------------------------------
// End to end on crafted streams

// Two streams, each with one incident of 150 vectors whose first feature is shifted by 6 sigma.
const std::vector<InjectedWindow> kShifted = {{0, 1000, 1149, 6.0}, {1, 2000, 2149, 6.0}};

TEST(RunTuningTest, PicksTheSettingThatNeitherFloodsNorHugsTheWindow) {
  const StreamRecording recording = MakeRecording(2, kShifted);
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.grid.nu = {0.001, 0.05, 0.5};
  options.alarms = AlarmSource::kAnomaly;
  options.objective = TuningObjective::kPointF1;
  options.jobs = 2;
  const TuningReport report = RunTuning(recording, IncidentsOf(kShifted), options);
  ASSERT_EQ(report.results.size(), 3u);
  const SettingResult& flood = ResultWithNu(report, 0.5);
  const SettingResult& sensible = ResultWithNu(report, 0.05);
  const SettingResult& tiny = ResultWithNu(report, 0.001);
  for (const SettingResult* r : {&flood, &sensible, &tiny}) {
    ASSERT_TRUE(r->overall.point_f1 && r->overall.point_precision && r->overall.point_recall);
  }
  // A 6-sigma shift is outside every envelope (f -> -rho far from the support vectors).
  EXPECT_GT(*sensible.overall.point_recall, 0.95);
  EXPECT_EQ(sensible.overall.incidents_detected, 2);
  // nu-property: nu = 0.5 flags about half of the 5200 normal scored vectors, so precision is at
  // most about 300 / (300 + 0.4 * 5200) = 0.13 even allowing the flagged share to fall to 0.4.
  EXPECT_LT(*flood.overall.point_precision, 0.13);
  // The small nu's envelope hugs the window: more false alarms than the sensible setting.
  EXPECT_GT(tiny.overall.false_alarm_events, sensible.overall.false_alarm_events);
  // And so the sensible setting is the clear best, and the one chosen.
  EXPECT_GT(*sensible.overall.point_f1, *tiny.overall.point_f1 + 0.05);
  EXPECT_GT(*sensible.overall.point_f1, *flood.overall.point_f1 + 0.2);
  EXPECT_EQ(report.chosen().detector.nu, 0.05);
  EXPECT_TRUE(report.selection.limit_met);
  ASSERT_TRUE(report.chosen().objective);
  EXPECT_EQ(*report.chosen().objective, *sensible.overall.point_f1);
}

// Two labelled incidents: a 6-sigma shift of 150 vectors on "a", and 300 vectors of normal data
// on "b" (a labelling the data cannot support). Incidents open after 4 consecutive flags
// (open_after = open_window = 4) and close after 1 clean vector.
// - nu = 0.5 flags at least about half of the normal vectors (nu-property; the contamination
//   guard only raises the share): a run of 4 starts at a given vector with probability about
//   0.5^4 * 0.5 = 1/32, i.e. about 45 false incidents per stream and day at one vector a minute,
//   and the 300 normal vectors of "b" hold such a run with probability about
//   1 - (31/32)^297 > 0.9999, so it "detects" both: incident recall 1.
// - nu = 0.02 flags a few per cent of fresh normal vectors (10% at most, allowing for the small
//   nu's tight envelope): 4 in a row has probability at most 1e-4 per vector, so under 0.15 false
//   incidents per stream and day and a chance of at most 3% to open one inside the 300 vectors:
//   it detects only the real shift, incident recall 1/2.
// Objective recall alone would prefer nu = 0.5; but it flags more than half of the vectors, which
// makes it unusable (replay.h, UnusableSettingNote), so it ranks last even without a limit. A limit
// of 10 false alarms per day rules it out too, and the setting within the limit must be chosen.
const std::vector<InjectedWindow> kOneRealOneUnsupported = {{0, 1000, 1149, 6.0},
                                                            {1, 2000, 2299, 0.0}};

TuningOptions RecallOptions() {
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.base.detector.open_after = 4;
  options.base.detector.open_window = 4;
  options.base.detector.close_after = 1;
  options.grid.nu = {0.02, 0.5};
  options.alarms = AlarmSource::kIncident;
  options.objective = TuningObjective::kIncidentRecall;
  options.jobs = 2;
  return options;
}

TEST(RunTuningTest, HonoursTheFalseAlarmLimit) {
  const StreamRecording recording = MakeRecording(2, kOneRealOneUnsupported);
  const std::vector<Incident> incidents = IncidentsOf(kOneRealOneUnsupported);

  TuningOptions options = RecallOptions();
  const TuningReport unlimited = RunTuning(recording, incidents, options);
  const SettingResult& flood = ResultWithNu(unlimited, 0.5);
  const SettingResult& quiet = ResultWithNu(unlimited, 0.02);
  ASSERT_TRUE(flood.objective && quiet.objective);
  EXPECT_EQ(*flood.objective, 1.0);
  EXPECT_EQ(*quiet.objective, 0.5);
  ASSERT_TRUE(flood.overall.false_alarms_per_day && quiet.overall.false_alarms_per_day);
  EXPECT_GT(*flood.overall.false_alarms_per_day, 10.0);
  EXPECT_LE(*quiet.overall.false_alarms_per_day, 10.0);
  EXPECT_FALSE(flood.usable);
  EXPECT_TRUE(quiet.usable);
  EXPECT_TRUE(unlimited.selection.usable_found);
  EXPECT_EQ(unlimited.chosen().detector.nu, 0.02);

  options.max_false_alarms_per_day = 10.0;
  const TuningReport limited = RunTuning(recording, incidents, options);
  EXPECT_TRUE(limited.selection.limit_met);
  EXPECT_EQ(limited.chosen().detector.nu, 0.02);
  ASSERT_TRUE(limited.chosen().overall.false_alarms_per_day);
  EXPECT_LE(*limited.chosen().overall.false_alarms_per_day, 10.0);
  // The better objective over the limit ranks last.
  EXPECT_FALSE(ResultWithNu(limited, 0.5).within_limit);
  EXPECT_EQ(limited.results[limited.selection.ranking.back()].detector.nu, 0.5);
}

void ExpectSameFigures(const SettingResult& a, const SettingResult& b) {
  SCOPED_TRACE("setting " + std::to_string(a.index + 1));
  EXPECT_EQ(a.index, b.index);
  EXPECT_TRUE(SameDetectorOptions(a.detector, b.detector));
  const StreamEvaluation& x = a.overall;
  const StreamEvaluation& y = b.overall;
  EXPECT_EQ(x.samples, y.samples);
  EXPECT_EQ(x.flagged_samples, y.flagged_samples);
  EXPECT_EQ(x.true_positives, y.true_positives);
  EXPECT_EQ(x.false_positives, y.false_positives);
  EXPECT_EQ(x.false_negatives, y.false_negatives);
  EXPECT_EQ(x.point_f1, y.point_f1);
  EXPECT_EQ(x.incidents_detected, y.incidents_detected);
  EXPECT_EQ(x.detection_delays_seconds, y.detection_delays_seconds);
  EXPECT_EQ(x.alarm_events, y.alarm_events);
  EXPECT_EQ(x.false_alarm_events, y.false_alarm_events);
  EXPECT_EQ(x.false_alarms_per_day, y.false_alarms_per_day);
  EXPECT_EQ(x.range_precision, y.range_precision);
  EXPECT_EQ(x.range_recall, y.range_recall);
  EXPECT_EQ(a.objective, b.objective);
  EXPECT_EQ(a.within_limit, b.within_limit);
}

TEST(RunTuningTest, GivesTheSameResultsWithOneAndTwoJobs) {
  const StreamRecording recording = MakeRecording(2, kShifted);
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.grid.nu = {0.01, 0.05, 0.2};
  options.grid.window = {300, 400};
  options.max_false_alarms_per_day = 100;
  options.jobs = 1;
  const TuningReport one = RunTuning(recording, IncidentsOf(kShifted), options);
  options.jobs = 2;
  const TuningReport two = RunTuning(recording, IncidentsOf(kShifted), options);
  ASSERT_EQ(one.results.size(), 6u);
  ASSERT_EQ(two.results.size(), 6u);
  for (std::size_t i = 0; i < one.results.size(); ++i) {
    ExpectSameFigures(one.results[i], two.results[i]);
  }
  EXPECT_EQ(one.selection.ranking, two.selection.ranking);
  EXPECT_EQ(one.selection.chosen, two.selection.chosen);
  // The replay kept for the timeline is the chosen setting's, whichever thread ran it.
  for (const TuningReport* report : {&one, &two}) {
    const std::vector<ReplayRow> again =
        ReplaySetting(recording, options.base, report->chosen().setting);
    ASSERT_EQ(report->chosen_rows.size(), again.size());
    for (std::size_t i = 0; i < again.size(); ++i) {
      ASSERT_EQ(report->chosen_rows[i].anomaly, again[i].anomaly) << i;
      ASSERT_EQ(report->chosen_rows[i].incident, again[i].incident) << i;
      ASSERT_TRUE(report->chosen_rows[i].decision == again[i].decision ||
                  (std::isnan(report->chosen_rows[i].decision) && std::isnan(again[i].decision)))
          << i;
    }
  }
  // The settings differ from one another, so the comparison above had something to compare.
  EXPECT_NE(one.results[0].overall.flagged_samples, one.results[2].overall.flagged_samples);
}

TEST(RunTuningTest, ReportsProgressUpToTheTotal) {
  const StreamRecording recording = MakeRecording(1, {});
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.grid.nu = {0.05, 0.1};
  options.jobs = 2;
  TuningProgress last;
  int calls = 0;
  RunTuning(recording, {}, options, [&](const TuningProgress& p) {
    EXPECT_GE(p.settings_done, last.settings_done);
    EXPECT_GE(p.rows_done, last.rows_done);
    last = p;
    ++calls;
  });
  EXPECT_GT(calls, 0);
  EXPECT_EQ(last.settings_done, 2u);
  EXPECT_EQ(last.settings_total, 2u);
  EXPECT_EQ(last.rows_done, 2 * recording.rows());
  EXPECT_EQ(last.rows_total, 2 * recording.rows());
}

TEST(RunTuningTest, RejectsBadInputBeforeReplaying) {
  const StreamRecording recording = MakeRecording(2, {});
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.base.detector.open_after = 6;  // more than open_window = 5
  options.grid.nu = {0.05};
  try {
    RunTuning(recording, {}, options);
    ADD_FAILURE() << "accepted open_after > open_window";
  } catch (const TuningError& e) {
    EXPECT_THAT(e.what(), HasSubstr("setting 1 (nu 0.05"));
    EXPECT_THAT(e.what(), HasSubstr("stream 'a'"));
    EXPECT_THAT(e.what(), HasSubstr("open_after"));
  }

  options.base = SmallDetectorConfig();
  options.jobs = 0;
  EXPECT_THROW(RunTuning(recording, {}, options), TuningError);

  options.jobs = 1;
  StreamRecording backwards = recording;
  backwards.times[4] = backwards.times[0] - 1;  // row 5 is stream "a" again, earlier than row 1
  try {
    RunTuning(backwards, {}, options);
    ADD_FAILURE() << "accepted decreasing times";
  } catch (const TuningError& e) {
    EXPECT_THAT(e.what(), HasSubstr("synthetic.csv: data row 5"));
    EXPECT_THAT(e.what(), HasSubstr("stream 'a'"));
  }
}

// ---------------------------------------------------------------------------------------------
// Reports

TEST(TuningReportTest, BestTomlParsesBackToTheChosenOptions) {
  const StreamRecording recording = MakeRecording(2, kShifted);
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.base.detector.feature_names = {"x", "y"};
  options.grid.nu = {0.05, 0.2};
  options.grid.gamma = {*GammaSpec::Parse("0.3")};
  options.max_false_alarms_per_day = 1000;
  const TuningReport report = RunTuning(recording, IncidentsOf(kShifted), options);
  const TuningProvenance provenance{"stream.csv", "incidents.csv", "", recording.rows(), 2, 2};
  const std::string toml = BestToml(report, options.base, provenance);
  const Config parsed = ParseConfig(toml, "best.toml");
  EXPECT_TRUE(SameDetectorOptions(parsed.detector, report.chosen().detector));
  EXPECT_EQ(parsed.detector.gamma.mode, GammaSpec::Mode::kValue);
  EXPECT_EQ(parsed.detector.gamma.value, 0.3);
  EXPECT_THAT(toml, HasSubstr("# Chosen: " + DescribeSetting(report.chosen().detector)));
  EXPECT_THAT(toml, HasSubstr("stream.csv (6000 rows, 2 streams)"));
  EXPECT_THAT(toml, HasSubstr("False-alarm limit: 1000 per day (met)"));
}

TEST(TuningReportTest, ResultsTablesHaveOneRowPerSettingAndEveryColumn) {
  const StreamRecording recording = MakeRecording(2, kShifted);
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.grid.nu = {0.02, 0.1};
  options.grid.support_vector_budget = {32, 64};
  const TuningReport report = RunTuning(recording, IncidentsOf(kShifted), options);
  const std::string csv = ResultsCsv(report);
  const CsvTable table = ParseCsv(csv, "results.csv");
  ASSERT_EQ(table.rows.size(), 4u);
  for (const char* column :
       {"nu", "gamma", "window", "support_vector_budget", "point_precision", "point_recall",
        "point_f1", "range_precision", "range_recall", "incidents_detected", "incidents_missed",
        "detection_delay_median_seconds", "false_alarms_per_day", "replay_seconds"}) {
    EXPECT_GE(table.Column(column), 0) << column;
  }
  int chosen = 0;
  for (const auto& row : table.rows) chosen += row[table.RequireColumn("chosen")] == "1";
  EXPECT_EQ(chosen, 1);

  const std::string table_text = SummaryTable(report);
  // A header and one line per setting; the chosen one is rank 1, marked.
  EXPECT_EQ(std::count(table_text.begin(), table_text.end(), '\n'), 5);
  EXPECT_THAT(table_text, HasSubstr("\n  *1"));
}

TEST(TuningReportTest, FiguresFollowTheResults) {
  const StreamRecording recording = MakeRecording(3, {{1, 1000, 1149, 6.0}});
  TuningOptions options;
  options.base = SmallDetectorConfig();
  options.grid.nu = {0.02, 0.1};
  options.grid.window = {300, 400};
  options.max_false_alarms_per_day = 50;
  const std::vector<Incident> incidents = IncidentsOf({{1, 1000, 1149, 6.0}});
  const TuningReport report = RunTuning(recording, incidents, options);

  const charts::LineFigure sweep = SweepFigure(report);
  ASSERT_EQ(sweep.panels.size(), 4u);
  for (const charts::LinePanel& panel : sweep.panels) {
    EXPECT_TRUE(panel.log_x);
    // One line per window (the only other tuned key that varies), plus the chosen point.
    ASSERT_EQ(panel.series.size(), 3u);
    EXPECT_EQ(panel.series[0].name, "window 300");
    EXPECT_EQ(panel.series[1].name, "window 400");
    EXPECT_EQ(panel.series[0].x, (std::vector<double>{0.02, 0.1}));
    EXPECT_EQ(panel.series[2].x, (std::vector<double>{report.chosen().detector.nu}));
  }
  ASSERT_TRUE(sweep.panels[3].reference_y);
  EXPECT_EQ(*sweep.panels[3].reference_y, 50.0);
  // The ratio panels: an axis from (just below) 0 to at or above their largest value.
  for (std::size_t m = 0; m < 3; ++m) {
    ASSERT_TRUE(sweep.panels[m].y_range);
    double largest = 0;
    for (const charts::Series& series : sweep.panels[m].series) {
      for (double y : series.y) largest = std::isfinite(y) ? std::max(largest, y) : largest;
    }
    EXPECT_LT(sweep.panels[m].y_range->first, 0);
    EXPECT_GE(sweep.panels[m].y_range->second, largest);
    EXPECT_LE(sweep.panels[m].y_range->second, 1.03 + 1e-12);
  }

  const std::vector<ReplayRow> rows =
      ReplaySetting(recording, options.base, report.chosen().setting);
  const charts::TimelineFigure one = ChosenTimelineFigure(report, recording, rows, incidents, 1);
  // With room for one panel, the stream with the labelled incident is shown.
  ASSERT_EQ(one.panels.size(), 1u);
  EXPECT_THAT(one.panels[0].title, HasSubstr("b: 1 incident(s)"));
  ASSERT_EQ(one.panels[0].shaded.size(), 1u);
  EXPECT_EQ(one.panels[0].shaded[0].start, incidents[0].start_seconds);
  EXPECT_THAT(one.title, HasSubstr("1 of 3 streams"));
  const charts::TimelineFigure all = ChosenTimelineFigure(report, recording, rows, incidents);
  ASSERT_EQ(all.panels.size(), 3u);
  // The rows a detector spent learning (no decision value) are one band per run of them, from
  // the first such row to the next scored row.
  for (std::size_t p = 0; p < all.panels.size(); ++p) {
    const charts::TimelinePanel& panel = all.panels[p];
    std::size_t learning_rows = 0;
    for (double v : panel.value) learning_rows += std::isnan(v) ? 1 : 0;
    ASSERT_GT(learning_rows, 0u) << "the small detector learns first";
    ASSERT_FALSE(panel.learning.empty());
    EXPECT_EQ(panel.learning[0].start, panel.t[0]);
    EXPECT_EQ(panel.learning[0].end, panel.t[learning_rows]);
  }
  // One mark per alarm event: the events of the chosen setting's evaluation.
  std::size_t marks = 0;
  for (const charts::TimelinePanel& panel : all.panels) marks += panel.marks.size();
  EXPECT_EQ(static_cast<int64_t>(marks), report.chosen().overall.alarm_events);
}

}  // namespace
}  // namespace nuwatch
