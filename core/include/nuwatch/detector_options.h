// The settings of one stream's detector. The daemon's TOML [detector] section and the fit, replay
// and tune command lines map onto this struct key for key (the key names are the member names).
// The member initialisers are the defaults; DetectorKeys() in nuwatch/detector_settings.h is the
// table of the keys (range, unit, documentation): a new member needs its entry there.
// Thread safety: a plain value type.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

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
  ScalerType scaler = ScalerType::kStandard;
  double tolerance = 1e-3;     // solver stopping tolerance (relative, see solver.h)
  int64_t max_iterations = 0;  // 0: the solver's default cap
  std::size_t cache_bytes = 64u << 20;

  // Window and refits.
  int64_t window = 2000;             // vectors kept for training
  double max_age_seconds = 0;        // 0: no age limit on window vectors
  int64_t warmup = 500;              // vectors before the first fit; <= window
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

  // Incidents: open after open_after of the last open_window vectors were flagged, close after
  // close_after consecutive clean ones.
  int open_after = 3;
  int open_window = 5;
  int close_after = 10;

  // Feature names (optional); used to name features in explanations.
  std::vector<std::string> feature_names;
};

}  // namespace nuwatch
