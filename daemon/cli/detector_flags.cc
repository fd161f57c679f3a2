#include "cli/detector_flags.h"

#include "cli/commands.h"

namespace nuwatch::cli {

void DetectorFlags::AddTo(CLI::App* sub) {
  app = sub;
  sub->add_option("--config", config_path, "TOML config; its [detector] and [[stream]] sections");
  sub->add_option("--nu", nu, "Upper bound on the training outlier fraction (default 0.05)");
  sub->add_option("--gamma", gamma, "Kernel width: scale, median or a number (default scale)");
  sub->add_option("--window", window, "Vectors kept for training per stream (default 2000)");
  sub->add_option("--budget", budget, "Support-vector budget per stream (default 256)");
  sub->add_option("--refit-every", refit_every,
                  "Accepted vectors between refits; 0: fit once (default 200)");
  sub->add_option("--warmup", warmup, "Vectors before the first fit (default 500)");
  sub->add_option("--open-after", open_after, "Incident opens after this many flagged... (3)");
  sub->add_option("--open-window", open_window, "...of the last this many vectors (default 5)");
  sub->add_option("--close-after", close_after, "Incident closes after this many clean (10)");
  sub->add_flag("--learn-from-anomalies", learn_from_anomalies,
                "Let flagged vectors enter the window even while an incident is open");
  sub->add_flag("--drift", drift, "Refit on a Page-Hinkley drift alarm on the decision values");
}

Config DetectorFlags::Resolve() const {
  Config config;
  try {
    config = config_path.empty() ? DefaultConfig() : LoadConfig(config_path);
  } catch (const std::exception& e) {
    throw CommandError(e.what());
  }
  auto given = [&](const char* flag) { return app->count(flag) > 0; };
  auto apply = [&](DetectorOptions& o) {
    if (given("--nu")) o.nu = nu;
    if (given("--gamma")) {
      auto spec = GammaSpec::Parse(gamma);
      if (!spec) throw CommandError("--gamma '" + gamma + "' is not scale, median or a number > 0");
      o.gamma = *spec;
    }
    if (given("--window")) o.window = window;
    if (given("--budget")) o.support_vector_budget = budget;
    if (given("--refit-every")) o.refit_every = refit_every;
    if (given("--warmup")) o.warmup = warmup;
    if (given("--open-after")) o.open_after = open_after;
    if (given("--open-window")) o.open_window = open_window;
    if (given("--close-after")) o.close_after = close_after;
    if (learn_from_anomalies) o.learn_from_anomalies = true;
    if (drift) o.drift_detection = true;
  };
  apply(config.detector);
  try {
    ValidateDetectorOptions(config.detector, "");
  } catch (const std::exception& e) {
    throw CommandError(e.what());
  }
  for (auto& override : config.overrides) apply(override.values);
  return config;
}

}  // namespace nuwatch::cli
