#include "nuwatch/detector.h"

#include <algorithm>
#include <atomic>
#include <chrono>
#include <limits>
#include <sstream>

#include "budget.h"
#include "model_fit.h"
#include "nuwatch/mutex.h"

namespace nuwatch {

std::string_view StreamStateName(StreamState state) {
  switch (state) {
    case StreamState::kLearning:
      return "learning";
    case StreamState::kScoring:
      return "scoring";
    case StreamState::kHistory:
      return "history";
  }
  return "unknown";
}

FeatureTransformOptions TransformOptions(const DetectorOptions& o) {
  FeatureTransformOptions t;
  t.lags = o.lags;
  t.rolling_windows.assign(o.rolling_windows.begin(), o.rolling_windows.end());
  t.rolling_statistics.clear();
  for (const auto& name : o.rolling_statistics) {
    const auto statistic = ParseRollingStatistic(name);
    if (!statistic) {
      throw PreconditionError("rolling_statistics: '" + name + "' is not one of mean, std, slope");
    }
    t.rolling_statistics.push_back(*statistic);
  }
  t.max_gap_seconds = o.max_gap_seconds;
  return t;
}

std::string_view RefitReasonName(RefitReason reason) {
  switch (reason) {
    case RefitReason::kWarmup:
      return "warmup";
    case RefitReason::kSchedule:
      return "schedule";
    case RefitReason::kDrift:
      return "drift";
    case RefitReason::kModelAge:
      return "model_age";
    case RefitReason::kReload:
      return "reload";
  }
  return "unknown";
}

namespace {

IncidentTrackerOptions TrackerOptions(const DetectorOptions& o) {
  return {o.open_after, o.open_window, o.close_after};
}

PageHinkleyOptions DriftOptions(const DetectorOptions& o) {
  PageHinkleyOptions p;
  p.delta = o.drift_delta;
  p.lambda = o.drift_lambda;
  p.min_samples = o.drift_min_samples;
  // A process leaving its envelope pushes decision values down; a model that has become too wide
  // (the process tightened) pushes them up. Both call for a refit.
  p.direction = DriftDirection::kBoth;
  return p;
}

// Chunks held out per calibration fold (FitWindow). One contiguous block per fold holds out a
// whole phase of a window that spans a cycle (every held-out score an extrapolation: the level too
// loose); many short chunks make every held-out score an interpolation, while fresh vectors lie
// beyond the window's end (the level too tight). Measured with false_alarm_rate 0.001 on the demo
// plant, flagged fraction outside the labelled incidents over the target (3 pumps x 3 days at
// 10 s with a one-day window; 12 pumps x 7 days at 60 s, window 1440):
//   chunks   standard, 10 s   whiten, 10 s   whiten, 60 s
//   1        0.23             -              0.55
//   2        0.25             1.04           1.45
//   4        0.74             2.2            2.5
// Tennessee Eastman (whiten, 1% budget, realised on d00_te.dat): 1.9%, 1.35%, 0.73% for 1, 2, 4.
constexpr int64_t kChunksPerFold = 2;

// The calibration folds are solved to a looser tolerance than the model they calibrate: their
// scores set a quantile, which the last digits of the optimum do not move. Measured in
// instructions (valgrind --tool=callgrind; a cold fit and a warm refit of a 2000 x 16 window,
// budget 64, 4 folds): 2.71 times an uncalibrated fit at the same tolerance, 2.60 at ten times it.
// For 3, 4 and 5 folds at ten times: 2.09, 2.60 and 3.06.
constexpr double kFoldToleranceFactor = 10;

double Seconds(std::chrono::steady_clock::time_point since) {
  return std::chrono::duration<double>(std::chrono::steady_clock::now() - since).count();
}

}  // namespace

struct Detector::Shared {
  std::atomic<std::shared_ptr<const Model>> model;
  std::atomic<double> model_time{0};
  mutable Mutex mutex;
  mutable CondVar idle{&mutex};  // signalled when in_flight becomes false
  bool in_flight GUARDED_BY(mutex) = false;
  bool refit_waiting GUARDED_BY(mutex) = false;  // a due refit waits for the in-flight one
  uint64_t generation GUARDED_BY(mutex) = 0;     // bumped by Relearn
  uint64_t next_version GUARDED_BY(mutex) = 1;
  std::vector<uint64_t> solution_ids GUARDED_BY(mutex);
  VectorD solution_alpha GUARDED_BY(mutex);
  RefitReport last_report GUARDED_BY(mutex);
  std::function<void(const RefitReport&)> listener GUARDED_BY(mutex);
};

namespace {

struct RefitInput {
  DetectorOptions options;
  // The window when the refit was posted, packed: a refit waiting in the queue holds about half
  // the bytes of the rows in doubles, which it builds only when a refit thread takes it.
  SampleWindow::Packed window;
  std::shared_ptr<const Model> base;  // null for a cold fit
  RefitReason reason;
  double time;
  uint64_t generation;
};

// The refit proper; runs on any thread and touches the detector only through `shared`.
template <typename SharedT>
void RunRefit(SharedT& shared, const RefitInput& in) {
  const auto started = std::chrono::steady_clock::now();
  RefitReport report;
  WindowFitResult fit;
  try {
    uint64_t version;
    WarmStart warm;
    {
      MutexLock lock(&shared.mutex);
      version = shared.next_version++;
      if (in.base) {
        warm.ids = shared.solution_ids;
        warm.alpha = shared.solution_alpha;
      }
    }
    warm.base = in.base;
    MatrixD rows;
    std::vector<uint64_t> ids;
    in.window.Unpack(&rows, &ids);
    fit = FitWindow(rows, ids, in.window.times, in.options, in.base ? &warm : nullptr, version);
    report = fit.report;
  } catch (const std::exception& e) {
    report.ok = false;
    report.error = e.what();
  }
  report.reason = in.reason;
  report.window_vectors = in.window.rows();
  report.total_seconds = Seconds(started);
  std::function<void(const RefitReport&)> listener;
  {
    MutexLock lock(&shared.mutex);
    if (shared.generation != in.generation) {
      report.discarded = true;
    } else if (report.ok) {
      shared.solution_ids = std::move(fit.solution_ids);
      shared.solution_alpha = std::move(fit.solution_alpha);
      shared.model_time.store(in.time);
      shared.model.store(fit.model);
    }
    shared.last_report = report;
    listener = shared.listener;
  }
  if (listener) listener(report);
  {
    MutexLock lock(&shared.mutex);
    shared.in_flight = false;
  }
  shared.idle.SignalAll();
}

// One model on the rows: the scaler and kernel from the rows or frozen from `frozen`, the solver
// (seeded from the solution given by id, if any), and compression to the budget (skipped for the
// calibration folds: compression moves the kernel sum, which the nonconformity is, by no more than
// the weight degradation it minimises; measured on the demo plant at a one-day window, 432
// support vectors compressed to 256, the flags with and without compressing the folds were the
// same, and a refit took 27% less time).
struct SingleFit {
  std::shared_ptr<const Model> model;
  SolverResult solution;
  int64_t support_vectors_fitted = 0;
  double weight_degradation = 0;
  double compress_seconds = 0;
};

SingleFit FitOnce(const MatrixD& rows, const std::vector<uint64_t>& ids, const DetectorOptions& o,
                  const Model* frozen, const std::vector<uint64_t>* seed_ids,
                  const VectorD* seed_alpha, uint64_t version, bool compress = true) {
  Scaler scaler;
  Kernel kernel;
  GammaSpec gamma_spec = o.gamma;
  if (frozen != nullptr) {
    scaler = frozen->parts().scaler;
    kernel = frozen->kernel();
    gamma_spec = frozen->parts().gamma_spec;
  } else {
    scaler = Scaler::Fit(o.scaler, rows);
  }
  const MatrixD z = scaler.Transform(rows);
  if (frozen == nullptr) {
    kernel.type = o.kernel;
    kernel.gamma = o.kernel == KernelType::kLinear ? 1.0 : ResolveGamma(o.gamma, z);
    kernel.degree = o.degree;
    kernel.coef0 = o.coef0;
  }
  VectorD seed;
  if (seed_ids != nullptr && seed_alpha != nullptr && !seed_ids->empty()) {
    // The missing mass goes to the samples farthest from the window's mean first, the same guess
    // the solver's cold start makes (MapWarmStart takes the lowest value first).
    const Eigen::RowVectorXd mean = z.colwise().mean();
    const VectorD priority = -(z.rowwise() - mean).rowwise().squaredNorm();
    seed = MapWarmStart(*seed_ids, *seed_alpha, ids, o.nu, &priority);
  }
  SolverOptions solver;
  solver.nu = o.nu;
  solver.tolerance = o.tolerance;
  solver.cache_bytes = o.cache_bytes;
  solver.max_iterations = o.max_iterations;
  WindowFit fit = FitScaled(z, scaler, kernel, gamma_spec, solver, seed.size() ? &seed : nullptr,
                            version, o.feature_names);
  SingleFit out;
  out.support_vectors_fitted = fit.model->num_support();
  out.model = fit.model;
  out.solution = std::move(fit.solution);
  if (compress && fit.model->num_support() > o.support_vector_budget) {
    const auto compress_started = std::chrono::steady_clock::now();
    const ModelParts& fitted = fit.model->parts();
    BudgetResult compressed = CompressToBudget(fitted.support_vectors, fitted.coefficients, kernel,
                                               o.support_vector_budget);
    ModelParts parts = fitted;
    parts.support_vectors = std::move(compressed.support_vectors);
    parts.coefficients = std::move(compressed.coefficients);
    // The old rho belongs to the uncompressed weight vector; recalibrate on the window so that
    // the window's outlier fraction is nu again (methods.md).
    parts.rho = 0;
    Model unshifted(parts);
    parts.rho = RecalibrateRho(unshifted.KernelSumsScaled(z), o.nu);
    parts.compression.support_vectors_before = fitted.support_vectors.rows();
    parts.compression.support_vectors_after = parts.support_vectors.rows();
    parts.compression.weight_degradation = compressed.weight_degradation;
    parts.compression.rho_before = fitted.rho;
    parts.compression.seconds = Seconds(compress_started);
    out.compress_seconds = parts.compression.seconds;
    out.weight_degradation = compressed.weight_degradation;
    out.model = std::make_shared<const Model>(std::move(parts));
  }
  return out;
}

// FitWindow for one kernel width (the options' gamma, or the warm base's): the fit, compression
// and calibration by cross-fitting. Requires what FitWindow checks.
WindowFitResult FitCalibrated(const MatrixD& rows, const std::vector<uint64_t>& ids,
                              std::span<const double> times, const DetectorOptions& o,
                              const WarmStart* warm, uint64_t version) {
  const int64_t n = rows.rows();
  WindowFitResult result;
  RefitReport& report = result.report;
  const Model* frozen = warm != nullptr ? warm->base.get() : nullptr;
  DetectorOptions named = o;  // the model names the transformed columns
  const FeatureTransformOptions transform = TransformOptions(o);
  if (!o.feature_names.empty()) {
    const FeatureTransform names(transform, static_cast<int>(o.feature_names.size()));
    if (names.output_dims() != rows.cols()) {
      throw PreconditionError("FitWindow: " + std::to_string(o.feature_names.size()) +
                              " feature names give " + std::to_string(names.output_dims()) +
                              " transformed columns, the rows have " + std::to_string(rows.cols()));
    }
    named.feature_names = names.OutputNames(o.feature_names);
  }
  SingleFit full = FitOnce(rows, ids, named, frozen, warm ? &warm->ids : nullptr,
                           warm ? &warm->alpha : nullptr, version);
  report.warm = frozen != nullptr;
  report.iterations = full.solution.iterations;
  report.converged = full.solution.converged;
  report.solve_seconds = full.solution.seconds;
  report.support_vectors_fitted = full.support_vectors_fitted;
  report.compress_seconds = full.compress_seconds;
  report.weight_degradation = full.weight_degradation;
  // Only the support vectors' alphas are kept: the rest are 0, and a warm start maps by id.
  const VectorD& alpha = full.solution.alpha;
  result.solution_alpha.resize((alpha.array() > 0).count());
  for (int64_t i = 0, k = 0; i < alpha.size(); ++i) {
    if (alpha[i] > 0) {
      result.solution_ids.push_back(ids[i]);
      result.solution_alpha[k++] = alpha[i];
    }
  }
  // Stable wording (no figures): callers log each distinct warning once per stream.
  if (full.solution.bounded_support_vectors == 0 && o.nu < 1) {
    report.warnings.push_back(
        "nu does not bind: no support vector is at the bound, so the window's outlier fraction is "
        "below nu (the kernel width hugs the data); the calibrated level, not nu, sets the alarm "
        "rate");
  }
  if (o.nu * static_cast<double>(n) < 10) {
    report.warnings.push_back(
        "nu x window is below 10: the envelope rests on a handful of support vectors, and the "
        "models fitted for calibration differ from it enough that the realised false-alarm rate "
        "scatters");
  }

  const int folds = static_cast<int>(std::min<int64_t>(o.calibration_folds, n / 2));
  if (o.calibration_folds >= 2 && folds < 2) {
    report.warnings.push_back(
        "calibration skipped: the window holds too few vectors for two per fold; flagging "
        "decision < 0 until it does");
  }
  if (folds >= 2) {
    const auto calibration_started = std::chrono::steady_clock::now();
    std::vector<double> scores(static_cast<std::size_t>(n));
    // Each fold holds out kChunksPerFold separate contiguous chunks, spread over the window, so
    // that a window spanning a daily cycle does not hold out a whole phase of it (which would
    // make every held-out score an extrapolation, and the level needlessly loose), while each
    // chunk is long enough that its vectors' neighbours are held out with them.
    const int64_t chunks = std::max<int64_t>(1, std::min<int64_t>(kChunksPerFold, n / (2 * folds)));
    const int64_t blocks = folds * chunks;
    DetectorOptions fold_options = named;
    fold_options.tolerance = named.tolerance * kFoldToleranceFactor;
    auto fold_of = [&](int64_t i) { return static_cast<int>((i * blocks / n) % folds); };
    for (int k = 0; k < folds; ++k) {
      std::vector<int64_t> held, kept;
      for (int64_t i = 0; i < n; ++i) (fold_of(i) == k ? held : kept).push_back(i);
      MatrixD train(static_cast<int64_t>(kept.size()), rows.cols());
      MatrixD test(static_cast<int64_t>(held.size()), rows.cols());
      std::vector<uint64_t> train_ids;
      train_ids.reserve(kept.size());
      for (std::size_t r = 0; r < kept.size(); ++r) {
        train.row(static_cast<int64_t>(r)) = rows.row(kept[r]);
        train_ids.push_back(ids[kept[r]]);
      }
      for (std::size_t r = 0; r < held.size(); ++r)
        test.row(static_cast<int64_t>(r)) = rows.row(held[r]);
      SingleFit fold = FitOnce(train, train_ids, fold_options, frozen, &result.solution_ids,
                               &result.solution_alpha, version, /*compress=*/false);
      VectorD nonconformity;
      fold.model->EvaluateBatch(test, nullptr, &nonconformity);
      for (std::size_t r = 0; r < held.size(); ++r)
        scores[held[r]] = nonconformity[static_cast<int64_t>(r)];
    }
    CalibrationOptions c;
    c.false_alarm_rate = o.false_alarm_rate;
    c.false_incidents_per_day = o.false_incidents_per_day;
    c.debounce = {o.open_after, o.open_window, o.close_after};
    Calibration calibration = Calibration::Fit(scores, times, c);
    for (const auto& w : calibration.summary().warnings) report.warnings.push_back(w);
    report.alarm_level = calibration.level();
    ModelParts parts = full.model->parts();
    parts.calibration = std::move(calibration);
    full.model = std::make_shared<const Model>(std::move(parts));
    report.calibration_seconds = Seconds(calibration_started);
  }
  // A warm refit keeps the width the cold fit chose, and with it the table it was chosen by.
  const bool keep_table = frozen != nullptr && !frozen->parts().gamma_candidates.empty();
  if (!transform.identity() || keep_table) {
    ModelParts parts = full.model->parts();
    parts.transform = transform;
    if (keep_table) parts.gamma_candidates = frozen->parts().gamma_candidates;
    full.model = std::make_shared<const Model>(std::move(parts));
  }
  result.model = full.model;
  report.support_vectors = result.model->num_support();
  report.model_version = version;
  report.ok = true;
  return result;
}

// The minimum-volume choice of the width (kernel_width.h): every candidate through
// FitCalibrated, each calibrated region measured on the same importance sample, the least kept.
WindowFitResult FitMinVolume(const MatrixD& rows, const std::vector<uint64_t>& ids,
                             std::span<const double> times, const DetectorOptions& o,
                             uint64_t version) {
  const auto started = std::chrono::steady_clock::now();
  DetectorOptions candidate = o;
  candidate.gamma.mode = GammaSpec::Mode::kScale;
  if (std::min<int64_t>(o.calibration_folds, rows.rows() / 2) < 2) {
    WindowFitResult fallback = FitCalibrated(rows, ids, times, candidate, nullptr, version);
    fallback.report.warnings.push_back(
        "gamma = min_volume used scale: the window is too short to calibrate, and the criterion "
        "compares calibrated envelopes");
    return fallback;
  }
  // The candidates' models live in the space of this scaler (each fit refits the same one).
  const Scaler scaler = Scaler::Fit(o.scaler, rows);
  const MatrixD z = scaler.Transform(rows);
  const VectorD center = z.colwise().mean().transpose();
  const MatrixD centered = z.rowwise() - center.transpose();
  const MatrixD covariance =
      (centered.transpose() * centered) / static_cast<double>(std::max<int64_t>(1, z.rows() - 1));
  const ImportanceSample sample = DrawImportanceSample(center, covariance, VolumeSampling{});

  std::vector<GammaCandidate> table;
  WindowFitResult best;
  double best_log_volume = std::numeric_limits<double>::infinity();
  double best_effective_samples = 0;
  for (const double gamma : MinVolumeGammaGrid(ResolveGamma(GammaSpec{}, z))) {
    candidate.gamma.mode = GammaSpec::Mode::kValue;
    candidate.gamma.value = gamma;
    WindowFitResult fit = FitCalibrated(rows, ids, times, candidate, nullptr, version);
    GammaCandidate row;
    row.gamma = gamma;
    row.log_volume = std::numeric_limits<double>::infinity();  // no finite threshold: unbounded
    if (std::isfinite(fit.model->parts().calibration.Threshold())) {
      const VolumeEstimate volume =
          EstimateVolume(sample, InsideAcceptanceRegion(*fit.model, sample.points));
      row.log_volume = volume.log_volume;
      row.standard_error = volume.standard_error;
      row.effective_samples = volume.effective_samples;
    }
    table.push_back(row);
    if (!best.model || row.log_volume < best_log_volume) {
      best = std::move(fit);
      best_log_volume = row.log_volume;
      best_effective_samples = row.effective_samples;
    }
  }
  if (best_effective_samples < 10) {
    best.report.warnings.push_back(
        "gamma = min_volume: the volume of the chosen envelope rests on fewer than 10 effective "
        "importance samples, so the choice of width is uncertain");
  }
  ModelParts parts = best.model->parts();
  parts.gamma_spec = o.gamma;
  parts.gamma_candidates = std::move(table);
  best.model = std::make_shared<const Model>(std::move(parts));
  best.report.width_selection_seconds = Seconds(started);
  return best;
}

}  // namespace

WindowFitResult FitWindow(const MatrixD& rows, const std::vector<uint64_t>& ids,
                          std::span<const double> times, const DetectorOptions& o,
                          const WarmStart* warm, uint64_t version) {
  CheckDetectorOptions(o, "FitWindow");
  const int64_t n = rows.rows();
  if (n < 2 || static_cast<int64_t>(ids.size()) != n ||
      (!times.empty() && static_cast<int64_t>(times.size()) != n)) {
    throw PreconditionError("FitWindow: " + std::to_string(n) + " rows, " +
                            std::to_string(ids.size()) + " ids, " + std::to_string(times.size()) +
                            " times (need at least 2 rows and as many ids, and times if any)");
  }
  const bool cold = warm == nullptr || warm->base == nullptr;
  if (cold && o.gamma.mode == GammaSpec::Mode::kMinVolume)
    return FitMinVolume(rows, ids, times, o, version);
  return FitCalibrated(rows, ids, times, o, warm, version);
}

Detector::Detector(const DetectorOptions& options, int dims, RefitExecutor* executor)
    : options_(options),
      dims_(dims),
      executor_(executor),
      transform_((CheckDetectorOptions(options, "Detector"), TransformOptions(options)),
                 dims >= 1 ? dims
                           : throw PreconditionError("Detector: dims = " + std::to_string(dims) +
                                                     " must be >= 1")),
      transformed_(static_cast<std::size_t>(transform_.output_dims())),
      last_scored_(static_cast<std::size_t>(transform_.output_dims())),
      window_(options.window, transform_.output_dims(), options.max_age_seconds),
      incidents_(TrackerOptions(options)),
      drift_(DriftOptions(options)),
      shared_(std::make_shared<Shared>()) {
  PublishOwnerBytes();
}

Detector::~Detector() { WaitForRefit(); }

void Detector::WaitForRefit() const {
  MutexLock lock(&shared_->mutex);
  while (shared_->in_flight) shared_->idle.Wait();
}

DetectorCounters Detector::LiveCounters::Load() const {
  DetectorCounters c;
  c.vectors = vectors.load(std::memory_order_relaxed);
  c.anomalies = anomalies.load(std::memory_order_relaxed);
  c.accepted = accepted.load(std::memory_order_relaxed);
  c.refits_started = refits_started.load(std::memory_order_relaxed);
  c.refits_coalesced = refits_coalesced.load(std::memory_order_relaxed);
  c.drift_alarms = drift_alarms.load(std::memory_order_relaxed);
  c.history_vectors = history_vectors.load(std::memory_order_relaxed);
  c.history_resets = history_resets.load(std::memory_order_relaxed);
  return c;
}

void Detector::LiveCounters::Store(const DetectorCounters& c) {
  vectors.store(c.vectors, std::memory_order_relaxed);
  anomalies.store(c.anomalies, std::memory_order_relaxed);
  accepted.store(c.accepted, std::memory_order_relaxed);
  refits_started.store(c.refits_started, std::memory_order_relaxed);
  refits_coalesced.store(c.refits_coalesced, std::memory_order_relaxed);
  drift_alarms.store(c.drift_alarms, std::memory_order_relaxed);
  history_vectors.store(c.history_vectors, std::memory_order_relaxed);
  history_resets.store(c.history_resets, std::memory_order_relaxed);
}

void Detector::PublishOwnerBytes() {
  const std::size_t bytes = sizeof(Detector) + sizeof(Shared) + window_.MemoryBytes() +
                            transform_.MemoryBytes() +
                            (transformed_.capacity() + last_scored_.capacity()) * sizeof(double) +
                            static_cast<std::size_t>(options_.open_window) * 24;
  owner_bytes_.store(bytes, std::memory_order_relaxed);
}

void Detector::set_refit_listener(std::function<void(const RefitReport&)> listener) {
  MutexLock lock(&shared_->mutex);
  shared_->listener = std::move(listener);
}

std::shared_ptr<const Model> Detector::model() const { return shared_->model.load(); }

StreamState Detector::state() const {
  return model() ? StreamState::kScoring : StreamState::kLearning;
}

RefitReport Detector::last_refit() const {
  MutexLock lock(&shared_->mutex);
  return shared_->last_report;
}

double Detector::model_time() const { return shared_->model_time.load(); }

void Detector::CheckVector(double time, std::span<const double> x, const char* caller,
                           int64_t row) const {
  // Built only on the way to a throw: Observe allocates nothing in the steady state.
  auto where = [&] {
    return std::string(caller) + (row >= 0 ? ": row " + std::to_string(row) + ":" : ":");
  };
  if (static_cast<int>(x.size()) != dims_) {
    throw PreconditionError(where() + " vector has " + std::to_string(x.size()) +
                            " values, the stream " + std::to_string(dims_));
  }
  auto text = [](double v) {
    std::ostringstream s;
    s << v;
    return s.str();
  };
  if (!std::isfinite(time))
    throw PreconditionError(where() + " time = " + text(time) + " is not finite");
  for (std::size_t j = 0; j < x.size(); ++j) {
    if (!std::isfinite(x[j])) {
      throw PreconditionError(where() + " x[" + std::to_string(j) + "] = " + text(x[j]) +
                              " is not finite");
    }
  }
}

Verdict Detector::HistoryVerdict() {
  LiveCounters::Bump(counters_.history_vectors);
  Verdict verdict;
  verdict.state = StreamState::kHistory;
  if (const auto open = incidents_.open_incident()) verdict.incident_id = open->id;
  return verdict;
}

Verdict Detector::Observe(double time, std::span<const double> x) {
  CheckVector(time, x, "Detector::Observe", -1);
  LiveCounters::Bump(counters_.vectors);
  if (options_.max_age_seconds > 0) window_.ExpireOlderThan(time);
  if (transform_.history_needed() == 0) return ObserveTransformed(time, x);
  const bool ready = transform_.Push(time, x, transformed_);
  if (transform_.last_push_reset() != HistoryReset::kNone)
    LiveCounters::Bump(counters_.history_resets);
  if (!ready) return HistoryVerdict();
  return ObserveTransformed(time, transformed_);
}

Verdict Detector::ObserveTransformed(double time, std::span<const double> x) {
  Verdict verdict;
  std::shared_ptr<const Model> model = shared_->model.load();
  if (!model) {
    window_.Push(time, x);
    PublishOwnerBytes();
    verdict.accepted = true;
    LiveCounters::Bump(counters_.accepted);
    if (window_.size() >= EffectiveWarmup(options_)) PostRefit(time, RefitReason::kWarmup);
    return verdict;
  }

  return ObserveScored(time, x, *model, model->Evaluate(x));
}

void Detector::ObserveBatch(std::span<const double> times, const Eigen::Ref<const MatrixD>& rows,
                            std::vector<Verdict>* verdicts) {
  const int64_t n = rows.rows();
  if (static_cast<int64_t>(times.size()) != n) {
    throw PreconditionError("Detector::ObserveBatch: " + std::to_string(times.size()) +
                            " times for " + std::to_string(n) + " rows");
  }
  if (n > 0 && rows.cols() != dims_) {
    throw PreconditionError("Detector::ObserveBatch: rows have " + std::to_string(rows.cols()) +
                            " values, the stream " + std::to_string(dims_));
  }
  for (int64_t i = 0; i < n; ++i)
    CheckVector(times[i], std::span<const double>(rows.row(i).data(), dims_),
                "Detector::ObserveBatch", i);
  verdicts->resize(static_cast<std::size_t>(n));
  batch_scored_row_.assign(static_cast<std::size_t>(n), -1);
  batch_model_ = shared_->model.load();
  if (!batch_model_) {
    // Learning: the warm-up fit may install a model within the batch (inline executor), and the
    // rows after it are then scored by it, as Observe would.
    for (int64_t i = 0; i < n; ++i)
      (*verdicts)[i] = Observe(times[i], std::span<const double>(rows.row(i).data(), dims_));
    return;
  }
  // The transform depends on the rows alone, so it runs first; the window, the incidents and the
  // refit schedule then advance row by row in order, as Observe does.
  const int features = transform_.output_dims();
  if (batch_z_.rows() < n || batch_z_.cols() != features) batch_z_.resize(n, features);
  std::vector<char> ready(static_cast<std::size_t>(n), 1);
  int64_t scored = 0;
  for (int64_t i = 0; i < n; ++i) {
    const std::span<const double> x(rows.row(i).data(), dims_);
    if (transform_.history_needed() == 0) {
      batch_z_.row(scored) = rows.row(i);
    } else {
      ready[i] = transform_.Push(times[i], x, transformed_) ? 1 : 0;
      if (transform_.last_push_reset() != HistoryReset::kNone)
        LiveCounters::Bump(counters_.history_resets);
      if (!ready[i]) continue;
      batch_z_.row(scored) = Eigen::Map<const Eigen::RowVectorXd>(transformed_.data(), features);
    }
    batch_scored_row_[i] = scored++;
  }
  VectorD decisions, nonconformity;
  if (scored > 0) batch_model_->EvaluateBatch(batch_z_.topRows(scored), &decisions, &nonconformity);
  for (int64_t i = 0; i < n; ++i) {
    LiveCounters::Bump(counters_.vectors);
    if (options_.max_age_seconds > 0) window_.ExpireOlderThan(times[i]);
    Verdict& verdict = (*verdicts)[i];
    if (!ready[i]) {
      verdict = HistoryVerdict();
      continue;
    }
    const int64_t k = batch_scored_row_[i];
    Score score;
    score.decision = decisions[k];
    score.nonconformity = nonconformity[k];
    verdict = ObserveScored(times[i], std::span<const double>(&batch_z_(k, 0), features),
                            *batch_model_, score);
  }
}

std::vector<FeatureShare> Detector::ExplainBatchRow(std::size_t i, int top_k) const {
  if (i >= batch_scored_row_.size() || batch_scored_row_[i] < 0 || !batch_model_) return {};
  const int64_t k = batch_scored_row_[i];
  return batch_model_->Explain(std::span<const double>(&batch_z_(k, 0), batch_z_.cols()), top_k);
}

Verdict Detector::ObserveScored(double time, std::span<const double> x, const Model& model_ref,
                                const Score& score) {
  const Model* model = &model_ref;
  Verdict verdict;
  verdict.state = StreamState::kScoring;
  std::copy(x.begin(), x.end(), last_scored_.begin());
  has_last_scored_ = true;
  verdict.decision = score.decision;
  verdict.p_value = model->PValue(score);
  verdict.outlier = model->Flagged(score, verdict.p_value);
  verdict.model_version = model->version();
  verdict.support_vectors = model->num_support();
  if (verdict.outlier) LiveCounters::Bump(counters_.anomalies);
  verdict.transition = incidents_.Update(time, verdict.outlier, verdict.decision);
  const auto open = incidents_.open_incident();
  verdict.incident_id = open ? open->id : 0;

  if (options_.learn_from_anomalies || !verdict.outlier || !open) {
    window_.Push(time, x);
    PublishOwnerBytes();
    verdict.accepted = true;
    LiveCounters::Bump(counters_.accepted);
    ++accepted_since_refit_;
  }
  bool drift_alarm = false;
  if (options_.drift_detection && drift_.Update(verdict.decision)) {
    drift_alarm = true;
    LiveCounters::Bump(counters_.drift_alarms);
    drift_.Reset();
  }
  if (RefitDue(time, drift_alarm)) {
    RefitReason reason = RefitReason::kSchedule;
    if (drift_alarm || drift_pending_)
      reason = RefitReason::kDrift;
    else if (options_.max_model_age_seconds > 0 &&
             time - shared_->model_time.load() >= options_.max_model_age_seconds)
      reason = RefitReason::kModelAge;
    if (pending_options_) reason = RefitReason::kReload;
    PostRefit(time, reason);
  }
  return verdict;
}

bool Detector::RefitDue(double time, bool drift_alarm) const {
  if (drift_alarm || drift_pending_ || pending_options_) return true;
  if (options_.refit_every > 0 && accepted_since_refit_ >= options_.refit_every) return true;
  return options_.max_model_age_seconds > 0 &&
         time - shared_->model_time.load() >= options_.max_model_age_seconds;
}

void Detector::PostRefit(double time, RefitReason reason) {
  {
    MutexLock lock(&shared_->mutex);
    // Observe found no model, but the warm-up fit may have installed one since (it stores the
    // model under this mutex before it clears in_flight): a second warm-up fit would be a refit
    // that refit_every = 0 rules out.
    if (reason == RefitReason::kWarmup && shared_->model.load()) return;
    if (shared_->in_flight) {
      // The due refit stays due and is posted once the in-flight one is done: count it once, not
      // once per vector observed while it waits.
      if (reason != RefitReason::kWarmup && !shared_->refit_waiting)
        LiveCounters::Bump(counters_.refits_coalesced);
      if (reason != RefitReason::kWarmup) shared_->refit_waiting = true;
      if (reason == RefitReason::kDrift) drift_pending_ = true;
      return;
    }
    shared_->in_flight = true;
    shared_->refit_waiting = false;
  }
  ApplyPendingOptions();
  auto input = std::make_shared<RefitInput>();
  input->options = options_;
  window_.Pack(&input->window);
  const bool cold = force_cold_ || reason == RefitReason::kWarmup ||
                    refits_since_cold_ + 1 >= options_.cold_refit_every || !model();
  input->base = cold ? nullptr : model();
  input->reason = reason;
  input->time = time;
  {
    MutexLock lock(&shared_->mutex);
    input->generation = shared_->generation;
  }
  refits_since_cold_ = cold ? 0 : refits_since_cold_ + 1;
  force_cold_ = false;
  accepted_since_refit_ = 0;
  drift_pending_ = false;
  LiveCounters::Bump(counters_.refits_started);
  auto job = [shared = shared_, input] { RunRefit(*shared, *input); };
  if (executor_ == nullptr) {
    job();
  } else {
    executor_->Post(std::move(job));
  }
}

void Detector::ApplyPendingOptions() {
  if (!pending_options_) return;
  DetectorOptions next = std::move(*pending_options_);
  pending_options_.reset();
  const DetectorOptions& old = options_;
  if (next.nu != old.nu || next.kernel != old.kernel || next.gamma.mode != old.gamma.mode ||
      next.gamma.value != old.gamma.value || next.scaler != old.scaler ||
      next.degree != old.degree || next.coef0 != old.coef0) {
    force_cold_ = true;  // a different problem: the last solution is no warm start for it
  }
  if (next.window != old.window || next.max_age_seconds != old.max_age_seconds) {
    MatrixD rows;
    std::vector<uint64_t> ids;
    std::vector<double> times;
    window_.Snapshot(&rows, &ids, &times);
    SampleWindow resized(next.window, transform_.output_dims(), next.max_age_seconds);
    resized.Restore(rows, ids, times, window_.next_id());
    window_ = std::move(resized);
  }
  if (next.open_after != old.open_after || next.open_window != old.open_window ||
      next.close_after != old.close_after) {
    IncidentTrackerState state = incidents_.ExportState();
    incidents_ = IncidentTracker(TrackerOptions(next));
    incidents_.ImportState(state);
  }
  if (next.drift_delta != old.drift_delta || next.drift_lambda != old.drift_lambda ||
      next.drift_min_samples != old.drift_min_samples) {
    drift_ = PageHinkley(DriftOptions(next));
  }
  options_ = std::move(next);
  PublishOwnerBytes();
}

std::vector<FeatureShare> Detector::ExplainLast(int top_k) const {
  const std::shared_ptr<const Model> m = model();
  if (!has_last_scored_ || !m || m->dims() != static_cast<int>(last_scored_.size())) return {};
  return m->Explain(last_scored_, top_k);
}

void Detector::UpdateOptions(const DetectorOptions& options) {
  CheckDetectorOptions(options, "Detector::UpdateOptions");
  const FeatureTransformOptions transform = TransformOptions(options);
  if (!(transform == transform_.options())) {
    // Another feature space: nothing learned so far applies to it.
    FeatureTransform next(transform, dims_);
    transformed_.assign(static_cast<std::size_t>(next.output_dims()), 0.0);
    last_scored_.assign(static_cast<std::size_t>(next.output_dims()), 0.0);
    has_last_scored_ = false;
    window_ = SampleWindow(options.window, next.output_dims(), options.max_age_seconds);
    transform_ = std::move(next);
    pending_options_.reset();
    options_ = options;
    incidents_ = IncidentTracker(TrackerOptions(options_));
    drift_ = PageHinkley(DriftOptions(options_));
    Relearn();
    return;
  }
  pending_options_ = options;
  if (!model()) ApplyPendingOptions();  // nothing to refit yet: take them now
}

void Detector::Relearn() {
  {
    MutexLock lock(&shared_->mutex);
    ++shared_->generation;
    shared_->solution_ids.clear();
    shared_->solution_alpha.resize(0);
    shared_->model.store(nullptr);
  }
  window_.Clear();
  const uint64_t next_id = incidents_.next_id();
  incidents_ = IncidentTracker(TrackerOptions(options_));
  incidents_.set_next_id(next_id);
  drift_.Reset();
  accepted_since_refit_ = 0;
  refits_since_cold_ = 0;
  drift_pending_ = false;
  PublishOwnerBytes();
}

std::size_t Detector::MemoryBytes() const {
  std::size_t bytes = owner_bytes_.load(std::memory_order_relaxed);
  if (auto m = model()) bytes += m->MemoryBytes();
  MutexLock lock(&shared_->mutex);
  bytes += shared_->solution_ids.capacity() * sizeof(uint64_t) +
           static_cast<std::size_t>(shared_->solution_alpha.size()) * sizeof(double);
  return bytes;
}

DetectorState Detector::ExportState() const {
  WaitForRefit();
  DetectorState state;
  window_.Snapshot(&state.window_rows, &state.window_ids, &state.window_times);
  state.next_sample_id = window_.next_id();
  state.model = model();
  {
    MutexLock lock(&shared_->mutex);
    state.solution_ids = shared_->solution_ids;
    state.solution_alpha = shared_->solution_alpha;
  }
  state.incidents = incidents_.ExportState();
  state.drift = drift_.state();
  state.accepted_since_refit = accepted_since_refit_;
  state.refits_since_cold = refits_since_cold_;
  state.model_time = shared_->model_time.load();
  state.counters = counters_.Load();
  state.transform = transform_.ExportState();
  return state;
}

void Detector::ImportState(const DetectorState& state) {
  const int features = transform_.output_dims();
  if (state.window_rows.rows() > 0 && state.window_rows.cols() != features) {
    throw PreconditionError("Detector::ImportState: window has " +
                            std::to_string(state.window_rows.cols()) + " columns, the stream " +
                            std::to_string(features));
  }
  if (state.model && state.model->dims() != features) {
    throw PreconditionError("Detector::ImportState: model has " +
                            std::to_string(state.model->dims()) + " dimensions, the stream " +
                            std::to_string(features));
  }
  if (state.model && !(state.model->parts().transform == transform_.options())) {
    throw PreconditionError(
        "Detector::ImportState: the model was fitted with other transform settings (lags, "
        "rolling_windows, rolling_statistics, max_gap_seconds) than the stream's");
  }
  if (static_cast<int64_t>(state.solution_ids.size()) != state.solution_alpha.size()) {
    throw PreconditionError("Detector::ImportState: " + std::to_string(state.solution_ids.size()) +
                            " solution ids, " + std::to_string(state.solution_alpha.size()) +
                            " alphas");
  }
  WaitForRefit();
  // Build everything first, so a bad state leaves the detector unchanged.
  SampleWindow window(options_.window, features, options_.max_age_seconds);
  window.Restore(state.window_rows, state.window_ids, state.window_times, state.next_sample_id);
  FeatureTransform transform(transform_.options(), dims_);
  transform.ImportState(state.transform);
  IncidentTracker incidents(TrackerOptions(options_));
  incidents.ImportState(state.incidents);
  PageHinkley drift(DriftOptions(options_));
  drift.Restore(state.drift);
  window_ = std::move(window);
  transform_ = std::move(transform);
  incidents_ = std::move(incidents);
  drift_ = std::move(drift);
  accepted_since_refit_ = state.accepted_since_refit;
  refits_since_cold_ = state.refits_since_cold;
  counters_.Store(state.counters);
  PublishOwnerBytes();
  MutexLock lock(&shared_->mutex);
  ++shared_->generation;
  shared_->solution_ids = state.solution_ids;
  shared_->solution_alpha = state.solution_alpha;
  shared_->model_time.store(state.model_time);
  shared_->model.store(state.model);
  if (state.model)
    shared_->next_version = std::max(shared_->next_version, state.model->version() + 1);
}

}  // namespace nuwatch
