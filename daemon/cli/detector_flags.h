// Command-line flags that override detector settings (replay and tune share them).
#pragma once

#include <CLI/CLI.hpp>
#include <string>

#include "nuwatch/detector_options.h"
#include "settings/config.h"

namespace nuwatch::cli {

struct DetectorFlags {
  std::string config_path;
  double nu = 0;
  std::string gamma;
  int64_t window = 0, budget = 0, refit_every = 0, warmup = 0;
  int open_after = 0, open_window = 0, close_after = 0;
  bool learn_from_anomalies = false;
  bool drift = false;
  CLI::App* app = nullptr;

  // Adds --config, --nu, --gamma, --window, --budget, --refit-every, --warmup, --open-after,
  // --open-window, --close-after, --learn-from-anomalies, --drift to `sub`.
  void AddTo(CLI::App* sub);
  // The config (file or defaults) with every given flag applied to [detector] and to every
  // [[stream]] override (a flag beats the file). Throws CommandError on a bad file or value.
  Config Resolve() const;
};

}  // namespace nuwatch::cli
