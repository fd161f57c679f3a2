// nuwatch fit: a cold fit of a one-class model on a CSV file, written to a model file.
#include <cmath>
#include <iostream>
#include <memory>
#include <sstream>

#include "cli/cli_util.h"
#include "nuwatch/model.h"
#include "nuwatch/model_file.h"

namespace nuwatch::cli {
namespace {

struct FitArgs {
  std::string input, output;
  double nu = 0.05;
  std::string kernel = "rbf", gamma = "scale", scale = "standard";
  int degree = 3;
  double coef0 = 0, tol = 1e-3, cache_mb = 100;
  int64_t max_iter = 0;
};

void RunFit(const FitArgs& a) {
  FitOptions options;
  if (!(a.nu > 0 && a.nu <= 1)) {
    std::ostringstream m;
    m << "--nu " << a.nu << " is outside (0, 1]";
    throw CommandError(m.str());
  }
  options.nu = a.nu;
  auto kernel = ParseKernelType(a.kernel);
  if (!kernel) throw CommandError("--kernel '" + a.kernel + "' is not one of rbf, linear, poly");
  options.kernel = *kernel;
  auto gamma = GammaSpec::Parse(a.gamma);
  if (!gamma) throw CommandError("--gamma '" + a.gamma + "' is not scale, median or a number > 0");
  options.gamma = *gamma;
  auto scaler = ParseScalerType(a.scale);
  if (!scaler) throw CommandError("--scale '" + a.scale + "' is not one of standard, robust, none");
  options.scaler = *scaler;
  if (a.degree < 1) throw CommandError("--degree " + std::to_string(a.degree) + " must be >= 1");
  options.degree = a.degree;
  options.coef0 = a.coef0;
  if (!(a.tol > 0)) throw CommandError("--tol must be > 0");
  options.tolerance = a.tol;
  if (!(a.cache_mb > 0)) throw CommandError("--cache-mb must be > 0");
  options.cache_bytes = static_cast<std::size_t>(a.cache_mb * 1024 * 1024);
  if (a.max_iter < 0) throw CommandError("--max-iter must be >= 0");
  options.max_iterations = a.max_iter;

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
  sub->add_option("--nu", args->nu, "Upper bound on the training outlier fraction, in (0, 1]")
      ->capture_default_str();
  sub->add_option("--kernel", args->kernel, "rbf, linear or poly")->capture_default_str();
  sub->add_option("--gamma", args->gamma,
                  "Kernel width: scale (1/(d Var X)), median (1/median squared distance) or a "
                  "number")
      ->capture_default_str();
  sub->add_option("--degree", args->degree, "Polynomial degree")->capture_default_str();
  sub->add_option("--coef0", args->coef0, "Polynomial offset")->capture_default_str();
  sub->add_option("--scale", args->scale, "Feature scaling: standard, robust or none")
      ->capture_default_str();
  sub->add_option("--tol", args->tol, "Solver stopping tolerance (LIBSVM's rule)")
      ->capture_default_str();
  sub->add_option("--cache-mb", args->cache_mb, "Kernel-column cache, MiB")->capture_default_str();
  sub->add_option("--max-iter", args->max_iter, "Iteration cap; 0: max(10^7, 100 l)")
      ->capture_default_str();
  sub->callback([args] { RunFit(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(10, AddFitCommand);
}  // namespace nuwatch::cli
