// Scoring alarms against labelled incident windows: point-wise, event-wise and range-based
// figures per stream and over all streams. Used by `nuwatch evaluate` (files) and `nuwatch tune`
// (in-memory replay results). No I/O.
//
// Conventions (the numbers depend on them):
// - An incident is the closed interval [start, end] of one stream; a sample at time t is inside it
//   when start <= t <= end. Incidents of one stream may overlap or touch.
// - Point-wise: a sample is "real" when it is inside at least one incident of its stream and
//   "flagged" when the detector raised an alarm on it. TP/FP/FN/TN count samples.
//     precision = TP / (TP + FP), undefined (nullopt) with no flagged sample;
//     recall    = TP / (TP + FN), undefined with no real sample;
//     F1        = 2 TP / (2 TP + FP + FN) (the harmonic mean of the two where both are defined),
//                 undefined only when there is neither a flagged nor a real sample, so F1 = 0
//                 when nothing was flagged during an incident (or only outside incidents).
// - Event-wise: an alarm event is a maximal run of consecutive flagged samples, or, when events
//   are given as intervals, each given closed interval (its samples are those inside it).
//   Incidents count one by one, even when they overlap. An incident is detected when a flagged
//   sample lies in [start, end + grace]; its detection delay is the time of the first such sample
//   minus start (so >= 0). Median (mean of the middle two for an even count), mean and max are
//   over detected incidents, undefined when none was detected.
//   A false alarm is an alarm event none of whose flagged samples lies in [start, end + grace] of
//   any incident of its stream (an event that spans two incidents is one event, not false).
//   Observed time = last sample - first sample + median sample interval (each sample stands for
//   the interval up to the next; one sample: 0). Incident-free time = observed time minus the
//   length of the union of the stream's incidents inside [first sample, first + observed]
//   (grace is not incident time). False alarms per day = false alarm events / incident-free days,
//   undefined when the incident-free time is 0.
// - Range-based (Tatbul, Lee, Zdonik, Alam, Gottschlich, "Precision and recall for time series",
//   NeurIPS 2018), counted in samples: a real range is a maximal run of consecutive samples that
//   are inside incidents (overlapping or touching incidents therefore merge into one range); a
//   predicted range is a maximal run of consecutive flagged samples (also when events were given
//   as intervals). Range ends are inclusive. Recall_T is the mean over real ranges R_i of
//   alpha * Existence + (1 - alpha) * CardinalityFactor * sum_j omega(R_i, overlap(R_i, P_j),
//   delta); Precision_T the mean over predicted ranges P_j of CardinalityFactor * sum_i omega(P_j,
//   overlap(P_j, R_i), delta) (alpha = 0 for precision, as in the paper). Undefined with no real
//   (recall) or no predicted (precision) range. omega(A, O, delta) = sum of delta(i, |A|) over
//   the positions i of A in O / the same sum over all of A. Grace plays no part here.
// - Without sample times (an alarm event list with no samples) only the event-wise counts and
//   delays are defined: an event [a, b] detects an incident when it meets [start, end + grace],
//   at time max(a, start); point-wise, range-based and per-day figures are undefined.
// - Overall: counts are summed over streams, then the ratios computed; delays are pooled over all
//   detected incidents; range scores are pooled over all ranges of all streams. Streams that
//   appear only in the incidents are reported with no samples: their incidents are missed and
//   they add nothing to the sample-based figures.
// Thread safety: pure functions on values.
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

namespace nuwatch {

struct Incident {
  std::string stream;
  double start_seconds = 0;  // closed interval, seconds since the epoch
  double end_seconds = 0;
  std::string kind;  // free-form label; reported, not used in scoring
};

// A closed time interval [start, end], seconds since the epoch.
struct TimeInterval {
  double start_seconds = 0;
  double end_seconds = 0;
};

// What a detector said about one stream.
struct StreamAlarms {
  std::string stream;
  // Sample times, sorted non-decreasing, finite. Empty when unknown (an alarm event list alone).
  std::vector<double> times;
  // One flag per sample (true = alarm) when `events` is empty; otherwise empty (the flags follow
  // from the events: a sample is flagged when it lies in one of them).
  std::vector<bool> flagged;
  // Alarm events given as closed intervals (start <= end). When sample times are known, an event
  // that covers no sample is ignored.
  std::vector<TimeInterval> events;
  bool events_given = false;  // true: `events` holds the alarm events (possibly none)
};

enum class CardinalityFactor {
  kOne,         // always 1
  kReciprocal,  // 1 when a range overlaps at most one range of the other set, else 1 / count
};
enum class PositionalBias {
  // delta(i, L) for position i = 1..L of a range of L samples:
  kFlat,    // 1: every position weighs the same
  kFront,   // L - i + 1: earlier positions weigh more (rewards early detection)
  kBack,    // i: later positions weigh more
  kMiddle,  // i while 2i <= L, then L - i + 1: the middle weighs most
};

std::string_view CardinalityName(CardinalityFactor factor);  // "one", "reciprocal"
std::optional<CardinalityFactor> ParseCardinalityFactor(std::string_view name);
std::string_view PositionalBiasName(PositionalBias bias);  // "flat", "front", "back", "middle"
std::optional<PositionalBias> ParsePositionalBias(std::string_view name);

struct EvaluationOptions {
  double grace_seconds = 0;  // an alarm this long after an incident's end still detects it; >= 0
  double alpha = 0;          // weight of the existence reward in range-based recall; [0, 1]
  CardinalityFactor cardinality = CardinalityFactor::kOne;
  PositionalBias bias = PositionalBias::kFlat;  // for both range-based precision and recall
};

// A run of samples by index, both ends inclusive: first <= last.
struct SampleRange {
  int64_t first = 0;
  int64_t last = 0;
};

struct RangeScores {
  int64_t real_ranges = 0;
  int64_t predicted_ranges = 0;
  double recall_sum = 0;            // sum of the per-real-range recall scores
  double precision_sum = 0;         // sum of the per-predicted-range precision scores
  std::optional<double> recall;     // recall_sum / real_ranges
  std::optional<double> precision;  // precision_sum / predicted_ranges
};

// Range-based precision and recall of Tatbul et al. 2018 on sample indices.
// Requires: each list sorted by `first`, its ranges disjoint, first <= last in each (ranges of the
// two lists may overlap in any way); options.alpha in [0, 1]. Throws PreconditionError otherwise.
RangeScores ScoreRanges(const std::vector<SampleRange>& real,
                        const std::vector<SampleRange>& predicted,
                        const EvaluationOptions& options);

// Maximal runs of true values, in order.
std::vector<SampleRange> RunsOf(const std::vector<bool>& values);

struct StreamEvaluation {
  std::string stream;  // empty for the overall row (and for the unnamed stream)
  bool samples_known = false;

  // Point-wise.
  int64_t samples = 0;
  int64_t flagged_samples = 0;
  int64_t incident_samples = 0;  // samples inside at least one incident
  int64_t true_positives = 0;
  int64_t false_positives = 0;
  int64_t false_negatives = 0;
  int64_t true_negatives = 0;
  std::optional<double> point_precision;
  std::optional<double> point_recall;
  std::optional<double> point_f1;

  // Event-wise.
  int64_t incidents = 0;
  int64_t incidents_detected = 0;
  int64_t incidents_missed = 0;
  std::vector<double> detection_delays_seconds;  // one per detected incident
  std::optional<double> detection_delay_median_seconds;
  std::optional<double> detection_delay_mean_seconds;
  std::optional<double> detection_delay_max_seconds;
  int64_t alarm_events = 0;
  int64_t false_alarm_events = 0;
  std::optional<double> observed_seconds;
  std::optional<double> incident_free_seconds;
  std::optional<double> false_alarms_per_day;

  // Range-based.
  RangeScores ranges;
  std::optional<double> range_precision;  // == ranges.precision
  std::optional<double> range_recall;     // == ranges.recall
};

struct EvaluationReport {
  EvaluationOptions options;
  std::vector<StreamEvaluation> streams;  // every stream of the alarms or incidents, by name
  StreamEvaluation overall;
};

// Scores the alarms of each stream against the incidents (of any streams) under the conventions
// above. Requires: stream names distinct; for each stream, times sorted non-decreasing and finite,
// flagged.size() == times.size() when !events_given, flagged empty when events_given; every event
// and incident finite with start <= end; options.grace_seconds finite and >= 0, options.alpha in
// [0, 1]. Throws PreconditionError naming the stream and the offending values otherwise.
EvaluationReport Evaluate(const std::vector<StreamAlarms>& alarms,
                          const std::vector<Incident>& incidents, const EvaluationOptions& options);

}  // namespace nuwatch
