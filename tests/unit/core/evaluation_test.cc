// Tests of the alarm scoring in nuwatch/evaluation.h. Every expected value is derived by hand,
// beside the check, from the definitions in /work/shared/methods.md ("Scoring alarms against
// labelled incidents", with the conventions stated in evaluation.h) or from the range-based
// definitions of Tatbul, Lee, Zdonik, Alam, Gottschlich, "Precision and recall for time series",
// NeurIPS 2018 (Recall_T, Precision_T, omega, the positional biases delta and the cardinality
// factor gamma; the delta functions as remembered from the paper, see evaluation.cc).
#include "nuwatch/evaluation.h"

#include <gtest/gtest.h>

#include <random>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

// Samples at t = 0, 1, ..., n-1 seconds, flagged at the given indices.
StreamAlarms Samples(const std::string& stream, int n, const std::vector<int>& flagged_indices) {
  StreamAlarms alarms;
  alarms.stream = stream;
  for (int k = 0; k < n; ++k) alarms.times.push_back(k);
  alarms.flagged.assign(n, false);
  for (int k : flagged_indices) alarms.flagged[k] = true;
  return alarms;
}

Incident MakeIncident(const std::string& stream, double start, double end) {
  return Incident{stream, start, end, ""};
}

const StreamEvaluation& Only(const EvaluationReport& report) {
  EXPECT_EQ(report.streams.size(), 1u);
  return report.streams.front();
}

EvaluationOptions Options(CardinalityFactor cardinality, PositionalBias bias, double alpha = 0) {
  EvaluationOptions options;
  options.cardinality = cardinality;
  options.bias = bias;
  options.alpha = alpha;
  return options;
}

TEST(RunsOfTest, FindsMaximalRunsOfTrue) {
  // 0 1 1 0 1 -> runs [1, 2] and [4, 4].
  const std::vector<SampleRange> runs = RunsOf({false, true, true, false, true});
  ASSERT_EQ(runs.size(), 2u);
  EXPECT_EQ(runs[0].first, 1);
  EXPECT_EQ(runs[0].last, 2);
  EXPECT_EQ(runs[1].first, 4);
  EXPECT_EQ(runs[1].last, 4);
  EXPECT_TRUE(RunsOf({false, false}).empty());
}

// The worked example used by several tests below: samples at t = 0..9 s, one incident [3, 6]
// (samples 3, 4, 5, 6 inside), flags at 1, 4, 5, 6, 8, 9.
//   TP = |{4, 5, 6}| = 3, FP = |{1, 8, 9}| = 3, FN = |{3}| = 1, TN = |{0, 2, 7}| = 3.
TEST(EvaluateTest, PointWiseCountsOnHandWorkedExample) {
  const EvaluationReport report =
      Evaluate({Samples("a", 10, {1, 4, 5, 6, 8, 9})}, {MakeIncident("a", 3, 6)}, {});
  const StreamEvaluation& e = Only(report);
  EXPECT_TRUE(e.samples_known);
  EXPECT_EQ(e.samples, 10);
  EXPECT_EQ(e.flagged_samples, 6);
  EXPECT_EQ(e.incident_samples, 4);
  EXPECT_EQ(e.true_positives, 3);
  EXPECT_EQ(e.false_positives, 3);
  EXPECT_EQ(e.false_negatives, 1);
  EXPECT_EQ(e.true_negatives, 3);
  // precision = 3 / 6; recall = 3 / 4; F1 = 2 * 0.5 * 0.75 / 1.25 = 0.6 = 2*3 / (6 + 3 + 1).
  EXPECT_DOUBLE_EQ(*e.point_precision, 0.5);
  EXPECT_DOUBLE_EQ(*e.point_recall, 0.75);
  EXPECT_DOUBLE_EQ(*e.point_f1, 0.6);
}

TEST(EvaluateTest, EventWiseFiguresOnHandWorkedExample) {
  const StreamAlarms alarms = Samples("a", 10, {1, 4, 5, 6, 8, 9});
  const EvaluationReport report = Evaluate({alarms}, {MakeIncident("a", 3, 6)}, {});
  const StreamEvaluation& e = Only(report);
  // Alarm events (runs of flagged samples): {1}, {4, 5, 6}, {8, 9}.
  EXPECT_EQ(e.alarm_events, 3);
  // Detected: the first flagged sample in [3, 6] is t = 4, so the delay is 4 - 3 = 1 s.
  EXPECT_EQ(e.incidents, 1);
  EXPECT_EQ(e.incidents_detected, 1);
  EXPECT_EQ(e.incidents_missed, 0);
  EXPECT_DOUBLE_EQ(*e.detection_delay_median_seconds, 1.0);
  EXPECT_DOUBLE_EQ(*e.detection_delay_mean_seconds, 1.0);
  EXPECT_DOUBLE_EQ(*e.detection_delay_max_seconds, 1.0);
  // {1} and {8, 9} touch no incident: 2 false alarms.
  EXPECT_EQ(e.false_alarm_events, 2);
  // Observed = 9 - 0 + median interval 1 = 10 s; incident time in [0, 10] = 6 - 3 = 3 s;
  // incident-free = 7 s; per day = 2 / (7 / 86400) = 172800 / 7.
  EXPECT_DOUBLE_EQ(*e.observed_seconds, 10.0);
  EXPECT_DOUBLE_EQ(*e.incident_free_seconds, 7.0);
  EXPECT_DOUBLE_EQ(*e.false_alarms_per_day, 172800.0 / 7.0);
}

TEST(EvaluateTest, RangeBasedFiguresOnHandWorkedExample) {
  const EvaluationReport report =
      Evaluate({Samples("a", 10, {1, 4, 5, 6, 8, 9})}, {MakeIncident("a", 3, 6)}, {});
  const StreamEvaluation& e = Only(report);
  // Real ranges: [3, 6]. Predicted: [1, 1], [4, 6], [8, 9].
  // Recall_T (alpha 0, flat, gamma 1): omega([3,6], [4,6]) = 3 / 4.
  // Precision_T: [1,1] -> 0, [4,6] -> 3/3 = 1, [8,9] -> 0; mean 1/3.
  EXPECT_EQ(e.ranges.real_ranges, 1);
  EXPECT_EQ(e.ranges.predicted_ranges, 3);
  EXPECT_DOUBLE_EQ(*e.range_recall, 0.75);
  EXPECT_DOUBLE_EQ(*e.range_precision, 1.0 / 3.0);
}

TEST(EvaluateTest, GraceExtendsDetectionButNotPointWiseLabels) {
  // Incident [3, 4], the only flag at t = 6.
  const StreamAlarms alarms = Samples("a", 10, {6});
  const std::vector<Incident> incidents = {MakeIncident("a", 3, 4)};
  const StreamEvaluation without = Only(Evaluate({alarms}, incidents, {}));
  // Grace 0: 6 is not in [3, 4]: missed; the event {6} is a false alarm.
  EXPECT_EQ(without.incidents_detected, 0);
  EXPECT_EQ(without.incidents_missed, 1);
  EXPECT_FALSE(without.detection_delay_median_seconds.has_value());
  EXPECT_EQ(without.false_alarm_events, 1);

  EvaluationOptions options;
  options.grace_seconds = 2;
  const StreamEvaluation with = Only(Evaluate({alarms}, incidents, options));
  // Grace 2 s: 6 is in [3, 4 + 2]: detected with delay 6 - 3 = 3 s; no false alarm.
  EXPECT_EQ(with.incidents_detected, 1);
  EXPECT_DOUBLE_EQ(*with.detection_delay_median_seconds, 3.0);
  EXPECT_EQ(with.false_alarm_events, 0);
  EXPECT_DOUBLE_EQ(*with.false_alarms_per_day, 0.0);
  // Point-wise labels ignore grace: sample 6 is still a false positive, TP = 0.
  EXPECT_EQ(with.true_positives, 0);
  EXPECT_EQ(with.false_positives, 1);
  EXPECT_DOUBLE_EQ(*with.point_precision, 0.0);
  // Grace 1 s is not enough: [3, 5] does not contain 6.
  options.grace_seconds = 1;
  EXPECT_EQ(Only(Evaluate({alarms}, incidents, options)).incidents_detected, 0);
}

TEST(EvaluateTest, DelayStatisticsOverDetectedIncidents) {
  // 100 samples at 0..99 s; incidents [10,20], [30,40], [50,60], [70,80]; flags at 12, 30, 57.
  // Delays: 12 - 10 = 2, 30 - 30 = 0, 57 - 50 = 7; the fourth is missed.
  // Median of {0, 2, 7} = 2; mean = 9 / 3 = 3; max = 7.
  const std::vector<Incident> incidents = {MakeIncident("a", 10, 20), MakeIncident("a", 30, 40),
                                           MakeIncident("a", 50, 60), MakeIncident("a", 70, 80)};
  const StreamEvaluation e = Only(Evaluate({Samples("a", 100, {12, 30, 57})}, incidents, {}));
  EXPECT_EQ(e.incidents_detected, 3);
  EXPECT_EQ(e.incidents_missed, 1);
  EXPECT_DOUBLE_EQ(*e.detection_delay_median_seconds, 2.0);
  EXPECT_DOUBLE_EQ(*e.detection_delay_mean_seconds, 3.0);
  EXPECT_DOUBLE_EQ(*e.detection_delay_max_seconds, 7.0);
  // An even count: add a flag at 75 (delay 5): delays {0, 2, 5, 7}, median (2 + 5) / 2 = 3.5.
  const StreamEvaluation even =
      Only(Evaluate({Samples("a", 100, {12, 30, 57, 75})}, incidents, {}));
  EXPECT_DOUBLE_EQ(*even.detection_delay_median_seconds, 3.5);
}

TEST(EvaluateTest, NoIncidents) {
  // Flags at 2, 3 and 7 of 0..9 with no incident: TP = 0, FP = 3, FN = 0.
  const StreamEvaluation e = Only(Evaluate({Samples("a", 10, {2, 3, 7})}, {}, {}));
  EXPECT_DOUBLE_EQ(*e.point_precision, 0.0);  // 0 / 3
  EXPECT_FALSE(e.point_recall.has_value());   // 0 / 0: undefined
  EXPECT_DOUBLE_EQ(*e.point_f1, 0.0);         // 0 / (0 + 3 + 0)
  EXPECT_EQ(e.incidents, 0);
  EXPECT_FALSE(e.detection_delay_mean_seconds.has_value());
  // Events {2, 3} and {7}, both false; incident-free time = observed = 10 s.
  EXPECT_EQ(e.false_alarm_events, 2);
  EXPECT_DOUBLE_EQ(*e.false_alarms_per_day, 2.0 * 86400.0 / 10.0);
  EXPECT_FALSE(e.range_recall.has_value());   // no real range
  EXPECT_DOUBLE_EQ(*e.range_precision, 0.0);  // both predicted ranges overlap nothing
}

TEST(EvaluateTest, NoAlarms) {
  const StreamEvaluation e = Only(Evaluate({Samples("a", 10, {})}, {MakeIncident("a", 3, 6)}, {}));
  EXPECT_FALSE(e.point_precision.has_value());  // no flagged sample
  EXPECT_DOUBLE_EQ(*e.point_recall, 0.0);       // 0 / 4
  EXPECT_DOUBLE_EQ(*e.point_f1, 0.0);           // 0 / (0 + 0 + 4)
  EXPECT_EQ(e.incidents_missed, 1);
  EXPECT_EQ(e.alarm_events, 0);
  EXPECT_DOUBLE_EQ(*e.false_alarms_per_day, 0.0);
  EXPECT_FALSE(e.range_precision.has_value());  // no predicted range
  EXPECT_DOUBLE_EQ(*e.range_recall, 0.0);
}

TEST(EvaluateTest, NoAlarmsAndNoIncidents) {
  const StreamEvaluation e = Only(Evaluate({Samples("a", 10, {})}, {}, {}));
  EXPECT_FALSE(e.point_precision.has_value());
  EXPECT_FALSE(e.point_recall.has_value());
  EXPECT_FALSE(e.point_f1.has_value());  // 0 / 0
  EXPECT_DOUBLE_EQ(*e.false_alarms_per_day, 0.0);
  EXPECT_FALSE(e.range_precision.has_value());
  EXPECT_FALSE(e.range_recall.has_value());
}

TEST(EvaluateTest, OneAlarmSpanningTwoIncidents) {
  // Incidents [2, 3] and [6, 7]; flags 2..7 form one event.
  const std::vector<Incident> incidents = {MakeIncident("a", 2, 3), MakeIncident("a", 6, 7)};
  const StreamAlarms alarms = Samples("a", 10, {2, 3, 4, 5, 6, 7});
  const StreamEvaluation e = Only(Evaluate({alarms}, incidents, {}));
  // Both incidents detected at their start (delay 0); the single event touches them: not false.
  EXPECT_EQ(e.incidents_detected, 2);
  EXPECT_DOUBLE_EQ(*e.detection_delay_max_seconds, 0.0);
  EXPECT_EQ(e.alarm_events, 1);
  EXPECT_EQ(e.false_alarm_events, 0);
  // Point-wise: TP = {2, 3, 6, 7} = 4, FP = {4, 5} = 2: precision 4/6, recall 1.
  EXPECT_DOUBLE_EQ(*e.point_precision, 4.0 / 6.0);
  EXPECT_DOUBLE_EQ(*e.point_recall, 1.0);
  // Range-based, real [2,3], [6,7], predicted [2,7]. Recall: each real range fully covered by
  // one predicted range -> 1 each, mean 1. Precision, gamma = 1: omega = 2/6 + 2/6 = 2/3.
  EXPECT_DOUBLE_EQ(*e.range_recall, 1.0);
  EXPECT_DOUBLE_EQ(*e.range_precision, 2.0 / 3.0);
  // Reciprocal gamma: the predicted range overlaps 2 real ranges -> (1/2) * 2/3 = 1/3.
  const StreamEvaluation reciprocal = Only(Evaluate(
      {alarms}, incidents, Options(CardinalityFactor::kReciprocal, PositionalBias::kFlat)));
  EXPECT_DOUBLE_EQ(*reciprocal.range_precision, 1.0 / 3.0);
  EXPECT_DOUBLE_EQ(*reciprocal.range_recall, 1.0);
}

TEST(EvaluateTest, IncidentsAtTheEdgesOfTheData) {
  // Samples 0..9; incident [-5, 1] starts before the data, [8, 20] ends after it; flags 0 and 9.
  const std::vector<Incident> incidents = {MakeIncident("a", -5, 1), MakeIncident("a", 8, 20)};
  const StreamEvaluation e = Only(Evaluate({Samples("a", 10, {0, 9})}, incidents, {}));
  // Inside: 0, 1, 8, 9. TP = {0, 9}, FN = {1, 8}.
  EXPECT_EQ(e.incident_samples, 4);
  EXPECT_EQ(e.true_positives, 2);
  EXPECT_EQ(e.false_negatives, 2);
  // Delays are measured from the labelled start: 0 - (-5) = 5 and 9 - 8 = 1.
  EXPECT_EQ(e.incidents_detected, 2);
  EXPECT_DOUBLE_EQ(*e.detection_delay_max_seconds, 5.0);
  EXPECT_DOUBLE_EQ(*e.detection_delay_median_seconds, 3.0);  // (1 + 5) / 2
  // Observed window [0, 10]; incident time inside it: [0, 1] -> 1 s, [8, 10] -> 2 s; free 7 s.
  EXPECT_DOUBLE_EQ(*e.observed_seconds, 10.0);
  EXPECT_DOUBLE_EQ(*e.incident_free_seconds, 7.0);
  EXPECT_EQ(e.false_alarm_events, 0);
  // Real ranges [0, 1] and [8, 9], predicted [0, 0] and [9, 9]: recall (1/2 + 1/2) / 2 = 1/2,
  // precision (1 + 1) / 2 = 1.
  EXPECT_DOUBLE_EQ(*e.range_recall, 0.5);
  EXPECT_DOUBLE_EQ(*e.range_precision, 1.0);
}

TEST(EvaluateTest, OverlappingIncidentsMergeIntoOneRealRangeButCountSeparately) {
  // Incidents [2, 5] and [4, 8] overlap; one flag at 7.
  const std::vector<Incident> incidents = {MakeIncident("a", 2, 5), MakeIncident("a", 4, 8)};
  const StreamEvaluation e = Only(Evaluate({Samples("a", 10, {7})}, incidents, {}));
  // Event-wise each incident counts: [2, 5] has no flagged sample (missed); [4, 8] has 7 (delay 3).
  EXPECT_EQ(e.incidents, 2);
  EXPECT_EQ(e.incidents_detected, 1);
  EXPECT_EQ(e.incidents_missed, 1);
  EXPECT_DOUBLE_EQ(*e.detection_delay_mean_seconds, 3.0);
  // Samples inside either: 2..8 = 7 samples, one real range [2, 8]; recall_T = 1/7.
  EXPECT_EQ(e.incident_samples, 7);
  EXPECT_EQ(e.ranges.real_ranges, 1);
  EXPECT_DOUBLE_EQ(*e.range_recall, 1.0 / 7.0);
  // Incident time is the union [2, 8] = 6 s, not 3 + 4 = 7 s: free = 10 - 6 = 4 s.
  EXPECT_DOUBLE_EQ(*e.incident_free_seconds, 4.0);
}

TEST(EvaluateTest, TouchingIncidentsMergeForRanges) {
  // [2, 4] and [5, 6] on integer samples: samples 2..6 are consecutive inside samples.
  const StreamEvaluation e = Only(
      Evaluate({Samples("a", 10, {5})}, {MakeIncident("a", 2, 4), MakeIncident("a", 5, 6)}, {}));
  EXPECT_EQ(e.ranges.real_ranges, 1);
  EXPECT_DOUBLE_EQ(*e.range_recall, 1.0 / 5.0);
}

TEST(EvaluateTest, OverallSumsCountsAndPoolsRanges) {
  // Stream a: samples 0..9, incident [3, 6], flags {1, 4, 5, 6, 8, 9} (the worked example:
  // TP 3, FP 3, FN 1, one real range with recall 3/4, predicted scores 0, 1, 0).
  // Stream b: samples 0..9, incidents [0, 0], [2, 2], [4, 4], no flags
  // (TP 0, FP 0, FN 3; three real ranges with recall 0).
  const std::vector<StreamAlarms> alarms = {Samples("a", 10, {1, 4, 5, 6, 8, 9}),
                                            Samples("b", 10, {})};
  const std::vector<Incident> incidents = {MakeIncident("a", 3, 6), MakeIncident("b", 0, 0),
                                           MakeIncident("b", 2, 2), MakeIncident("b", 4, 4)};
  const EvaluationReport report = Evaluate(alarms, incidents, {});
  ASSERT_EQ(report.streams.size(), 2u);
  const StreamEvaluation& all = report.overall;
  // Summed: TP 3, FP 3, FN 4. precision 3/6, recall 3/7 (not the mean of 3/4 and 0).
  EXPECT_DOUBLE_EQ(*all.point_precision, 0.5);
  EXPECT_DOUBLE_EQ(*all.point_recall, 3.0 / 7.0);
  EXPECT_DOUBLE_EQ(*all.point_f1, 6.0 / (6.0 + 3.0 + 4.0));
  EXPECT_EQ(all.incidents, 4);
  EXPECT_EQ(all.incidents_detected, 1);
  EXPECT_EQ(all.incidents_missed, 3);
  // Pooled ranges: recall (3/4 + 0 + 0 + 0) / 4 = 3/16; precision (0 + 1 + 0) / 3 = 1/3.
  EXPECT_DOUBLE_EQ(*all.range_recall, 3.0 / 16.0);
  EXPECT_DOUBLE_EQ(*all.range_precision, 1.0 / 3.0);
  // False alarms: 2 (a) + 0 (b) over incident-free time 7 s (a) + (10 - 0 - 0 - 0) s (b): the
  // single-point incidents of b have zero length.
  EXPECT_EQ(all.false_alarm_events, 2);
  EXPECT_DOUBLE_EQ(*all.incident_free_seconds, 17.0);
  EXPECT_DOUBLE_EQ(*all.false_alarms_per_day, 2.0 * 86400.0 / 17.0);
}

TEST(EvaluateTest, IncidentsOfStreamsAbsentFromTheAlarmsAreMissed) {
  const EvaluationReport report =
      Evaluate({Samples("a", 10, {4})}, {MakeIncident("a", 3, 6), MakeIncident("ghost", 1, 2)}, {});
  ASSERT_EQ(report.streams.size(), 2u);
  const StreamEvaluation& ghost = report.streams[1];  // sorted by name: "a", "ghost"
  EXPECT_EQ(ghost.stream, "ghost");
  EXPECT_FALSE(ghost.samples_known);
  EXPECT_EQ(ghost.incidents_missed, 1);
  EXPECT_FALSE(ghost.point_recall.has_value());
  EXPECT_EQ(report.overall.incidents, 2);
  EXPECT_EQ(report.overall.incidents_missed, 1);
  // The ghost stream adds no samples: overall recall is stream a's, 1 / 4.
  EXPECT_DOUBLE_EQ(*report.overall.point_recall, 0.25);
}

TEST(EvaluateTest, EventIntervalsWithoutSamples) {
  // Events [100, 110], [151, 160], [200, 205]; incidents [105, 150], [300, 400].
  StreamAlarms alarms;
  alarms.stream = "a";
  alarms.events_given = true;
  alarms.events = {{100, 110}, {151, 160}, {200, 205}};
  const std::vector<Incident> incidents = {MakeIncident("a", 105, 150),
                                           MakeIncident("a", 300, 400)};
  const StreamEvaluation e = Only(Evaluate({alarms}, incidents, {}));
  EXPECT_FALSE(e.samples_known);
  // [100, 110] meets [105, 150] at max(100, 105) = 105: delay 0. [300, 400] is missed.
  EXPECT_EQ(e.incidents_detected, 1);
  EXPECT_EQ(e.incidents_missed, 1);
  EXPECT_DOUBLE_EQ(*e.detection_delay_max_seconds, 0.0);
  // [151, 160] and [200, 205] meet no incident (grace 0).
  EXPECT_EQ(e.alarm_events, 3);
  EXPECT_EQ(e.false_alarm_events, 2);
  // No samples: point-wise, range-based and per-day figures are undefined.
  EXPECT_FALSE(e.point_precision.has_value());
  EXPECT_FALSE(e.point_f1.has_value());
  EXPECT_FALSE(e.range_precision.has_value());
  EXPECT_FALSE(e.range_recall.has_value());
  EXPECT_FALSE(e.false_alarms_per_day.has_value());
  // Grace 1 s: [151, 160] meets [105, 151]; it is no longer false.
  EvaluationOptions options;
  options.grace_seconds = 1;
  const EvaluationReport graced = Evaluate({alarms}, incidents, options);
  EXPECT_EQ(graced.streams[0].false_alarm_events, 1);
  EXPECT_FALSE(graced.overall.false_alarms_per_day.has_value());
}

TEST(EvaluateTest, EventIntervalsWithSamples) {
  // Samples 0..9; events [2.5, 4.2] (covers samples 3, 4), [8.5, 8.7] (covers none: ignored),
  // [6, 6] (covers 6); incident [4, 5].
  StreamAlarms alarms = Samples("a", 10, {});
  alarms.flagged.clear();
  alarms.events_given = true;
  alarms.events = {{2.5, 4.2}, {8.5, 8.7}, {6, 6}};
  const StreamEvaluation e = Only(Evaluate({alarms}, {MakeIncident("a", 4, 5)}, {}));
  EXPECT_TRUE(e.samples_known);
  EXPECT_EQ(e.flagged_samples, 3);  // 3, 4, 6
  EXPECT_EQ(e.alarm_events, 2);
  // The first event has sample 4 inside [4, 5]: detected with delay 0; [6, 6] is false.
  EXPECT_EQ(e.incidents_detected, 1);
  EXPECT_DOUBLE_EQ(*e.detection_delay_max_seconds, 0.0);
  EXPECT_EQ(e.false_alarm_events, 1);
  // TP {4}, FP {3, 6}, FN {5}.
  EXPECT_DOUBLE_EQ(*e.point_precision, 1.0 / 3.0);
  EXPECT_DOUBLE_EQ(*e.point_recall, 0.5);
}

// Tatbul et al. 2018 note that with alpha = 0, flat bias and gamma = 1, Recall_T and Precision_T
// equal classical recall and precision when every range has length one. Build random streams whose
// real and predicted samples sit on even indices only, so every range is a single sample.
TEST(ScoreRangesTest, ReducesToPointWiseForUnitLengthRanges) {
  std::mt19937 random(20180607);
  std::bernoulli_distribution coin(0.4);
  for (int trial = 0; trial < 20; ++trial) {
    const int n = 200;
    StreamAlarms alarms = Samples("s", n, {});
    std::vector<Incident> incidents;
    for (int k = 0; k < n; k += 2) {
      alarms.flagged[k] = coin(random);
      if (coin(random)) incidents.push_back(MakeIncident("s", k - 0.25, k + 0.25));
    }
    const StreamEvaluation e = Only(Evaluate({alarms}, incidents, {}));
    ASSERT_TRUE(e.point_precision && e.point_recall);
    EXPECT_EQ(e.ranges.real_ranges, e.incident_samples);
    EXPECT_EQ(e.ranges.predicted_ranges, e.flagged_samples);
    EXPECT_NEAR(*e.range_precision, *e.point_precision, 1e-12) << "trial " << trial;
    EXPECT_NEAR(*e.range_recall, *e.point_recall, 1e-12) << "trial " << trial;
  }
}

TEST(ScoreRangesTest, ExistenceAndCardinality) {
  // Real [0, 9] (10 samples); predicted [2, 4] and [7, 7].
  const std::vector<SampleRange> real = {{0, 9}};
  const std::vector<SampleRange> predicted = {{2, 4}, {7, 7}};
  // gamma = 1: overlap = 3/10 + 1/10 = 0.4. Each predicted range lies inside: precision 1.
  const RangeScores one =
      ScoreRanges(real, predicted, Options(CardinalityFactor::kOne, PositionalBias::kFlat));
  EXPECT_DOUBLE_EQ(*one.recall, 0.4);
  EXPECT_DOUBLE_EQ(*one.precision, 1.0);
  // gamma = 1/x with x = 2 overlapped predicted ranges: 0.4 / 2 = 0.2.
  const RangeScores reciprocal =
      ScoreRanges(real, predicted, Options(CardinalityFactor::kReciprocal, PositionalBias::kFlat));
  EXPECT_DOUBLE_EQ(*reciprocal.recall, 0.2);
  EXPECT_DOUBLE_EQ(*reciprocal.precision, 1.0);  // each predicted range overlaps one real range
  // alpha = 0.5: 0.5 * Existence (1) + 0.5 * 0.2 = 0.6.
  const RangeScores existence = ScoreRanges(
      real, predicted, Options(CardinalityFactor::kReciprocal, PositionalBias::kFlat, 0.5));
  EXPECT_DOUBLE_EQ(*existence.recall, 0.6);
  // alpha = 1 gives the pure existence reward; precision ignores alpha.
  const RangeScores pure_existence =
      ScoreRanges(real, predicted, Options(CardinalityFactor::kOne, PositionalBias::kFlat, 1.0));
  EXPECT_DOUBLE_EQ(*pure_existence.recall, 1.0);
  EXPECT_DOUBLE_EQ(*pure_existence.precision, 1.0);
  // A third predicted range [12, 13] outside: precision (1 + 1 + 0) / 3; recall unchanged.
  const RangeScores outside = ScoreRanges(real, {{2, 4}, {7, 7}, {12, 13}},
                                          Options(CardinalityFactor::kOne, PositionalBias::kFlat));
  EXPECT_DOUBLE_EQ(*outside.precision, 2.0 / 3.0);
  EXPECT_DOUBLE_EQ(*outside.recall, 0.4);
}

TEST(ScoreRangesTest, ReciprocalPrecisionForOnePredictionOverManyRealRanges) {
  // Predicted [0, 9]; real [1, 2] and [5, 6]. Precision overlap: 2/10 + 2/10 = 0.4; gamma = 1/2
  // gives 0.2. Recall: each real range fully covered by one prediction: 1.
  const std::vector<SampleRange> real = {{1, 2}, {5, 6}};
  const std::vector<SampleRange> predicted = {{0, 9}};
  EXPECT_DOUBLE_EQ(
      *ScoreRanges(real, predicted, Options(CardinalityFactor::kOne, PositionalBias::kFlat))
           .precision,
      0.4);
  const RangeScores reciprocal =
      ScoreRanges(real, predicted, Options(CardinalityFactor::kReciprocal, PositionalBias::kFlat));
  EXPECT_DOUBLE_EQ(*reciprocal.precision, 0.2);
  EXPECT_DOUBLE_EQ(*reciprocal.recall, 1.0);
}

TEST(ScoreRangesTest, FrontBiasRewardsAnEarlyOverlapMoreThanALateOne) {
  // Real [0, 4], length 5. Front-end delta(i) = 5 - i + 1: weights 5, 4, 3, 2, 1 (sum 15).
  const std::vector<SampleRange> real = {{0, 4}};
  const EvaluationOptions front = Options(CardinalityFactor::kOne, PositionalBias::kFront);
  const double early = *ScoreRanges(real, {{0, 1}}, front).recall;  // (5 + 4) / 15
  const double late = *ScoreRanges(real, {{3, 4}}, front).recall;   // (2 + 1) / 15
  EXPECT_DOUBLE_EQ(early, 9.0 / 15.0);
  EXPECT_DOUBLE_EQ(late, 3.0 / 15.0);
  EXPECT_GT(early, late);
  // Back-end delta(i) = i: weights 1..5; the same overlaps score the other way round.
  const EvaluationOptions back = Options(CardinalityFactor::kOne, PositionalBias::kBack);
  EXPECT_DOUBLE_EQ(*ScoreRanges(real, {{0, 1}}, back).recall, 3.0 / 15.0);
  EXPECT_DOUBLE_EQ(*ScoreRanges(real, {{3, 4}}, back).recall, 9.0 / 15.0);
  // Flat: both 2/5.
  const EvaluationOptions flat = Options(CardinalityFactor::kOne, PositionalBias::kFlat);
  EXPECT_DOUBLE_EQ(*ScoreRanges(real, {{0, 1}}, flat).recall, 0.4);
  EXPECT_DOUBLE_EQ(*ScoreRanges(real, {{3, 4}}, flat).recall, 0.4);
}

TEST(ScoreRangesTest, MiddleBias) {
  // Length 5: delta = 1, 2, 3, 2, 1 (sum 9). Overlap [1, 3] -> 7/9; [0, 0] -> 1/9.
  const EvaluationOptions middle = Options(CardinalityFactor::kOne, PositionalBias::kMiddle);
  EXPECT_DOUBLE_EQ(*ScoreRanges({{0, 4}}, {{1, 3}}, middle).recall, 7.0 / 9.0);
  EXPECT_DOUBLE_EQ(*ScoreRanges({{0, 4}}, {{0, 0}}, middle).recall, 1.0 / 9.0);
  // Length 4: delta = 1, 2, 2, 1 (sum 6). Overlap [10, 11] of [10, 13] -> 3/6.
  EXPECT_DOUBLE_EQ(*ScoreRanges({{10, 13}}, {{10, 11}}, middle).recall, 0.5);
}

TEST(ScoreRangesTest, BiasAppliesToPrecisionOverThePredictedRange) {
  // Predicted [3, 6] (length 4), real [0, 4]: overlap [3, 4] = positions 1, 2 of the prediction.
  // Front: weights 4, 3, 2, 1 (sum 10): (4 + 3) / 10. Back: weights 1..4: (1 + 2) / 10.
  const std::vector<SampleRange> real = {{0, 4}};
  const std::vector<SampleRange> predicted = {{3, 6}};
  EXPECT_DOUBLE_EQ(
      *ScoreRanges(real, predicted, Options(CardinalityFactor::kOne, PositionalBias::kFront))
           .precision,
      0.7);
  EXPECT_DOUBLE_EQ(
      *ScoreRanges(real, predicted, Options(CardinalityFactor::kOne, PositionalBias::kBack))
           .precision,
      0.3);
}

TEST(ScoreRangesTest, EmptySetsAreUndefined) {
  const RangeScores none = ScoreRanges({}, {}, {});
  EXPECT_FALSE(none.recall.has_value());
  EXPECT_FALSE(none.precision.has_value());
  EXPECT_THROW(ScoreRanges({{3, 2}}, {}, {}), PreconditionError);          // first > last
  EXPECT_THROW(ScoreRanges({}, {{0, 3}, {3, 5}}, {}), PreconditionError);  // not disjoint
}

TEST(EvaluateTest, RejectsBrokenPreconditions) {
  StreamAlarms unsorted = Samples("a", 3, {});
  unsorted.times = {0, 2, 1};
  EXPECT_THROW(Evaluate({unsorted}, {}, {}), PreconditionError);
  StreamAlarms short_flags = Samples("a", 3, {});
  short_flags.flagged.pop_back();
  EXPECT_THROW(Evaluate({short_flags}, {}, {}), PreconditionError);
  EXPECT_THROW(Evaluate({Samples("a", 3, {})}, {MakeIncident("a", 5, 4)}, {}), PreconditionError);
  EXPECT_THROW(Evaluate({Samples("a", 3, {}), Samples("a", 3, {})}, {}, {}), PreconditionError);
  EvaluationOptions bad;
  bad.alpha = 1.5;
  EXPECT_THROW(Evaluate({}, {}, bad), PreconditionError);
  bad = {};
  bad.grace_seconds = -1;
  EXPECT_THROW(Evaluate({}, {}, bad), PreconditionError);
  try {
    Evaluate({unsorted}, {}, {});
  } catch (const PreconditionError& e) {
    EXPECT_NE(std::string(e.what()).find("'a'"), std::string::npos) << e.what();
  }
}

TEST(EvaluationNamesTest, ParseAndNameRoundTrip) {
  for (PositionalBias bias : {PositionalBias::kFlat, PositionalBias::kFront, PositionalBias::kBack,
                              PositionalBias::kMiddle}) {
    EXPECT_EQ(ParsePositionalBias(PositionalBiasName(bias)), bias);
  }
  for (CardinalityFactor factor : {CardinalityFactor::kOne, CardinalityFactor::kReciprocal}) {
    EXPECT_EQ(ParseCardinalityFactor(CardinalityName(factor)), factor);
  }
  EXPECT_FALSE(ParsePositionalBias("sideways").has_value());
  EXPECT_FALSE(ParseCardinalityFactor("two").has_value());
}

}  // namespace
}  // namespace nuwatch
