#include "offline/tuning.h"

#include <algorithm>
#include <atomic>
#include <charconv>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <exception>
#include <filesystem>
#include <limits>
#include <map>
#include <nlohmann/json.hpp>
#include <optional>
#include <set>
#include <utility>

#include "concurrency/thread_pool.h"
#include "formats/csv_table.h"
#include "formats/evaluation_json.h"
#include "nuwatch/checked_file.h"
#include "nuwatch/mutex.h"
#include "settings/setting_text.h"

namespace nuwatch {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// Shortest text that reads back as the same double ("0.01", "1e-05").
std::string Shortest(double value) {
  char buffer[64];
  const auto result = std::to_chars(buffer, buffer + sizeof buffer, value);
  return std::string(buffer, result.ptr);
}

std::string GammaText(const GammaSpec& gamma) {
  return gamma.mode == GammaSpec::Mode::kValue ? Shortest(gamma.value) : gamma.ToString();
}

bool SameGamma(const GammaSpec& a, const GammaSpec& b) {
  return a.mode == b.mode && (a.mode != GammaSpec::Mode::kValue || a.value == b.value);
}

// The items of a comma-separated list, trimmed; none of them empty.
std::vector<std::string_view> SplitList(std::string_view text) {
  const std::vector<std::string_view> items = SplitCommaList(text);
  if (items.empty()) throw TuningError("the list is empty");
  for (std::size_t i = 0; i < items.size(); ++i) {
    if (items[i].empty()) {
      throw TuningError("'" + std::string(text) + "' has an empty item (item " +
                        std::to_string(i + 1) + ")");
    }
  }
  return items;
}

template <typename T, typename Same>
void RejectRepeats(const std::vector<T>& values, const std::vector<std::string_view>& items,
                   Same same) {
  for (std::size_t i = 0; i < values.size(); ++i) {
    for (std::size_t j = 0; j < i; ++j) {
      if (same(values[i], values[j])) {
        throw TuningError("'" + std::string(items[i]) + "' is listed twice");
      }
    }
  }
}

std::vector<int64_t> ParseIntegerList(std::string_view text, int64_t minimum) {
  const std::vector<std::string_view> items = SplitList(text);
  std::vector<int64_t> values;
  for (const std::string_view item : items) {
    int64_t value = 0;
    const auto [ptr, error] = std::from_chars(item.data(), item.data() + item.size(), value);
    if (error != std::errc() || ptr != item.data() + item.size()) {
      throw TuningError("'" + std::string(item) + "' is not a whole number");
    }
    if (value < minimum) {
      throw TuningError("'" + std::string(item) + "' is below the minimum " +
                        std::to_string(minimum));
    }
    values.push_back(value);
  }
  RejectRepeats(values, items, [](int64_t a, int64_t b) { return a == b; });
  return values;
}

std::string Fixed(const std::optional<double>& value, int decimals) {
  if (!value) return "n/a";
  char buffer[64];
  std::snprintf(buffer, sizeof buffer, "%.*f", decimals, *value);
  return buffer;
}

std::string CsvNumber(const std::optional<double>& value) {
  return value ? Shortest(*value) : std::string();
}

nlohmann::json JsonNumber(const std::optional<double>& value) { return OptionalNumber(value); }

std::optional<double> Ratio(int64_t numerator, int64_t denominator) {
  if (denominator <= 0) return std::nullopt;
  return static_cast<double>(numerator) / static_cast<double>(denominator);
}

// Strict weak "a ranks before b" among results of the same block (see tuning.h).
bool BetterObjective(const SettingResult& a, const SettingResult& b) {
  if (a.objective.has_value() != b.objective.has_value()) return a.objective.has_value();
  if (a.objective && *a.objective != *b.objective) return *a.objective > *b.objective;
  return false;
}
bool FewerFalseAlarms(const SettingResult& a, const SettingResult& b) {
  const auto& fa = a.overall.false_alarms_per_day;
  const auto& fb = b.overall.false_alarms_per_day;
  if (fa.has_value() != fb.has_value()) return fa.has_value();
  if (fa && *fa != *fb) return *fa < *fb;
  return false;
}
bool Tie(bool (*before)(const SettingResult&, const SettingResult&), const SettingResult& a,
         const SettingResult& b) {
  return !before(a, b) && !before(b, a);
}

bool WithinLimit(const SettingResult& r, std::optional<double> limit) {
  const auto& fa = r.overall.false_alarms_per_day;
  return !limit || (fa && *fa <= *limit);
}

// The ranking order of tuning.h. It depends on the two results alone (within_limit set), and is
// total thanks to the grid index: so the best of any subset is the same whatever the order in
// which the results arrive.
bool RanksBefore(const SettingResult& a, const SettingResult& b) {
  // A setting that flags most of the vectors is not an alarm anyone keeps: never first.
  if (a.usable != b.usable) return a.usable;
  if (a.within_limit != b.within_limit) return a.within_limit;
  if (a.within_limit) {
    if (!Tie(BetterObjective, a, b)) return BetterObjective(a, b);
    if (!Tie(FewerFalseAlarms, a, b)) return FewerFalseAlarms(a, b);
  } else {
    if (!Tie(FewerFalseAlarms, a, b)) return FewerFalseAlarms(a, b);
    if (!Tie(BetterObjective, a, b)) return BetterObjective(a, b);
  }
  if (a.detector.nu != b.detector.nu) return a.detector.nu < b.detector.nu;
  return a.index < b.index;
}

// The streams of the recording, each with its row indices in order.
std::vector<std::vector<int64_t>> RowsByStream(const StreamRecording& recording) {
  std::vector<std::vector<int64_t>> rows(recording.streams.size());
  for (int64_t i = 0; i < recording.rows(); ++i) rows[recording.stream_of_row[i]].push_back(i);
  return rows;
}

bool Alarmed(const ReplayRow& row, AlarmSource source) {
  if (row.learning) return false;
  return source == AlarmSource::kIncident ? row.incident != 0 : row.anomaly;
}

void CheckTimesOrdered(const StreamRecording& recording) {
  std::vector<double> last(recording.streams.size(), -std::numeric_limits<double>::infinity());
  for (int64_t i = 0; i < recording.rows(); ++i) {
    const int32_t s = recording.stream_of_row[i];
    if (recording.times[i] < last[s]) {
      throw TuningError(recording.path + ": data row " + std::to_string(i + 1) + ": time " +
                        std::string(recording.time_text[i]) + " of stream '" +
                        recording.streams[s] + "' is earlier than the stream's previous sample");
    }
    last[s] = recording.times[i];
  }
}

StreamOptions OptionsFor(const Config& base, const TuningSetting& setting) {
  return [&base, setting](const std::string& stream) {
    return ApplySetting(DetectorOptionsFor(base, stream), setting);
  };
}

// Report files are replaced durably, as model and state files are (nuwatch/checked_file.h).
void WriteReportFile(const std::string& path, const std::string& text) {
  try {
    WriteFileAtomically(path, reinterpret_cast<const uint8_t*>(text.data()), text.size());
  } catch (const ModelFileError& e) {
    throw TuningError(e.what());
  }
}

// cairo writes the picture to a temporary file, which then replaces `path` durably.
void DrawAtomically(const std::string& path, const std::function<void(const std::string&)>& draw) {
  const std::string temporary = path + ".tmp";
  try {
    draw(temporary);
    CommitFileDurably(temporary, path);
  } catch (const std::exception& e) {
    std::error_code ignored;
    std::filesystem::remove(temporary, ignored);
    throw TuningError(std::string(e.what()).rfind(path, 0) == 0 ? e.what()
                                                                : path + ": " + e.what());
  }
}

std::vector<std::size_t> RankOf(const TuningSelection& selection, std::size_t count) {
  std::vector<std::size_t> rank(count, 0);
  for (std::size_t r = 0; r < selection.ranking.size(); ++r) rank[selection.ranking[r]] = r + 1;
  return rank;
}

// Calls the progress callback from the worker threads one call at a time, as RunTuning promises.
class SerializedProgress {
 public:
  explicit SerializedProgress(const TuningProgressCallback& progress)
      : progress_(progress ? &progress : nullptr) {}
  void Report(const TuningProgress& p) EXCLUDES(mutex_) {
    if (progress_ == nullptr) return;
    MutexLock lock(&mutex_);
    (*progress_)(p);
  }

 private:
  Mutex mutex_;
  const TuningProgressCallback* const progress_ PT_GUARDED_BY(mutex_);
};

// The replay of the best setting so far, kept for the timeline so that the chosen setting need
// not be replayed again at the end (a replay of a large recording takes many seconds).
class BestReplay {
 public:
  // `results[k]` is scored; keeps `rows` if it ranks before the best so far.
  void Offer(const std::vector<SettingResult>& results, std::size_t k, std::vector<ReplayRow> rows)
      EXCLUDES(mutex_) {
    MutexLock lock(&mutex_);
    if (!index_ || RanksBefore(results[k], results[*index_])) {
      index_ = k;
      rows_ = std::move(rows);
    }
  }
  // After the workers have finished: the index of the best setting and its replay.
  std::optional<std::size_t> index() EXCLUDES(mutex_) {
    MutexLock lock(&mutex_);
    return index_;
  }
  std::vector<ReplayRow> TakeRows() EXCLUDES(mutex_) {
    MutexLock lock(&mutex_);
    return std::move(rows_);
  }

 private:
  Mutex mutex_;
  std::optional<std::size_t> index_ GUARDED_BY(mutex_);
  std::vector<ReplayRow> rows_ GUARDED_BY(mutex_);
};

}  // namespace

std::string_view TuningObjectiveName(TuningObjective objective) {
  switch (objective) {
    case TuningObjective::kPointF1:
      return "f1";
    case TuningObjective::kRangeF1:
      return "range-f1";
    case TuningObjective::kIncidentRecall:
      return "recall";
  }
  return "f1";
}

std::optional<TuningObjective> ParseTuningObjective(std::string_view name) {
  for (TuningObjective o :
       {TuningObjective::kPointF1, TuningObjective::kRangeF1, TuningObjective::kIncidentRecall}) {
    if (name == TuningObjectiveName(o)) return o;
  }
  return std::nullopt;
}

std::string_view TuningObjectiveDescription(TuningObjective objective) {
  switch (objective) {
    case TuningObjective::kPointF1:
      return "point-wise F1";
    case TuningObjective::kRangeF1:
      return "range-based F1 (Tatbul et al. 2018)";
    case TuningObjective::kIncidentRecall:
      return "incident recall (fraction of labelled incidents detected)";
  }
  return "point-wise F1";
}

std::vector<double> ParseNuList(std::string_view text) {
  const std::vector<std::string_view> items = SplitList(text);
  std::vector<double> values;
  for (const std::string_view item : items) {
    const std::optional<double> value = ParseFiniteNumber(item);
    if (!value) throw TuningError("'" + std::string(item) + "' is not a number");
    if (!(*value > 0 && *value <= 1)) {
      throw TuningError("nu = " + std::string(item) + " is outside (0, 1]");
    }
    values.push_back(*value);
  }
  RejectRepeats(values, items, [](double a, double b) { return a == b; });
  return values;
}

std::vector<GammaSpec> ParseGammaList(std::string_view text) {
  const std::vector<std::string_view> items = SplitList(text);
  std::vector<GammaSpec> values;
  for (const std::string_view item : items) {
    const std::optional<GammaSpec> value = GammaSpec::Parse(item);
    if (!value) {
      throw TuningError("gamma '" + std::string(item) +
                        "' is not scale, median, min_volume or a number > 0");
    }
    values.push_back(*value);
  }
  RejectRepeats(values, items, SameGamma);
  return values;
}

std::vector<int64_t> ParseWindowList(std::string_view text) { return ParseIntegerList(text, 2); }
std::vector<int64_t> ParseSupportVectorBudgetList(std::string_view text) {
  return ParseIntegerList(text, 1);
}

std::vector<double> DefaultNuList() { return {0.02, 0.05, 0.1}; }

std::vector<double> DefaultFalseAlarmRateList() { return {0.0005, 0.001, 0.002, 0.005}; }

std::vector<double> ParseFalseAlarmRateList(std::string_view text) {
  const std::vector<std::string_view> items = SplitList(text);
  std::vector<double> values;
  for (const std::string_view item : items) {
    const std::optional<double> value = ParseFiniteNumber(item);
    if (!value || !(*value > 0 && *value <= 0.5)) {
      throw TuningError("'" + std::string(item) + "' is not a false-alarm rate in (0, 0.5]");
    }
    values.push_back(*value);
  }
  RejectRepeats(values, items, [](double a, double b) { return a == b; });
  return values;
}

std::vector<int64_t> ParseLagsList(std::string_view text) {
  std::vector<int64_t> values = ParseIntegerList(text, 0);
  for (const int64_t v : values) {
    if (v > 1000) throw TuningError("lags " + std::to_string(v) + " is above 1000");
  }
  return values;
}

std::vector<int64_t> ParseRollingWindowList(std::string_view text) {
  std::vector<int64_t> values = ParseIntegerList(text, 0);
  for (const int64_t v : values) {
    if (v == 1 || v > 100000) {
      throw TuningError("rolling window " + std::to_string(v) +
                        " is neither 0 (none) nor in [2, 100000]");
    }
  }
  return values;
}

std::vector<TuningSetting> ExpandGrid(const TuningGrid& grid) {
  // An empty list stands for one unset value.
  auto values = [](const auto& list) {
    using T = typename std::decay_t<decltype(list)>::value_type;
    std::vector<std::optional<T>> out(list.begin(), list.end());
    if (out.empty()) out.emplace_back();
    return out;
  };
  const auto nus = values(grid.nu);
  const auto gammas = values(grid.gamma);
  const auto windows = values(grid.window);
  const auto budgets = values(grid.support_vector_budget);
  const auto rates = values(grid.false_alarm_rate);
  const auto lags = values(grid.lags);
  const auto rolling = values(grid.rolling_window);
  std::vector<TuningSetting> settings;
  for (const auto& window : windows) {
    for (const auto& budget : budgets) {
      for (const auto& roll : rolling) {
        for (const auto& lag : lags) {
          for (const auto& gamma : gammas) {
            for (const auto& rate : rates) {
              for (const auto& nu : nus) {
                settings.push_back({nu, gamma, window, budget, rate, lag, roll});
              }
            }
          }
        }
      }
    }
  }
  return settings;
}

DetectorOptions ApplySetting(DetectorOptions base, const TuningSetting& setting) {
  if (setting.nu) base.nu = *setting.nu;
  if (setting.gamma) base.gamma = *setting.gamma;
  if (setting.window) {
    base.window = *setting.window;
    if (base.warmup > base.window) base.warmup = 0;  // the whole window
  }
  if (setting.support_vector_budget) base.support_vector_budget = *setting.support_vector_budget;
  if (setting.false_alarm_rate) base.false_alarm_rate = *setting.false_alarm_rate;
  if (setting.lags) base.lags = static_cast<int>(*setting.lags);
  if (setting.rolling_window) {
    base.rolling_windows.clear();
    if (*setting.rolling_window > 0) base.rolling_windows.push_back(*setting.rolling_window);
  }
  return base;
}

std::string DescribeSetting(const DetectorOptions& options) {
  std::string text = "nu " + Shortest(options.nu) + ", false_alarm_rate " +
                     Shortest(options.false_alarm_rate) + ", gamma " + GammaText(options.gamma) +
                     ", window " + std::to_string(options.window) + ", support_vector_budget " +
                     std::to_string(options.support_vector_budget);
  if (options.lags > 0) text += ", lags " + std::to_string(options.lags);
  if (!options.rolling_windows.empty()) {
    text += ", rolling_windows ";
    for (std::size_t i = 0; i < options.rolling_windows.size(); ++i)
      text += (i ? "," : "") + std::to_string(options.rolling_windows[i]);
  }
  return text;
}

std::vector<StreamAlarms> AlarmsFromReplay(const StreamRecording& recording,
                                           const std::vector<ReplayRow>& rows, AlarmSource source) {
  if (static_cast<int64_t>(rows.size()) != recording.rows()) {
    throw TuningError("AlarmsFromReplay: " + std::to_string(rows.size()) + " replay rows for " +
                      std::to_string(recording.rows()) + " recorded rows");
  }
  const std::vector<std::vector<int64_t>> by_stream = RowsByStream(recording);
  std::vector<StreamAlarms> alarms(recording.streams.size());
  for (std::size_t s = 0; s < alarms.size(); ++s) {
    alarms[s].stream = recording.streams[s];
    alarms[s].times.reserve(by_stream[s].size());
    alarms[s].flagged.reserve(by_stream[s].size());
    for (const int64_t i : by_stream[s]) {
      alarms[s].times.push_back(recording.times[i]);
      alarms[s].flagged.push_back(Alarmed(rows[i], source));
    }
  }
  return alarms;
}

void MeasureFalseAlarms(const StreamRecording& recording, const std::vector<ReplayRow>& rows,
                        const std::vector<Incident>& incidents, SettingResult* result) {
  std::map<std::string, std::vector<std::pair<double, double>>> windows;
  for (const Incident& incident : incidents)
    windows[incident.stream].emplace_back(incident.start_seconds, incident.end_seconds);
  int64_t scored = 0, flagged = 0, outside = 0, outside_flagged = 0;
  for (int64_t i = 0; i < recording.rows(); ++i) {
    const ReplayRow& row = rows[i];
    if (row.learning) continue;
    ++scored;
    flagged += row.anomaly;
    const auto it = windows.find(recording.streams[recording.stream_of_row[i]]);
    bool inside = false;
    if (it != windows.end()) {
      for (const auto& [start, end] : it->second)
        inside = inside || (recording.times[i] >= start && recording.times[i] <= end);
    }
    if (!inside) {
      ++outside;
      outside_flagged += row.anomaly;
    }
  }
  result->realised_false_alarm_rate = Ratio(outside_flagged, outside);
  result->usable = UnusableSettingNote(flagged, scored).empty();
}

void ScoreSetting(TuningObjective objective, SettingResult* result) {
  const StreamEvaluation& e = result->overall;
  result->range_f1.reset();
  if (e.range_recall) {
    const double r = *e.range_recall;
    // No predicted range at all while there are incident samples: nothing was caught, as F1 = 0.
    const double p = e.range_precision.value_or(0.0);
    result->range_f1 = p + r > 0 ? 2 * p * r / (p + r) : 0.0;
  }
  result->incident_recall = Ratio(e.incidents_detected, e.incidents);
  switch (objective) {
    case TuningObjective::kPointF1:
      result->objective = e.point_f1;
      break;
    case TuningObjective::kRangeF1:
      result->objective = result->range_f1;
      break;
    case TuningObjective::kIncidentRecall:
      result->objective = result->incident_recall;
      break;
  }
}

TuningSelection SelectSetting(std::vector<SettingResult>* results,
                              std::optional<double> max_false_alarms_per_day) {
  if (results->empty()) throw TuningError("SelectSetting: no results to choose from");
  if (max_false_alarms_per_day &&
      !(std::isfinite(*max_false_alarms_per_day) && *max_false_alarms_per_day >= 0)) {
    throw TuningError("the false-alarm limit " + Shortest(*max_false_alarms_per_day) +
                      " is not a finite number >= 0");
  }
  TuningSelection selection;
  selection.limit_met = false;
  selection.usable_found = false;
  for (SettingResult& r : *results) {
    r.within_limit = WithinLimit(r, max_false_alarms_per_day);
    selection.limit_met = selection.limit_met || r.within_limit;
    selection.usable_found = selection.usable_found || r.usable;
  }
  selection.ranking.resize(results->size());
  for (std::size_t i = 0; i < results->size(); ++i) selection.ranking[i] = i;
  std::sort(selection.ranking.begin(), selection.ranking.end(), [&](std::size_t a, std::size_t b) {
    return RanksBefore((*results)[a], (*results)[b]);
  });
  selection.chosen = selection.ranking.front();
  return selection;
}

std::vector<ReplayRow> ReplaySetting(const StreamRecording& recording, const Config& base,
                                     const TuningSetting& setting) {
  try {
    return ReplayRecording(recording, OptionsFor(base, setting));
  } catch (const PreconditionError& e) {
    throw TuningError(DescribeSetting(ApplySetting(base.detector, setting)) + ": " + e.what());
  }
}

TuningReport RunTuning(const StreamRecording& recording, const std::vector<Incident>& incidents,
                       const TuningOptions& options, const TuningProgressCallback& progress) {
  if (options.jobs < 1) {
    throw TuningError("jobs = " + std::to_string(options.jobs) + " is not at least 1");
  }
  if (options.max_false_alarms_per_day && !(std::isfinite(*options.max_false_alarms_per_day) &&
                                            *options.max_false_alarms_per_day >= 0)) {
    throw TuningError("the false-alarm limit " + Shortest(*options.max_false_alarms_per_day) +
                      " is not a finite number >= 0");
  }
  if (recording.rows() == 0) throw TuningError(recording.path + ": no data rows");
  CheckTimesOrdered(recording);
  const std::vector<TuningSetting> settings = ExpandGrid(options.grid);

  TuningReport report;
  report.objective = options.objective;
  report.alarms = options.alarms;
  report.max_false_alarms_per_day = options.max_false_alarms_per_day;
  report.evaluation = options.evaluation;
  report.results.resize(settings.size());

  // Check every setting for every stream before spending minutes on replays.
  std::vector<DetectorOptions> configured;
  configured.reserve(recording.streams.size());
  for (const std::string& stream : recording.streams) {
    configured.push_back(DetectorOptionsFor(options.base, stream));
  }
  for (std::size_t k = 0; k < settings.size(); ++k) {
    SettingResult& result = report.results[k];
    result.index = k;
    result.setting = settings[k];
    result.detector = ApplySetting(options.base.detector, settings[k]);
    // What the replay used (ReplayRecording names unnamed features after the file's columns), and
    // what the daemon's explanations then call the features.
    if (result.detector.feature_names.empty()) {
      result.detector.feature_names = recording.feature_names;
    }
    for (std::size_t s = 0; s < configured.size(); ++s) {
      try {
        ValidateDetectorOptions(ApplySetting(configured[s], settings[k]),
                                "setting " + std::to_string(k + 1) + " (" +
                                    DescribeSetting(result.detector) + ") for stream '" +
                                    recording.streams[s] + "'");
      } catch (const ConfigError& e) {
        throw TuningError(e.what());
      }
    }
  }
  // Evaluate's own checks, once, on an alarm-free replay shape (the times are the same for all).
  {
    std::vector<ReplayRow> quiet(recording.rows());
    try {
      Evaluate(AlarmsFromReplay(recording, quiet, options.alarms), incidents, options.evaluation);
    } catch (const PreconditionError& e) {
      throw TuningError(e.what());
    }
  }

  SerializedProgress reporter(progress);
  BestReplay best;
  std::atomic<std::size_t> next{0}, settings_done{0};
  std::atomic<int64_t> rows_done{0};
  std::atomic<bool> failed{false};
  std::vector<std::exception_ptr> errors(settings.size());
  const int64_t rows_total = recording.rows() * static_cast<int64_t>(settings.size());
  const auto report_progress = [&] {
    reporter.Report(
        TuningProgress{settings_done.load(), settings.size(), rows_done.load(), rows_total});
  };

  const auto worker = [&] {
    while (!failed.load()) {
      const std::size_t k = next.fetch_add(1);
      if (k >= settings.size()) return;
      SettingResult& result = report.results[k];
      try {
        const auto started = std::chrono::steady_clock::now();
        int64_t counted = 0;
        std::vector<ReplayRow> rows = ReplayRecording(
            recording, OptionsFor(options.base, settings[k]),
            [&](int64_t done) {
              rows_done += done - counted;
              counted = done;
              report_progress();
            },
            &result.warnings);
        const EvaluationReport evaluation = Evaluate(
            AlarmsFromReplay(recording, rows, options.alarms), incidents, options.evaluation);
        result.overall = evaluation.overall;
        MeasureFalseAlarms(recording, rows, incidents, &result);
        ScoreSetting(options.objective, &result);
        result.within_limit = WithinLimit(result, options.max_false_alarms_per_day);
        result.replay_seconds =
            std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
        // Keep the replay of the best setting so far for the timeline, instead of replaying the
        // chosen one again at the end (a replay of a large recording takes many seconds).
        best.Offer(report.results, k, std::move(rows));
      } catch (...) {
        errors[k] = std::current_exception();
        failed = true;
        return;
      }
      ++settings_done;
      report_progress();
    }
  };
  const std::size_t threads =
      std::min<std::size_t>(static_cast<std::size_t>(options.jobs), settings.size());
  if (threads <= 1) {
    worker();
  } else {
    ThreadPool pool(static_cast<int>(threads));
    for (std::size_t t = 0; t < threads; ++t) pool.Post(worker);
    pool.Join();
  }
  for (std::size_t k = 0; k < settings.size(); ++k) {
    if (!errors[k]) continue;
    const std::string where = "setting " + std::to_string(k + 1) + " (" +
                              DescribeSetting(report.results[k].detector) + "): ";
    try {
      std::rethrow_exception(errors[k]);
    } catch (const TuningError&) {
      throw;
    } catch (const std::exception& e) {
      throw TuningError(where + e.what());
    }
  }
  report.selection = SelectSetting(&report.results, options.max_false_alarms_per_day);
  // RanksBefore is the ranking's order, so the kept replay is the chosen one's; should that ever
  // fail, WriteTuningReport replays the chosen setting again rather than draw the wrong one.
  if (best.index() == report.selection.chosen) report.chosen_rows = best.TakeRows();
  return report;
}

std::string SummaryTable(const TuningReport& report) {
  const bool limited = report.max_false_alarms_per_day.has_value();
  std::vector<std::string> header = {
      "rank",    "nu",       "gamma",     "window",    "support_vector_budget",
      "far set", "far real", "objective", "precision", "recall",
      "f1",      "range_f1", "incidents", "delay_med", "false/day"};
  if (limited) header.push_back("limit");
  header.push_back("seconds");
  std::vector<std::vector<std::string>> rows;
  for (std::size_t r = 0; r < report.selection.ranking.size(); ++r) {
    const SettingResult& s = report.results[report.selection.ranking[r]];
    const StreamEvaluation& e = s.overall;
    std::vector<std::string> row = {
        (s.index == report.selection.chosen ? "*" : "") + std::to_string(r + 1),
        Shortest(s.detector.nu),
        GammaText(s.detector.gamma),
        std::to_string(s.detector.window),
        std::to_string(s.detector.support_vector_budget),
        Shortest(s.detector.false_alarm_rate),
        Fixed(s.realised_false_alarm_rate, 4) + (s.usable ? "" : " (unusable)"),
        Fixed(s.objective, 3),
        Fixed(e.point_precision, 3),
        Fixed(e.point_recall, 3),
        Fixed(e.point_f1, 3),
        Fixed(s.range_f1, 3),
        std::to_string(e.incidents_detected) + "/" + std::to_string(e.incidents),
        e.detection_delay_median_seconds ? Fixed(e.detection_delay_median_seconds, 0) + "s" : "n/a",
        Fixed(e.false_alarms_per_day, 2)};
    if (limited) row.push_back(s.within_limit ? "ok" : "over");
    row.push_back(Fixed(s.replay_seconds, 1));
    rows.push_back(std::move(row));
  }
  std::vector<std::size_t> widths(header.size());
  for (std::size_t c = 0; c < header.size(); ++c) widths[c] = header[c].size();
  for (const auto& row : rows) {
    for (std::size_t c = 0; c < row.size(); ++c) widths[c] = std::max(widths[c], row[c].size());
  }
  std::string out;
  const auto print = [&](const std::vector<std::string>& row) {
    std::string line;
    for (std::size_t c = 0; c < row.size(); ++c) {
      const std::string padding(widths[c] - row[c].size(), ' ');
      // gamma is a word or a number: left-aligned; every other column right-aligned.
      line += c == 2 ? row[c] + padding : padding + row[c];
      if (c + 1 < row.size()) line += "  ";
    }
    while (!line.empty() && line.back() == ' ') line.pop_back();
    out += line + "\n";
  };
  print(header);
  for (const auto& row : rows) print(row);
  return out;
}

std::string BestToml(const TuningReport& report, const Config& base,
                     const TuningProvenance& provenance) {
  const SettingResult& best = report.chosen();
  const StreamEvaluation& e = best.overall;
  std::string out;
  out += "# Written by `nuwatch tune`: the best of " + std::to_string(report.results.size()) +
         " setting(s) by " + std::string(TuningObjectiveDescription(report.objective)) + ".\n";
  out += "# Alarms scored: " +
         std::string(report.alarms == AlarmSource::kIncident
                         ? "debounced incidents (a sample is alarmed while an incident is open)"
                         : "flagged samples (anomaly)") +
         "; grace " + Shortest(report.evaluation.grace_seconds) + " s.\n";
  if (report.max_false_alarms_per_day) {
    out +=
        "# False-alarm limit: " + Shortest(*report.max_false_alarms_per_day) + " per day" +
        (report.selection.limit_met
             ? " (met).\n"
             : " -- NOT MET by any setting: this is the setting with the fewest false alarms.\n");
  }
  out += "# Recording: " + provenance.input_path + " (" + std::to_string(provenance.rows) +
         " rows, " + std::to_string(provenance.streams) +
         " streams); incidents: " + provenance.incidents_path + " (" +
         std::to_string(provenance.incidents) + ").\n";
  out +=
      "# Base config: " +
      (provenance.config_path.empty() ? std::string("built-in defaults") : provenance.config_path) +
      ".\n";
  out += "# Chosen: " + DescribeSetting(best.detector) + ".\n";
  out += "# False-alarm rate: set " + Shortest(best.detector.false_alarm_rate) + ", realised " +
         Fixed(best.realised_false_alarm_rate, 5) +
         " (flagged fraction of the scored vectors outside the labelled incidents)" +
         (best.usable ? ".\n" : " -- NOT USABLE: it flags more than half of the vectors.\n");
  out += "# Measured: point precision " + Fixed(e.point_precision, 3) + ", recall " +
         Fixed(e.point_recall, 3) + ", F1 " + Fixed(e.point_f1, 3) + "; range precision " +
         Fixed(e.range_precision, 3) + ", recall " + Fixed(e.range_recall, 3) + ", F1 " +
         Fixed(best.range_f1, 3) + ";\n";
  out += "#   incidents detected " + std::to_string(e.incidents_detected) + " of " +
         std::to_string(e.incidents) + " (median delay " +
         (e.detection_delay_median_seconds ? Fixed(e.detection_delay_median_seconds, 0) + " s"
                                           : std::string("n/a")) +
         "); false alarms " + Fixed(e.false_alarms_per_day, 2) + " per day.\n";
  out += "# Use: replace the [detector] section of the daemon's config with this one and send\n";
  out += "# nuwatchd SIGHUP to reload it (new settings apply at each stream's next refit).\n";
  if (!base.overrides.empty()) {
    out +=
        "# The base config's [[stream]] overrides are not repeated here. While tuning, the tuned\n";
    out += "# keys were applied over them: remove those keys from your [[stream]] tables to run\n";
    out += "# what was measured.\n";
  }
  out += DescribeDetectorOptions(best.detector);
  return out;
}

std::string ResultsCsv(const TuningReport& report) {
  const std::vector<std::size_t> rank = RankOf(report.selection, report.results.size());
  std::string out =
      "index,rank,chosen,within_limit,usable,nu,false_alarm_rate,realised_false_alarm_rate,lags,"
      "rolling_windows,gamma,window,support_vector_budget,warmup,objective,point_"
      "precision,"
      "point_recall,point_f1,range_precision,range_recall,range_f1,samples,flagged_samples,"
      "incidents,incidents_detected,incidents_missed,incident_recall,"
      "detection_delay_median_seconds,detection_delay_mean_seconds,detection_delay_max_seconds,"
      "alarm_events,false_alarm_events,incident_free_seconds,false_alarms_per_day,"
      "replay_seconds\n";
  for (const SettingResult& s : report.results) {
    const StreamEvaluation& e = s.overall;
    const std::vector<std::string> fields = {std::to_string(s.index + 1),
                                             std::to_string(rank[s.index]),
                                             s.index == report.selection.chosen ? "1" : "0",
                                             s.within_limit ? "1" : "0",
                                             s.usable ? "1" : "0",
                                             Shortest(s.detector.nu),
                                             Shortest(s.detector.false_alarm_rate),
                                             CsvNumber(s.realised_false_alarm_rate),
                                             std::to_string(s.detector.lags),
                                             s.detector.rolling_windows.empty()
                                                 ? std::string("0")
                                                 : std::to_string(s.detector.rolling_windows[0]),
                                             GammaText(s.detector.gamma),
                                             std::to_string(s.detector.window),
                                             std::to_string(s.detector.support_vector_budget),
                                             std::to_string(s.detector.warmup),
                                             CsvNumber(s.objective),
                                             CsvNumber(e.point_precision),
                                             CsvNumber(e.point_recall),
                                             CsvNumber(e.point_f1),
                                             CsvNumber(e.range_precision),
                                             CsvNumber(e.range_recall),
                                             CsvNumber(s.range_f1),
                                             std::to_string(e.samples),
                                             std::to_string(e.flagged_samples),
                                             std::to_string(e.incidents),
                                             std::to_string(e.incidents_detected),
                                             std::to_string(e.incidents_missed),
                                             CsvNumber(s.incident_recall),
                                             CsvNumber(e.detection_delay_median_seconds),
                                             CsvNumber(e.detection_delay_mean_seconds),
                                             CsvNumber(e.detection_delay_max_seconds),
                                             std::to_string(e.alarm_events),
                                             std::to_string(e.false_alarm_events),
                                             CsvNumber(e.incident_free_seconds),
                                             CsvNumber(e.false_alarms_per_day),
                                             Shortest(s.replay_seconds)};
    for (std::size_t c = 0; c < fields.size(); ++c) {
      out += fields[c];
      out += c + 1 < fields.size() ? ',' : '\n';
    }
  }
  return out;
}

namespace {

nlohmann::json SettingJson(const SettingResult& s, std::size_t rank, bool chosen) {
  nlohmann::json j = EvaluationJson(s.overall);
  j["index"] = s.index + 1;
  j["rank"] = rank;
  j["chosen"] = chosen;
  j["within_limit"] = s.within_limit;
  j["usable"] = s.usable;
  j["nu"] = s.detector.nu;
  j["false_alarm_rate"] = s.detector.false_alarm_rate;
  j["realised_false_alarm_rate"] = JsonNumber(s.realised_false_alarm_rate);
  j["lags"] = s.detector.lags;
  j["rolling_windows"] = s.detector.rolling_windows;
  j["warnings"] = s.warnings;
  j["gamma"] = GammaText(s.detector.gamma);
  j["window"] = s.detector.window;
  j["support_vector_budget"] = s.detector.support_vector_budget;
  j["warmup"] = s.detector.warmup;
  j["objective"] = JsonNumber(s.objective);
  j["range_f1"] = JsonNumber(s.range_f1);
  j["incident_recall"] = JsonNumber(s.incident_recall);
  j["replay_seconds"] = s.replay_seconds;
  return j;
}

}  // namespace

std::string ResultsJson(const TuningReport& report, const TuningProvenance& provenance) {
  const std::vector<std::size_t> rank = RankOf(report.selection, report.results.size());
  nlohmann::json j;
  j["input"] = {{"stream_file", provenance.input_path},
                {"incident_file", provenance.incidents_path},
                {"config", provenance.config_path.empty() ? nlohmann::json(nullptr)
                                                          : nlohmann::json(provenance.config_path)},
                {"rows", provenance.rows},
                {"streams", provenance.streams},
                {"incidents", provenance.incidents}};
  j["objective"] = std::string(TuningObjectiveName(report.objective));
  j["objective_description"] = std::string(TuningObjectiveDescription(report.objective));
  j["alarms"] = std::string(AlarmSourceName(report.alarms));
  j["grace_seconds"] = report.evaluation.grace_seconds;
  j["max_false_alarms_per_day"] = JsonNumber(report.max_false_alarms_per_day);
  j["limit_met"] = report.selection.limit_met;
  j["settings"] = nlohmann::json::array();
  for (const SettingResult& s : report.results) {
    j["settings"].push_back(SettingJson(s, rank[s.index], s.index == report.selection.chosen));
  }
  j["chosen"] = SettingJson(report.chosen(), 1, true);
  return j.dump(2) + "\n";
}

charts::LineFigure SweepFigure(const TuningReport& report) {
  struct Metric {
    std::string title, y_label;
    std::function<std::optional<double>(const SettingResult&)> value;
  };
  std::vector<Metric> metrics;
  const auto point_precision = [](const SettingResult& s) { return s.overall.point_precision; };
  const auto point_recall = [](const SettingResult& s) { return s.overall.point_recall; };
  switch (report.objective) {
    case TuningObjective::kPointF1:
      metrics = {{"Point-wise precision", "precision (share of alarmed samples)", point_precision},
                 {"Point-wise recall", "recall (share of incident samples)", point_recall},
                 {"Point-wise F1 (objective)", "F1",
                  [](const SettingResult& s) { return s.overall.point_f1; }}};
      break;
    case TuningObjective::kRangeF1:
      metrics = {
          {"Range-based precision", "precision (Tatbul et al. 2018)",
           [](const SettingResult& s) { return s.overall.range_precision; }},
          {"Range-based recall", "recall (Tatbul et al. 2018)",
           [](const SettingResult& s) { return s.overall.range_recall; }},
          {"Range-based F1 (objective)", "F1", [](const SettingResult& s) { return s.range_f1; }}};
      break;
    case TuningObjective::kIncidentRecall:
      metrics = {{"Point-wise precision", "precision (share of alarmed samples)", point_precision},
                 {"Point-wise recall", "recall (share of incident samples)", point_recall},
                 {"Incidents detected (objective)", "incident recall (share of incidents)",
                  [](const SettingResult& s) { return s.incident_recall; }}};
      break;
  }
  metrics.push_back({"False alarms per day", "false alarms (per incident-free stream-day)",
                     [](const SettingResult& s) { return s.overall.false_alarms_per_day; }});

  // One line per combination of the other tuned keys, in grid order; named by the keys that vary.
  const auto key_of = [](const SettingResult& s) {
    return std::make_tuple(GammaText(s.detector.gamma), s.detector.window,
                           s.detector.support_vector_budget);
  };
  std::vector<std::tuple<std::string, int64_t, int64_t>> combos;
  for (const SettingResult& s : report.results) {
    if (std::find(combos.begin(), combos.end(), key_of(s)) == combos.end()) {
      combos.push_back(key_of(s));
    }
  }
  std::set<std::string> gammas;
  std::set<int64_t> windows, budgets;
  for (const auto& [g, w, b] : combos) {
    gammas.insert(g);
    windows.insert(w);
    budgets.insert(b);
  }
  const bool name_all = gammas.size() == 1 && windows.size() == 1 && budgets.size() == 1;
  const auto combo_name = [&](const std::tuple<std::string, int64_t, int64_t>& combo) {
    std::string name;
    const auto add = [&](const std::string& part) { name += (name.empty() ? "" : ", ") + part; };
    if (name_all || gammas.size() > 1) add("gamma " + std::get<0>(combo));
    if (name_all || windows.size() > 1) add("window " + std::to_string(std::get<1>(combo)));
    if (name_all || budgets.size() > 1)
      add("support_vector_budget " + std::to_string(std::get<2>(combo)));
    return name;
  };

  charts::LineFigure figure;
  figure.title = "nuwatch tune: " + std::to_string(report.results.size()) + " setting(s), " +
                 std::string(report.alarms == AlarmSource::kIncident ? "alarms = open incidents"
                                                                     : "alarms = flagged samples") +
                 ", chosen " + DescribeSetting(report.chosen().detector);
  figure.rows = 2;
  figure.cols = 2;
  figure.width = 1400;
  figure.height = 900;
  for (std::size_t m = 0; m < metrics.size(); ++m) {
    charts::LinePanel panel;
    panel.title = metrics[m].title;
    panel.x_label = "nu (log scale)";
    panel.y_label = metrics[m].y_label;
    panel.log_x = true;
    for (const auto& combo : combos) {
      std::vector<std::pair<double, double>> points;
      for (const SettingResult& s : report.results) {
        if (key_of(s) != combo) continue;
        points.emplace_back(s.detector.nu, metrics[m].value(s).value_or(kNaN));
      }
      std::sort(points.begin(), points.end(),
                [](const auto& a, const auto& b) { return a.first < b.first; });
      charts::Series series;
      series.name = combo_name(combo);
      for (const auto& [x, y] : points) {
        series.x.push_back(x);
        series.y.push_back(y);
      }
      panel.series.push_back(std::move(series));
    }
    charts::Series chosen;
    chosen.name = "chosen setting";
    chosen.x = {report.chosen().detector.nu};
    chosen.y = {metrics[m].value(report.chosen()).value_or(kNaN)};
    panel.series.push_back(std::move(chosen));
    if (m + 1 < metrics.size()) {
      // Ratios: from 0 (so that heights compare honestly) to just above the largest, so that a
      // precision of 0.02 is not a flat line along the bottom of a 0-1 axis.
      std::vector<double> ratios;
      for (const charts::Series& series : panel.series) {
        ratios.insert(ratios.end(), series.y.begin(), series.y.end());
      }
      panel.y_range = charts::RatioAxisRange(ratios);
    } else if (report.max_false_alarms_per_day) {
      panel.reference_y = *report.max_false_alarms_per_day;
      panel.reference_label = "limit " + Shortest(*report.max_false_alarms_per_day) + "/day";
    }
    figure.panels.push_back(std::move(panel));
  }
  return figure;
}

charts::TimelineFigure ChosenTimelineFigure(const TuningReport& report,
                                            const StreamRecording& recording,
                                            const std::vector<ReplayRow>& rows,
                                            const std::vector<Incident>& incidents,
                                            std::size_t max_panels) {
  if (max_panels < 1) throw TuningError("ChosenTimelineFigure: max_panels must be at least 1");
  const std::vector<StreamAlarms> alarms = AlarmsFromReplay(recording, rows, report.alarms);
  const EvaluationReport evaluation = Evaluate(alarms, incidents, report.evaluation);
  std::map<std::string, const StreamEvaluation*> by_name;
  for (const StreamEvaluation& e : evaluation.streams) by_name[e.stream] = &e;

  // Which streams: those with incidents first, then the most alarm events; shown in file order.
  const std::size_t count = recording.streams.size();
  std::vector<std::size_t> order(count);
  for (std::size_t s = 0; s < count; ++s) order[s] = s;
  const auto stats = [&](std::size_t s) { return by_name.at(recording.streams[s]); };
  std::stable_sort(order.begin(), order.end(), [&](std::size_t a, std::size_t b) {
    const bool ia = stats(a)->incidents > 0, ib = stats(b)->incidents > 0;
    if (ia != ib) return ia;
    return stats(a)->alarm_events > stats(b)->alarm_events;
  });
  order.resize(std::min(count, max_panels));
  std::sort(order.begin(), order.end());

  const std::vector<std::vector<int64_t>> by_stream = RowsByStream(recording);
  charts::TimelineFigure figure;
  figure.title =
      "Decision values of the chosen setting (" + DescribeSetting(report.chosen().detector) + ")" +
      (order.size() < count
           ? ", " + std::to_string(order.size()) + " of " + std::to_string(count) + " streams"
           : "");
  figure.panel_height = 180;
  figure.marks_label = report.alarms == AlarmSource::kIncident ? "incident opened (alarm)"
                                                               : "alarm (start of flagged run)";
  figure.shaded_label = "labelled incident window";
  for (const std::size_t s : order) {
    const StreamEvaluation& e = *stats(s);
    charts::TimelinePanel panel;
    const std::string name = recording.streams[s].empty() ? "(unnamed)" : recording.streams[s];
    panel.title = name + ": " + std::to_string(e.incidents) + " incident(s), " +
                  std::to_string(e.incidents_detected) + " detected, " +
                  std::to_string(e.false_alarm_events) + " false alarm(s)";
    panel.y_label = "decision value";
    bool previous = false;
    // Learning rows have no decision value: a band from the first learning row to the next
    // scored one (or the last learning row) explains the gap in the line. NaN: not learning (a
    // plain double: GCC 12 warns that an std::optional<double> here may be used uninitialized,
    // wrongly).
    double learning_since = kNaN;
    for (const int64_t i : by_stream[s]) {
      const double t = recording.times[i];
      panel.t.push_back(t);
      panel.value.push_back(rows[i].learning ? kNaN : rows[i].decision);
      if (rows[i].learning && std::isnan(learning_since)) learning_since = t;
      if (!rows[i].learning && !std::isnan(learning_since)) {
        panel.learning.push_back({learning_since, t});
        learning_since = kNaN;
      }
      const bool alarmed = Alarmed(rows[i], report.alarms);
      if (alarmed && !previous) panel.marks.push_back(t);
      previous = alarmed;
    }
    if (!std::isnan(learning_since)) panel.learning.push_back({learning_since, panel.t.back()});
    for (const Incident& incident : incidents) {
      if (incident.stream == recording.streams[s]) {
        panel.shaded.push_back({incident.start_seconds, incident.end_seconds});
      }
    }
    figure.panels.push_back(std::move(panel));
  }
  return figure;
}

std::vector<std::string> WriteTuningReport(const TuningReport& report,
                                           const StreamRecording& recording,
                                           const std::vector<Incident>& incidents,
                                           const Config& base, const TuningProvenance& provenance,
                                           const std::string& dir) {
  std::error_code error;
  std::filesystem::create_directories(dir, error);
  if (error || !std::filesystem::is_directory(dir)) {
    throw TuningError(dir + ": cannot create the report directory" +
                      (error ? ": " + error.message() : std::string()));
  }
  const auto path = [&](const char* name) { return (std::filesystem::path(dir) / name).string(); };
  std::vector<std::string> written;
  const auto text = [&](const char* name, const std::string& content) {
    WriteReportFile(path(name), content);
    written.push_back(path(name));
  };
  text("results.csv", ResultsCsv(report));
  text("results.json", ResultsJson(report, provenance));
  text("best.toml", BestToml(report, base, provenance));

  const charts::LineFigure sweep = SweepFigure(report);
  const bool kept = static_cast<int64_t>(report.chosen_rows.size()) == recording.rows();
  const std::vector<ReplayRow> replayed =
      kept ? std::vector<ReplayRow>() : ReplaySetting(recording, base, report.chosen().setting);
  const charts::TimelineFigure timeline =
      ChosenTimelineFigure(report, recording, kept ? report.chosen_rows : replayed, incidents);
  // Plain pairs, not structured bindings: clang 14 refuses a lambda that captures a binding
  // (C++20 allows it; GCC 12 accepts it), and the tree builds with both.
  using Chart = std::pair<const char*, charts::Format>;
  for (const Chart& chart :
       {Chart{"sweep.png", charts::Format::kPng}, Chart{"sweep.svg", charts::Format::kSvg}}) {
    const charts::Format format = chart.second;
    DrawAtomically(path(chart.first), [&](const std::string& target) {
      charts::DrawLineFigure(sweep, target, format);
    });
    written.push_back(path(chart.first));
  }
  for (const Chart& chart :
       {Chart{"timeline.png", charts::Format::kPng}, Chart{"timeline.svg", charts::Format::kSvg}}) {
    const charts::Format format = chart.second;
    DrawAtomically(path(chart.first), [&](const std::string& target) {
      charts::DrawTimelineFigure(timeline, target, format);
    });
    written.push_back(path(chart.first));
  }
  return written;
}

}  // namespace nuwatch
