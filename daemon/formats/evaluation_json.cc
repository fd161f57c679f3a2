#include "formats/evaluation_json.h"

namespace nuwatch {

nlohmann::json OptionalNumber(const std::optional<double>& value) {
  return value ? nlohmann::json(*value) : nlohmann::json(nullptr);
}

nlohmann::json EvaluationJson(const StreamEvaluation& e) {
  nlohmann::json j;
  j["samples_known"] = e.samples_known;
  j["samples"] = e.samples;
  j["flagged_samples"] = e.flagged_samples;
  j["incident_samples"] = e.incident_samples;
  j["true_positives"] = e.true_positives;
  j["false_positives"] = e.false_positives;
  j["false_negatives"] = e.false_negatives;
  j["true_negatives"] = e.true_negatives;
  j["point_precision"] = OptionalNumber(e.point_precision);
  j["point_recall"] = OptionalNumber(e.point_recall);
  j["point_f1"] = OptionalNumber(e.point_f1);
  j["incidents"] = e.incidents;
  j["incidents_detected"] = e.incidents_detected;
  j["incidents_missed"] = e.incidents_missed;
  j["detection_delay_median_seconds"] = OptionalNumber(e.detection_delay_median_seconds);
  j["detection_delay_mean_seconds"] = OptionalNumber(e.detection_delay_mean_seconds);
  j["detection_delay_max_seconds"] = OptionalNumber(e.detection_delay_max_seconds);
  j["alarm_events"] = e.alarm_events;
  j["false_alarm_events"] = e.false_alarm_events;
  j["observed_seconds"] = OptionalNumber(e.observed_seconds);
  j["incident_free_seconds"] = OptionalNumber(e.incident_free_seconds);
  j["false_alarms_per_day"] = OptionalNumber(e.false_alarms_per_day);
  j["real_ranges"] = e.ranges.real_ranges;
  j["predicted_ranges"] = e.ranges.predicted_ranges;
  j["range_precision"] = OptionalNumber(e.range_precision);
  j["range_recall"] = OptionalNumber(e.range_recall);
  return j;
}

}  // namespace nuwatch
