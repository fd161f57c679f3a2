// nuwatch bench: capacity planning on synthetic data. Cold fit, warm refit after a 10% slide,
// compression to the budget, batch and single-vector scoring, bytes per model and per stream.
#include <algorithm>
#include <chrono>
#include <iostream>
#include <memory>
#include <nlohmann/json.hpp>
#include <random>

#include "cli/cli_util.h"
#include "nuwatch/budget.h"
#include "nuwatch/detector.h"
#include "nuwatch/model.h"
#include "nuwatch/sample_window.h"

namespace nuwatch::cli {
namespace {

struct BenchArgs {
  int dims = 16;
  int64_t window = 5000;
  double nu = 0.05;
  int64_t budget = 256;
  uint64_t seed = 1;
  bool json = false;
};

using Clock = std::chrono::steady_clock;
double Since(Clock::time_point t) {
  return std::chrono::duration<double>(Clock::now() - t).count();
}

// Gaussian data: the same generator the comparison script (tests/bench) writes for scikit-learn.
MatrixD SyntheticRows(int64_t rows, int dims, std::mt19937_64& generator) {
  std::normal_distribution<double> normal;
  MatrixD x(rows, dims);
  for (int64_t i = 0; i < rows; ++i)
    for (int j = 0; j < dims; ++j) x(i, j) = normal(generator);
  return x;
}

void RunBench(const BenchArgs& a) {
  if (a.dims < 1 || a.window < 10 || !(a.nu > 0 && a.nu <= 1) || a.budget < 1)
    throw CommandError("need --dims >= 1, --window >= 10, --nu in (0, 1], --budget >= 1");
  std::mt19937_64 generator(a.seed);
  const int64_t slide = std::max<int64_t>(1, a.window / 10);
  MatrixD all = SyntheticRows(a.window + slide, a.dims, generator);
  MatrixD first = all.topRows(a.window);
  MatrixD slid = all.bottomRows(a.window);

  // Cold fit on the window (scaler, gamma = scale, SMO from LIBSVM's start).
  FitOptions fit_options;
  fit_options.nu = a.nu;
  auto started = Clock::now();
  Model cold = FitModel(first, fit_options);
  const double fit_seconds = Since(started);

  // Warm refit after a 10% slide: same scaler and gamma, the old alphas mapped by sample id.
  const Scaler& scaler = cold.parts().scaler;
  const Kernel& kernel = cold.kernel();
  SolverOptions solver;
  solver.nu = a.nu;
  std::vector<uint64_t> old_ids(a.window), new_ids(a.window);
  for (int64_t i = 0; i < a.window; ++i) {
    old_ids[i] = static_cast<uint64_t>(i + 1);
    new_ids[i] = static_cast<uint64_t>(i + 1 + slide);
  }
  MatrixD z_first = scaler.Transform(first);
  WindowFit previous = FitScaled(z_first, scaler, kernel, GammaSpec{}, solver, nullptr, 1);
  started = Clock::now();
  MatrixD z_slid = scaler.Transform(slid);
  const Eigen::RowVectorXd mean = z_slid.colwise().mean();  // as the detector seeds (detector.cc)
  const VectorD priority = -(z_slid.rowwise() - mean).rowwise().squaredNorm();
  VectorD seed = MapWarmStart(old_ids, previous.solution.alpha, new_ids, a.nu, &priority);
  WindowFit warm = FitScaled(z_slid, scaler, kernel, GammaSpec{}, solver, &seed, 2);
  const double refit_seconds = Since(started);
  started = Clock::now();
  WindowFit cold_slid = FitScaled(z_slid, scaler, kernel, GammaSpec{}, solver, nullptr, 2);
  const double cold_refit_seconds = Since(started);

  // Compression to the budget, with rho recalibrated on the window.
  const ModelParts& fitted = warm.model->parts();
  started = Clock::now();
  BudgetResult compressed =
      CompressToBudget(fitted.support_vectors, fitted.coefficients, kernel, a.budget);
  ModelParts parts = fitted;
  parts.support_vectors = compressed.support_vectors;
  parts.coefficients = compressed.coefficients;
  parts.rho = 0;
  parts.rho = RecalibrateRho(Model(parts).KernelSumsScaled(z_slid), a.nu);
  const double compress_seconds = Since(started);
  Model budgeted(parts);

  // Scoring at the budget: batch throughput and single-vector latency.
  MatrixD queries = SyntheticRows(20000, a.dims, generator);
  VectorD sink = budgeted.DecisionBatch(queries.topRows(1000));  // warm the caches
  started = Clock::now();
  int batches = 0;
  do {
    sink += budgeted.DecisionBatch(queries).head(sink.size());
    ++batches;
  } while (Since(started) < 0.5);
  const double batch_rate = static_cast<double>(batches * queries.rows()) / Since(started);
  std::vector<double> latencies;
  latencies.reserve(static_cast<std::size_t>(queries.rows()));
  double single_sink = 0;
  for (int64_t i = 0; i < queries.rows(); ++i) {
    std::span<const double> x(queries.row(i).data(), a.dims);
    const auto t = Clock::now();
    single_sink += budgeted.Decision(x);
    latencies.push_back(Since(t));
  }
  std::sort(latencies.begin(), latencies.end());
  auto percentile = [&](double p) {
    return latencies[static_cast<std::size_t>(p * (latencies.size() - 1))];
  };

  // Bytes per stream: a detector holding this window and budget.
  DetectorOptions detector_options;
  detector_options.nu = a.nu;
  detector_options.window = a.window;
  detector_options.warmup = a.window;
  detector_options.refit_every = 0;
  detector_options.support_vector_budget = a.budget;
  Detector detector(detector_options, a.dims);
  for (int64_t i = 0; i < a.window; ++i)
    detector.Observe(static_cast<double>(i), std::span<const double>(first.row(i).data(), a.dims));
  const std::size_t stream_bytes = detector.MemoryBytes();
  const double stream_bytes_target = 1.5 * (static_cast<double>(a.window) * a.dims * 8 +
                                            static_cast<double>(a.budget) * a.dims * 4);

  nlohmann::ordered_json j;
  j["dims"] = a.dims;
  j["window"] = a.window;
  j["nu"] = a.nu;
  j["budget"] = a.budget;
  j["gamma"] = kernel.gamma;
  j["fit_seconds"] = fit_seconds;
  j["fit_iterations"] = cold.parts().training.iterations;
  j["support_vectors_fitted"] = cold.num_support();
  j["refit_seconds"] = refit_seconds;
  j["refit_iterations"] = warm.solution.iterations;
  j["cold_refit_seconds"] = cold_refit_seconds;
  j["warm_objective"] = warm.solution.objective;
  j["cold_objective"] = cold_slid.solution.objective;
  j["compress_seconds"] = compress_seconds;
  j["compressed_from"] = fitted.support_vectors.rows();
  j["support_vectors"] = budgeted.num_support();
  j["score_vectors_per_second"] = batch_rate;
  j["score_p50_seconds"] = percentile(0.50);
  j["score_p99_seconds"] = percentile(0.99);
  j["model_bytes"] = budgeted.MemoryBytes();
  j["stream_bytes"] = stream_bytes;
  j["stream_bytes_limit"] = stream_bytes_target;
  j["checksum"] = sink.sum() + single_sink;  // keeps the scoring loops from being optimised away
  if (a.json) {
    std::cout << j.dump(2) << "\n";
    return;
  }
  std::printf("nuwatch bench: d = %d, window = %lld, nu = %g, budget = %lld (gamma %.4g)\n", a.dims,
              static_cast<long long>(a.window), a.nu, static_cast<long long>(a.budget),
              kernel.gamma);
  std::printf("  cold fit            %10.4f s  (%lld iterations, %d support vectors)\n",
              fit_seconds, static_cast<long long>(cold.parts().training.iterations),
              cold.num_support());
  std::printf(
      "  warm refit (10%%)    %10.4f s  (%lld iterations; cold on the same window %.4f s)\n",
      refit_seconds, static_cast<long long>(warm.solution.iterations), cold_refit_seconds);
  std::printf("  compress %lld -> %d %8.4f s\n",
              static_cast<long long>(fitted.support_vectors.rows()), budgeted.num_support(),
              compress_seconds);
  std::printf("  batch scoring       %10.0f vectors/s\n", batch_rate);
  std::printf("  single vector       p50 %.2f us, p99 %.2f us\n", percentile(0.5) * 1e6,
              percentile(0.99) * 1e6);
  std::printf("  model bytes         %10zu\n", budgeted.MemoryBytes());
  std::printf("  stream bytes        %10zu  (1.5 x (window x d x 8 + budget x d x 4) = %.0f)\n",
              stream_bytes, stream_bytes_target);
}

void AddBenchCommand(CLI::App& app) {
  auto args = std::make_shared<BenchArgs>();
  CLI::App* sub = app.add_subcommand("bench", "Capacity planning on synthetic Gaussian data");
  sub->add_option("--dims", args->dims, "Features per vector")->capture_default_str();
  sub->add_option("--window", args->window, "Training window (vectors)")->capture_default_str();
  sub->add_option("--nu", args->nu, "nu")->capture_default_str();
  sub->add_option("--budget", args->budget, "Support-vector budget")->capture_default_str();
  sub->add_option("--seed", args->seed, "Seed of the synthetic data")->capture_default_str();
  sub->add_flag("--json", args->json, "Print one JSON object");
  sub->callback([args] { RunBench(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(40, AddBenchCommand);
}  // namespace nuwatch::cli
