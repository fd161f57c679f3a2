// nuwatch fit: a cold fit of a one-class model on a CSV file, written to a model file.
#include <algorithm>
#include <cmath>
#include <iostream>
#include <memory>
#include <sstream>

#include "cli/cli_util.h"
#include "cli/detector_flags.h"
#include "nuwatch/model.h"
#include "nuwatch/model_file.h"

namespace nuwatch::cli {
namespace {

// The detector keys a cold fit takes (FitOptions' members), as flags named as the keys.
constexpr std::string_view kFitKeys[] = {"nu",        "kernel",         "gamma",
                                         "degree",    "coef0",          "scaler",
                                         "tolerance", "max_iterations", "cache_bytes"};

DetectorOptions AsDetectorOptions(const FitOptions& f) {
  DetectorOptions o;
  o.nu = f.nu;
  o.kernel = f.kernel;
  o.gamma = f.gamma;
  o.degree = f.degree;
  o.coef0 = f.coef0;
  o.scaler = f.scaler;
  o.tolerance = f.tolerance;
  o.max_iterations = f.max_iterations;
  o.cache_bytes = f.cache_bytes;
  return o;
}

FitOptions AsFitOptions(const DetectorOptions& o) {
  FitOptions f;
  f.nu = o.nu;
  f.kernel = o.kernel;
  f.gamma = o.gamma;
  f.degree = o.degree;
  f.coef0 = o.coef0;
  f.scaler = o.scaler;
  f.tolerance = o.tolerance;
  f.max_iterations = o.max_iterations;
  f.cache_bytes = o.cache_bytes;
  return f;
}

struct FitArgs {
  std::string input, output;
  DetectorKeyFlags keys;
};

void RunFit(const FitArgs& a) {
  // FitOptions' defaults (a larger kernel cache than a stream's) under the flags the user gave,
  // checked by the detector table's rules; the other keys keep valid defaults.
  DetectorOptions detector = AsDetectorOptions(FitOptions{});
  a.keys.ApplyTo(detector);
  try {
    ValidateDetectorOptions(detector, "");
  } catch (const ConfigError& e) {
    throw CommandError(e.what());
  }
  const FitOptions options = AsFitOptions(detector);

  FeatureFile file = ReadFeatureFile(a.input);
  Model model = FitModel(file.values, options, file.names);
  SaveModel(model, a.output);
  const auto& t = model.parts().training;
  std::cerr << "fitted " << a.input << ": " << t.n_train << " vectors, " << model.dims()
            << " features, " << t.n_support << " support vectors (" << t.n_bounded
            << " at the bound), gamma " << model.kernel().gamma << ", rho " << model.rho() << ", "
            << t.iterations << " iterations" << (t.converged ? "" : " (NOT converged)") << ", "
            << t.seconds << " s -> " << a.output << "\n";
}

void AddFitCommand(CLI::App& app) {
  auto args = std::make_shared<FitArgs>();
  CLI::App* sub = app.add_subcommand("fit", "Fit a one-class model on a CSV file of vectors");
  sub->add_option("--input", args->input,
                  "CSV with a header row; every column is a feature except 'time' and 'stream'")
      ->required();
  sub->add_option("--output", args->output, "Model file to write")->required();
  args->keys.AddTo(sub, AsDetectorOptions(FitOptions{}), [](const Setting<DetectorOptions>& s) {
    return std::find(std::begin(kFitKeys), std::end(kFitKeys), s.name) != std::end(kFitKeys);
  });
  sub->callback([args] { RunFit(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(10, AddFitCommand);
}  // namespace nuwatch::cli
