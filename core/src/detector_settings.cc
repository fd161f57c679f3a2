#include "nuwatch/detector_settings.h"

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

using D = DetectorOptions;

constexpr std::string_view kKernelNames[] = {"rbf", "linear", "poly"};
constexpr std::string_view kScalerNames[] = {"none", "standard", "robust", "whiten"};
constexpr std::string_view kRollingStatisticNames[] = {"mean", "std", "slope"};

constexpr std::string_view kModel = "Model";
constexpr std::string_view kRefits = "Window and refits";
constexpr std::string_view kDrift =
    "Drift (Page-Hinkley test on the decision values; an alarm triggers a refit)";
constexpr std::string_view kIncidents = "Incidents";
constexpr std::string_view kAlarms =
    "Calibrated alarms (the alarm level set out of sample from the false-alarm budget)";
constexpr std::string_view kContext =
    "Temporal context (transforms computed before scaling; changing them relearns the stream)";
constexpr std::string_view kFeatures = "Features";

constexpr SettingBounds AtLeast(double min) { return {.min = min}; }
constexpr SettingBounds Positive() { return {.min = 0, .min_open = true}; }

// The table. The defaults are DetectorOptions' member initialisers; config/REFERENCE.md explains
// each key at length, config/nuwatchd.toml lists it with this doc line.
const Setting<D> kDetectorKeys[] = {
    // --- Model ---
    {.section = "detector",
     .name = "nu",
     .member = &D::nu,
     .doc = "Upper bound on the fraction of training vectors left outside the envelope. Smaller: "
            "fewer false alarms, later detection.",
     .unit = "fraction",
     .bounds = {.min = 0, .min_open = true, .max = 1},
     .group = kModel},
    {.section = "detector",
     .name = "kernel",
     .member = &D::kernel,
     .doc = "Kernel: \"rbf\" (a closed envelope around the data), \"linear\" or \"poly\".",
     .choices = kKernelNames,
     .group = kModel},
    {.section = "detector",
     .name = "gamma",
     .member = &D::gamma,
     .doc = "Kernel width: \"scale\" (1 / (features x variance of the scaled window)), \"median\" "
            "(1 / median squared distance), \"min_volume\" (of scale x 1/4, 1/2, 1, 2, 4, the "
            "width whose calibrated envelope has the least volume: Scott & Nowak's minimum-volume "
            "set; cold fits cost 5 times as much) or a positive number.",
     .unit = "1 / scaled units squared",
     .bounds = Positive(),
     .bounds_note = " (or \"scale\", \"median\" or \"min_volume\")",
     .group = kModel},
    {.section = "detector",
     .name = "degree",
     .member = &D::degree,
     .doc = "Degree of the polynomial kernel (gamma x.y + coef0)^degree; unused otherwise.",
     .bounds = AtLeast(1),
     .group = kModel},
    {.section = "detector",
     .name = "coef0",
     .member = &D::coef0,
     .doc = "Constant term of the polynomial kernel; unused otherwise.",
     .group = kModel},
    {.section = "detector",
     .name = "scaler",
     .member = &D::scaler,
     .doc = "Scaling fitted on the window: \"whiten\" (standardise, then rotate onto the principal "
            "axes at unit variance: broken relations between features stand out), \"standard\", "
            "\"robust\" (median / IQR) or \"none\".",
     .choices = kScalerNames,
     .group = kModel},
    {.section = "detector",
     .name = "tolerance",
     .member = &D::tolerance,
     .doc = "Solver stopping tolerance (LIBSVM's rule). Smaller: more exact, slower refits.",
     .unit = "solver gradient units",
     .bounds = Positive(),
     .group = kModel},
    {.section = "detector",
     .name = "max_iterations",
     .member = &D::max_iterations,
     .doc = "Solver iteration cap; 0: max(10^7, 100 x window). A capped refit still gives a "
            "usable model.",
     .unit = "iterations",
     .bounds = AtLeast(0),
     .bounds_note = " (0: the solver's default cap)",
     .group = kModel},
    {.section = "detector",
     .name = "cache_bytes",
     .member = &D::cache_bytes,
     .doc = "Kernel-column cache of the solver; the whole kernel matrix takes 4 x window^2 bytes.",
     .unit = "bytes",
     .bounds = AtLeast(1 << 20),
     .bounds_note = " (1 MiB); the unit is bytes",
     .group = kModel},
    // --- Window and refits ---
    {.section = "detector",
     .name = "window",
     .member = &D::window,
     .doc = "Vectors kept for training; the window should span the process's normal cycle.",
     .unit = "vectors",
     // Grows to (4 x features + 8) bytes x window as the stream fills; a larger value cannot be
     // allocated for any useful number of features, and once overflowed the size (issue 10).
     .bounds = {.min = 2, .max = 1e7},
     .group = kRefits},
    {.section = "detector",
     .name = "max_age_seconds",
     .member = &D::max_age_seconds,
     .doc = "Window vectors older than this are dropped; 0: no age limit.",
     .unit = "seconds",
     .bounds = AtLeast(0),
     .bounds_note = " (0: no limit)",
     .group = kRefits},
    {.section = "detector",
     .name = "warmup",
     .member = &D::warmup,
     .doc = "Vectors collected before the first fit, at most window; 0: the whole window, so that "
            "the first model has seen a full cycle.",
     .unit = "vectors",
     .bounds = AtLeast(0),
     .bounds_note = " (0: the whole window)",
     .at_most = "window",
     .group = kRefits},
    {.section = "detector",
     .name = "refit_every",
     .member = &D::refit_every,
     .doc = "Accepted vectors between refits; 0: fit once, never refit.",
     .unit = "vectors",
     .bounds = AtLeast(0),
     .bounds_note = " (0: fit once, never refit)",
     .group = kRefits},
    {.section = "detector",
     .name = "max_model_age_seconds",
     .member = &D::max_model_age_seconds,
     .doc = "Refit when the model is older than this (data time); 0: no age-triggered refit.",
     .unit = "seconds",
     .bounds = AtLeast(0),
     .bounds_note = " (0: no age limit)",
     .group = kRefits},
    {.section = "detector",
     .name = "cold_refit_every",
     .member = &D::cold_refit_every,
     .doc = "Every n-th refit starts cold (re-estimates the scaler and gamma); the others "
            "warm-start.",
     .unit = "refits",
     .bounds = AtLeast(1),
     .bounds_note = " (1: every refit is cold)",
     .group = kRefits},
    {.section = "detector",
     .name = "support_vector_budget",
     .member = &D::support_vector_budget,
     .doc = "Support vectors a model keeps at most; larger models are compressed.",
     .unit = "support vectors",
     .bounds = AtLeast(1),
     .group = kRefits},
    {.section = "detector",
     .name = "learn_from_anomalies",
     .member = &D::learn_from_anomalies,
     .doc = "false: flagged vectors do not enter the window while an incident is open, so a fault "
            "is not learnt as normal.",
     .group = kRefits},
    // --- Drift ---
    {.section = "detector",
     .name = "drift_detection",
     .member = &D::drift_detection,
     .doc = "Refit when the test signals a change of the mean decision value.",
     .group = kDrift},
    {.section = "detector",
     .name = "drift_delta",
     .member = &D::drift_delta,
     .doc = "Tolerated change of the mean decision value.",
     .unit = "decision units",
     .bounds = AtLeast(0),
     .group = kDrift},
    {.section = "detector",
     .name = "drift_lambda",
     .member = &D::drift_lambda,
     .doc = "Alarm threshold on the cumulative deviation.",
     .unit = "decision units",
     .bounds = Positive(),
     .group = kDrift},
    {.section = "detector",
     .name = "drift_min_samples",
     .member = &D::drift_min_samples,
     .doc = "Scores needed since the last refit before the test may raise an alarm.",
     .unit = "scores",
     .bounds = AtLeast(1),
     .group = kDrift},
    // --- Calibrated alarms ---
    {.section = "detector",
     .name = "false_alarm_rate",
     .member = &D::false_alarm_rate,
     .doc = "Per-vector false-alarm budget: a vector is flagged when its out-of-sample p-value is "
            "at most this; 0: not set (false_incidents_per_day alone).",
     .unit = "fraction of vectors",
     .bounds = {.min = 0, .max = 0.5},
     .bounds_note = " (0: not set)",
     .group = kAlarms},
    {.section = "detector",
     .name = "false_incidents_per_day",
     .member = &D::false_incidents_per_day,
     .doc = "Budget of false incidents per day of data time; the level is lowered until the "
            "debounce rule, run over the calibration scores in time order, stays within it.",
     .unit = "incidents per day",
     .bounds = AtLeast(0),
     .bounds_note = " (0: not set)",
     .group = kAlarms},
    {.section = "detector",
     .name = "calibration_folds",
     .member = &D::calibration_folds,
     .doc = "Models fitted without a fold of the window each, to score it out of sample; 0: "
            "uncalibrated (flag decision < 0). More: a tighter level, slower refits.",
     .unit = "folds",
     .bounds = {.min = 0, .max = 50},
     .bounds_note = " (0: off; else at least 2)",
     .group = kAlarms},
    // --- Temporal context ---
    {.section = "detector",
     .name = "lags",
     .member = &D::lags,
     .doc = "Previous vectors stacked beside the current one (dynamic PCA's augmentation); each "
            "lag adds a copy of the features.",
     .unit = "vectors",
     .bounds = {.min = 0, .max = 1000},
     .group = kContext},
    {.section = "detector",
     .name = "rolling_windows",
     .member = &D::rolling_windows,
     .doc = "Lengths of the rolling windows whose statistics are added as features; empty: none.",
     .unit = "vectors",
     .bounds = {.min = 2, .max = 100000},
     .distinct = true,
     .group = kContext},
    {.section = "detector",
     .name = "rolling_statistics",
     .member = &D::rolling_statistics,
     .doc = "Statistics taken over each rolling window: \"mean\", \"std\" (sample), \"slope\" "
            "(least squares, per vector).",
     .choices = kRollingStatisticNames,
     .distinct = true,
     .group = kContext},
    {.section = "detector",
     .name = "max_gap_seconds",
     .member = &D::max_gap_seconds,
     .doc = "A gap in time larger than this refills the lags' and windows' history; 0: never.",
     .unit = "seconds",
     .bounds = AtLeast(0),
     .bounds_note = " (0: gaps never reset)",
     .group = kContext},
    // --- Incidents ---
    {.section = "detector",
     .name = "open_after",
     .member = &D::open_after,
     .doc = "An incident opens when open_after of the last open_window vectors were flagged...",
     .unit = "vectors",
     .bounds = AtLeast(1),
     .at_most = "open_window",
     .group = kIncidents},
    {.section = "detector",
     .name = "open_window",
     .member = &D::open_window,
     .doc = "...the number of recent vectors open_after counts over...",
     .unit = "vectors",
     .bounds = {.min = 1, .max = 1e6},  // a ring of this many entries is allocated up front
     .group = kIncidents},
    {.section = "detector",
     .name = "close_after",
     .member = &D::close_after,
     .doc = "...and it closes after this many consecutive vectors that were not flagged.",
     .unit = "vectors",
     .bounds = AtLeast(1),
     .group = kIncidents},
    // --- Features ---
    {.section = "detector",
     .name = "feature_names",
     .member = &D::feature_names,
     .doc = "Names of the features in vector order, used in explanations; empty: features are "
            "named by their 0-based column index.",
     .distinct = true,
     .group = kFeatures},
};

}  // namespace

std::span<const Setting<DetectorOptions>> DetectorKeys() { return kDetectorKeys; }

std::optional<SettingViolation> FindDetectorViolation(const DetectorOptions& options,
                                                      const SettingNamer& name) {
  if (auto violation = CheckSettings(DetectorKeys(), options, name)) return violation;
  // Rules between the calibration and transform keys, which the table cannot state.
  const auto fail = [&](std::vector<std::string> keys, std::string message) {
    return SettingViolation{"detector", std::move(keys), std::move(message)};
  };
  if (options.warmup == 1) {
    return fail({"warmup"},
                name("detector", "warmup") + " = 1 must be at least 2 (0: the whole window)");
  }
  if (options.calibration_folds == 1) {
    return fail({"calibration_folds"},
                name("detector", "calibration_folds") +
                    " = 1: cross-fitting needs at least 2 folds (0 turns calibration off)");
  }
  if (options.calibration_folds != 0 && options.false_alarm_rate == 0 &&
      options.false_incidents_per_day == 0) {
    return fail({"false_alarm_rate", "false_incidents_per_day"},
                name("detector", "false_alarm_rate") + " and " +
                    name("detector", "false_incidents_per_day") +
                    " are both 0: set a false-alarm budget, or " +
                    name("detector", "calibration_folds") + " = 0 to flag decision < 0");
  }
  if (options.gamma.mode == GammaSpec::Mode::kMinVolume && options.kernel != KernelType::kRbf) {
    return fail({"gamma", "kernel"},
                name("detector", "gamma") + " = \"min_volume\" needs " +
                    name("detector", "kernel") +
                    " = \"rbf\" (the other kernels' envelopes are unbounded, so they have no "
                    "volume to compare)");
  }
  if (options.gamma.mode == GammaSpec::Mode::kMinVolume && options.calibration_folds == 0) {
    return fail({"gamma", "calibration_folds"},
                name("detector", "gamma") + " = \"min_volume\" needs " +
                    name("detector", "calibration_folds") +
                    " >= 2: it compares the envelopes at the calibrated level, which held-out "
                    "scores set");
  }
  if (!options.rolling_windows.empty() && options.rolling_statistics.empty()) {
    return fail({"rolling_statistics", "rolling_windows"},
                name("detector", "rolling_statistics") + " is empty while " +
                    name("detector", "rolling_windows") + " is set: name at least one statistic");
  }
  return std::nullopt;
}

void CheckDetectorOptions(const DetectorOptions& options, std::string_view where) {
  const auto plain = [](std::string_view, std::string_view key) { return std::string(key); };
  if (const auto violation = FindDetectorViolation(options, plain)) {
    throw PreconditionError(std::string(where) + ": " + violation->message);
  }
}

}  // namespace nuwatch
