#include "nuwatch/detector.h"

#include <atomic>
#include <chrono>
#include <sstream>

#include "budget.h"
#include "model_fit.h"
#include "nuwatch/mutex.h"

namespace nuwatch {

std::string_view StreamStateName(StreamState state) {
  return state == StreamState::kLearning ? "learning" : "scoring";
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
  MatrixD rows;
  std::vector<uint64_t> ids;
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
  report.reason = in.reason;
  report.window_vectors = in.rows.rows();
  std::shared_ptr<const Model> result;
  std::vector<uint64_t> solution_ids;
  VectorD solution_alpha;
  try {
    const DetectorOptions& o = in.options;
    Scaler scaler;
    Kernel kernel;
    MatrixD z;
    VectorD seed;
    const bool warm = in.base != nullptr;
    if (warm) {
      scaler = in.base->parts().scaler;
      kernel = in.base->kernel();
      z = scaler.Transform(in.rows);
      std::vector<uint64_t> old_ids;
      VectorD old_alpha;
      {
        MutexLock lock(&shared.mutex);
        old_ids = shared.solution_ids;
        old_alpha = shared.solution_alpha;
      }
      // The missing mass goes to the samples farthest from the window's mean first, the same
      // guess the solver's cold start makes (MapWarmStart takes the lowest value first).
      const Eigen::RowVectorXd mean = z.colwise().mean();
      const VectorD priority = -(z.rowwise() - mean).rowwise().squaredNorm();
      seed = MapWarmStart(old_ids, old_alpha, in.ids, o.nu, &priority);
    } else {
      scaler = Scaler::Fit(o.scaler, in.rows);
      z = scaler.Transform(in.rows);
      kernel.type = o.kernel;
      kernel.gamma = o.kernel == KernelType::kLinear ? 1.0 : ResolveGamma(o.gamma, z);
      kernel.degree = o.degree;
      kernel.coef0 = o.coef0;
    }
    report.warm = warm;
    SolverOptions solver;
    solver.nu = o.nu;
    solver.tolerance = o.tolerance;
    solver.cache_bytes = o.cache_bytes;
    solver.max_iterations = o.max_iterations;
    uint64_t version;
    {
      MutexLock lock(&shared.mutex);
      version = shared.next_version++;
    }
    WindowFit fit = FitScaled(z, scaler, kernel, o.gamma, solver, warm ? &seed : nullptr, version,
                              o.feature_names);
    report.iterations = fit.solution.iterations;
    report.converged = fit.solution.converged;
    report.solve_seconds = fit.solution.seconds;
    report.support_vectors_fitted = fit.model->num_support();
    result = fit.model;
    if (fit.model->num_support() > o.support_vector_budget) {
      const auto compress_started = std::chrono::steady_clock::now();
      const ModelParts& fitted = fit.model->parts();
      BudgetResult compressed = CompressToBudget(fitted.support_vectors, fitted.coefficients,
                                                 kernel, o.support_vector_budget);
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
      report.compress_seconds = parts.compression.seconds;
      report.weight_degradation = compressed.weight_degradation;
      result = std::make_shared<const Model>(std::move(parts));
    }
    report.support_vectors = result->num_support();
    report.model_version = version;
    report.ok = true;
    // Only the support vectors' alphas are kept: the rest are 0, and a warm start maps by id.
    const VectorD& alpha = fit.solution.alpha;
    solution_alpha.resize((alpha.array() > 0).count());
    for (int64_t i = 0, k = 0; i < alpha.size(); ++i) {
      if (alpha[i] > 0) {
        solution_ids.push_back(in.ids[i]);
        solution_alpha[k++] = alpha[i];
      }
    }
  } catch (const std::exception& e) {
    report.ok = false;
    report.error = e.what();
  }
  report.total_seconds = Seconds(started);
  std::function<void(const RefitReport&)> listener;
  {
    MutexLock lock(&shared.mutex);
    if (shared.generation != in.generation) {
      report.discarded = true;
    } else if (report.ok) {
      shared.solution_ids = std::move(solution_ids);
      shared.solution_alpha = std::move(solution_alpha);
      shared.model_time.store(in.time);
      shared.model.store(result);
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

}  // namespace

Detector::Detector(const DetectorOptions& options, int dims, RefitExecutor* executor)
    : options_(options),
      dims_(dims),
      executor_(executor),
      window_((CheckDetectorOptions(options, "Detector"), options.window),
              dims >= 1 ? dims
                        : throw PreconditionError("Detector: dims = " + std::to_string(dims) +
                                                  " must be >= 1"),
              options.max_age_seconds),
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
  return c;
}

void Detector::LiveCounters::Store(const DetectorCounters& c) {
  vectors.store(c.vectors, std::memory_order_relaxed);
  anomalies.store(c.anomalies, std::memory_order_relaxed);
  accepted.store(c.accepted, std::memory_order_relaxed);
  refits_started.store(c.refits_started, std::memory_order_relaxed);
  refits_coalesced.store(c.refits_coalesced, std::memory_order_relaxed);
  drift_alarms.store(c.drift_alarms, std::memory_order_relaxed);
}

void Detector::PublishOwnerBytes() {
  const std::size_t bytes = sizeof(Detector) + sizeof(Shared) + window_.MemoryBytes() +
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

Verdict Detector::Observe(double time, std::span<const double> x) {
  if (static_cast<int>(x.size()) != dims_) {
    throw PreconditionError("Detector::Observe: vector has " + std::to_string(x.size()) +
                            " values, the stream " + std::to_string(dims_));
  }
  auto text = [](double v) {
    std::ostringstream s;
    s << v;
    return s.str();
  };
  if (!std::isfinite(time))
    throw PreconditionError("Detector::Observe: time = " + text(time) + " is not finite");
  for (std::size_t j = 0; j < x.size(); ++j) {
    if (!std::isfinite(x[j])) {
      throw PreconditionError("Detector::Observe: x[" + std::to_string(j) + "] = " + text(x[j]) +
                              " is not finite");
    }
  }

  LiveCounters::Bump(counters_.vectors);
  if (options_.max_age_seconds > 0) window_.ExpireOlderThan(time);
  Verdict verdict;
  std::shared_ptr<const Model> model = shared_->model.load();
  if (!model) {
    window_.Push(time, x);
    PublishOwnerBytes();
    verdict.accepted = true;
    LiveCounters::Bump(counters_.accepted);
    if (window_.size() >= options_.warmup) PostRefit(time, RefitReason::kWarmup);
    return verdict;
  }

  verdict.state = StreamState::kScoring;
  verdict.decision = model->Decision(x);
  verdict.outlier = verdict.decision < 0;
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
  window_.Snapshot(&input->rows, &input->ids, nullptr);
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
    SampleWindow resized(next.window, dims_, next.max_age_seconds);
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

void Detector::UpdateOptions(const DetectorOptions& options) {
  CheckDetectorOptions(options, "Detector::UpdateOptions");
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
  return state;
}

void Detector::ImportState(const DetectorState& state) {
  if (state.window_rows.rows() > 0 && state.window_rows.cols() != dims_) {
    throw PreconditionError("Detector::ImportState: window has " +
                            std::to_string(state.window_rows.cols()) + " columns, the stream " +
                            std::to_string(dims_));
  }
  if (state.model && state.model->dims() != dims_) {
    throw PreconditionError("Detector::ImportState: model has " +
                            std::to_string(state.model->dims()) + " dimensions, the stream " +
                            std::to_string(dims_));
  }
  if (static_cast<int64_t>(state.solution_ids.size()) != state.solution_alpha.size()) {
    throw PreconditionError("Detector::ImportState: " + std::to_string(state.solution_ids.size()) +
                            " solution ids, " + std::to_string(state.solution_alpha.size()) +
                            " alphas");
  }
  WaitForRefit();
  // Build everything first, so a bad state leaves the detector unchanged.
  SampleWindow window(options_.window, dims_, options_.max_age_seconds);
  window.Restore(state.window_rows, state.window_ids, state.window_times, state.next_sample_id);
  IncidentTracker incidents(TrackerOptions(options_));
  incidents.ImportState(state.incidents);
  PageHinkley drift(DriftOptions(options_));
  drift.Restore(state.drift);
  window_ = std::move(window);
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
