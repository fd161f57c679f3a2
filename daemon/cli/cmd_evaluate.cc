// nuwatch evaluate: scores alarms (replay output or an alarm event list) against labelled incident
// windows and prints point-wise, event-wise and range-based figures per stream and overall.
#include <cmath>
#include <cstdio>
#include <iostream>
#include <memory>
#include <nlohmann/json.hpp>
#include <optional>
#include <string>
#include <vector>

#include "cli/cli_util.h"
#include "cli/commands.h"
#include "formats/alarm_files.h"
#include "formats/csv_table.h"
#include "formats/evaluation_json.h"
#include "formats/timestamps.h"
#include "nuwatch/evaluation.h"
#include "nuwatch/types.h"

namespace nuwatch::cli {
namespace {

constexpr const char* kConventions = R"(Files:
  --alarms is either replay output (a header with `time` and `anomaly`, optionally `stream`,
  `state`, `incident`): every row is a sample; with --alarm-kind incident (the default, as in
  `nuwatch tune`) it is flagged while an incident is open (the `incident` column holds the open
  incident's id), with --alarm-kind anomaly when `anomaly` is 1 (rows whose state is `learning` or
  `history` are samples with no alarm). Or an alarm event list
  (columns `stream,start,end`): each row is one alarm event, the closed interval [start, end].
  An event list has no sample times: then only incidents detected/missed, detection delays and
  the false alarm count are computed, and point-wise, range-based and per-day figures are n/a
  (null in JSON), unless --samples gives the sample times (a CSV with `time` and optionally
  `stream`, e.g. the replayed feature file), which makes every figure defined.
  --incidents has columns `stream,start,end[,kind]`. Times are ISO-8601 or seconds since the
  epoch. No `stream` column, or an empty stream, means the unnamed stream.
Conventions:
  An incident is the closed interval [start, end]; a sample at t is inside when start <= t <= end.
  Point-wise precision/recall/F1 count samples: precision is n/a with no flagged sample, recall
  n/a with no sample inside an incident, F1 = 2TP / (2TP + FP + FN) (0 when nothing was caught).
  An incident is detected when a flagged sample lies in [start, end + grace]; delay = that
  sample's time - start (median, mean, max over detected incidents). An alarm event (a run of
  consecutive flagged samples, or an event-list row) is false when none of its samples lies in
  [start, end + grace] of an incident of its stream. False alarms per day = false alarm events /
  incident-free days, where incident-free time = (last - first sample + median sample interval)
  minus the incident time inside that span (grace is not incident time).
  Range-based precision/recall (Tatbul et al., NeurIPS 2018) count samples: a real range is a
  maximal run of samples inside incidents (overlapping incidents merge), a predicted range a
  maximal run of flagged samples; ends inclusive. --alpha weighs existence in recall only.
  Overall: counts summed over streams before the ratios; delays and ranges pooled. Incidents of
  streams absent from the alarms count as missed and add nothing to the sample-based figures.)";

struct EvaluateArguments {
  std::string alarms_path;
  std::string incidents_path;
  std::string samples_path;
  std::string grace = "0";
  std::string alpha = "0";
  std::string cardinality = "one";
  std::string bias = "flat";
  std::string alarm_kind = "incident";
  bool json = false;
};

EvaluationOptions ParseOptions(const EvaluateArguments& arguments) {
  EvaluationOptions options;
  options.grace_seconds = DurationFlag("--grace", arguments.grace);
  options.alpha = NumberFlagIn("--alpha", arguments.alpha, 0, 1);
  const std::optional<CardinalityFactor> cardinality =
      ParseCardinalityFactor(arguments.cardinality);
  if (!cardinality) {
    throw CommandError("--cardinality: '" + arguments.cardinality +
                       "' is not one of: one, reciprocal");
  }
  options.cardinality = *cardinality;
  const std::optional<PositionalBias> bias = ParsePositionalBias(arguments.bias);
  if (!bias) {
    throw CommandError("--bias: '" + arguments.bias + "' is not one of: flat, front, back, middle");
  }
  options.bias = *bias;
  return options;
}

nlohmann::json ReportJson(const EvaluationReport& report) {
  nlohmann::json j;
  j["options"] = {{"grace_seconds", report.options.grace_seconds},
                  {"alpha", report.options.alpha},
                  {"cardinality", std::string(CardinalityName(report.options.cardinality))},
                  {"bias", std::string(PositionalBiasName(report.options.bias))}};
  j["overall"] = EvaluationJson(report.overall);
  j["streams"] = nlohmann::json::object();
  for (const StreamEvaluation& stream : report.streams)
    j["streams"][stream.stream] = EvaluationJson(stream);
  return j;
}

std::string Fixed(const std::optional<double>& value, int decimals) {
  if (!value) return "n/a";
  char buffer[64];
  std::snprintf(buffer, sizeof buffer, "%.*f", decimals, *value);
  return buffer;
}

std::string Seconds(const std::optional<double>& value) {
  return value ? Fixed(value, 1) + "s" : "n/a";
}

void PrintTable(const EvaluationReport& report, std::ostream& out) {
  const std::vector<std::string> header = {"stream",    "samples",    "flagged",   "precision",
                                           "recall",    "f1",         "incidents", "detected",
                                           "delay_med", "delay_mean", "delay_max", "false_alarms",
                                           "false/day", "range_p",    "range_r"};
  std::vector<std::vector<std::string>> rows;
  const auto add = [&](const std::string& name, const StreamEvaluation& e) {
    rows.push_back({name, e.samples_known ? std::to_string(e.samples) : "n/a",
                    e.samples_known ? std::to_string(e.flagged_samples) : "n/a",
                    Fixed(e.point_precision, 3), Fixed(e.point_recall, 3), Fixed(e.point_f1, 3),
                    std::to_string(e.incidents), std::to_string(e.incidents_detected),
                    Seconds(e.detection_delay_median_seconds),
                    Seconds(e.detection_delay_mean_seconds), Seconds(e.detection_delay_max_seconds),
                    std::to_string(e.false_alarm_events), Fixed(e.false_alarms_per_day, 2),
                    Fixed(e.range_precision, 3), Fixed(e.range_recall, 3)});
  };
  for (const StreamEvaluation& stream : report.streams) {
    add(stream.stream.empty() ? "(unnamed)" : stream.stream, stream);
  }
  add("overall", report.overall);

  std::vector<std::size_t> widths(header.size());
  for (std::size_t c = 0; c < header.size(); ++c) widths[c] = header[c].size();
  for (const auto& row : rows) {
    for (std::size_t c = 0; c < row.size(); ++c) widths[c] = std::max(widths[c], row[c].size());
  }
  const auto print = [&](const std::vector<std::string>& row) {
    std::string line;
    for (std::size_t c = 0; c < row.size(); ++c) {
      const std::string padding(widths[c] - row[c].size(), ' ');
      // Names left-aligned, numbers right-aligned.
      line += c == 0 ? row[c] + padding : padding + row[c];
      if (c + 1 < row.size()) line += "  ";
    }
    out << line << "\n";
  };
  print(header);
  for (const auto& row : rows) print(row);
  out << "options: grace " << report.options.grace_seconds << "s, alpha " << report.options.alpha
      << ", cardinality " << CardinalityName(report.options.cardinality) << ", bias "
      << PositionalBiasName(report.options.bias) << "\n";
}

void RunEvaluate(const EvaluateArguments& arguments) {
  const EvaluationOptions options = ParseOptions(arguments);
  const std::optional<AlarmSource> kind = ParseAlarmSource(arguments.alarm_kind);
  if (!kind) {
    throw CommandError("--alarm-kind: '" + arguments.alarm_kind +
                       "' is not one of: incident, anomaly");
  }
  try {
    AlarmFile alarms = ReadAlarmFile(arguments.alarms_path, *kind);
    if (!arguments.samples_path.empty()) {
      if (alarms.form != AlarmFileForm::kEventList) {
        throw CommandError("--samples applies to an alarm event list only; " +
                           arguments.alarms_path + " is replay output, whose rows are the samples");
      }
      AttachSampleTimes(ReadCsv(arguments.samples_path), &alarms);
    }
    const std::vector<Incident> incidents = ReadIncidentFile(arguments.incidents_path);
    const EvaluationReport report = Evaluate(alarms.streams, incidents, options);
    if (arguments.json) {
      std::cout << ReportJson(report).dump(2) << "\n";
    } else {
      PrintTable(report, std::cout);
    }
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  } catch (const PreconditionError& e) {
    throw CommandError(e.what());
  }
}

void AddEvaluateCommand(CLI::App& app) {
  auto arguments = std::make_shared<EvaluateArguments>();
  CLI::App* command = app.add_subcommand(
      "evaluate",
      "Score alarms against labelled incident windows: point-wise precision/recall/F1, incidents "
      "detected and detection delay, false alarms per day, range-based precision/recall");
  command
      ->add_option("--alarms", arguments->alarms_path, "Replay output or an alarm event list (CSV)")
      ->type_name("FILE")
      ->required();
  command
      ->add_option("--incidents", arguments->incidents_path,
                   "Labelled incidents: stream,start,end[,kind] (CSV)")
      ->type_name("FILE")
      ->required();
  command
      ->add_option("--samples", arguments->samples_path,
                   "Sample times (CSV with time[,stream]) for an alarm event list")
      ->type_name("FILE");
  command
      ->add_option("--grace", arguments->grace,
                   "How long after an incident's end an alarm still detects it (90, 15m, 2h)")
      ->type_name("DURATION")
      ->capture_default_str();
  command
      ->add_option("--alpha", arguments->alpha,
                   "Weight of the existence reward in range-based recall, in [0, 1]")
      ->type_name("NUMBER")
      ->capture_default_str();
  command
      ->add_option("--cardinality", arguments->cardinality,
                   "Range-based cardinality factor: one | reciprocal")
      ->type_name("one|reciprocal")
      ->capture_default_str();
  command
      ->add_option("--bias", arguments->bias,
                   "Range-based positional bias: flat | front | back | middle")
      ->type_name("flat|front|back|middle")
      ->capture_default_str();
  command
      ->add_option("--alarm-kind", arguments->alarm_kind,
                   "In replay output, what counts as an alarm: incident (while one is open) | "
                   "anomaly (every flagged vector)")
      ->type_name("incident|anomaly")
      ->capture_default_str();
  command->add_flag("--json", arguments->json, "Print JSON instead of a table");
  command->footer(kConventions);
  command->callback([arguments] { RunEvaluate(*arguments); });
}

}  // namespace

NUWATCH_REGISTER_COMMAND(80, AddEvaluateCommand);

}  // namespace nuwatch::cli
