// nuwatch fit: a model fitted on a CSV file, written to a model file. The fit is the one every
// refit of the daemon, replay and tune makes (FitWindow: transforms, scaler, kernel width, solver,
// budget, calibration by cross-fitting), on the whole file as one window.
#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <iostream>
#include <limits>
#include <memory>
#include <numeric>
#include <stop_token>
#include <string>
#include <thread>

#include "cli/cli_util.h"
#include "cli/detector_flags.h"
#include "cli/progress_line.h"
#include "formats/timestamps.h"
#include "nuwatch/detector.h"
#include "nuwatch/model_file.h"

namespace nuwatch::cli {
namespace {

// The keys that describe one window's fit; the refit schedule, drift and window-age keys do not
// apply to a file fitted once.
constexpr std::string_view kFitKeys[] = {"nu",
                                         "kernel",
                                         "gamma",
                                         "degree",
                                         "coef0",
                                         "scaler",
                                         "tolerance",
                                         "max_iterations",
                                         "cache_bytes",
                                         "support_vector_budget",
                                         "false_alarm_rate",
                                         "false_incidents_per_day",
                                         "calibration_folds",
                                         "lags",
                                         "rolling_windows",
                                         "rolling_statistics",
                                         "max_gap_seconds",
                                         "open_after",
                                         "open_window",
                                         "close_after"};

// A file is fitted as it is: no budget unless one is asked for (the model keeps every support
// vector, as scikit-learn's does), and the larger kernel cache of a one-off fit.
DetectorOptions FitDefaults() {
  DetectorOptions o;
  o.support_vector_budget = std::numeric_limits<int32_t>::max();
  o.cache_bytes = std::size_t{100} << 20;
  return o;
}

struct FitArgs {
  std::string input, output, stream, from, until;
  DetectorKeyFlags keys;
};

// While one long step runs (reading the file, or the fit: one solver run with no progress of its
// own to report), "fit: STEP, 12 s" on a terminal's stderr from its first second on, so that a
// long fit shows it is alive; erased when the ticker is destroyed. On a stderr that is no terminal
// it starts no thread.
class ElapsedTicker {
 public:
  explicit ElapsedTicker(std::string step) {
    ProgressLine line = ProgressLine::ForStderr();
    if (!line.enabled()) return;
    thread_ = std::jthread(
        [line = std::move(line), step = std::move(step)](std::stop_token stop) mutable {
          const auto started = ProgressLine::Clock::now();
          while (!stop.stop_requested()) {
            const auto now = ProgressLine::Clock::now();
            // A step shorter than a second gets no line: it would only flicker.
            if (now - started < std::chrono::seconds(1)) {
              std::this_thread::sleep_for(std::chrono::milliseconds(50));
              continue;
            }
            char text[200];
            std::snprintf(text, sizeof text, "fit: %s, %.0f s", step.c_str(),
                          std::chrono::duration<double>(now - started).count());
            line.Draw(text, now);
            // Short naps, so that the line is erased promptly once the step is over.
            for (int nap = 0; nap < 5 && !stop.stop_requested(); ++nap)
              std::this_thread::sleep_for(std::chrono::milliseconds(50));
          }
          line.Clear();
        });
  }
  // Stops and joins the thread (std::jthread), which erases the line.
  ~ElapsedTicker() = default;

 private:
  std::jthread thread_;
};

double TimeBound(const std::string& text, const char* flag, double none) {
  if (text.empty()) return none;
  const auto t = ParseTimestamp(text);
  if (!t)
    throw CommandError(std::string(flag) + ": '" + text +
                       "' is not an ISO-8601 time or epoch seconds");
  return *t;
}

void RunFit(const FitArgs& a) {
  DetectorOptions options = FitDefaults();
  a.keys.ApplyTo(options);
  FeatureFile all_rows;
  {
    const ElapsedTicker ticker("reading " + a.input);
    all_rows = ReadFeatureFile(a.input);
  }
  const FeatureFile file =
      SelectRows(std::move(all_rows), a.stream, TimeBound(a.from, "--from", -INFINITY),
                 TimeBound(a.until, "--until", INFINITY));
  options.feature_names = file.names;
  options.window = std::max<int64_t>(2, file.values.rows());
  options.warmup = 0;
  a.keys.Validate(options, [&](std::string_view key) -> std::string {
    if (key == "window") return "the number of rows fitted";
    if (key == "warmup") return "fixed by fit";
    return "fit's default";
  });
  // Temporal context first, as the detector does: rows in file order, gaps by the time column.
  const FeatureTransform transform(TransformOptions(options), static_cast<int>(file.values.cols()));
  std::vector<int64_t> output_row;
  const MatrixD rows = transform.TransformAll(file.values, file.times, &output_row);
  if (rows.rows() < 2) {
    throw CommandError(a.input + ": " + std::to_string(rows.rows()) +
                       " vector(s) to fit after the transforms' history; need at least 2");
  }
  std::vector<double> times;
  if (!file.times.empty()) {
    for (std::size_t i = 0; i < output_row.size(); ++i)
      if (output_row[i] >= 0) times.push_back(file.times[i]);
  }
  std::vector<uint64_t> ids(static_cast<std::size_t>(rows.rows()));
  std::iota(ids.begin(), ids.end(), uint64_t{1});
  WindowFitResult fit;
  try {
    const ElapsedTicker ticker("fitting " + std::to_string(rows.rows()) + " vectors of " +
                               std::to_string(rows.cols()) + " features");
    fit = FitWindow(rows, ids, times, options, nullptr, 1);
  } catch (const PreconditionError& e) {
    throw CommandError(a.input + ": " + e.what());
  }
  SaveModel(*fit.model, a.output);
  const Model& model = *fit.model;
  const auto& t = model.parts().training;
  std::cerr << "fitted " << a.input << ": " << rows.rows() << " vectors of " << model.dims()
            << " features, " << t.n_support << " support vectors (" << t.n_bounded
            << " at the bound)";
  if (model.parts().compression.support_vectors_before > 0)
    std::cerr << ", compressed to " << model.num_support();
  std::cerr << ", gamma " << model.kernel().gamma << ", " << t.iterations << " iterations"
            << (t.converged ? "" : " (NOT converged)") << " -> " << a.output << "\n";
  if (!model.parts().gamma_candidates.empty()) {
    std::cerr << "gamma min_volume: log volume of the calibrated envelope (standard error) for";
    for (const GammaCandidate& c : model.parts().gamma_candidates)
      std::cerr << " " << c.gamma << ": " << c.log_volume << " (" << c.standard_error << ")";
    std::cerr << "; kept " << model.kernel().gamma << "\n";
  }
  if (model.calibrated()) {
    const CalibrationSummary& c = model.parts().calibration.summary();
    std::cerr << "calibrated (" << model.parts().calibration.Method() << ", "
              << options.calibration_folds << " folds): flags p <= " << c.level;
    if (c.vectors_per_day > 0)
      std::cerr << ", about " << c.incidents_per_day << " false incidents per day";
    std::cerr << "\n";
  }
  for (const auto& w : fit.report.warnings) std::cerr << "warning: " << w << "\n";
}

void AddFitCommand(CLI::App& app) {
  auto args = std::make_shared<FitArgs>();
  CLI::App* sub = app.add_subcommand(
      "fit", "Fit a model on a CSV file of vectors, calibrated to the false-alarm budget");
  sub->add_option("--input", args->input,
                  "CSV with a header row; every column is a feature except 'time' and 'stream'")
      ->type_name("FILE")
      ->required();
  sub->add_option("--output", args->output, "Model file to write")->type_name("FILE")->required();
  AddLastWinsOption(sub, "--stream", args->stream,
                    "Fit the rows of this stream only (needed when the file holds several)")
      ->type_name("STREAM");
  AddLastWinsOption(sub, "--from", args->from, "Fit the rows at or after this time")
      ->type_name("TIME");
  AddLastWinsOption(sub, "--until", args->until, "Fit the rows at or before this time")
      ->type_name("TIME");
  args->keys.AddTo(sub, FitDefaults(), [](const Setting<DetectorOptions>& s) {
    return std::find(std::begin(kFitKeys), std::end(kFitKeys), s.name) != std::end(kFitKeys);
  });
  sub->callback([args] { RunFit(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(10, AddFitCommand);
}  // namespace nuwatch::cli
