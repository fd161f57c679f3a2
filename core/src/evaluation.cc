// Scoring alarms against labelled incidents; conventions in nuwatch/evaluation.h.
#include "nuwatch/evaluation.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <map>
#include <numeric>
#include <sstream>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

constexpr double kSecondsPerDay = 86400.0;

std::string Quote(const std::string& stream) { return "'" + stream + "'"; }

std::string Number(double value) {
  std::ostringstream out;
  out.precision(17);
  out << value;
  return out.str();
}

// The positional bias delta(i, length) of Tatbul et al. 2018, i = 1..length. Written from the
// paper's definitions as remembered (flat: 1; front-end: length - i + 1; back-end: i; middle:
// i while i <= length / 2, then length - i + 1); a library copy of the paper was not available.
double BiasWeight(PositionalBias bias, int64_t i, int64_t length) {
  switch (bias) {
    case PositionalBias::kFlat:
      return 1.0;
    case PositionalBias::kFront:
      return static_cast<double>(length - i + 1);
    case PositionalBias::kBack:
      return static_cast<double>(i);
    case PositionalBias::kMiddle:
      return static_cast<double>(2 * i <= length ? i : length - i + 1);
  }
  return 1.0;
}

// Sum of delta(i, length) for the positions i of `range` that lie in [overlap_first, overlap_last]
// (absolute sample indices).
double BiasSum(PositionalBias bias, const SampleRange& range, int64_t overlap_first,
               int64_t overlap_last) {
  const int64_t length = range.last - range.first + 1;
  double sum = 0;
  for (int64_t k = overlap_first; k <= overlap_last; ++k) {
    sum += BiasWeight(bias, k - range.first + 1, length);
  }
  return sum;
}

double Cardinality(CardinalityFactor factor, int64_t overlapped) {
  if (factor == CardinalityFactor::kOne || overlapped <= 1) return 1.0;
  return 1.0 / static_cast<double>(overlapped);
}

void CheckRanges(const std::vector<SampleRange>& ranges, const char* which) {
  for (std::size_t k = 0; k < ranges.size(); ++k) {
    if (ranges[k].first > ranges[k].last) {
      throw PreconditionError(std::string("ScoreRanges: ") + which + " range " + std::to_string(k) +
                              " has first " + std::to_string(ranges[k].first) + " > last " +
                              std::to_string(ranges[k].last));
    }
    if (k > 0 && ranges[k].first <= ranges[k - 1].last) {
      throw PreconditionError(std::string("ScoreRanges: ") + which + " ranges " +
                              std::to_string(k - 1) + " and " + std::to_string(k) +
                              " are not sorted and disjoint");
    }
  }
}

// For each range of `scored`, the Tatbul overlap reward against `other`:
// CardinalityFactor * sum_j omega(range, overlap(range, other_j), delta), and whether any overlap
// exists. Both lists sorted and disjoint, so the ranges of `other` meeting one range are contiguous
// and a single forward sweep finds them.
struct OverlapReward {
  double reward = 0;
  bool exists = false;
};
std::vector<OverlapReward> OverlapRewards(const std::vector<SampleRange>& scored,
                                          const std::vector<SampleRange>& other,
                                          const EvaluationOptions& options) {
  std::vector<OverlapReward> rewards(scored.size());
  std::size_t j = 0;
  for (std::size_t i = 0; i < scored.size(); ++i) {
    const SampleRange& range = scored[i];
    while (j < other.size() && other[j].last < range.first) ++j;
    const double whole = BiasSum(options.bias, range, range.first, range.last);
    double omega_sum = 0;
    int64_t overlapped = 0;
    for (std::size_t k = j; k < other.size() && other[k].first <= range.last; ++k) {
      const int64_t first = std::max(range.first, other[k].first);
      const int64_t last = std::min(range.last, other[k].last);
      omega_sum += BiasSum(options.bias, range, first, last) / whole;
      ++overlapped;
    }
    rewards[i].exists = overlapped > 0;
    rewards[i].reward = Cardinality(options.cardinality, overlapped) * omega_sum;
  }
  return rewards;
}

void CheckOptions(const EvaluationOptions& options, const char* function) {
  if (!(options.alpha >= 0 && options.alpha <= 1)) {
    throw PreconditionError(std::string(function) + ": alpha = " + Number(options.alpha) +
                            " is outside [0, 1]");
  }
  if (!std::isfinite(options.grace_seconds) || options.grace_seconds < 0) {
    throw PreconditionError(std::string(function) + ": grace_seconds = " +
                            Number(options.grace_seconds) + " is not a finite number >= 0");
  }
}

std::optional<double> Ratio(double numerator, double denominator) {
  if (denominator <= 0) return std::nullopt;
  return numerator / denominator;
}

double Median(std::vector<double> values) {
  std::sort(values.begin(), values.end());
  const std::size_t n = values.size();
  return n % 2 == 1 ? values[n / 2] : 0.5 * (values[n / 2 - 1] + values[n / 2]);
}

// Union of closed intervals, sorted by start; touching intervals merge.
std::vector<TimeInterval> MergeIntervals(std::vector<TimeInterval> intervals) {
  std::sort(intervals.begin(), intervals.end(), [](const TimeInterval& a, const TimeInterval& b) {
    return a.start_seconds < b.start_seconds;
  });
  std::vector<TimeInterval> merged;
  for (const TimeInterval& interval : intervals) {
    if (!merged.empty() && interval.start_seconds <= merged.back().end_seconds) {
      merged.back().end_seconds = std::max(merged.back().end_seconds, interval.end_seconds);
    } else {
      merged.push_back(interval);
    }
  }
  return merged;
}

// The half-open index range [begin, end) of the samples with start <= t <= end.
std::pair<std::size_t, std::size_t> SamplesIn(const std::vector<double>& times, double start,
                                              double end) {
  const auto begin = std::lower_bound(times.begin(), times.end(), start);
  const auto stop = std::upper_bound(begin, times.end(), end);
  return {static_cast<std::size_t>(begin - times.begin()),
          static_cast<std::size_t>(stop - times.begin())};
}

std::vector<bool> MarkSamples(const std::vector<double>& times,
                              const std::vector<TimeInterval>& intervals) {
  std::vector<bool> marked(times.size(), false);
  for (const TimeInterval& interval : intervals) {
    const auto [begin, end] = SamplesIn(times, interval.start_seconds, interval.end_seconds);
    for (std::size_t k = begin; k < end; ++k) marked[k] = true;
  }
  return marked;
}

void FinishDelays(StreamEvaluation& result) {
  const std::vector<double>& delays = result.detection_delays_seconds;
  if (delays.empty()) return;
  result.detection_delay_median_seconds = Median(delays);
  result.detection_delay_mean_seconds =
      std::accumulate(delays.begin(), delays.end(), 0.0) / static_cast<double>(delays.size());
  result.detection_delay_max_seconds = *std::max_element(delays.begin(), delays.end());
}

void FinishPointWise(StreamEvaluation& result) {
  const double tp = static_cast<double>(result.true_positives);
  const double fp = static_cast<double>(result.false_positives);
  const double fn = static_cast<double>(result.false_negatives);
  result.point_precision = Ratio(tp, tp + fp);
  result.point_recall = Ratio(tp, tp + fn);
  result.point_f1 = Ratio(2 * tp, 2 * tp + fp + fn);
}

void FinishRanges(StreamEvaluation& result) {
  RangeScores& r = result.ranges;
  r.recall = Ratio(r.recall_sum, static_cast<double>(r.real_ranges));
  r.precision = Ratio(r.precision_sum, static_cast<double>(r.predicted_ranges));
  result.range_recall = r.recall;
  result.range_precision = r.precision;
}

void CheckStream(const StreamAlarms& alarms) {
  const std::string name = Quote(alarms.stream);
  for (std::size_t k = 0; k < alarms.times.size(); ++k) {
    if (!std::isfinite(alarms.times[k])) {
      throw PreconditionError("Evaluate: stream " + name + ": times[" + std::to_string(k) +
                              "] is not finite");
    }
    if (k > 0 && alarms.times[k] < alarms.times[k - 1]) {
      throw PreconditionError("Evaluate: stream " + name + ": times[" + std::to_string(k) +
                              "] = " + Number(alarms.times[k]) + " is before times[" +
                              std::to_string(k - 1) + "] = " + Number(alarms.times[k - 1]));
    }
  }
  if (alarms.events_given) {
    if (!alarms.flagged.empty()) {
      throw PreconditionError("Evaluate: stream " + name + ": both flags and events given");
    }
  } else if (alarms.flagged.size() != alarms.times.size()) {
    throw PreconditionError("Evaluate: stream " + name + ": " +
                            std::to_string(alarms.flagged.size()) + " flags for " +
                            std::to_string(alarms.times.size()) + " samples");
  }
  for (const TimeInterval& event : alarms.events) {
    if (!std::isfinite(event.start_seconds) || !std::isfinite(event.end_seconds) ||
        event.start_seconds > event.end_seconds) {
      throw PreconditionError("Evaluate: stream " + name + ": alarm event [" +
                              Number(event.start_seconds) + ", " + Number(event.end_seconds) +
                              "] is not a finite interval with start <= end");
    }
  }
}

// One stream whose sample times are known: everything is counted on samples.
StreamEvaluation EvaluateSamples(const StreamAlarms& alarms, const std::vector<Incident>& incidents,
                                 const EvaluationOptions& options) {
  StreamEvaluation result;
  result.stream = alarms.stream;
  result.samples_known = true;
  const std::vector<double>& times = alarms.times;
  const std::size_t n = times.size();

  // Alarm events as index ranges of the samples they cover, and the flags.
  std::vector<bool> flagged;
  std::vector<std::pair<std::size_t, std::size_t>> events;  // [begin, end)
  if (alarms.events_given) {
    flagged.assign(n, false);
    for (const TimeInterval& event : alarms.events) {
      const auto [begin, end] = SamplesIn(times, event.start_seconds, event.end_seconds);
      if (begin == end) continue;  // covers no sample: nothing to match it with
      events.emplace_back(begin, end);
      for (std::size_t k = begin; k < end; ++k) flagged[k] = true;
    }
  } else {
    flagged = alarms.flagged;
    for (const SampleRange& run : RunsOf(flagged)) {
      events.emplace_back(static_cast<std::size_t>(run.first),
                          static_cast<std::size_t>(run.last) + 1);
    }
  }

  std::vector<TimeInterval> incident_intervals;
  std::vector<TimeInterval> graced_intervals;
  for (const Incident& incident : incidents) {
    incident_intervals.push_back({incident.start_seconds, incident.end_seconds});
    graced_intervals.push_back(
        {incident.start_seconds, incident.end_seconds + options.grace_seconds});
  }
  const std::vector<TimeInterval> incident_union = MergeIntervals(incident_intervals);
  const std::vector<bool> inside = MarkSamples(times, incident_union);
  const std::vector<bool> inside_graced = MarkSamples(times, MergeIntervals(graced_intervals));

  // Point-wise.
  result.samples = static_cast<int64_t>(n);
  for (std::size_t k = 0; k < n; ++k) {
    if (flagged[k]) ++result.flagged_samples;
    if (inside[k]) ++result.incident_samples;
    if (flagged[k] && inside[k]) ++result.true_positives;
    if (flagged[k] && !inside[k]) ++result.false_positives;
    if (!flagged[k] && inside[k]) ++result.false_negatives;
    if (!flagged[k] && !inside[k]) ++result.true_negatives;
  }
  FinishPointWise(result);

  // Detection: the first flagged sample at or after each incident's start.
  std::vector<std::size_t> next_flagged(n + 1, n);
  for (std::size_t k = n; k-- > 0;) next_flagged[k] = flagged[k] ? k : next_flagged[k + 1];
  result.incidents = static_cast<int64_t>(incidents.size());
  for (const Incident& incident : incidents) {
    const auto [begin, end] =
        SamplesIn(times, incident.start_seconds, incident.end_seconds + options.grace_seconds);
    const std::size_t first = next_flagged[begin];
    if (first < end) {
      ++result.incidents_detected;
      result.detection_delays_seconds.push_back(times[first] - incident.start_seconds);
    }
  }
  result.incidents_missed = result.incidents - result.incidents_detected;
  FinishDelays(result);

  // False alarms: events none of whose (flagged) samples is in an incident or its grace.
  std::vector<int64_t> graced_before(n + 1, 0);
  for (std::size_t k = 0; k < n; ++k) {
    graced_before[k + 1] = graced_before[k] + (inside_graced[k] ? 1 : 0);
  }
  result.alarm_events = static_cast<int64_t>(events.size());
  for (const auto& [begin, end] : events) {
    if (graced_before[end] == graced_before[begin]) ++result.false_alarm_events;
  }

  // Observed and incident-free time.
  double observed = 0;
  if (n >= 2) {
    std::vector<double> intervals(n - 1);
    for (std::size_t k = 1; k < n; ++k) intervals[k - 1] = times[k] - times[k - 1];
    observed = times[n - 1] - times[0] + Median(std::move(intervals));
  }
  double incident_time = 0;
  if (n >= 1) {
    const double lo = times[0];
    const double hi = times[0] + observed;
    for (const TimeInterval& interval : incident_union) {
      incident_time +=
          std::max(0.0, std::min(interval.end_seconds, hi) - std::max(interval.start_seconds, lo));
    }
  }
  result.observed_seconds = observed;
  result.incident_free_seconds = std::max(0.0, observed - incident_time);
  if (*result.incident_free_seconds > 0) {
    result.false_alarms_per_day = static_cast<double>(result.false_alarm_events) /
                                  (*result.incident_free_seconds / kSecondsPerDay);
  }

  result.ranges = ScoreRanges(RunsOf(inside), RunsOf(flagged), options);
  FinishRanges(result);
  return result;
}

// One stream known only by its alarm event intervals (or by nothing at all).
StreamEvaluation EvaluateIntervals(const StreamAlarms& alarms,
                                   const std::vector<Incident>& incidents,
                                   const EvaluationOptions& options) {
  StreamEvaluation result;
  result.stream = alarms.stream;
  result.samples_known = false;
  const auto meets = [&](const TimeInterval& event, const Incident& incident) {
    return event.start_seconds <= incident.end_seconds + options.grace_seconds &&
           event.end_seconds >= incident.start_seconds;
  };
  result.incidents = static_cast<int64_t>(incidents.size());
  for (const Incident& incident : incidents) {
    double first = std::numeric_limits<double>::infinity();
    for (const TimeInterval& event : alarms.events) {
      if (meets(event, incident)) {
        first = std::min(first, std::max(event.start_seconds, incident.start_seconds));
      }
    }
    if (std::isfinite(first)) {
      ++result.incidents_detected;
      result.detection_delays_seconds.push_back(first - incident.start_seconds);
    }
  }
  result.incidents_missed = result.incidents - result.incidents_detected;
  FinishDelays(result);
  result.alarm_events = static_cast<int64_t>(alarms.events.size());
  for (const TimeInterval& event : alarms.events) {
    const bool touches =
        std::any_of(incidents.begin(), incidents.end(),
                    [&](const Incident& incident) { return meets(event, incident); });
    if (!touches) ++result.false_alarm_events;
  }
  return result;
}

void AddToOverall(const StreamEvaluation& stream, StreamEvaluation& overall) {
  overall.samples_known = overall.samples_known || stream.samples_known;
  overall.samples += stream.samples;
  overall.flagged_samples += stream.flagged_samples;
  overall.incident_samples += stream.incident_samples;
  overall.true_positives += stream.true_positives;
  overall.false_positives += stream.false_positives;
  overall.false_negatives += stream.false_negatives;
  overall.true_negatives += stream.true_negatives;
  overall.incidents += stream.incidents;
  overall.incidents_detected += stream.incidents_detected;
  overall.incidents_missed += stream.incidents_missed;
  overall.detection_delays_seconds.insert(overall.detection_delays_seconds.end(),
                                          stream.detection_delays_seconds.begin(),
                                          stream.detection_delays_seconds.end());
  overall.alarm_events += stream.alarm_events;
  overall.false_alarm_events += stream.false_alarm_events;
  if (stream.samples_known) {
    overall.observed_seconds = overall.observed_seconds.value_or(0) + *stream.observed_seconds;
    overall.incident_free_seconds =
        overall.incident_free_seconds.value_or(0) + *stream.incident_free_seconds;
  }
  overall.ranges.real_ranges += stream.ranges.real_ranges;
  overall.ranges.predicted_ranges += stream.ranges.predicted_ranges;
  overall.ranges.recall_sum += stream.ranges.recall_sum;
  overall.ranges.precision_sum += stream.ranges.precision_sum;
}

}  // namespace

std::string_view CardinalityName(CardinalityFactor factor) {
  return factor == CardinalityFactor::kReciprocal ? "reciprocal" : "one";
}

std::optional<CardinalityFactor> ParseCardinalityFactor(std::string_view name) {
  if (name == "one") return CardinalityFactor::kOne;
  if (name == "reciprocal") return CardinalityFactor::kReciprocal;
  return std::nullopt;
}

std::string_view PositionalBiasName(PositionalBias bias) {
  switch (bias) {
    case PositionalBias::kFlat:
      return "flat";
    case PositionalBias::kFront:
      return "front";
    case PositionalBias::kBack:
      return "back";
    case PositionalBias::kMiddle:
      return "middle";
  }
  return "flat";
}

std::optional<PositionalBias> ParsePositionalBias(std::string_view name) {
  if (name == "flat") return PositionalBias::kFlat;
  if (name == "front") return PositionalBias::kFront;
  if (name == "back") return PositionalBias::kBack;
  if (name == "middle") return PositionalBias::kMiddle;
  return std::nullopt;
}

std::vector<SampleRange> RunsOf(const std::vector<bool>& values) {
  std::vector<SampleRange> runs;
  const int64_t n = static_cast<int64_t>(values.size());
  for (int64_t k = 0; k < n; ++k) {
    if (!values[k]) continue;
    if (!runs.empty() && runs.back().last == k - 1) {
      runs.back().last = k;
    } else {
      runs.push_back({k, k});
    }
  }
  return runs;
}

RangeScores ScoreRanges(const std::vector<SampleRange>& real,
                        const std::vector<SampleRange>& predicted,
                        const EvaluationOptions& options) {
  CheckOptions(options, "ScoreRanges");
  CheckRanges(real, "real");
  CheckRanges(predicted, "predicted");
  RangeScores scores;
  scores.real_ranges = static_cast<int64_t>(real.size());
  scores.predicted_ranges = static_cast<int64_t>(predicted.size());
  for (const OverlapReward& r : OverlapRewards(real, predicted, options)) {
    scores.recall_sum += options.alpha * (r.exists ? 1.0 : 0.0) + (1 - options.alpha) * r.reward;
  }
  for (const OverlapReward& r : OverlapRewards(predicted, real, options)) {
    scores.precision_sum += r.reward;
  }
  scores.recall = Ratio(scores.recall_sum, static_cast<double>(scores.real_ranges));
  scores.precision = Ratio(scores.precision_sum, static_cast<double>(scores.predicted_ranges));
  return scores;
}

EvaluationReport Evaluate(const std::vector<StreamAlarms>& alarms,
                          const std::vector<Incident>& incidents,
                          const EvaluationOptions& options) {
  CheckOptions(options, "Evaluate");
  std::map<std::string, const StreamAlarms*> by_stream;
  for (const StreamAlarms& stream : alarms) {
    CheckStream(stream);
    if (!by_stream.emplace(stream.stream, &stream).second) {
      throw PreconditionError("Evaluate: stream " + Quote(stream.stream) + " appears twice");
    }
  }
  std::map<std::string, std::vector<Incident>> incidents_by_stream;
  for (const Incident& incident : incidents) {
    if (!std::isfinite(incident.start_seconds) || !std::isfinite(incident.end_seconds) ||
        incident.start_seconds > incident.end_seconds) {
      throw PreconditionError("Evaluate: incident of stream " + Quote(incident.stream) + " [" +
                              Number(incident.start_seconds) + ", " + Number(incident.end_seconds) +
                              "] is not a finite interval with start <= end");
    }
    incidents_by_stream[incident.stream].push_back(incident);
    by_stream.emplace(incident.stream, nullptr);  // a stream with incidents only
  }

  EvaluationReport report;
  report.options = options;
  bool unknown_duration_with_alarms = false;
  const StreamAlarms no_alarms;
  for (const auto& [name, stream_alarms] : by_stream) {
    std::vector<Incident>& stream_incidents = incidents_by_stream[name];
    std::sort(stream_incidents.begin(), stream_incidents.end(),
              [](const Incident& a, const Incident& b) {
                return a.start_seconds != b.start_seconds ? a.start_seconds < b.start_seconds
                                                          : a.end_seconds < b.end_seconds;
              });
    const StreamAlarms& source = stream_alarms != nullptr ? *stream_alarms : no_alarms;
    StreamEvaluation result = source.times.empty()
                                  ? EvaluateIntervals(source, stream_incidents, options)
                                  : EvaluateSamples(source, stream_incidents, options);
    result.stream = name;
    if (!result.samples_known && result.alarm_events > 0) unknown_duration_with_alarms = true;
    AddToOverall(result, report.overall);
    report.streams.push_back(std::move(result));
  }

  StreamEvaluation& overall = report.overall;
  if (overall.samples_known) FinishPointWise(overall);
  FinishDelays(overall);
  if (overall.samples_known && !unknown_duration_with_alarms &&
      *overall.incident_free_seconds > 0) {
    overall.false_alarms_per_day = static_cast<double>(overall.false_alarm_events) /
                                   (*overall.incident_free_seconds / kSecondsPerDay);
  }
  FinishRanges(overall);
  return report;
}

}  // namespace nuwatch
