// One stream's online detector: warm-up, scoring with the current model, the contamination guard,
// the refit policy, the support-vector budget and the debounced incident state.
//
// Refits run inline (no executor: deterministic replay, the refit happens inside the Observe call
// that makes it due) or on a RefitExecutor (the daemon's pool), in which case the new model is
// swapped in atomically when it is ready and scoring never waits for it. A refit that is due while
// another is still running is coalesced: at most one refit per stream is in flight.
//
// Refit schedule: the first fit after `warmup` vectors is cold (scaler and gamma estimated on the
// window). Then a refit every `refit_every` accepted vectors, on a Page-Hinkley drift alarm on the
// decision values (if enabled) and when the model is older than `max_model_age_seconds` (data
// time). Every `cold_refit_every`-th refit is cold again; the others are warm: they keep the
// current model's scaler and gamma, so the optimisation problem differs from the last one only by
// the samples that entered and left the window, and the last solution's alphas (mapped by sample
// id) are a valid warm start.
//
// Contamination guard (learn_from_anomalies = false): a flagged vector does not enter the window
// while an incident is open. Isolated flags do enter: dropping every flagged vector would cut the
// nu tail from each window, and the envelope would shrink refit after refit on a stationary stream.
//
// Temporal context: with lags or rolling statistics (detector_options.h) each raw vector goes
// through the stream's FeatureTransform first; the window, the model and the explanations work on
// the transformed vectors (dims() stays the raw dimension). While the transform's history fills
// (history_needed() vectors after the start, a Relearn or a gap in time) verdicts say kHistory.
//
// Thread safety: Observe, Relearn, UpdateOptions and the state functions must be called from one
// thread (the stream's owner). model(), counters() and MemoryBytes() may be called from any thread.
// Refit jobs touch only state shared through an internal mutex and the atomic model slot.
#pragma once

#include <atomic>
#include <cmath>
#include <cstdint>
#include <functional>
#include <limits>
#include <memory>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/detector_options.h"
#include "nuwatch/detector_settings.h"
#include "nuwatch/incident_tracker.h"
#include "nuwatch/model.h"
#include "nuwatch/page_hinkley.h"
#include "nuwatch/sample_window.h"

namespace nuwatch {

// kHistory: a feature transform is (re)filling its history (after the start or a gap in time), so
// the vector can be neither learned from nor scored.
enum class StreamState { kLearning, kScoring, kHistory };
std::string_view StreamStateName(StreamState state);  // "learning", "scoring", "history"

// Runs refit jobs somewhere else. Post must run the job exactly once, eventually, on any thread,
// and must not block for long (the caller is the stream's scoring thread).
class RefitExecutor {
 public:
  virtual ~RefitExecutor() = default;
  virtual void Post(std::function<void()> job) = 0;
};

enum class RefitReason { kWarmup, kSchedule, kDrift, kModelAge, kReload };
std::string_view RefitReasonName(RefitReason reason);

struct RefitReport {
  RefitReason reason = RefitReason::kWarmup;
  bool ok = false;  // false: the refit failed and the old model stays; see error
  std::string error;
  bool warm = false;
  bool converged = false;  // false: stopped at the iteration cap (the model is still used)
  bool discarded = false;  // a relearn happened while it ran: the result was thrown away
  int64_t window_vectors = 0;
  int64_t iterations = 0;
  int64_t support_vectors_fitted = 0;
  int64_t support_vectors = 0;  // after compression
  double weight_degradation = 0;
  double solve_seconds = 0;
  double compress_seconds = 0;
  double calibration_seconds = 0;  // the cross-fitted models and the calibration
  // gamma = min_volume, cold fits: fitting, calibrating and measuring every candidate width
  // (includes the chosen one's solve, compress and calibration seconds); 0 otherwise.
  double width_selection_seconds = 0;
  double total_seconds = 0;
  uint64_t model_version = 0;
  double alarm_level = 0;  // the calibrated p-value level (0: uncalibrated, decision < 0 flags)
  // Why the alarms may not mean what was set (calibration.h), and "nu does not bind" notes.
  std::vector<std::string> warnings;
};

struct Verdict {
  StreamState state = StreamState::kLearning;
  double decision = std::numeric_limits<double>::quiet_NaN();  // NaN while learning
  // The calibrated p-value (NaN while learning or for an uncalibrated model): small is strange.
  double p_value = std::numeric_limits<double>::quiet_NaN();
  bool outlier = false;      // p_value <= the calibrated level (decision < 0 when uncalibrated)
  bool accepted = false;     // the vector entered the training window
  uint64_t incident_id = 0;  // the open incident after this vector; 0: none
  IncidentTransition transition;  // an incident opened or closed at this vector
  uint64_t model_version = 0;     // 0 while learning
  int support_vectors = 0;
};

// A snapshot of a detector's counters. Each count is exact at some moment; taken from another
// thread while the owner observes, two counts may be one vector apart.
struct DetectorCounters {
  int64_t vectors = 0;
  int64_t anomalies = 0;
  int64_t accepted = 0;
  int64_t refits_started = 0;
  int64_t refits_coalesced = 0;  // due while one was in flight
  int64_t drift_alarms = 0;
  int64_t history_vectors = 0;  // vectors spent (re)filling a transform's history
  int64_t history_resets = 0;   // gaps in time (or time going back) that refilled it
};

// Everything a state file needs to resume a stream without a new warm-up.
struct DetectorState {
  MatrixD window_rows;
  std::vector<uint64_t> window_ids;
  std::vector<double> window_times;
  uint64_t next_sample_id = 1;
  std::shared_ptr<const Model> model;  // null while learning
  std::vector<uint64_t> solution_ids;  // the last solution over its window, for warm starts
  VectorD solution_alpha;
  IncidentTrackerState incidents;
  PageHinkleyState drift;
  FeatureTransformState transform;  // empty history for the identity transform
  int64_t accepted_since_refit = 0;
  int64_t refits_since_cold = 0;
  double model_time = 0;  // data time of the vector that triggered the model's refit
  DetectorCounters counters;
};

class Detector {
 public:
  // Requires: dims >= 1; options valid (window >= 2, 2 <= warmup <= window, budget >= 1, ...);
  // throws PreconditionError naming the value otherwise. executor: null runs refits inline; else it
  // must outlive the detector.
  Detector(const DetectorOptions& options, int dims, RefitExecutor* executor = nullptr);
  ~Detector();  // waits for an in-flight refit
  Detector(const Detector&) = delete;
  Detector& operator=(const Detector&) = delete;

  // Scores one vector and updates the window, the incident state and the refit schedule.
  // Requires: x.size() == dims() (the raw dimension), finite values and time (PreconditionError
  // otherwise, state unchanged). Allocates nothing unless a refit is posted.
  Verdict Observe(double time, std::span<const double> x);

  // The rows of one message, in order: the same as Observe on each row, except that every row is
  // scored by the model in place when the call began, in one batched product (Model::
  // EvaluateBatch) instead of one per row; a model that a refit installs during the call scores
  // from the next call on (with an inline executor too). While learning, rows go one by one.
  // Requires: times.size() == rows.rows(), rows.cols() == dims(), finite values and times
  // (PreconditionError naming the first bad row otherwise; the detector is then unchanged).
  // Ensures: verdicts->size() == rows.rows(), verdict i for row i. Allocates the batched
  // product's buffers once per call, not per row. rows may be a block of a larger matrix (a slice
  // of a message, say): a Ref to rows of a row-major matrix is taken without a copy.
  void ObserveBatch(std::span<const double> times, const Eigen::Ref<const MatrixD>& rows,
                    std::vector<Verdict>* verdicts);
  // The attribution of row i of the last ObserveBatch, by the model that scored it; empty if that
  // row was not scored. Owner thread; allocates its result.
  std::vector<FeatureShare> ExplainBatchRow(std::size_t i, int top_k) const;

  // The attribution (Model::Explain) of the last vector Observe scored, in the transformed
  // features the model sees (named by the model's feature_names: "flow_m3h, mean of 6"), by the
  // current model. Empty before anything was scored. Owner thread; allocates its result.
  std::vector<FeatureShare> ExplainLast(int top_k) const;

  // Drops the window, the model and the open incident, so that a new normal is learned from the
  // next `warmup` vectors. A refit in flight is discarded when it finishes.
  void Relearn();

  // New settings (e.g. a reloaded config). They apply at the next refit; the dimension stays. New
  // transform settings change the feature space: they apply at once, with a Relearn.
  void UpdateOptions(const DetectorOptions& options);

  // Blocks until no refit is in flight (tests, shutdown, snapshots).
  void WaitForRefit() const;

  // Called on the refit's thread after each refit (for metrics and logs). Set before use.
  void set_refit_listener(std::function<void(const RefitReport&)> listener);

  std::shared_ptr<const Model> model() const;
  StreamState state() const;
  int dims() const { return dims_; }
  // The dimension of the transformed vectors the window and the model hold.
  int feature_dims() const { return transform_.output_dims(); }
  const DetectorOptions& options() const { return options_; }
  int64_t window_size() const { return window_.size(); }
  std::optional<TrackedIncident> open_incident() const { return incidents_.open_incident(); }
  // Any thread.
  DetectorCounters counters() const { return counters_.Load(); }
  RefitReport last_refit() const;
  double model_time() const;

  // Bytes held for this stream: window, model, last solution, incident ring. Any thread; the
  // owner-state part is as of the owner's last Observe (or other owner call).
  std::size_t MemoryBytes() const;

  // Requires for Import: dimensions matching dims(); throws PreconditionError otherwise (the
  // detector is unchanged then). Export waits for an in-flight refit.
  DetectorState ExportState() const;
  void ImportState(const DetectorState& state);

 private:
  struct Shared;
  // Observe after the transform: z holds feature_dims() values.
  Verdict ObserveTransformed(double time, std::span<const double> z);
  // A vector spent (re)filling the transform's history: counted, not scored.
  Verdict HistoryVerdict();
  // The rest of ObserveTransformed once `model` has scored z.
  Verdict ObserveScored(double time, std::span<const double> z, const Model& model,
                        const struct Score& score);
  // Throws PreconditionError if x or time is not what Observe requires; `row` names the batch row.
  void CheckVector(double time, std::span<const double> x, const char* caller, int64_t row) const;
  bool RefitDue(double time, bool drift_alarm) const;
  void PostRefit(double time, RefitReason reason);
  void ApplyPendingOptions();
  // Publishes the bytes of the owner's state for MemoryBytes (owner thread).
  void PublishOwnerBytes();

  // The counters: written by the owner thread only, read by any thread. One writer, so an
  // increment is a relaxed load and store (no read-modify-write on the hot path).
  struct LiveCounters {
    std::atomic<int64_t> vectors{0}, anomalies{0}, accepted{0}, refits_started{0},
        refits_coalesced{0}, drift_alarms{0}, history_vectors{0}, history_resets{0};
    static void Bump(std::atomic<int64_t>& counter) {
      counter.store(counter.load(std::memory_order_relaxed) + 1, std::memory_order_relaxed);
    }
    DetectorCounters Load() const;
    void Store(const DetectorCounters& counters);
  };

  DetectorOptions options_;
  std::optional<DetectorOptions> pending_options_;
  const int dims_;
  RefitExecutor* executor_;
  FeatureTransform transform_;
  std::vector<double> transformed_;  // output buffer of transform_, sized once
  std::vector<double> last_scored_;  // the last scored vector (transformed), for ExplainLast
  bool has_last_scored_ = false;
  // The last ObserveBatch: its transformed rows, which of them were scored (row of batch_z_ or
  // -1), and the model that scored them (kept for ExplainBatchRow).
  MatrixD batch_z_;
  std::vector<int64_t> batch_scored_row_;
  std::shared_ptr<const Model> batch_model_;
  SampleWindow window_;
  IncidentTracker incidents_;
  PageHinkley drift_;
  std::shared_ptr<Shared> shared_;
  int64_t accepted_since_refit_ = 0;
  int64_t refits_since_cold_ = 0;
  bool drift_pending_ = false;
  bool force_cold_ = false;
  LiveCounters counters_;
  std::atomic<std::size_t> owner_bytes_{0};  // see PublishOwnerBytes
};

// The last solution of a window, for a warm start: the base model's scaler and kernel are kept,
// and the alphas are mapped onto the new window by sample id (MapWarmStart).
struct WarmStart {
  std::shared_ptr<const Model> base;
  std::vector<uint64_t> ids;
  VectorD alpha;
};

struct WindowFitResult {
  std::shared_ptr<const Model> model;  // compressed to the budget and calibrated
  std::vector<uint64_t> solution_ids;  // the full solution's support vectors, by sample id
  VectorD solution_alpha;
  RefitReport report;  // all but reason, discarded and total_seconds
};

// The fit of one window, exactly as the detector's refits do it (so that `nuwatch fit`, replay,
// tune and the daemon share one code path): the scaler and kernel width from the rows (cold, warm
// == null) or the base model's (warm); the solver; compression to support_vector_budget with rho
// recalibrated on the window; then, with calibration_folds = K >= 2, K models fitted the same way
// on the window without each of K folds, each scoring the fold it did not see, and the
// calibration (calibration.h) built from those out-of-sample scores in time order. A fold is two
// contiguous chunks spread over the window: contiguous, because neighbouring vectors are
// correlated (a random split would score each vector by a model that saw its neighbours; blocked
// cross-validation for dependent data, common practice), and spread, so that a window spanning a
// cycle does not hold out a whole phase of it. Each fold model is warm-started from the full
// solution (MapWarmStart).
// gamma = "min_volume" on a cold fit (nuwatch/kernel_width.h): the whole of the above once per
// candidate width, scale x 1/4, 1/2, 1, 2, 4 (so a cold fit costs five calibrated fits), each
// calibrated region's volume estimated on one importance sample, and the fit of the least volume
// kept, with the table in the model's gamma_candidates. A window too short to calibrate falls
// back to "scale" with a warning. Warm fits keep the base model's width, as they keep its scaler.
// Requires: rows.rows() == ids.size() >= 2 (ids strictly increasing), times empty or of the same
// size; finite values; valid options. Throws PreconditionError otherwise.
WindowFitResult FitWindow(const MatrixD& rows, const std::vector<uint64_t>& ids,
                          std::span<const double> times, const DetectorOptions& options,
                          const WarmStart* warm, uint64_t version);

}  // namespace nuwatch
