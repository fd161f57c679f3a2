#include "service/stream_registry.h"

#include <algorithm>

namespace nuwatch {

AnomalyRatioRing::AnomalyRatioRing(int64_t capacity) : capacity_(capacity) {
  if (capacity < 1) {
    throw PreconditionError("AnomalyRatioRing: capacity = " + std::to_string(capacity) +
                            " must be >= 1");
  }
  bits_.assign(static_cast<std::size_t>((capacity + 63) / 64), 0);
}

void AnomalyRatioRing::Push(bool flagged) {
  uint64_t& word = bits_[static_cast<std::size_t>(next_ / 64)];
  const uint64_t mask = uint64_t{1} << (next_ % 64);
  if (size_ == capacity_) {
    if (word & mask) --flagged_;  // the oldest entry leaves
  } else {
    ++size_;
  }
  if (flagged) {
    word |= mask;
    ++flagged_;
  } else {
    word &= ~mask;
  }
  if (++next_ == capacity_) next_ = 0;
}

Stream::Stream(std::string stream_key, int stream_dims, const DetectorOptions& stream_options,
               RefitExecutor* pool, DaemonMetrics* metrics_registry, int64_t anomaly_ratio_window,
               std::function<void(Stream*)> on_refit_finished)
    : key(std::move(stream_key)),
      dims(stream_dims),
      options(stream_options),
      metrics_owner(metrics_registry),
      ratio(anomaly_ratio_window),
      row(static_cast<std::size_t>(std::max(stream_dims, 1))),
      executor(pool, [this, callback = std::move(on_refit_finished)] {
        if (callback) callback(this);
      }) {
  detector = std::make_unique<Detector>(options, dims, &executor);
  metrics = metrics_owner->AddStream(key);
  // Runs on the pool thread: only prometheus handles, which are thread-safe. The duration first,
  // so that a scrape that sees the refit counted sees its duration too.
  detector->set_refit_listener([m = metrics, owner = metrics_owner](const RefitReport& report) {
    if (!report.discarded) owner->refit_duration().Observe(report.total_seconds);
    m.refit(ClassifyRefit(report)).Increment();
  });
  RefreshSlowGauges();
}

Stream::~Stream() {
  detector.reset();
  if (!keep_metric_series) metrics_owner->RemoveStream(metrics);
}

void Stream::RefreshSlowGauges() {
  const auto model = detector->model();
  metrics.support_vectors->Set(model ? model->num_support() : 0);
  metrics.support_vector_budget->Set(static_cast<double>(options.support_vector_budget));
  metrics.false_alarm_rate_target->Set(options.false_alarm_rate);
  metrics.alarm_level->Set(model && model->calibrated() ? model->parts().calibration.level() : 0);
  metrics.window_vectors->Set(static_cast<double>(detector->window_size()));
  metrics.memory_bytes->Set(static_cast<double>(detector->MemoryBytes()));
  metrics.incidents_open->Set(detector->open_incident() ? 1 : 0);
  if (!model) {
    metrics.model_age_seconds->Set(0);
    metrics.model_data_age_seconds->Set(0);
  }
}

Stream* StreamRegistry::Find(std::string_view key) const {
  const auto it = streams_.find(key);
  return it == streams_.end() ? nullptr : it->second.get();
}

Stream* StreamRegistry::Add(std::unique_ptr<Stream> stream) {
  Stream* raw = stream.get();
  streams_.emplace(raw->key, std::move(stream));
  return raw;
}

std::unique_ptr<Stream> StreamRegistry::Remove(std::string_view key) {
  const auto it = streams_.find(key);
  if (it == streams_.end()) return nullptr;
  std::unique_ptr<Stream> stream = std::move(it->second);
  streams_.erase(it);
  return stream;
}

void StreamRegistry::Clear() {
  for (auto& [key, stream] : streams_) stream->keep_metric_series = true;
  streams_.clear();
}

std::vector<Stream*> StreamRegistry::Sorted() const {
  std::vector<Stream*> out;
  out.reserve(streams_.size());
  for (const auto& [key, stream] : streams_) out.push_back(stream.get());
  std::sort(out.begin(), out.end(),
            [](const Stream* a, const Stream* b) { return a->key < b->key; });
  return out;
}

}  // namespace nuwatch
