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

// FitOptions' members are the detector keys of kFitKeys, named alike: copies them either way.
template <class From, class To>
To WithFitKeys(const From& from, To to) {
  to.nu = from.nu;
  to.kernel = from.kernel;
  to.gamma = from.gamma;
  to.degree = from.degree;
  to.coef0 = from.coef0;
  to.scaler = from.scaler;
  to.tolerance = from.tolerance;
  to.max_iterations = from.max_iterations;
  to.cache_bytes = from.cache_bytes;
  return to;
}

DetectorOptions AsDetectorOptions(const FitOptions& f) { return WithFitKeys(f, DetectorOptions{}); }
FitOptions AsFitOptions(const DetectorOptions& o) { return WithFitKeys(o, FitOptions{}); }

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
