#include "service/metrics.h"

#include <prometheus/text_serializer.h>

#include <algorithm>
#include <ctime>  // clock_gettime, CLOCK_THREAD_CPUTIME_ID (POSIX)
#include <sstream>

namespace nuwatch {

const prometheus::Histogram::BucketBoundaries& ScoreDurationBounds() {
  static const prometheus::Histogram::BucketBoundaries bounds{
      1e-6, 2.5e-6, 5e-6, 1e-5, 2.5e-5, 5e-5, 1e-4, 2.5e-4, 5e-4, 1e-3, 2.5e-3, 5e-3, 1e-2};
  return bounds;
}

HistogramBatch::HistogramBatch(const prometheus::Histogram::BucketBoundaries& bounds)
    : bounds_(bounds), counts_(bounds.size() + 1, 0.0) {}

void HistogramBatch::Observe(double value) {
  const auto bucket = std::lower_bound(bounds_.begin(), bounds_.end(), value) - bounds_.begin();
  counts_[static_cast<std::size_t>(bucket)] += 1;
  sum_ += value;
  ++pending_;
}

void HistogramBatch::FlushTo(prometheus::Histogram& histogram) {
  if (pending_ == 0) return;
  histogram.ObserveMultiple(counts_, sum_);
  std::fill(counts_.begin(), counts_.end(), 0.0);
  sum_ = 0;
  pending_ = 0;
}

std::string_view RefitResultLabel(RefitResult result) {
  switch (result) {
    case RefitResult::kOk:
      return "ok";
    case RefitResult::kNotConverged:
      return "not_converged";
    case RefitResult::kFailed:
      return "failed";
    case RefitResult::kDiscarded:
      return "discarded";
    case RefitResult::kCoalesced:
      return "coalesced";
  }
  return "unknown";
}

std::string_view PublishDropReasonLabel(PublishDropReason reason) {
  switch (reason) {
    case PublishDropReason::kSubscriberSlow:
      return "subscriber_slow";
    case PublishDropReason::kSendError:
      return "send_error";
  }
  return "unknown";
}

std::string_view AuthSocketLabel(AuthSocket socket) {
  switch (socket) {
    case AuthSocket::kIngest:
      return "ingest";
    case AuthSocket::kPublish:
      return "publish";
    case AuthSocket::kControl:
      return "control";
    case AuthSocket::kSubscribe:
      return "subscribe";
  }
  return "unknown";
}

std::string_view AuthRefusalLabel(AuthRefusal reason) {
  switch (reason) {
    case AuthRefusal::kUnknownKey:
      return "unknown_key";
    case AuthRefusal::kWrongMechanism:
      return "wrong_mechanism";
    case AuthRefusal::kBadHandshake:
      return "bad_handshake";
    case AuthRefusal::kIncompleteHandshake:
      return "incomplete_handshake";
    case AuthRefusal::kSubscriberLimit:
      return "subscriber_limit";
    case AuthRefusal::kSenderLimit:
      return "sender_limit";
  }
  return "unknown";
}

RefitResult ClassifyRefit(const RefitReport& report) {
  if (report.discarded) return RefitResult::kDiscarded;
  if (!report.ok) return RefitResult::kFailed;
  return report.converged ? RefitResult::kOk : RefitResult::kNotConverged;
}

namespace {

template <typename Builder>
auto& Build(Builder builder, const std::string& name, const std::string& help,
            prometheus::Registry& registry) {
  return builder.Name(name).Help(help).Register(registry);
}

}  // namespace

DaemonMetrics::DaemonMetrics(const std::string& version)
    : registry_(std::make_shared<prometheus::Registry>()) {
  using prometheus::BuildCounter;
  using prometheus::BuildGauge;
  using prometheus::BuildHistogram;
  auto& r = *registry_;
  vectors_ = &Build(BuildCounter(), "nuwatch_vectors_total",
                    "Vectors processed per stream, learning and scored.", r);
  anomalies_ = &Build(BuildCounter(), "nuwatch_anomalies_total",
                      "Vectors flagged: p-value at most the calibrated level (decision < 0 for "
                      "an uncalibrated model).",
                      r);
  anomaly_ratio_ = &Build(BuildGauge(), "nuwatch_anomaly_ratio",
                          "Fraction of the stream's last metrics.anomaly_ratio_window scored "
                          "vectors that were flagged: the realised alarm rate.",
                          r);
  false_alarm_rate_target_ =
      &Build(BuildGauge(), "nuwatch_false_alarm_rate_target",
             "The per-vector false-alarm budget configured (detector.false_alarm_rate; 0: not "
             "set).",
             r);
  alarm_level_ = &Build(BuildGauge(), "nuwatch_alarm_level",
                        "The p-value level the stream's current model flags at: the false-alarm "
                        "budget, lowered where the incident budget requires (0: uncalibrated or "
                        "learning). On normal data the realised rate should stay near it.",
                        r);
  support_vectors_ = &Build(BuildGauge(), "nuwatch_support_vectors",
                            "Support vectors in the stream's current model (0 while learning).", r);
  support_vector_budget_ = &Build(
      BuildGauge(), "nuwatch_support_vector_budget",
      "Configured maximum of support vectors per model (detector.support_vector_budget).", r);
  window_vectors_ =
      &Build(BuildGauge(), "nuwatch_window_vectors", "Vectors in the stream's training window.", r);
  refits_ = &Build(BuildCounter(), "nuwatch_refits_total",
                   "Refits by result: ok, not_converged (stopped at the iteration cap, model "
                   "used), failed (old model kept), discarded (stream relearnt meanwhile), "
                   "coalesced (due while one was running, folded into the next).",
                   r);
  incidents_open_ = &Build(BuildGauge(), "nuwatch_incidents_open",
                           "1 while the stream has an open incident, else 0.", r);
  model_age_ = &Build(BuildGauge(), "nuwatch_model_age_seconds",
                      "Wall-clock seconds since the daemon put the stream's current model in "
                      "place (a model restored from its state file: since the restart), as of the "
                      "stream's latest scored message (0 while learning).",
                      r);
  model_data_age_ = &Build(BuildGauge(), "nuwatch_model_data_age_seconds",
                           "Data time since the model was fitted: the latest vector's timestamp "
                           "minus the timestamp of the vector that triggered the model's refit "
                           "(0 while learning).",
                           r);
  memory_ = &Build(BuildGauge(), "nuwatch_stream_memory_bytes",
                   "Bytes held for the stream: window, model, last solution, incident ring.", r);

  auto& rejected =
      Build(BuildCounter(), "nuwatch_rejected_messages_total",
            "Ingest messages rejected, by reason (daemon/protocol/PROTOCOL.md section 8).", r);
  for (RejectReason reason : AllRejectReasons()) {
    rejected_[static_cast<std::size_t>(reason)] =
        &rejected.Add({{"reason", std::string(RejectReasonLabel(reason))}});
  }

  refit_duration_ =
      &Build(BuildHistogram(), "nuwatch_refit_duration_seconds",
             "Wall time of each refit, from the window copy to the model swap.", r)
           .Add({}, prometheus::Histogram::BucketBoundaries{0.001, 0.0025, 0.005, 0.01, 0.025, 0.05,
                                                            0.1, 0.25, 0.5, 1, 2.5, 5, 10});
  score_duration_ = &Build(BuildHistogram(), "nuwatch_score_duration_seconds",
                           "Wall time of scoring one vector (Detector::Observe).", r)
                         .Add({}, ScoreDurationBounds());
  streams_ = &Build(BuildGauge(), "nuwatch_streams", "Streams tracked.", r).Add({});
  streams_expired_ =
      &Build(BuildCounter(), "nuwatch_streams_expired_total",
             "Streams forgotten after limits.idle_expiry_seconds without a vector.", r)
           .Add({});
  streams_released_ = &Build(BuildCounter(), "nuwatch_streams_released_total",
                             "Streams unloaded, their state file written and kept, because a "
                             "reload of cluster.members gave them to another member.",
                             r)
                           .Add({});
  cluster_members_ =
      &Build(BuildGauge(), "nuwatch_cluster_members",
             "Members in this replica's cluster.members list (0: not part of a cluster).", r)
           .Add({});
  publish_connections_ =
      &Build(BuildGauge(), "nuwatch_publish_connections",
             "Connections to the result socket: subscribers, and peers still in their handshake "
             "(publish.max_subscribers bounds them).",
             r)
           .Add({});
  auto& handoffs = Build(BuildCounter(), "nuwatch_stream_handoffs_total",
                         "Streams handed between members after a change of cluster.members, by "
                         "direction (sent, received) and outcome: ok (adopted), refused (for "
                         "good), corrupt (received state that did not decode), timeout (sent: "
                         "not adopted in time, the state file stays; received: held for a state "
                         "that did not come, started afresh), withdrawn (sent: a later reload "
                         "gave the stream back before it was adopted; it resumes here).",
                         r);
  // HandoffOutcome's order
  const char* outcomes[] = {"ok", "refused", "corrupt", "timeout", "withdrawn"};
  for (std::size_t i = 0; i < kHandoffOutcomeCount; ++i) {
    const auto outcome = static_cast<HandoffOutcome>(i);
    // A sender refuses its own undecodable state before sending: no sent/corrupt series; only a
    // sender withdraws: no received/withdrawn series.
    if (outcome != HandoffOutcome::kCorrupt) {
      handoffs_[0][i] = &handoffs.Add({{"direction", "sent"}, {"outcome", outcomes[i]}});
    }
    if (outcome != HandoffOutcome::kWithdrawn) {
      handoffs_[1][i] = &handoffs.Add({{"direction", "received"}, {"outcome", outcomes[i]}});
    }
  }
  refits_queued_ = &Build(BuildGauge(), "nuwatch_refits_queued",
                          "Refits waiting for a refit thread (at most one per stream).", r)
                        .Add({});
  ingest_connections_ =
      &Build(BuildGauge(), "nuwatch_ingest_connections",
             "Connections to the ingest sockets (PULL): senders, and peers still in their "
             "handshake (ingest.max_senders bounds them).",
             r)
           .Add({});
  ingest_connections_cut_ =
      &Build(BuildCounter(), "nuwatch_ingest_connections_cut_total",
             "Ingest TCP connections the daemon shut down because ZeroMQ held more of their bytes "
             "than a message in progress and the kernel's buffer explain: a message whose frames "
             "never end (README, \"A message that never ends\").",
             r)
           .Add({});
  ingest_unread_bytes_ =
      &Build(BuildGauge(), "nuwatch_ingest_unread_bytes",
             "Bytes ZeroMQ and the kernel hold for the ingest TCP connections, received and not "
             "read by the daemon yet, at the last check (ingest.max_unread_bytes bounds it).",
             r)
           .Add({});
  ingest_shed_messages_ =
      &Build(BuildCounter(), "nuwatch_ingest_shed_messages_total",
             "Ingest messages read and dropped unscored because ZeroMQ held more than "
             "ingest.max_unread_bytes for the ingest connections, from the senders holding most.",
             r)
           .Add({});
  ingest_shed_bytes_ = &Build(BuildCounter(), "nuwatch_ingest_shed_bytes_total",
                              "Bytes of the messages in nuwatch_ingest_shed_messages_total (all "
                              "their frames, as read).",
                              r)
                            .Add({});
  ingest_queued_bytes_ =
      &Build(BuildGauge(), "nuwatch_ingest_queued_bytes",
             "Bytes of ingest messages handed to the scoring threads and not scored yet (at most "
             "ingest.scoring_queue_bytes and one message per scoring thread; what waits beyond "
             "that stays in ZeroMQ's queues, ingest.receive_high_water_mark messages per "
             "connection).",
             r)
           .Add({});
  auto& ingest_waits = Build(BuildCounter(), "nuwatch_ingest_waits_total",
                             "Times the socket thread waited before handing an ingest message "
                             "to its scoring thread, whose queue was full, by bound: messages "
                             "(1000 queued) or bytes (ingest.scoring_queue_bytes queued). Ingest "
                             "then backs up into ZeroMQ's queues and the senders; nothing is "
                             "dropped.",
                             r);
  ingest_waits_[static_cast<std::size_t>(IngestWait::kMessages)] =
      &ingest_waits.Add({{"bound", "messages"}});
  ingest_waits_[static_cast<std::size_t>(IngestWait::kBytes)] =
      &ingest_waits.Add({{"bound", "bytes"}});
  auto& results_dropped =
      Build(BuildCounter(), "nuwatch_results_dropped_total",
            "Results (one per vector processed) not handed to the result socket, by reason: "
            "subscriber_slow (a subscriber's queue was at publish.high_water_mark; the result "
            "went to no subscriber), send_error (another ZeroMQ error).",
            r);
  auto& events_dropped = Build(BuildCounter(), "nuwatch_incident_events_dropped_total",
                               "Incident events not handed to the result socket, by reason (as "
                               "nuwatch_results_dropped_total).",
                               r);
  for (std::size_t i = 0; i < kPublishDropReasonCount; ++i) {
    const prometheus::Labels labels{
        {"reason", std::string(PublishDropReasonLabel(static_cast<PublishDropReason>(i)))}};
    publish_dropped_[static_cast<std::size_t>(PublishedMessage::kResult)][i] =
        &results_dropped.Add(labels);
    publish_dropped_[static_cast<std::size_t>(PublishedMessage::kIncidentEvent)][i] =
        &events_dropped.Add(labels);
  }
  thread_cpu_ = &Build(BuildCounter(), "nuwatch_thread_cpu_seconds_total",
                       "CPU time of nuwatchd's hot-path threads: socket (ingest and control) and "
                       "scoring_0, scoring_1, ... (daemon.scoring_threads). A rate near 1 is a "
                       "thread at a full core. Brought up to date about once a second.",
                       r);
  state_write_failures_ = &Build(BuildCounter(), "nuwatch_state_write_failures_total",
                                 "State files that could not be written.", r)
                               .Add({});
  auto& admitted =
      Build(BuildCounter(), "nuwatch_auth_handshakes_total",
            "CURVE handshakes admitted by the daemon's ZAP handler, by socket (ingest, "
            "publish, control, subscribe); stays 0 without [auth].",
            r);
  auto& refused = Build(BuildCounter(), "nuwatch_auth_refusals_total",
                        "Peers refused on a CURVE socket, by socket and reason: unknown_key (not "
                        "in auth.client_keys), wrong_mechanism (no CURVE), bad_handshake (e.g. a "
                        "wrong server key), incomplete_handshake (gone before it finished); and "
                        "on the result socket, with or without CURVE, subscriber_limit (it had "
                        "publish.max_subscribers connections); on the ingest socket, with or "
                        "without CURVE, sender_limit (ingest.max_senders).",
                        r);
  for (std::size_t i = 0; i < kAuthSocketCount; ++i) {
    const std::string socket(AuthSocketLabel(static_cast<AuthSocket>(i)));
    auth_admitted_[i] = &admitted.Add({{"socket", socket}});
    for (std::size_t j = 0; j < kAuthRefusalCount; ++j) {
      if (static_cast<AuthRefusal>(j) == AuthRefusal::kSubscriberLimit &&
          static_cast<AuthSocket>(i) != AuthSocket::kPublish) {
        continue;
      }
      if (static_cast<AuthRefusal>(j) == AuthRefusal::kSenderLimit &&
          static_cast<AuthSocket>(i) != AuthSocket::kIngest) {
        continue;
      }
      auth_refused_[i][j] =
          &refused.Add({{"socket", socket},
                        {"reason", std::string(AuthRefusalLabel(static_cast<AuthRefusal>(j)))}});
    }
  }
  Build(BuildGauge(), "nuwatch_build_info", "Always 1; the version label names the build.", r)
      .Add({{"version", version}})
      .Set(1);
}

StreamMetrics DaemonMetrics::AddStream(const std::string& stream) {
  const prometheus::Labels labels{{"stream", stream}};
  StreamMetrics m;
  m.vectors = &vectors_->Add(labels);
  m.anomalies = &anomalies_->Add(labels);
  m.anomaly_ratio = &anomaly_ratio_->Add(labels);
  m.false_alarm_rate_target = &false_alarm_rate_target_->Add(labels);
  m.alarm_level = &alarm_level_->Add(labels);
  m.support_vectors = &support_vectors_->Add(labels);
  m.support_vector_budget = &support_vector_budget_->Add(labels);
  m.window_vectors = &window_vectors_->Add(labels);
  m.incidents_open = &incidents_open_->Add(labels);
  m.model_age_seconds = &model_age_->Add(labels);
  m.model_data_age_seconds = &model_data_age_->Add(labels);
  m.memory_bytes = &memory_->Add(labels);
  for (std::size_t i = 0; i < kRefitResultCount; ++i) {
    m.refits[i] =
        &refits_->Add({{"stream", stream},
                       {"result", std::string(RefitResultLabel(static_cast<RefitResult>(i)))}});
  }
  return m;
}

void DaemonMetrics::RemoveStream(const StreamMetrics& m) {
  if (m.vectors) vectors_->Remove(m.vectors);
  if (m.anomalies) anomalies_->Remove(m.anomalies);
  if (m.anomaly_ratio) anomaly_ratio_->Remove(m.anomaly_ratio);
  if (m.false_alarm_rate_target) false_alarm_rate_target_->Remove(m.false_alarm_rate_target);
  if (m.alarm_level) alarm_level_->Remove(m.alarm_level);
  if (m.support_vectors) support_vectors_->Remove(m.support_vectors);
  if (m.support_vector_budget) support_vector_budget_->Remove(m.support_vector_budget);
  if (m.window_vectors) window_vectors_->Remove(m.window_vectors);
  if (m.incidents_open) incidents_open_->Remove(m.incidents_open);
  if (m.model_age_seconds) model_age_->Remove(m.model_age_seconds);
  if (m.model_data_age_seconds) model_data_age_->Remove(m.model_data_age_seconds);
  if (m.memory_bytes) memory_->Remove(m.memory_bytes);
  for (prometheus::Counter* c : m.refits)
    if (c) refits_->Remove(c);
}

void DaemonMetrics::CountRejected(RejectReason reason) const {
  if (prometheus::Counter* c = rejected_[static_cast<std::size_t>(reason)]) c->Increment();
}

void ThreadCpuMeter::Report(std::chrono::steady_clock::time_point now) {
  timespec cpu{};
  if (::clock_gettime(CLOCK_THREAD_CPUTIME_ID, &cpu) != 0) return;  // never for the own thread
  const double seconds = static_cast<double>(cpu.tv_sec) + 1e-9 * static_cast<double>(cpu.tv_nsec);
  if (seconds > reported_seconds_) counter_->Increment(seconds - reported_seconds_);
  reported_seconds_ = std::max(reported_seconds_, seconds);
  due_ = now + std::chrono::seconds(1);
}

std::string DaemonMetrics::Serialize() const {
  std::ostringstream out;
  prometheus::TextSerializer().Serialize(out, registry_->Collect());
  return out.str();
}

}  // namespace nuwatch
