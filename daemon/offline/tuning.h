// Tuning the detector against labelled incident windows, as `nuwatch tune` does: every setting of
// a grid (the cartesian product of lists of nu, gamma, window and support-vector budget) replays a
// recorded stream file through the same Detector as the daemon (ReplayRecording, refits inline),
// its alarms are scored with Evaluate, and the best setting by an objective is chosen under an
// optional false-alarm limit. The results are written as CSV, JSON, a pasteable [detector] section
// and pictures.
//
// Conventions (the choice depends on them):
// - A setting replaces only the keys it names; a list left empty keeps each stream's configured
//   value ([detector] with its [[stream]] override). A tuned key beats every override, as a
//   command-line flag does. warmup becomes min(warmup, window) so that a short window stays valid.
// - Alarms (AlarmSource): kIncident (the default) alarms a sample while the detector's debounced
//   incident is open (Verdict::incident_id != 0): from the vector at which it opens, i.e. when
//   someone is paged, to the vector at which it closes. kOutlier alarms every flagged sample.
//   Samples of the warm-up are samples with no alarm, as `nuwatch evaluate` treats replay output.
// - Objectives: kPointF1 is the overall point-wise F1; kRangeF1 is 2 P R / (P + R) of the overall
//   range-based precision P and recall R (0 when both are 0 or when there is no alarm at all but
//   there are incident samples; undefined with no incident sample); kIncidentRecall ("recall") is
//   the fraction of labelled incidents detected (event-wise, with the grace), undefined with no
//   incident. Higher is better; an undefined objective ranks below every defined one.
// - False alarms per day is Evaluate's overall figure: false alarm events summed over the streams
//   divided by incident-free days summed over the streams, i.e. per stream and day (12 streams at
//   0.5 per day page someone 6 times a day).
// - Selection: a setting is within the limit when its false_alarms_per_day is defined and at most
//   the limit (every setting is, when there is no limit). The ranking puts the settings within the
//   limit first, by objective (high first), then fewer false alarms per day, then smaller nu, then
//   grid order; after them the settings over the limit by fewer false alarms per day, then
//   objective, nu and grid order. The chosen setting is the first of the ranking: when no setting
//   meets the limit it is the one with the fewest false alarms, and limit_met says so.
// - Determinism: every figure except replay_seconds depends only on the recording, the incidents
//   and the options, not on the number of jobs or the order in which threads finish.
// Thread safety: all functions are reentrant; RunTuning shares the recording read-only between
// its threads and calls `progress` from them one call at a time.
#pragma once

#include <cstddef>
#include <cstdint>
#include <functional>
#include <optional>
#include <stdexcept>
#include <string>
#include <string_view>
#include <vector>

#include "charts/charts.h"
#include "formats/alarm_files.h"
#include "nuwatch/detector_options.h"
#include "nuwatch/evaluation.h"
#include "nuwatch/kernel.h"
#include "offline/replay.h"
#include "settings/config.h"

namespace nuwatch {

// Bad input to the tuning functions (a bad list, a setting the detector rejects, a file that cannot
// be written). The message is one line.
class TuningError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

enum class TuningObjective { kPointF1, kRangeF1, kIncidentRecall };
std::string_view TuningObjectiveName(TuningObjective objective);  // "f1", "range-f1", "recall"
std::optional<TuningObjective> ParseTuningObjective(std::string_view name);
// A sentence for reports, e.g. "point-wise F1".
std::string_view TuningObjectiveDescription(TuningObjective objective);

// Comma-separated lists ("0.01, 0.02,0.05"; spaces around items are ignored). Throw TuningError
// naming the offending item for an empty list or item, a value out of range or a repeated value.
// nu: numbers in (0, 1]. gamma: "scale", "median", "min_volume" or a number > 0. window: integers
// >= 2. support_vector_budget: integers >= 1.
std::vector<double> ParseNuList(std::string_view text);
std::vector<GammaSpec> ParseGammaList(std::string_view text);
std::vector<int64_t> ParseWindowList(std::string_view text);
std::vector<int64_t> ParseSupportVectorBudgetList(std::string_view text);
// false_alarm_rate: numbers in (0, 0.5]. lags: integers in [0, 1000]. rolling window: integers,
// 0 (no rolling statistics) or in [2, 100000].
std::vector<double> ParseFalseAlarmRateList(std::string_view text);
std::vector<int64_t> ParseLagsList(std::string_view text);
std::vector<int64_t> ParseRollingWindowList(std::string_view text);

// The default nu list: 0.02, 0.05, 0.1. With calibrated alarms nu is the envelope's complexity
// (how much of the window it may leave out, how many support vectors it keeps), not the alarm
// rate; below nu x window = 10 the calibration scatters, above 0.1 the models grow without
// helping. The false-alarm budget is the knob that trades alarms against detection.
std::vector<double> DefaultNuList();

// The default false-alarm budgets: 0.0005 to 0.005, a factor of 10 around the detector's default.
std::vector<double> DefaultFalseAlarmRateList();

struct TuningGrid {
  std::vector<double> nu;  // empty: keep the configured value (likewise for the others)
  std::vector<GammaSpec> gamma;
  std::vector<int64_t> window;
  std::vector<int64_t> support_vector_budget;
  std::vector<double> false_alarm_rate;
  std::vector<int64_t> lags;
  std::vector<int64_t> rolling_window;  // one window per setting (rolling_windows = {w}); 0: none
};

// One point of the grid; an unset member keeps the configured value.
struct TuningSetting {
  std::optional<double> nu;
  std::optional<GammaSpec> gamma;
  std::optional<int64_t> window;
  std::optional<int64_t> support_vector_budget;
  std::optional<double> false_alarm_rate;
  std::optional<int64_t> lags;
  std::optional<int64_t> rolling_window;
};

// The cartesian product, nu varying fastest, then false_alarm_rate, gamma, lags, rolling_window,
// support_vector_budget, window.
// An empty list contributes one unset value, so the product has at least one setting. Ensures: size
// == product of max(1, list size).
std::vector<TuningSetting> ExpandGrid(const TuningGrid& grid);

// `base` with the setting's keys replaced (warmup clamped to the window, see above).
DetectorOptions ApplySetting(DetectorOptions base, const TuningSetting& setting);

// "nu 0.01, gamma scale, window 1440, support_vector_budget 128": the keys a grid tunes, named
// as in the config file.
std::string DescribeSetting(const DetectorOptions& options);

struct TuningOptions {
  Config base;  // [detector] and [[stream]] overrides the settings apply to
  TuningGrid grid;
  AlarmSource alarms = AlarmSource::kIncident;
  TuningObjective objective = TuningObjective::kPointF1;
  std::optional<double> max_false_alarms_per_day;  // finite, >= 0
  EvaluationOptions evaluation;
  int jobs = 1;  // threads, >= 1 (more than the settings is the number of settings)
};

struct SettingResult {
  std::size_t index = 0;  // position in ExpandGrid's order
  TuningSetting setting;
  // The base [detector] with the setting applied (what best.toml says); feature_names are the
  // recording's when the base names none.
  DetectorOptions detector;
  StreamEvaluation overall;  // Evaluate's overall row
  std::optional<double> range_f1;
  std::optional<double> incident_recall;
  std::optional<double> objective;
  bool within_limit = true;
  // Calibration honesty: the flagged fraction of the scored vectors outside every labelled
  // incident (the realised false-alarm rate, to set against detector.false_alarm_rate), and
  // whether the setting is usable at all: it flags at most half of the scored vectors.
  std::optional<double> realised_false_alarm_rate;
  bool usable = true;
  std::vector<std::string> warnings;  // distinct refit warnings, "STREAM: ..." (replay.h)
  double replay_seconds = 0;          // wall time of the replay and its scoring (not deterministic)
};

struct TuningSelection {
  std::vector<std::size_t> ranking;  // indices into the results, best first (see above)
  std::size_t chosen = 0;            // == ranking.front()
  bool limit_met = true;             // false: no setting is within the limit
  bool usable_found = true;          // false: every setting flags more than half the vectors
};

struct TuningReport {
  TuningObjective objective = TuningObjective::kPointF1;
  AlarmSource alarms = AlarmSource::kIncident;
  std::optional<double> max_false_alarms_per_day;
  EvaluationOptions evaluation;
  std::vector<SettingResult> results;  // grid order
  TuningSelection selection;
  // The chosen setting's replay (RunTuning keeps it for the timeline; may be empty otherwise).
  std::vector<ReplayRow> chosen_rows;
  const SettingResult& chosen() const { return results[selection.chosen]; }
};

struct TuningProgress {
  std::size_t settings_done = 0, settings_total = 0;
  int64_t rows_done = 0, rows_total = 0;  // replayed rows over all settings
};
using TuningProgressCallback = std::function<void(const TuningProgress&)>;

// The alarms of a replay, one StreamAlarms per stream of the recording, in its order.
// Requires: rows.size() == recording.rows().
std::vector<StreamAlarms> AlarmsFromReplay(const StreamRecording& recording,
                                           const std::vector<ReplayRow>& rows, AlarmSource source);

// Fills range_f1, incident_recall and objective of `result` from result->overall.
void ScoreSetting(TuningObjective objective, SettingResult* result);

// Ranks scored results (objective set by ScoreSetting) and sets within_limit of each.
// Requires: results not empty; limit finite and >= 0 when given (TuningError otherwise).
TuningSelection SelectSetting(std::vector<SettingResult>* results,
                              std::optional<double> max_false_alarms_per_day);

// Replays the recording once per setting on options.jobs threads, scores and selects.
// Requires: every setting gives valid detector options for every stream of the recording, each
// stream's times do not decrease, options as documented. Throws TuningError naming the setting,
// the stream or the value otherwise (before any replay starts, where it can be checked up front).
TuningReport RunTuning(const StreamRecording& recording, const std::vector<Incident>& incidents,
                       const TuningOptions& options, const TuningProgressCallback& progress = {});

// The replay of one setting (for the chosen setting's timeline), as RunTuning ran it.
std::vector<ReplayRow> ReplaySetting(const StreamRecording& recording, const Config& base,
                                     const TuningSetting& setting);

// Where the figures came from, for the headers of the written files (no dates: the same inputs
// give the same files, replay_seconds aside).
struct TuningProvenance {
  std::string input_path, incidents_path;
  std::string config_path;  // "" for the built-in defaults
  int64_t rows = 0;
  std::size_t streams = 0, incidents = 0;
};

// One line per setting, best first: rank, the tuned keys, the objective and the main figures,
// aligned in columns, the chosen setting marked with '*'.
std::string SummaryTable(const TuningReport& report);

// best.toml: a comment header (objective, limit, figures, provenance, how to use it) and the
// chosen [detector] section from DescribeDetectorOptions. Ensures: ParseConfig accepts it and
// reads back report.chosen().detector.
std::string BestToml(const TuningReport& report, const Config& base,
                     const TuningProvenance& provenance);

// Every setting with every metric; an undefined figure is an empty field (CSV) or null (JSON).
std::string ResultsCsv(const TuningReport& report);
std::string ResultsJson(const TuningReport& report, const TuningProvenance& provenance);

// Precision, recall, the objective and false alarms per day against nu (log axis), one line per
// combination of the other tuned keys, the chosen setting marked, the limit as a reference line.
// The ratio panels share no fixed 0-1 axis: each runs from 0 to just above its largest value
// (charts::RatioAxisRange), so that small precisions stay readable.
charts::LineFigure SweepFigure(const TuningReport& report);

// The chosen setting's decision values per stream over time, incident windows shaded, the start
// of each alarm event marked, each run of learning rows (no decision value) a band from its first
// row to the next scored row (or its own last row). At most `max_panels` streams: those with
// labelled incidents first, then those with the most alarm events, shown in recording order.
// Requires: rows is the chosen setting's replay of `recording`; max_panels >= 1.
charts::TimelineFigure ChosenTimelineFigure(const TuningReport& report,
                                            const StreamRecording& recording,
                                            const std::vector<ReplayRow>& rows,
                                            const std::vector<Incident>& incidents,
                                            std::size_t max_panels = 12);

// Writes DIR/results.csv, results.json, best.toml, sweep.png, sweep.svg, timeline.png and
// timeline.svg (creating DIR); the timeline uses report.chosen_rows, or replays the chosen setting
// again when they are missing. Each file
// is written to a temporary name and renamed, so a reader never sees half a file.
// Returns the paths written. Throws TuningError naming the path on failure.
std::vector<std::string> WriteTuningReport(const TuningReport& report,
                                           const StreamRecording& recording,
                                           const std::vector<Incident>& incidents,
                                           const Config& base, const TuningProvenance& provenance,
                                           const std::string& dir);

}  // namespace nuwatch
