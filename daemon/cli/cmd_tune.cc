// nuwatch tune: replays a recorded stream file once per setting of a grid (nu, gamma, window,
// support-vector budget), scores each against labelled incident windows, picks the best under a
// false-alarm limit and writes a report directory. The logic lives in daemon/offline/tuning.h.
#include <unistd.h>

#include <algorithm>
#include <charconv>
#include <chrono>
#include <cstdio>
#include <iostream>
#include <memory>
#include <optional>
#include <set>
#include <string>
#include <thread>
#include <vector>

#include "cli/cli_util.h"
#include "cli/commands.h"
#include "cli/detector_flags.h"
#include "formats/alarm_files.h"
#include "formats/csv_table.h"
#include "formats/timestamps.h"
#include "offline/replay.h"
#include "offline/tuning.h"
#include "settings/config.h"

namespace nuwatch::cli {
namespace {

constexpr const char* kFooter = R"(How settings are scored:
  The grid is the cartesian product of the --nu, --false-alarm-rate, --gamma, --lags,
  --rolling-windows, --window and --support-vector-budget lists; a list not given keeps the
  config's value (each stream's, [[stream]] overrides included), except --nu and
  --false-alarm-rate, which have default lists.
  A tuned key is applied to every stream, over any override; a warmup above a tuned window
  becomes 0 (the whole window).
  Every other detector key has its flag (named as the key, e.g. --refit-every); it beats the
  config for every stream, as in `nuwatch replay`. Each setting
  replays the recording with refits inline (deterministic: the same results with any --jobs) and
  is scored as `nuwatch evaluate` scores replay output (incidents are closed intervals; warm-up
  samples carry no alarm).
  --alarm-kind incident (default): a sample is alarmed while the debounced incident is open, from the
  vector at which it opens (when someone is paged) until it closes; --alarm-kind anomaly: every
  flagged sample is an alarm.
  --objective f1: point-wise F1; range-f1: F1 of range-based precision and recall (Tatbul et al.,
  NeurIPS 2018); recall: the fraction of labelled incidents detected.
  False alarms per day count per stream: false alarm events over all streams divided by the
  incident-free days summed over the streams.
Selection:
  Settings that flag more than half of the scored vectors are not usable and rank last; when
  every setting is such, tune writes the report and exits 1. Each setting's realised false-alarm
  rate (flagged fraction outside the labelled incidents) is reported beside the rate it set.
  The best objective among the settings with false alarms per day <= --max-false-alarms-per-day;
  ties go to fewer false alarms per day, then the smaller nu, then grid order. When no setting
  meets the limit, the one with the fewest false alarms is chosen, a warning is printed and the
  exit status is still 0 (results.json: "limit_met": false; best.toml says so too).
Report directory:
  results.csv, results.json (every setting, every metric), best.toml (the chosen [detector]
  section: paste it into the daemon config and send nuwatchd SIGHUP), sweep.png/.svg (metrics
  against nu), timeline.png/.svg (the chosen setting's decision values per stream).)";

// The detector keys `tune` takes lists of: the grid.
constexpr std::string_view kGridKeys[] = {
    "nu",   "gamma",          "window", "support_vector_budget", "false_alarm_rate",
    "lags", "rolling_windows"};

bool IsGridKey(std::string_view key) {
  return std::find(std::begin(kGridKeys), std::end(kGridKeys), key) != std::end(kGridKeys);
}

struct TuneArguments {
  std::string input, incidents, report;
  std::string nu, gamma, window, support_vector_budget, false_alarm_rate, lags,
      rolling_windows;  // lists
  std::string max_false_alarms, objective = "f1", alarms = "incident", jobs, grace = "0";
  DetectorFlags detector;  // --config and every key that is not a grid key
  CLI::App* command = nullptr;
};

std::string Rounded(const std::optional<double>& value) {
  if (!value) return "n/a";
  char buffer[32];
  std::snprintf(buffer, sizeof buffer, "%.3f", *value);
  return buffer;
}

bool Given(const TuneArguments& a, const char* flag) { return a.command->count(flag) > 0; }

template <typename Parse>
auto ParseList(const std::string& flag, const std::string& text, Parse parse) {
  try {
    return parse(text);
  } catch (const TuningError& e) {
    throw CommandError(flag + ": " + e.what());
  }
}

// The base config with the single-valued key flags applied (a flag beats the file). Each setting
// of the grid is checked when RunTuning starts, where the message can name the setting.
Config ResolveBase(const TuneArguments& a) { return a.detector.Resolve(/*validate=*/false); }

TuningOptions ParseOptions(const TuneArguments& a) {
  TuningOptions options;
  options.grid.nu = Given(a, "--nu") ? ParseList("--nu", a.nu, ParseNuList) : DefaultNuList();
  options.grid.false_alarm_rate =
      Given(a, "--false-alarm-rate")
          ? ParseList("--false-alarm-rate", a.false_alarm_rate, ParseFalseAlarmRateList)
          : DefaultFalseAlarmRateList();
  if (Given(a, "--lags")) options.grid.lags = ParseList("--lags", a.lags, ParseLagsList);
  if (Given(a, "--rolling-windows")) {
    options.grid.rolling_window =
        ParseList("--rolling-windows", a.rolling_windows, ParseRollingWindowList);
  }
  if (Given(a, "--gamma")) options.grid.gamma = ParseList("--gamma", a.gamma, ParseGammaList);
  if (Given(a, "--window")) options.grid.window = ParseList("--window", a.window, ParseWindowList);
  if (Given(a, "--support-vector-budget")) {
    options.grid.support_vector_budget =
        ParseList("--support-vector-budget", a.support_vector_budget, ParseSupportVectorBudgetList);
  }
  const std::optional<TuningObjective> objective = ParseTuningObjective(a.objective);
  if (!objective) {
    throw CommandError("--objective: '" + a.objective + "' is not one of: f1, range-f1, recall");
  }
  options.objective = *objective;
  const std::optional<AlarmSource> alarms = ParseAlarmSource(a.alarms);
  if (!alarms) {
    throw CommandError("--alarm-kind: '" + a.alarms + "' is not one of: incident, anomaly");
  }
  options.alarms = *alarms;
  if (Given(a, "--max-false-alarms-per-day")) {
    options.max_false_alarms_per_day =
        NumberFlagIn("--max-false-alarms-per-day", a.max_false_alarms, 0, INFINITY);
  }
  options.evaluation.grace_seconds = DurationFlag("--grace", a.grace);
  if (Given(a, "--jobs")) {
    options.jobs = static_cast<int>(WholeNumberFlagIn("--jobs", a.jobs, 1, 1024));
  } else {
    options.jobs = static_cast<int>(std::max(1u, std::thread::hardware_concurrency()));
  }
  return options;
}

// A progress bar on a terminal, redrawn at most a few times a second.
class ProgressBar {
 public:
  explicit ProgressBar(bool enabled) : enabled_(enabled) {}

  void Update(const TuningProgress& p) {
    if (!enabled_) return;
    const auto now = std::chrono::steady_clock::now();
    const bool finished = p.settings_done == p.settings_total;
    if (!finished && p.settings_done == last_settings_ && now - last_draw_ < kRedraw) return;
    last_draw_ = now;
    last_settings_ = p.settings_done;
    const double elapsed = std::chrono::duration<double>(now - started_).count();
    const double fraction =
        p.rows_total > 0 ? static_cast<double>(p.rows_done) / static_cast<double>(p.rows_total)
                         : 0.0;
    constexpr int kWidth = 28;
    const int filled = static_cast<int>(fraction * kWidth);
    const std::string bar = std::string(filled, '#') + std::string(kWidth - filled, '.');
    char left[32] = "?";
    if (fraction > 0.01) {
      std::snprintf(left, sizeof left, "%.0f s", elapsed * (1 - fraction) / fraction);
    }
    std::fprintf(stderr, "\rtune: [%s] %zu/%zu settings, %.0f s elapsed, ~%s left   ", bar.c_str(),
                 p.settings_done, p.settings_total, elapsed, left);
    if (finished) std::fputc('\n', stderr);
    std::fflush(stderr);
  }

 private:
  static constexpr std::chrono::milliseconds kRedraw{250};
  bool enabled_;
  std::chrono::steady_clock::time_point started_ = std::chrono::steady_clock::now();
  std::chrono::steady_clock::time_point last_draw_{};
  std::size_t last_settings_ = static_cast<std::size_t>(-1);
};

void WarnAboutIncidents(const StreamRecording& recording, const std::vector<Incident>& incidents,
                        const std::string& path) {
  if (incidents.empty()) {
    std::cerr << "nuwatch tune: warning: " << path
              << " holds no incidents: recall is undefined and every alarm is false\n";
    return;
  }
  const std::set<std::string> known(recording.streams.begin(), recording.streams.end());
  std::set<std::string> absent;
  std::size_t count = 0;
  for (const Incident& incident : incidents) {
    if (!known.count(incident.stream)) {
      absent.insert(incident.stream);
      ++count;
    }
  }
  if (count == 0) return;
  std::string names;
  for (const std::string& name : absent) names += (names.empty() ? "" : ", ") + name;
  std::cerr << "nuwatch tune: warning: " << count
            << " incident(s) name streams that are not in the recording (they count as missed): "
            << names << "\n";
}

void RunTune(const TuneArguments& a) {
  TuningOptions options = ParseOptions(a);
  options.base = ResolveBase(a);

  std::vector<Incident> incidents;
  StreamRecording recording;
  try {
    incidents = ReadIncidentFile(a.incidents);
    recording = ReadStreamRecording(a.input);
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  if (!recording.cut_last_line.empty())
    std::cerr << "nuwatch tune: warning: " << recording.cut_last_line << "\n";
  WarnAboutIncidents(recording, incidents, a.incidents);

  const std::size_t settings = ExpandGrid(options.grid).size();
  ProgressBar bar(::isatty(STDERR_FILENO) != 0);
  const auto started = std::chrono::steady_clock::now();
  TuningReport report;
  TuningProvenance provenance{a.input,
                              a.incidents,
                              a.detector.config_path,
                              recording.rows(),
                              recording.streams.size(),
                              incidents.size()};
  std::vector<std::string> written;
  try {
    report =
        RunTuning(recording, incidents, options, [&](const TuningProgress& p) { bar.Update(p); });
    const double seconds =
        std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
    std::fprintf(stderr, "tune: %zu setting(s) x %lld rows replayed in %.1f s with %d job(s)\n",
                 settings, static_cast<long long>(recording.rows()), seconds,
                 std::min<int>(options.jobs, static_cast<int>(settings)));
    written = WriteTuningReport(report, recording, incidents, options.base, provenance, a.report);
  } catch (const TuningError& e) {
    throw CommandError(e.what());
  }

  std::cout << SummaryTable(report);
  const SettingResult& best = report.chosen();
  std::cout << "chosen: " << DescribeSetting(best.detector) << " (setting " << best.index + 1
            << " of " << report.results.size() << "): " << TuningObjectiveName(report.objective)
            << " = " << Rounded(best.objective)
            << ", false alarms per day = " << Rounded(best.overall.false_alarms_per_day)
            << (report.max_false_alarms_per_day
                    ? std::string(report.selection.limit_met ? " (within" : " (over") +
                          " the limit " + FormatNumber(*report.max_false_alarms_per_day) + ")"
                    : std::string())
            << "\n";
  std::cout << "report: " << a.report
            << " (results.csv, results.json, best.toml, sweep.png/.svg, timeline.png/.svg)\n";
  // Calibration honesty: target against realised for the chosen setting, and every distinct
  // warning the refits raised for it.
  std::cout << "false-alarm rate of the chosen setting: set "
            << FormatNumber(best.detector.false_alarm_rate) << ", realised "
            << Rounded(best.realised_false_alarm_rate) << " outside the labelled incidents\n";
  for (const std::string& w : best.warnings) std::cerr << "nuwatch tune: warning: " << w << "\n";
  if (!report.selection.usable_found) {
    throw CommandError(
        "no usable setting: every setting flags more than half of the scored vectors (report "
        "written to " +
        a.report + "); check that the window spans the process's normal cycle");
  }
  if (!report.selection.limit_met) {
    std::cerr << "nuwatch tune: warning: no setting meets --max-false-alarms-per-day "
              << FormatNumber(*options.max_false_alarms_per_day)
              << "; chose the one with the fewest false alarms\n";
  }
}

void AddTuneCommand(CLI::App& app) {
  auto a = std::make_shared<TuneArguments>();
  CLI::App* sub = app.add_subcommand(
      "tune",
      "Replay a recording once per setting of a grid (nu, gamma, window, support-vector budget), "
      "score each "
      "against labelled incidents and pick the best under a false-alarm limit");
  a->command = sub;
  sub->add_option("--input", a->input, "Recorded stream file: time[,stream],features (CSV)")
      ->type_name("FILE")
      ->required();
  sub->add_option("--incidents", a->incidents, "Labelled incidents: stream,start,end[,kind] (CSV)")
      ->type_name("FILE")
      ->required();
  sub->add_option("--report", a->report, "Directory for the results, best.toml and pictures")
      ->type_name("DIR")
      ->required();
  AddLastWinsOption(sub, "--nu", a->nu,
                    "nu values, comma-separated, each in (0, 1] (default "
                    "0.02,0.05,0.1)")
      ->type_name("LIST");
  AddLastWinsOption(sub, "--gamma", a->gamma,
                    "Kernel widths: scale, median, min_volume or numbers (default: config)")
      ->type_name("LIST");
  AddLastWinsOption(sub, "--false-alarm-rate", a->false_alarm_rate,
                    "Per-vector false-alarm budgets, each in (0, 0.5] (default "
                    "0.0005,0.001,0.002,0.005)")
      ->type_name("LIST");
  AddLastWinsOption(sub, "--lags", a->lags,
                    "Numbers of previous vectors stacked (temporal context; default: config)")
      ->type_name("LIST");
  AddLastWinsOption(sub, "--rolling-windows", a->rolling_windows,
                    "Rolling-statistics window lengths, one per setting; 0: none (default: config)")
      ->type_name("LIST");
  AddLastWinsOption(sub, "--window", a->window,
                    "Training window sizes in vectors (default: config)")
      ->type_name("LIST");
  AddLastWinsOption(sub, "--support-vector-budget", a->support_vector_budget,
                    "Support-vector budgets (default: config)")
      ->type_name("LIST");
  sub->add_option(
         "--max-false-alarms-per-day", a->max_false_alarms,
         "Only settings with at most this many false alarms per stream and incident-free day")
      ->type_name("NUMBER");
  sub->add_option("--objective", a->objective, "What to maximise: f1 | range-f1 | recall")
      ->type_name("f1|range-f1|recall")
      ->capture_default_str();
  sub->add_option("--alarm-kind", a->alarms,
                  "What counts as an alarm: incident (while one is open) | anomaly (every flagged "
                  "vector)")
      ->type_name("incident|anomaly")
      ->capture_default_str();
  sub->add_option("--jobs", a->jobs, "Settings replayed in parallel (default: hardware threads)")
      ->type_name("INTEGER");
  sub->add_option("--grace", a->grace,
                  "How long after an incident's end an alarm still detects it (90, 15m, 2h)")
      ->type_name("DURATION")
      ->capture_default_str();
  a->detector.AddTo(sub, [](const Setting<DetectorOptions>& s) { return !IsGridKey(s.name); });
  sub->footer(kFooter);
  sub->callback([a] { RunTune(*a); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(70, AddTuneCommand);
}  // namespace nuwatch::cli
