// The training window of one stream: a ring buffer of the vectors accepted for training, bounded by
// count and optionally by age. Each entry carries a sample id, assigned on push and strictly
// increasing over the window's life (Clear does not reuse ids), so that a refit can map the
// previous fit's alphas onto the samples that survived the slide (MapWarmStart below). Entries
// leave from the oldest end only, so the ids in the window are consecutive and only the oldest
// one is stored (a stored id per entry was 16 KB of a full 2000-entry window).
//
// Storage is one contiguous slots x dims buffer that grows with the window, doubling from 16
// slots up to capacity (exactly: its last step stops at capacity), so that a stream holds memory
// for the vectors it has, not for a full window from its first vector (a fleet of new or sparse
// streams is the common case). The buffer holds float32 deviations from a reference row in
// doubles, half the memory of double values (a full 2000 x 16 window: 128 KB instead of 256 KB).
// Deviations, not the values themselves, so that a feature with a large offset keeps its
// variation (a reading of 12,345,678.9 that moves by 0.01 would lose it to a float's 24 bits).
// The reference is a row of the window itself, chosen by its id alone (the id with the most
// trailing zero bits, then the newest), so that it moves with the window, about once per
// capacity() pushes, costing O(dims) a push on average, and a window restored from a snapshot
// chooses the same row and gives back the same values. A row that deviates beyond the float
// range (more than about 3.4e38) turns the window to double values for good (then it holds
// 8 x dims bytes a slot). Push allocates only while it grows the buffer (a full
// window never again); Expire, Clear and the accessors never allocate, and the buffer never
// shrinks. Snapshot and Restore may allocate (they are on the refit and state-file paths). Thread
// safety: not thread-safe. One window per stream, owned by the stream's thread; a refit works on a
// Snapshot, never on the window itself.
#pragma once

#include <cstddef>
#include <cstdint>
#include <span>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {

class SampleWindow {
 public:
  // Requires: capacity >= 1, dims >= 1, max_age_seconds finite and >= 0 (0: no age limit).
  // Throws PreconditionError naming the offending value. The first id handed out is 1. Allocates
  // nothing yet.
  SampleWindow(int64_t capacity, int dims, double max_age_seconds = 0);

  // Appends x with its timestamp (seconds, any epoch) and returns its id. When the window is full
  // the oldest entry is evicted first. Push does not apply the age limit: call ExpireOlderThan.
  // Requires: x.size() == dims(), finite time and values (PreconditionError otherwise; the window
  // is unchanged then). Allocates only when the window is at its buffer's size and below
  // capacity (the buffer doubles); may throw std::bad_alloc then, the window unchanged.
  uint64_t Push(double time, std::span<const double> x);

  // Drops entries from the oldest end while their time < now - max_age_seconds. Entries leave in
  // push order, so an entry pushed with an earlier time than its predecessor stays until that
  // predecessor has gone (timestamps are expected to be non-decreasing; this keeps the ring a
  // ring). No-op when max_age_seconds == 0. Requires: finite now.
  void ExpireOlderThan(double now);

  // Empties the window. Ids keep increasing: the next push gets next_id().
  void Clear();

  int64_t size() const { return size_; }
  bool empty() const { return size_ == 0; }
  int64_t capacity() const { return capacity_; }
  int dims() const { return dims_; }
  double max_age_seconds() const { return max_age_seconds_; }
  // The id the next Push will return.
  uint64_t next_id() const { return next_id_; }

  // Logical index i: 0 is the oldest entry, size() - 1 the newest.
  // Requires: 0 <= i < size() (PreconditionError otherwise).
  // Row ensures: the values pushed, each within 2^-20 x the window's range (the spread of each
  // feature over the rows it held meanwhile): a deviation from a row of the window is rounded to
  // a float (2^-24 relative) once, and again at each of the few re-bases of its life. Exact
  // while the window holds doubles.
  // Allocates its result (tests and diagnostics; refits take a Snapshot).
  std::vector<double> Row(int64_t i) const;
  uint64_t Id(int64_t i) const;
  double Time(int64_t i) const;

  // Copies the contents, oldest first: out becomes size() x dims() (values as Row gives them); ids
  // and times (either may be null) get size() entries. Ids in a snapshot are consecutive.
  // Requires: out != nullptr.
  void Snapshot(MatrixD* out, std::vector<uint64_t>* ids, std::vector<double>* times) const;

  // The contents in the window's own compact form, oldest first, to be turned into a matrix later
  // and on another thread (Unpack): a refit waiting in a queue holds this, about half the bytes of
  // a Snapshot (float32 deviations and a reference row, not doubles; the oldest id, not one a row).
  struct Packed {
    int dims = 0;
    std::vector<float> deviations;  // rows x dims, row-major (empty when values holds the rows)
    std::vector<double> values;     // rows x dims, row-major: a window that holds doubles
    std::vector<double> reference;  // dims values: deviations are from this row
    std::vector<double> times;      // one a row
    uint64_t first_id = 0;          // row r has id first_id + r
    int64_t rows() const { return static_cast<int64_t>(times.size()); }
    // Ensures: out and ids (may be null) exactly as Snapshot gave them when Pack was called.
    // Requires: out != nullptr. Reentrant: a Packed is a plain value, readable from any thread.
    void Unpack(MatrixD* out, std::vector<uint64_t>* ids) const;
  };
  // Copies the contents into *out. Requires: out != nullptr.
  void Pack(Packed* out) const;

  // Replaces the contents with saved rows (oldest first), as from a state file. When there are more
  // rows than capacity() (the configured window shrank) only the newest capacity() are kept, as
  // pushing them in order would. The age limit is not applied: call ExpireOlderThan.
  // Requires: rows.cols() == dims(); ids.size() == times.size() == rows.rows(); ids consecutive
  // (each one more than the last, as Snapshot gives them) and >= 1; next_id the last id + 1 (any
  // next_id >= 1 when there are no rows); finite values and times. Throws PreconditionError naming
  // the offending row and value; the window is unchanged then.
  void Restore(const MatrixD& rows, std::span<const uint64_t> ids, std::span<const double> times,
               uint64_t next_id);

  // Bytes held by this window (object plus buffers): grows with the window up to capacity.
  std::size_t MemoryBytes() const;
  // Whether the window holds double values (a row deviated beyond the float range), not float32
  // deviations.
  bool holds_doubles() const { return doubles_; }

 private:
  int64_t Physical(int64_t i) const;  // logical index -> slot
  void CheckIndex(int64_t i, const char* caller) const;
  // Makes room for `slots` entries (at most capacity), the contents kept in order with the oldest
  // at slot 0. The new buffers are reserved exactly, so that none holds more than it must, and
  // allocated before anything changes.
  void GrowTo(int64_t slots);
  // The value of slot `slot`, feature j.
  double Value(int64_t slot, int j) const;
  // Whether every deviation of x from the reference fits a float.
  bool FitsFloat(std::span<const double> x) const;
  // Stores x in `slot` (the reference set, the mode chosen).
  void Store(int64_t slot, std::span<const double> x);
  // The occupied slot whose id is preferred as the reference (Outranks in the .cc).
  int64_t PreferredSlot() const;
  // Deviations from the row in `slot` from now on (or doubles, if one would not fit a float).
  void RebaseTo(int64_t slot);
  // Turns the buffer to double values (a row beyond the float range).
  void SwitchToDoubles();

  int64_t capacity_;
  int dims_;
  double max_age_seconds_;
  int64_t slots_ = 0;  // entries the buffers hold room for; the ring wraps here
  // slots x dims, row-major by slot: float32 deviations from reference_, or (doubles_) the values.
  std::vector<float> deviations_;
  std::vector<double> values_;
  std::vector<double> reference_;       // dims values: the row reference_id_ (in the window)
  std::vector<double> next_reference_;  // dims values: RebaseTo's scratch, so it allocates nothing
  uint64_t reference_id_ = 0;
  bool doubles_ = false;
  uint64_t first_id_ = 0;      // the id of the oldest entry; entry i has first_id_ + i
  std::vector<double> times_;  // by slot
  int64_t head_ = 0;           // slot of the oldest entry
  int64_t size_ = 0;
  uint64_t next_id_ = 1;
};

// Warm start for a refit on a window that slid (alpha seeding, DeCoste & Wagstaff, KDD 2000;
// methods.md "Warm starts on a sliding window"). Builds a feasible alpha for the new window:
//   1. a surviving sample (its id is in old_ids) keeps its old alpha, clipped to the new bound
//      1/(nu l_new); a new sample starts at 0;
//   2. the missing mass 1 - sum is handed out, at most up to the bound each, in priority order:
//      with new_gradient, the lowest gradient first (the samples the previous solution puts
//      furthest outside, which the optimum is most likely to make support vectors; ties: the newer
//      sample first); without it (nullptr), newest first, since new samples are the ones the
//      previous fit knew nothing about. Only the order of new_gradient matters: G = K a of the
//      surviving alphas, or the previous model's decision values on the new window, will do;
//   3. a surplus (sum > 1, only possible if old_alpha summed to more than 1) is taken off the
//      largest alphas by lowering them to a common level.
// The result is only a starting point; SMO converges from any feasible alpha. It is a good one only
// if the problem is the same apart from the samples: the same scaler, kernel and gamma. After a
// cold refit (scaler or gamma re-estimated) start cold instead (ColdStartAlpha in solver.h).
// Requires: old_ids.size() == old_alpha.size(); old_ids and new_ids strictly increasing (as
// SampleWindow::Snapshot gives them); new_ids non-empty; old_alpha finite and >= 0; 0 < nu <= 1;
// new_gradient null or of size new_ids.size() with finite values. The alphas are unscaled
// (sum 1, the convention of solver.h).
// Ensures: size new_ids.size(), 0 <= a_i <= 1/(nu l_new), |sum - 1| <= 1e-12. Throws
// PreconditionError naming the offending value otherwise. Reentrant; allocates.
VectorD MapWarmStart(const std::vector<uint64_t>& old_ids, const VectorD& old_alpha,
                     const std::vector<uint64_t>& new_ids, double nu,
                     const VectorD* new_gradient = nullptr);

}  // namespace nuwatch
