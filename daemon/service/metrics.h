// nuwatchd's Prometheus metrics: one registry, its families, and the handles of each stream's
// series, so that the hot path never looks a series up by its labels.
//
// Names (Prometheus conventions: prefix nuwatch_, base units, counters end in _total):
//   nuwatch_vectors_total{stream}             counter  vectors processed (learning and scored)
//   nuwatch_anomalies_total{stream}           counter  vectors flagged (p-value at most the level)
//   nuwatch_anomaly_ratio{stream}             gauge    flagged fraction of the last
//                                                      metrics.anomaly_ratio_window scored vectors:
//                                                      the realised rate
//   nuwatch_false_alarm_rate_target{stream}   gauge    detector.false_alarm_rate as configured
//                                                      (0: not set)
//   nuwatch_alarm_level{stream}               gauge    the p-value level the current model flags
//                                                      at: the target, lowered by the incident
//                                                      budget (0: uncalibrated or learning)
//   nuwatch_support_vectors{stream}           gauge    support vectors of the current model
//   nuwatch_support_vector_budget{stream}     gauge    the configured budget
//   nuwatch_window_vectors{stream}            gauge    vectors in the training window
//   nuwatch_refits_total{stream,result}       counter  result: ok, not_converged, failed,
//                                                      discarded, coalesced
//   nuwatch_refit_duration_seconds            histogram  wall time of each refit
//   nuwatch_score_duration_seconds            histogram  wall time of scoring one vector
//   nuwatch_rejected_messages_total{reason}   counter  rejected ingest messages (PROTOCOL.md §8)
//   nuwatch_incidents_open{stream}            gauge    1 while the stream has an open incident
//   nuwatch_model_age_seconds{stream}         gauge    wall-clock seconds since the daemon put
//                                                      the current model in place (a restored
//                                                      model: since the restart); set with each
//                                                      scored message
//   nuwatch_model_data_age_seconds{stream}    gauge    data time: latest vector's t minus the t of
//                                                      the vector that triggered the model's refit
//   nuwatch_stream_memory_bytes{stream}       gauge    window, model and solution bytes
//   nuwatch_streams                           gauge    streams tracked
//   nuwatch_streams_expired_total             counter  streams forgotten after
//                                                      limits.idle_expiry_seconds without a vector
//   nuwatch_streams_released_total            counter  streams unloaded (state file written and
//                                                      kept) because a reload gave them to another
//                                                      member (PROTOCOL.md §13.4)
//   nuwatch_cluster_members                   gauge    members in this replica's cluster.members
//                                                      list, 0 outside a cluster (replicas that
//                                                      disagree or a missing replica show in the
//                                                      fleet rules of nuwatch_rules.yml)
//   nuwatch_stream_handoffs_total{direction,outcome}  counter  streams handed between members
//                                                      after a change of cluster.members
//                                                      (PROTOCOL.md §13.4): direction sent
//                                                      (outcome ok, refused, timeout) or
//                                                      received (ok, refused, corrupt, timeout)
//   nuwatch_refits_queued                     gauge    refits waiting for a refit thread (at most
//                                                      one per stream: later ones are coalesced)
//   nuwatch_results_dropped_total{reason}     counter  results not handed to the result socket:
//                                                      subscriber_slow (a subscriber's queue was at
//                                                      publish.high_water_mark), send_error
//   nuwatch_incident_events_dropped_total{reason}  counter  incident events, likewise
//   nuwatch_state_write_failures_total        counter  state files that could not be written
//   nuwatch_auth_handshakes_total{socket}     counter  CURVE handshakes admitted (socket: ingest,
//                                                      publish, control; only with [auth]), and
//                                                      subscribe: handshakes with publishers
//   nuwatch_auth_refusals_total{socket,reason}  counter  peers refused: unknown_key,
//                                                      wrong_mechanism, bad_handshake,
//                                                      incomplete_handshake (curve_auth.h)
//   nuwatch_thread_cpu_seconds_total{thread}  counter  CPU time of nuwatchd's hot-path threads:
//                                                      socket (ingest, control) and scoring_0,
//                                                      scoring_1, ... (daemon.scoring_threads);
//                                                      a rate near 1 is a thread at a full core.
//                                                      Brought up to date about once a second
//   nuwatch_build_info{version}               gauge    always 1
//
// Thread safety: counters, gauges and histograms are prometheus-cpp objects (atomic, or locked
// inside), safe from any thread. AddStream and RemoveStream lock their families: call them once
// per stream, not per vector.
#pragma once

#include <prometheus/counter.h>
#include <prometheus/family.h>
#include <prometheus/gauge.h>
#include <prometheus/histogram.h>
#include <prometheus/registry.h>

#include <array>
#include <chrono>
#include <cstdint>
#include <memory>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/detector.h"
#include "protocol/wire_protocol.h"

namespace nuwatch {

// Why a message for the result socket was not handed to it (PROTOCOL.md §9.3).
enum class PublishDropReason : uint8_t { kSubscriberSlow, kSendError };
inline constexpr std::size_t kPublishDropReasonCount = 2;
// "subscriber_slow", "send_error".
std::string_view PublishDropReasonLabel(PublishDropReason reason);
enum class PublishedMessage : uint8_t { kResult, kIncidentEvent };

// The sockets CURVE protects, named by their ZAP domain and metric label: "ingest", "publish",
// "control".
// kSubscribe: the SUB socket of ingest.subscribe, a CURVE client (auth.subscribe_server_key_file).
enum class AuthSocket : uint8_t { kIngest, kPublish, kControl, kSubscribe };
inline constexpr std::size_t kAuthSocketCount = 4;
std::string_view AuthSocketLabel(AuthSocket socket);
// Why a peer was refused (PROTOCOL.md §12): unknown_key (CURVE, but its public key is not in
// auth.client_keys), wrong_mechanism (no CURVE), bad_handshake (the CURVE handshake failed: a wrong
// server key, a malformed command), incomplete_handshake (the peer went away or timed out before
// the handshake finished, e.g. a port scan), subscriber_limit (the result socket had
// publish.max_subscribers connections already; a series of the publish socket only),
// sender_limit (the ingest sockets had ingest.max_senders; of the ingest socket only).
enum class AuthRefusal : uint8_t {
  kUnknownKey,
  kWrongMechanism,
  kBadHandshake,
  kIncompleteHandshake,
  kSubscriberLimit,
  kSenderLimit
};
inline constexpr std::size_t kAuthRefusalCount = 6;
std::string_view AuthRefusalLabel(AuthRefusal reason);

// A stream handed to another member (kSent) or taken over from one (kReceived), PROTOCOL.md §13.4.
enum class HandoffDirection : uint8_t { kSent, kReceived };
// kOk: handed over and adopted. kRefused: the receiver refused it for good (sent: it said so;
// received: stream_exists, dims_mismatch, stream_limit, not_owner). kCorrupt (received only): the
// state did not decode. kTimeout: sent, no adoption within cluster.handoff_timeout_seconds (the
// state file stays); received, a key held for its state that did not come (started afresh).
// kWithdrawn (sent only): a later reload gave the stream back before it was adopted; it resumes
// here from the offered state.
enum class HandoffOutcome : uint8_t { kOk, kRefused, kCorrupt, kTimeout, kWithdrawn };
inline constexpr std::size_t kHandoffOutcomeCount = 5;

// Why the socket thread waited before handing an ingest message to its scoring thread: that
// thread's queue held kShardQueueMessages messages (daemon.cc), or ingest.scoring_queue_bytes.
enum class IngestWait : uint8_t { kMessages, kBytes };
inline constexpr std::size_t kIngestWaitCount = 2;

enum class RefitResult : uint8_t { kOk, kNotConverged, kFailed, kDiscarded, kCoalesced };
inline constexpr std::size_t kRefitResultCount = 5;
// "ok", "not_converged", "failed", "discarded", "coalesced".
std::string_view RefitResultLabel(RefitResult result);
// The result label of a finished refit (never kCoalesced: coalesced refits never run).
RefitResult ClassifyRefit(const RefitReport& report);

// The buckets of nuwatch_score_duration_seconds, in seconds.
const prometheus::Histogram::BucketBoundaries& ScoreDurationBounds();

// Observations of one histogram gathered by one thread, then handed to the shared histogram in
// one ObserveMultiple. prometheus-cpp's Observe takes the histogram's mutex each time: with two
// scoring threads timing every vector into one histogram, 42-62 ns of CPU an observation against
// 12.6 ns batched (tests/bench/metrics_bench.cc; README, "Timing the scoring without a lock a
// vector"). A value goes to the first bucket whose bound is at or above it, else to +Inf, as in
// prometheus-cpp's Observe. Not thread-safe: one per thread. Allocates only in the constructor.
class HistogramBatch {
 public:
  explicit HistogramBatch(const prometheus::Histogram::BucketBoundaries& bounds);
  void Observe(double value);
  int64_t pending() const { return pending_; }
  // Adds what was observed since the last flush to `histogram`, which must have the same bounds,
  // and starts afresh.
  void FlushTo(prometheus::Histogram& histogram);

 private:
  prometheus::Histogram::BucketBoundaries bounds_;
  std::vector<double> counts_;  // one per bound, then +Inf
  double sum_ = 0;
  int64_t pending_ = 0;
};

// Adds the calling thread's CPU time (CLOCK_THREAD_CPUTIME_ID) to its
// nuwatch_thread_cpu_seconds_total series about once a second, so that an operator can see a
// thread near a full core (a hot stream, too few scoring threads) where the process's CPU alone
// would hide it. Not thread-safe: one per thread, used only by the thread it measures.
class ThreadCpuMeter {
 public:
  explicit ThreadCpuMeter(prometheus::Counter& counter) : counter_(&counter) {}
  // Requires (Tick, Report): called by the measured thread only; its CPU time counts from the
  // thread's start, so the meter may be built on another thread.
  // Reports if a second has passed since the last report. `now`: the caller's reading of the
  // steady clock, so that a call between reports costs one comparison.
  void Tick(std::chrono::steady_clock::time_point now) {
    if (now >= due_) Report(now);
  }
  // Reports at once (at the thread's end). Ensures: the counter holds the thread's CPU time.
  void Report(std::chrono::steady_clock::time_point now);

 private:
  prometheus::Counter* counter_;
  double reported_seconds_ = 0;
  std::chrono::steady_clock::time_point due_{};
};

// The series of one stream. Valid until DaemonMetrics::RemoveStream.
struct StreamMetrics {
  prometheus::Counter* vectors = nullptr;
  prometheus::Counter* anomalies = nullptr;
  prometheus::Gauge* anomaly_ratio = nullptr;
  prometheus::Gauge* false_alarm_rate_target = nullptr;
  prometheus::Gauge* alarm_level = nullptr;
  prometheus::Gauge* support_vectors = nullptr;
  prometheus::Gauge* support_vector_budget = nullptr;
  prometheus::Gauge* window_vectors = nullptr;
  prometheus::Gauge* incidents_open = nullptr;
  prometheus::Gauge* model_age_seconds = nullptr;
  prometheus::Gauge* model_data_age_seconds = nullptr;
  prometheus::Gauge* memory_bytes = nullptr;
  std::array<prometheus::Counter*, kRefitResultCount> refits{};

  prometheus::Counter& refit(RefitResult result) const {
    return *refits[static_cast<std::size_t>(result)];
  }
};

class DaemonMetrics {
 public:
  // Creates every family, the rejection counter of every reason and nuwatch_build_info{version}.
  explicit DaemonMetrics(const std::string& version);
  DaemonMetrics(const DaemonMetrics&) = delete;
  DaemonMetrics& operator=(const DaemonMetrics&) = delete;

  const std::shared_ptr<prometheus::Registry>& registry() const { return registry_; }

  // Requires: no live series for `stream` (one AddStream per stream until its RemoveStream).
  StreamMetrics AddStream(const std::string& stream);
  void RemoveStream(const StreamMetrics& series);

  // Array lookup by reason; kNone is ignored.
  void CountRejected(RejectReason reason) const;
  prometheus::Histogram& refit_duration() const { return *refit_duration_; }
  prometheus::Histogram& score_duration() const { return *score_duration_; }
  prometheus::Gauge& streams() const { return *streams_; }
  prometheus::Gauge& refits_queued() const { return *refits_queued_; }
  prometheus::Gauge& ingest_queued_bytes() const { return *ingest_queued_bytes_; }
  prometheus::Gauge& ingest_unread_bytes() const { return *ingest_unread_bytes_; }
  prometheus::Counter& ingest_shed_messages() const { return *ingest_shed_messages_; }
  prometheus::Counter& ingest_shed_bytes() const { return *ingest_shed_bytes_; }
  prometheus::Counter& ingest_waits(IngestWait bound) const {
    return *ingest_waits_[static_cast<std::size_t>(bound)];
  }
  prometheus::Counter& streams_expired() const { return *streams_expired_; }
  prometheus::Counter& streams_released() const { return *streams_released_; }
  prometheus::Gauge& cluster_members() const { return *cluster_members_; }
  prometheus::Gauge& publish_connections() const { return *publish_connections_; }
  prometheus::Counter& ingest_connections_cut() const { return *ingest_connections_cut_; }
  prometheus::Gauge& ingest_connections() const { return *ingest_connections_; }
  // Requires: not (kSent, kCorrupt) nor (kReceived, kWithdrawn), which are not series (a sender's
  // corrupt state is refused; only a sender withdraws).
  prometheus::Counter& handoffs(HandoffDirection direction, HandoffOutcome outcome) const {
    return *handoffs_[static_cast<std::size_t>(direction)][static_cast<std::size_t>(outcome)];
  }
  // nuwatch_results_dropped_total or nuwatch_incident_events_dropped_total, by reason.
  prometheus::Counter& publish_dropped(PublishedMessage message, PublishDropReason reason) const {
    return *publish_dropped_[static_cast<std::size_t>(message)][static_cast<std::size_t>(reason)];
  }
  prometheus::Counter& state_write_failures() const { return *state_write_failures_; }
  // Requires: kSubscriberLimit only with kPublish, kSenderLimit only with kIngest.
  prometheus::Counter& auth_refused(AuthSocket socket, AuthRefusal reason) const {
    return *auth_refused_[static_cast<std::size_t>(socket)][static_cast<std::size_t>(reason)];
  }
  prometheus::Counter& auth_admitted(AuthSocket socket) const {
    return *auth_admitted_[static_cast<std::size_t>(socket)];
  }

  // nuwatch_thread_cpu_seconds_total{thread}; one call per thread (the series is created).
  prometheus::Counter& thread_cpu(const std::string& thread) const {
    return thread_cpu_->Add({{"thread", thread}});
  }

  // The text exposition format, as /metrics serves it.
  std::string Serialize() const;

 private:
  std::shared_ptr<prometheus::Registry> registry_;
  prometheus::Family<prometheus::Counter>* vectors_;
  prometheus::Family<prometheus::Counter>* anomalies_;
  prometheus::Family<prometheus::Gauge>* anomaly_ratio_;
  prometheus::Family<prometheus::Gauge>* false_alarm_rate_target_;
  prometheus::Family<prometheus::Gauge>* alarm_level_;
  prometheus::Family<prometheus::Gauge>* support_vectors_;
  prometheus::Family<prometheus::Gauge>* support_vector_budget_;
  prometheus::Family<prometheus::Gauge>* window_vectors_;
  prometheus::Family<prometheus::Counter>* refits_;
  prometheus::Family<prometheus::Gauge>* incidents_open_;
  prometheus::Family<prometheus::Gauge>* model_age_;
  prometheus::Family<prometheus::Gauge>* model_data_age_;
  prometheus::Family<prometheus::Gauge>* memory_;
  std::array<prometheus::Counter*, 256> rejected_{};
  prometheus::Histogram* refit_duration_;
  prometheus::Histogram* score_duration_;
  prometheus::Gauge* streams_;
  prometheus::Gauge* refits_queued_;
  prometheus::Gauge* ingest_queued_bytes_;
  prometheus::Gauge* ingest_unread_bytes_;
  prometheus::Counter* ingest_shed_messages_;
  prometheus::Counter* ingest_shed_bytes_;
  std::array<prometheus::Counter*, kIngestWaitCount> ingest_waits_{};
  prometheus::Counter* streams_expired_;
  prometheus::Counter* streams_released_;
  prometheus::Gauge* cluster_members_;
  prometheus::Gauge* publish_connections_;
  prometheus::Counter* ingest_connections_cut_;
  prometheus::Gauge* ingest_connections_;
  prometheus::Family<prometheus::Counter>* thread_cpu_;
  std::array<std::array<prometheus::Counter*, kHandoffOutcomeCount>, 2> handoffs_{};
  std::array<std::array<prometheus::Counter*, kPublishDropReasonCount>, 2> publish_dropped_{};
  prometheus::Counter* state_write_failures_;
  std::array<std::array<prometheus::Counter*, kAuthRefusalCount>, kAuthSocketCount> auth_refused_{};
  std::array<prometheus::Counter*, kAuthSocketCount> auth_admitted_{};
};

}  // namespace nuwatch
