// The control socket's requests and replies (daemon/protocol/PROTOCOL.md §11): one JSON object per
// request, one per reply, every reply with "ok". The daemon implements ControlCommands; this file
// parses requests, dispatches them and writes the replies.
// Thread safety: HandleControlRequest is reentrant; it calls `commands` on the caller's thread.
#pragma once

#include <cstdint>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/incident_tracker.h"

namespace nuwatch {

struct StreamStatus {
  std::string stream;
  std::string state;  // "learning" or "scoring"
  int dims = 0;
  int64_t vectors = 0;
  int64_t anomalies = 0;
  int64_t support_vectors = 0;
  int64_t window = 0;
  uint64_t model_version = 0;
  int64_t refits = 0;  // refits started
  std::optional<TrackedIncident> incident;
  std::size_t memory_bytes = 0;
  // The scoring thread that owns the stream, 0 to daemon.scoring_threads - 1.
  int scoring_thread = 0;
  int64_t snapshot_vectors = -1;  // the vectors count the state file holds; -1: none
  std::string snapshot_error;     // why the last state write failed; "" when it succeeded
};

struct ControlOutcome {
  bool ok = true;
  std::string error;  // when !ok
};

struct SnapshotOutcome : ControlOutcome {
  int64_t written = 0;              // streams written (fsynced and renamed)
  int64_t pending = 0;              // streams with a refit running, written when it finishes
  std::vector<std::string> failed;  // streams whose write failed (then !ok, error names them)
};

struct ReloadOutcome : ControlOutcome {
  std::string config;           // the file reread
  int64_t streams_updated = 0;  // streams given new detector settings
};

// The outcome of an adopt request (PROTOCOL.md §11.7): a stream's state handed over by the member
// that owned it before a change of cluster.members.
struct AdoptOutcome : ControlOutcome {
  // When !ok, the stable label of the refusal: "not_owner" (this member does not own the key
  // under its member list: the sender retries until it has reloaded too), "stream_exists",
  // "corrupt_state", "dims_mismatch", "stream_limit", "unsupported".
  std::string reason;
  int64_t held_vectors = 0;  // vectors that came before the state, scored by the adopted model
  // The adopted state is in this member's state file (fsynced and renamed), so that the old
  // owner may delete its copy; false without a state directory or when the write failed.
  bool state_written = false;
};

// The replica's place among cluster.members (PROTOCOL.md §13), for status.
struct ClusterStatus {
  std::string member;       // this daemon's name; "" = none (a lone daemon)
  std::size_t members = 0;  // size of the member list; 0 = a lone daemon that owns every stream
  bool departed = false;    // a reload took `member` out of the list: it owns no key
  int64_t handoffs_pending = 0;  // streams offered to their new owners, not adopted or given up
};

class ControlCommands {
 public:
  virtual ~ControlCommands() = default;
  virtual std::vector<StreamStatus> Status() = 0;
  // Called with Status() on the same thread. The default: a lone daemon.
  virtual ClusterStatus Cluster() { return {}; }
  virtual SnapshotOutcome Snapshot() = 0;
  // nullopt when done; else the error (e.g. unknown stream).
  virtual std::optional<std::string> Relearn(const std::string& stream) = 0;
  virtual ReloadOutcome Reload() = 0;
  // Stops tracking the stream: its model, window, metric series and state file go; its next
  // vector starts it afresh. nullopt when done; else the error (e.g. unknown stream).
  virtual std::optional<std::string> Forget(const std::string& stream) = 0;
  // Takes over `stream` with `state` (state_store.h's EncodeStreamState bytes) from member
  // `from`. The default refuses: a daemon that cannot adopt.
  virtual AdoptOutcome Adopt(const std::string& stream, const std::string& from,
                             std::span<const uint8_t> state) {
    (void)stream;
    (void)from;
    (void)state;
    AdoptOutcome outcome;
    outcome.ok = false;
    outcome.reason = "unsupported";
    outcome.error = "this daemon does not adopt streams";
    return outcome;
  }
};

// Ensures: a one-line JSON object. {"ok":false,"error":"..."} for anything that is not a JSON
// object with a known string "command" (and, for relearn and forget, a string "stream"); never
// throws except std::bad_alloc. Exceptions from `commands` become {"ok":false,...} too.
std::string HandleControlRequest(std::string_view request, ControlCommands& commands,
                                 std::string_view version);
// The same for a request of two frames: `attachment` is the second frame, which only adopt takes
// (and requires); nullopt for a request of one frame. A second frame with another command, or an
// adopt without one, is answered with an error.
std::string HandleControlRequest(std::string_view request,
                                 std::optional<std::string_view> attachment,
                                 ControlCommands& commands, std::string_view version);

// The reply to a request of more than one frame.
std::string ControlErrorReply(std::string_view error);

}  // namespace nuwatch
