// Detector options for tests of reading, writing and parsing settings.
#pragma once

#include "nuwatch/detector_options.h"

namespace nuwatch {

inline DetectorOptions UnusualDetectorOptions() {
  DetectorOptions o;
  o.nu = 0.1 + 0.2;  // 0.30000000000000004: needs all 17 significant digits
  o.kernel = KernelType::kLinear;
  o.gamma.mode = GammaSpec::Mode::kValue;
  o.gamma.value = 1.0 / 3.0;
  o.degree = 5;
  o.coef0 = -2.0;
  o.scaler = ScalerType::kNone;
  o.tolerance = 1e-7;
  o.max_iterations = 999;
  o.cache_bytes = (3u << 20) + 1;
  o.window = 4321;
  o.max_age_seconds = 86400;
  o.warmup = 4321;
  o.refit_every = 17;
  o.max_model_age_seconds = 0.5;
  o.cold_refit_every = 1;
  o.support_vector_budget = 1;
  o.learn_from_anomalies = true;
  o.drift_detection = true;
  o.drift_delta = 1e-300;
  o.drift_lambda = 1e+20;
  o.drift_min_samples = 1;
  o.open_after = 7;
  o.open_window = 7;
  o.close_after = 1;
  // TOML basic-string escapes (TOML 1.0 §String): quote, backslash, tab, a control character.
  o.feature_names = {"temp \"C\"", "back\\slash", "tab\there", "ctl\x01", "caf\xC3\xA9"};
  return o;
}

}  // namespace nuwatch
