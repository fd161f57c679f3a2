// The settings of one stream's detector. The daemon's TOML [detector] section and the fit, replay
// and tune command lines map onto this struct key for key (the key names are the member names).
// The member initialisers are the defaults; DetectorKeys() in nuwatch/detector_settings.h is the
// table of the keys (range, unit, documentation): a new member needs its entry there.
// Thread safety: a plain value type.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "nuwatch/feature_transform.h"
#include "nuwatch/kernel.h"
#include "nuwatch/scaler.h"

namespace nuwatch {

struct DetectorOptions {
  // Model.
  double nu = 0.05;  // upper bound on the training outlier fraction; (0, 1]
  KernelType kernel = KernelType::kRbf;
  GammaSpec gamma;     // "scale" by default
  int degree = 3;      // polynomial kernel only
  double coef0 = 0.0;  // polynomial kernel only
  // whiten: Mahalanobis distances, so that a broken relation between features stands out (the
  // Q statistic's faults); measured on the demo plant and on the Tennessee Eastman data (README).
  ScalerType scaler = ScalerType::kWhiten;
  double tolerance = 1e-3;     // solver stopping tolerance (relative, see solver.h)
  int64_t max_iterations = 0;  // 0: the solver's default cap
  std::size_t cache_bytes = 64u << 20;

  // Window and refits.
  // Vectors kept for training: the window must span the process's normal cycle. 8640 is a day at
  // 10 s (the demo plant's interval).
  int64_t window = 8640;
  double max_age_seconds = 0;  // 0: no age limit on window vectors
  int64_t warmup =
      0;  // vectors before the first fit, <= window; 0: the whole window (a full cycle)
  int64_t refit_every = 200;         // accepted vectors between refits; 0: fit once, never refit
  double max_model_age_seconds = 0;  // 0: no age-triggered refit
  int64_t cold_refit_every = 10;     // every n-th refit re-estimates scaler and gamma (cold start)
  int64_t support_vector_budget = 256;
  bool learn_from_anomalies = false;

  // Drift: Page-Hinkley on the decision values.
  bool drift_detection = false;
  double drift_delta = 0.005;       // tolerated change of the mean, in decision units
  double drift_lambda = 0.5;        // alarm threshold on the cumulative deviation
  int64_t drift_min_samples = 100;  // no alarm before this many scores since the last refit

  // Calibrated alarms (calibration.h). The alarm level comes from the false-alarm budget, set
  // out of sample by cross-fitting over calibration_folds folds of the window: each fold is
  // scored by a model fitted without it (detector.h, FitWindow). nu shapes the envelope (the
  // model's complexity); these decide when to alarm. calibration_folds = 0 turns calibration off
  // (flag decision < 0, the in-sample rule whose rate on fresh data nu does not bound).
  double false_alarm_rate = 0.001;       // per-vector budget; 0: not set
  double false_incidents_per_day = 0.1;  // false incidents per day of data time; 0: not set
  int calibration_folds = 4;             // 0 or >= 2

  // Temporal context (feature_transform.h), computed before scaling so that every path sees the
  // same features: `lags` previous vectors stacked beside the current one, and rolling statistics
  // (names in rolling_statistics: "mean", "std", "slope") over each length in rolling_windows. A
  // gap in time larger than max_gap_seconds (> 0) refills the history. Changing any of these
  // changes the feature space: the stream relearns.
  int lags = 0;
  std::vector<int64_t> rolling_windows;
  std::vector<std::string> rolling_statistics = {"mean", "std", "slope"};
  double max_gap_seconds = 0;

  // Incidents: open after open_after of the last open_window vectors were flagged, close after
  // close_after consecutive clean ones.
  int open_after = 3;
  int open_window = 5;
  int close_after = 10;

  // Feature names (optional); used to name features in explanations.
  std::vector<std::string> feature_names;
};

// The vectors the first fit waits for: warmup, or window when warmup is 0.
inline int64_t EffectiveWarmup(const DetectorOptions& options) {
  return options.warmup > 0 ? options.warmup : options.window;
}

// The transform the options describe. Requires: valid rolling_statistics names (PreconditionError
// naming the bad one otherwise; CheckDetectorOptions checks all of it).
FeatureTransformOptions TransformOptions(const DetectorOptions& options);

}  // namespace nuwatch
