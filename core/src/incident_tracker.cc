#include "nuwatch/incident_tracker.h"

#include <algorithm>
#include <cmath>
#include <string>

#include "number_text.h"
#include "nuwatch/types.h"

namespace nuwatch {
IncidentTracker::IncidentTracker(const IncidentTrackerOptions& options) : options_(options) {
  if (options.open_window < 1) {
    throw PreconditionError(
        "IncidentTracker: open_window = " + std::to_string(options.open_window) + " must be >= 1");
  }
  if (options.open_after < 1 || options.open_after > options.open_window) {
    throw PreconditionError("IncidentTracker: open_after = " + std::to_string(options.open_after) +
                            " must be in [1, open_window = " + std::to_string(options.open_window) +
                            "]");
  }
  if (options.close_after < 1) {
    throw PreconditionError(
        "IncidentTracker: close_after = " + std::to_string(options.close_after) + " must be >= 1");
  }
  ring_.assign(static_cast<std::size_t>(options.open_window), Entry{0, 0, false});
}

void IncidentTracker::PushRecent(double time, bool flagged, double decision) {
  int slot;
  if (ring_size_ == options_.open_window) {
    slot = ring_head_;
    if (ring_[slot].flagged) --ring_flagged_;
    ring_head_ = ring_head_ + 1 == options_.open_window ? 0 : ring_head_ + 1;
  } else {
    slot = ring_head_ + ring_size_;
    if (slot >= options_.open_window) slot -= options_.open_window;
    ++ring_size_;
  }
  ring_[slot] = Entry{time, decision, flagged};
  if (flagged) ++ring_flagged_;
}

void IncidentTracker::ClearRecent() {
  ring_head_ = 0;
  ring_size_ = 0;
  ring_flagged_ = 0;
}

IncidentTransition IncidentTracker::Update(double time, bool flagged, double decision) {
  if (!std::isfinite(time)) {
    throw PreconditionError("IncidentTracker::Update: time = " + RoundTripText(time) +
                            " is not finite");
  }
  if (!std::isfinite(decision)) {
    throw PreconditionError("IncidentTracker::Update: decision = " + RoundTripText(decision) +
                            " is not finite");
  }
  PushRecent(time, flagged, decision);

  if (open_) {
    if (flagged) {
      clean_run_ = 0;
      incident_.end_time = time;
      incident_.peak_decision = std::min(incident_.peak_decision, decision);
      ++incident_.flagged_vectors;
      return {};
    }
    if (++clean_run_ < options_.close_after) return {};
    open_ = false;
    clean_run_ = 0;
    ClearRecent();
    return {IncidentTransitionType::kClosed, incident_};
  }

  if (!flagged || ring_flagged_ < options_.open_after) return {};
  TrackedIncident opened;
  opened.id = next_id_++;
  opened.flagged_vectors = ring_flagged_;
  bool first = true;
  for (int i = 0; i < ring_size_; ++i) {
    int slot = ring_head_ + i;
    if (slot >= options_.open_window) slot -= options_.open_window;
    const Entry& entry = ring_[slot];
    if (!entry.flagged) continue;
    if (first) {
      opened.start_time = entry.time;
      opened.peak_decision = entry.decision;
      first = false;
    } else {
      opened.peak_decision = std::min(opened.peak_decision, entry.decision);
    }
  }
  opened.end_time = time;  // this vector is flagged and the newest
  incident_ = opened;
  open_ = true;
  clean_run_ = 0;
  return {IncidentTransitionType::kOpened, incident_};
}

std::optional<TrackedIncident> IncidentTracker::open_incident() const {
  if (!open_) return std::nullopt;
  return incident_;
}

void IncidentTracker::set_next_id(uint64_t next_id) {
  if (next_id < 1 || (open_ && next_id <= incident_.id)) {
    throw PreconditionError(
        "IncidentTracker::set_next_id: next_id = " + std::to_string(next_id) + " must be >= 1" +
        (open_ ? " and > the open incident's id " + std::to_string(incident_.id) : std::string()));
  }
  next_id_ = next_id;
}

IncidentTrackerState IncidentTracker::ExportState() const {
  IncidentTrackerState state;
  state.next_id = next_id_;
  state.recent_flags.reserve(static_cast<std::size_t>(ring_size_));
  state.recent_times.reserve(static_cast<std::size_t>(ring_size_));
  state.recent_decisions.reserve(static_cast<std::size_t>(ring_size_));
  for (int i = 0; i < ring_size_; ++i) {
    int slot = ring_head_ + i;
    if (slot >= options_.open_window) slot -= options_.open_window;
    state.recent_flags.push_back(ring_[slot].flagged);
    state.recent_times.push_back(ring_[slot].time);
    state.recent_decisions.push_back(ring_[slot].decision);
  }
  if (open_) state.open_incident = incident_;
  state.clean_run = open_ ? clean_run_ : 0;
  return state;
}

void IncidentTracker::ImportState(const IncidentTrackerState& state) {
  const char* const kCaller = "IncidentTracker::ImportState: ";
  if (state.next_id < 1) {
    throw PreconditionError(std::string(kCaller) + "next_id = 0 must be >= 1");
  }
  const std::size_t n = state.recent_flags.size();
  if (state.recent_times.size() != n || state.recent_decisions.size() != n) {
    throw PreconditionError(std::string(kCaller) + std::to_string(n) + " recent flags but " +
                            std::to_string(state.recent_times.size()) + " times and " +
                            std::to_string(state.recent_decisions.size()) + " decisions");
  }
  for (std::size_t i = 0; i < n; ++i) {
    if (!std::isfinite(state.recent_times[i]) || !std::isfinite(state.recent_decisions[i])) {
      throw PreconditionError(std::string(kCaller) + "recent entry " + std::to_string(i) +
                              ": time = " + RoundTripText(state.recent_times[i]) + ", decision = " +
                              RoundTripText(state.recent_decisions[i]) + " must be finite");
    }
  }
  if (state.open_incident) {
    const TrackedIncident& incident = *state.open_incident;
    if (incident.id < 1 || incident.id >= state.next_id) {
      throw PreconditionError(std::string(kCaller) + "open incident id " +
                              std::to_string(incident.id) +
                              " must be in [1, next_id = " + std::to_string(state.next_id) + ")");
    }
    if (!std::isfinite(incident.start_time) || !std::isfinite(incident.end_time) ||
        !std::isfinite(incident.peak_decision) || incident.flagged_vectors < 1) {
      throw PreconditionError(std::string(kCaller) + "open incident " +
                              std::to_string(incident.id) +
                              ": start_time = " + RoundTripText(incident.start_time) +
                              ", end_time = " + RoundTripText(incident.end_time) +
                              ", peak_decision = " + RoundTripText(incident.peak_decision) +
                              ", flagged_vectors = " + std::to_string(incident.flagged_vectors) +
                              " (times and peak must be finite, at least one flagged vector)");
    }
    if (state.clean_run < 0) {
      throw PreconditionError(std::string(kCaller) +
                              "clean_run = " + std::to_string(state.clean_run) + " must be >= 0");
    }
  }

  next_id_ = state.next_id;
  ClearRecent();
  const std::size_t skip = n > ring_.size() ? n - ring_.size() : 0;
  for (std::size_t i = skip; i < n; ++i) {
    PushRecent(state.recent_times[i], state.recent_flags[i], state.recent_decisions[i]);
  }
  open_ = state.open_incident.has_value();
  incident_ = open_ ? *state.open_incident : TrackedIncident{};
  clean_run_ = open_ ? state.clean_run : 0;
}

}  // namespace nuwatch
