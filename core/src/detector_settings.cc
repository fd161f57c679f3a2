#include "nuwatch/detector_settings.h"

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

using D = DetectorOptions;

constexpr std::string_view kKernelNames[] = {"rbf", "linear", "poly"};
constexpr std::string_view kScalerNames[] = {"none", "standard", "robust"};

constexpr std::string_view kModel = "Model";
constexpr std::string_view kRefits = "Window and refits";
constexpr std::string_view kDrift =
    "Drift (Page-Hinkley test on the decision values; an alarm triggers a refit)";
constexpr std::string_view kIncidents = "Incidents";
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
            "(1 / median squared distance) or a positive number.",
     .unit = "1 / scaled units squared",
     .bounds = Positive(),
     .bounds_note = " (or \"scale\" or \"median\")",
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
     .doc = "Per-feature scaling fitted on the window: \"none\", \"standard\" or \"robust\" "
            "(median / IQR).",
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
     .bounds = AtLeast(2),
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
     .doc = "Vectors collected before the first fit, at most window.",
     .unit = "vectors",
     .bounds = AtLeast(2),
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
     .bounds = AtLeast(1),
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
  return CheckSettings(DetectorKeys(), options, name);
}

void CheckDetectorOptions(const DetectorOptions& options, std::string_view where) {
  const auto plain = [](std::string_view, std::string_view key) { return std::string(key); };
  if (const auto violation = FindDetectorViolation(options, plain)) {
    throw PreconditionError(std::string(where) + ": " + violation->message);
  }
}

}  // namespace nuwatch
