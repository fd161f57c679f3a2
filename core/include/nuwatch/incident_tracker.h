// The debounced incident state of one stream. A single flagged vector is noise; an incident opens
// when at least open_after of the last open_window vectors were flagged, and closes after
// close_after consecutive clean vectors.
//
// What an incident reports:
//   id             1, 2, 3, ... per tracker; set_next_id carries the sequence across restarts.
//   start_time     the time of the earliest flagged vector still in the opening window (the
//                  first of the flags that made it open, so the incident covers its onset).
//   end_time       the time of the latest flagged vector; on close, the last flag before the clean
//                  run (the clean run only confirms the end, it is not part of the incident).
//   peak_decision  the minimum decision value over the incident's flagged vectors (the opening
//                  window's flags included): the furthest the stream went outside the envelope.
//   flagged_vectors  how many flagged vectors the incident holds (the opening window's included).
// After a close the recent-flag ring is cleared, so the next incident needs open_after fresh flags:
// leftovers of the last one cannot reopen it at once.
// Thread safety: not thread-safe. One per stream, owned by the stream's thread. Update allocates
// nothing (the ring is sized at construction); ExportState and ImportState may allocate.
#pragma once

#include <cstdint>
#include <optional>
#include <vector>

namespace nuwatch {

struct TrackedIncident {
  uint64_t id = 0;
  double start_time = 0;
  double end_time = 0;
  double peak_decision = 0;
  int64_t flagged_vectors = 0;
};

enum class IncidentTransitionType { kNone = 0, kOpened = 1, kClosed = 2 };

struct IncidentTransition {
  IncidentTransitionType type = IncidentTransitionType::kNone;
  TrackedIncident incident;  // the incident opened or closed; unset (default) for kNone
};

struct IncidentTrackerOptions {
  int open_after = 3;    // 1 <= open_after <= open_window
  int open_window = 5;   // >= 1
  int close_after = 10;  // >= 1
};

// The tracker's state as a state file stores it.
struct IncidentTrackerState {
  uint64_t next_id = 1;
  // The last (at most open_window) vectors seen since construction or the last close, oldest
  // first: the ring's contents. All three have the same length.
  std::vector<bool> recent_flags;
  std::vector<double> recent_times;
  std::vector<double> recent_decisions;
  std::optional<TrackedIncident> open_incident;
  int64_t clean_run = 0;  // consecutive clean vectors since the open incident's last flag
};

class IncidentTracker {
 public:
  // Requires: 1 <= open_after <= open_window, close_after >= 1; throws PreconditionError naming
  // the values otherwise.
  explicit IncidentTracker(const IncidentTrackerOptions& options);

  // Feeds one scored vector. Returns kOpened when this vector opens an incident, kClosed when it
  // completes the clean run that closes one, kNone otherwise (a vector never does both).
  // Requires: finite time and decision (PreconditionError otherwise; the state is unchanged then).
  IncidentTransition Update(double time, bool flagged, double decision);

  // The incident in progress, if any; end_time and peak_decision so far.
  std::optional<TrackedIncident> open_incident() const;
  const IncidentTrackerOptions& options() const { return options_; }

  uint64_t next_id() const { return next_id_; }
  // Requires: next_id >= 1 and greater than the open incident's id, if any.
  void set_next_id(uint64_t next_id);

  IncidentTrackerState ExportState() const;
  // Requires: next_id >= 1; the three recent_* vectors of equal length; finite times and
  // decisions; if an incident is open, its id < next_id, clean_run >= 0 and finite fields. If the
  // ring holds more than open_window entries (the configuration shrank) only the newest are kept;
  // if clean_run >= close_after the next clean vector closes the incident. Throws
  // PreconditionError naming the offending value; the tracker is unchanged then.
  void ImportState(const IncidentTrackerState& state);

 private:
  struct Entry {
    double time;
    double decision;
    bool flagged;
  };

  void PushRecent(double time, bool flagged, double decision);
  void ClearRecent();

  IncidentTrackerOptions options_;
  std::vector<Entry> ring_;  // open_window slots
  int ring_head_ = 0;        // slot of the oldest entry
  int ring_size_ = 0;
  int ring_flagged_ = 0;  // flagged entries in the ring
  bool open_ = false;
  TrackedIncident incident_;
  int64_t clean_run_ = 0;
  uint64_t next_id_ = 1;
};

}  // namespace nuwatch
