#include "nuwatch/capacity.h"

#include <algorithm>
#include <chrono>
#include <random>
#include <span>
#include <string>
#include <vector>

#include "budget.h"
#include "model_fit.h"
#include "nuwatch/detector.h"
#include "nuwatch/model.h"
#include "nuwatch/sample_window.h"

namespace nuwatch {
namespace {

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

}  // namespace

CapacityReport MeasureCapacity(const CapacityOptions& a) {
  if (a.dims < 1 || a.window < 10 || !(a.nu > 0 && a.nu <= 1) || a.support_vector_budget < 1) {
    throw PreconditionError(
        "MeasureCapacity: need dims >= 1, window >= 10, nu in (0, 1], "
        "support_vector_budget >= 1; got dims = " +
        std::to_string(a.dims) + ", window = " + std::to_string(a.window) +
        ", nu = " + std::to_string(a.nu) +
        ", support_vector_budget = " + std::to_string(a.support_vector_budget));
  }
  CapacityReport r;
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
  r.fit_seconds = Since(started);
  r.fit_iterations = cold.parts().training.iterations;
  r.support_vectors_fitted = cold.num_support();

  // Warm refit after a 10% slide: same scaler and gamma, the old alphas mapped by sample id.
  const Scaler& scaler = cold.parts().scaler;
  const Kernel& kernel = cold.kernel();
  r.gamma = kernel.gamma;
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
  r.refit_seconds = Since(started);
  r.refit_iterations = warm.solution.iterations;
  r.warm_objective = warm.solution.objective;
  started = Clock::now();
  WindowFit cold_slid = FitScaled(z_slid, scaler, kernel, GammaSpec{}, solver, nullptr, 2);
  r.cold_refit_seconds = Since(started);
  r.cold_objective = cold_slid.solution.objective;

  // Compression to the budget, with rho recalibrated on the window.
  const ModelParts& fitted = warm.model->parts();
  started = Clock::now();
  BudgetResult compressed = CompressToBudget(fitted.support_vectors, fitted.coefficients, kernel,
                                             a.support_vector_budget);
  ModelParts parts = fitted;
  parts.support_vectors = compressed.support_vectors;
  parts.coefficients = compressed.coefficients;
  parts.rho = 0;
  parts.rho = RecalibrateRho(Model(parts).KernelSumsScaled(z_slid), a.nu);
  r.compress_seconds = Since(started);
  r.compressed_from = fitted.support_vectors.rows();
  Model budgeted(parts);
  r.support_vectors = budgeted.num_support();

  // Whole refits, as the detector runs them, with and without calibration.
  {
    std::vector<double> first_times(a.window), slid_times(a.window);
    for (int64_t i = 0; i < a.window; ++i) {
      first_times[i] = 10.0 * static_cast<double>(i);
      slid_times[i] = 10.0 * static_cast<double>(i + slide);
    }
    auto time_fits = [&](int folds, double* cold_best, double* warm_best,
                         GammaSpec gamma = GammaSpec{}) {
      DetectorOptions o;
      o.gamma = gamma;
      o.nu = a.nu;
      o.scaler = ScalerType::kStandard;
      o.window = a.window;
      o.support_vector_budget = a.support_vector_budget;
      o.calibration_folds = folds;
      *cold_best = *warm_best = 1e300;
      for (int repeat = 0; repeat < 3; ++repeat) {
        auto t = Clock::now();
        const WindowFitResult base = FitWindow(first, old_ids, first_times, o, nullptr, 1);
        *cold_best = std::min(*cold_best, Since(t));
        const WarmStart warm_start{base.model, base.solution_ids, base.solution_alpha};
        t = Clock::now();
        const WindowFitResult next = FitWindow(slid, new_ids, slid_times, o, &warm_start, 2);
        *warm_best = std::min(*warm_best, Since(t));
        r.checksum += next.model->rho();
      }
    };
    time_fits(0, &r.window_cold_fit_seconds, &r.window_refit_seconds);
    time_fits(DetectorOptions{}.calibration_folds, &r.window_cold_fit_calibrated_seconds,
              &r.window_refit_calibrated_seconds);
    double warm_min_volume = 0;  // the same as the calibrated warm refit: the width is kept
    time_fits(DetectorOptions{}.calibration_folds, &r.window_cold_fit_min_volume_seconds,
              &warm_min_volume, GammaSpec{GammaSpec::Mode::kMinVolume, 0});
  }
  r.model_bytes = budgeted.MemoryBytes();

  // Scoring at the budget: batch throughput and single-vector latency.
  MatrixD queries = SyntheticRows(20000, a.dims, generator);
  VectorD sink = budgeted.DecisionBatch(queries.topRows(1000));  // warm the caches
  started = Clock::now();
  int batches = 0;
  do {
    sink += budgeted.DecisionBatch(queries).head(sink.size());
    ++batches;
  } while (Since(started) < 0.5);
  r.score_vectors_per_second = static_cast<double>(batches * queries.rows()) / Since(started);
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
  r.score_p50_seconds = percentile(0.50);
  r.score_p99_seconds = percentile(0.99);

  // Bytes per stream: a detector holding this window and budget.
  DetectorOptions detector_options;
  detector_options.nu = a.nu;
  detector_options.window = a.window;
  detector_options.warmup = a.window;
  detector_options.refit_every = 0;
  detector_options.support_vector_budget = a.support_vector_budget;
  Detector detector(detector_options, a.dims);
  for (int64_t i = 0; i < a.window; ++i)
    detector.Observe(static_cast<double>(i), std::span<const double>(first.row(i).data(), a.dims));
  r.stream_bytes = detector.MemoryBytes();
  r.stream_bytes_limit = 1.5 * (static_cast<double>(a.window) * a.dims * 8 +
                                static_cast<double>(a.support_vector_budget) * a.dims * 4);
  r.checksum = sink.sum() + single_sink;
  return r;
}

}  // namespace nuwatch
