// The streams nuwatchd tracks: for each key its Detector, its fixed dims, its metric handles, the
// anomaly-ratio ring, its recorder and the bookkeeping of snapshots.
//
// Thread safety: the registry and every Stream belong to the daemon's socket thread, except what
// is marked otherwise: the refit listener and the executor's completion callback run on pool
// threads and touch only prometheus handles (thread-safe) and what the callbacks themselves
// guard. A Stream never moves (the registry holds it by unique_ptr), so pool threads may keep a
// pointer to it until the pool is joined.
#pragma once

#include <chrono>
#include <cstdint>
#include <deque>
#include <functional>
#include <memory>
#include <set>
#include <string>
#include <string_view>
#include <unordered_map>
#include <vector>

#include "nuwatch/detector.h"
#include "service/metrics.h"
#include "service/recorder.h"
#include "service/refit_pool.h"

namespace nuwatch {

// The flagged fraction of the last `capacity` scored vectors, as a ring of bits.
// Push and Ratio allocate nothing.
class AnomalyRatioRing {
 public:
  // Requires: capacity >= 1 (PreconditionError otherwise).
  explicit AnomalyRatioRing(int64_t capacity);
  void Push(bool flagged);
  // flagged / size(); 0 while empty.
  double Ratio() const { return size_ == 0 ? 0.0 : static_cast<double>(flagged_) / size_; }
  int64_t size() const { return size_; }
  int64_t capacity() const { return capacity_; }
  int64_t flagged() const { return flagged_; }

 private:
  std::vector<uint64_t> bits_;
  int64_t capacity_;
  int64_t next_ = 0;  // slot of the next push
  int64_t size_ = 0;
  int64_t flagged_ = 0;
};

// A message of more vectors than its scoring thread scores at one go (daemon.cc, SliceRows): its
// rows and times, copied out of the message, are scored a slice at a time, so that the thread's
// other streams are not kept waiting behind it. The stream's own later messages wait here, in
// arrival order, so that its vectors keep their order.
struct SlicedMessage {
  MatrixD rows;
  std::vector<double> times;
  int next = 0;  // the first row not scored yet
  // The message's bytes, counted in ingest.scoring_queue_bytes until its last slice is scored.
  int64_t queued_bytes = 0;
  struct Waiting {
    std::string payload;
    int64_t queued_bytes = 0;  // as above, until it is handled
  };
  std::deque<Waiting> waiting;
};

struct Stream {
  // Creates the detector (throws PreconditionError for invalid options or dims) on `pool`, adds
  // the stream's metric series and sets the refit listener. `on_refit_finished` runs on the pool
  // thread after each refit job. Requires: `pool` and `metrics` outlive the stream.
  Stream(std::string key, int dims, const DetectorOptions& options, RefitExecutor* pool,
         DaemonMetrics* metrics, int64_t anomaly_ratio_window,
         std::function<void(Stream*)> on_refit_finished);
  // Waits for the stream's refit in flight, then removes its metric series unless
  // keep_metric_series is set.
  ~Stream();
  Stream(const Stream&) = delete;
  Stream& operator=(const Stream&) = delete;

  // Sets the gauges that change only at refits, restores and reloads: support vectors, budget,
  // window, memory, incident open.
  void RefreshSlowGauges();

  const std::string key;
  const int dims;
  DetectorOptions options;  // the settings the stream was last given (config and reloads)
  DaemonMetrics* const metrics_owner;
  StreamMetrics metrics;
  AnomalyRatioRing ratio;
  std::vector<double> row;                // dims values: the vector being processed
  std::unique_ptr<SlicedMessage> sliced;  // null unless a message is being scored in slices
  // When its last message arrived (its scoring thread's clock at the turn it was taken), for
  // limits.idle_expiry_seconds.
  std::chrono::steady_clock::time_point last_seen{};
  uint64_t seen_model_version = 0;  // the model version the gauges describe
  // When the stream's thread first saw that model (restored: at the restart), for
  // nuwatch_model_age_seconds.
  std::chrono::steady_clock::time_point model_seen_at{};
  int64_t seen_coalesced = 0;    // counters().refits_coalesced already counted
  std::set<std::string> warned;  // refit warnings already logged for this stream
  bool flooding = false;         // more than half flagged: logged once until it recovers
  // Snapshots. snapshot_vectors and snapshot_model_version describe what the stream's state file
  // holds: restored at start-up, then changed only when a write has succeeded (fsynced and
  // renamed), so that status never counts vectors the disk does not hold. snapshot_wanted: one is
  // due once the refit in flight has finished (or the next retry).
  int64_t snapshot_vectors = -1;
  uint64_t snapshot_model_version = 0;
  bool snapshot_wanted = false;
  // A state-file write of this stream is queued or running on the io thread: one at a time per
  // stream, so that a slow disk cannot pile them up. Set and cleared by the socket thread (the
  // writer reports its outcome back to it).
  bool write_queued = false;
  // Failed writes in a row, the last one's error, and when the next attempt may run
  // (StateWriteRetrySeconds; a snapshot request or the shutdown does not wait for it).
  int write_failures = 0;
  std::string write_error;
  std::chrono::steady_clock::time_point retry_at{};
  // Set when the registry goes away with the daemon: its series go with the metrics registry, so
  // they are not removed one by one (prometheus-cpp's Family::Remove scans the family, which
  // made a shutdown of N streams cost N^2).
  bool keep_metric_series = false;
  // Adopted from another member (PROTOCOL.md §11.7): the sender's name and a digest of the state
  // bytes it sent, so that the same offer sent again (its reply was lost or came after the
  // sender's 5 s wait) is answered ok instead of being refused as stream_exists.
  std::string adopted_from;
  std::size_t adopted_state_digest = 0;
  std::unique_ptr<StreamRecorder> recorder;  // null: not recording
  bool recording_failed = false;             // an error was logged; paused until the next flush
  int64_t recording_skipped = 0;             // rows not recorded while paused (logged on resume)
  TrackedRefitExecutor executor;
  std::unique_ptr<Detector> detector;  // last: destroyed first
};

// Keys to streams. Find does not allocate (heterogeneous lookup).
class StreamRegistry {
 public:
  Stream* Find(std::string_view key) const;
  // Requires: no stream with the same key. Returns the stored stream.
  Stream* Add(std::unique_ptr<Stream> stream);
  // Takes the stream out of the registry (nullptr for an unknown key); destroying the result waits
  // for its refit in flight.
  std::unique_ptr<Stream> Remove(std::string_view key);
  std::size_t size() const { return streams_.size(); }
  // Every stream, sorted by key.
  std::vector<Stream*> Sorted() const;
  // Destroys every stream (each waits for its refit in flight), in time linear in their number:
  // for the daemon's shutdown, so their metric series are left to the metrics registry, which
  // must be destroyed after (or never scraped again).
  void Clear();

 private:
  struct Hash {
    using is_transparent = void;
    std::size_t operator()(std::string_view s) const { return std::hash<std::string_view>{}(s); }
  };
  std::unordered_map<std::string, std::unique_ptr<Stream>, Hash, std::equal_to<>> streams_;
};

}  // namespace nuwatch
