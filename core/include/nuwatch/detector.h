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
// Thread safety: Observe, Relearn, UpdateOptions, the state functions and the accessors of owner
// state (options(), window_size(), open_incident()) must be called from one thread (the stream's
// owner). model(), state(), model_time(), last_refit(), counters() and MemoryBytes() may be called
// from any thread, at any time: the model slot and model time are atomics, the counters are
// atomics the owner alone writes, and the bytes of owner state are a figure the owner publishes
// after each change. Refit jobs touch only state shared through an internal mutex (annotated for
// clang's -Wthread-safety) and the atomic model slot.
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

enum class StreamState { kLearning, kScoring };
std::string_view StreamStateName(StreamState state);  // "learning", "scoring"

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
  double total_seconds = 0;
  uint64_t model_version = 0;
};

struct Verdict {
  StreamState state = StreamState::kLearning;
  double decision = std::numeric_limits<double>::quiet_NaN();  // NaN while learning
  bool outlier = false;
  bool accepted = false;          // the vector entered the training window
  uint64_t incident_id = 0;       // the open incident after this vector; 0: none
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
  // Requires: x.size() == dims(), finite values and time (PreconditionError otherwise, state
  // unchanged). Allocates nothing unless a refit is posted.
  Verdict Observe(double time, std::span<const double> x);

  // Drops the window, the model and the open incident, so that a new normal is learned from the
  // next `warmup` vectors. A refit in flight is discarded when it finishes.
  void Relearn();

  // New settings (e.g. a reloaded config). They apply at the next refit; the dimension stays.
  void UpdateOptions(const DetectorOptions& options);

  // Blocks until no refit is in flight (tests, shutdown, snapshots).
  void WaitForRefit() const;

  // Called on the refit's thread after each refit (for metrics and logs). Set before use.
  void set_refit_listener(std::function<void(const RefitReport&)> listener);

  std::shared_ptr<const Model> model() const;
  StreamState state() const;
  int dims() const { return dims_; }
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
  bool RefitDue(double time, bool drift_alarm) const;
  void PostRefit(double time, RefitReason reason);
  void ApplyPendingOptions();
  // Publishes the bytes of the owner's state for MemoryBytes (owner thread).
  void PublishOwnerBytes();

  // The counters: written by the owner thread only, read by any thread. One writer, so an
  // increment is a relaxed load and store (no read-modify-write on the hot path).
  struct LiveCounters {
    std::atomic<int64_t> vectors{0}, anomalies{0}, accepted{0}, refits_started{0},
        refits_coalesced{0}, drift_alarms{0};
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

}  // namespace nuwatch
