// nuwatchd as a child process with a subscriber that does not read: every result is either
// received or counted as dropped (issue 9, section 4; PROTOCOL.md §9 promises one result per
// accepted vector, §9.3 the count of those not delivered). The subscriber is a plain cppzmq SUB
// socket and the counts are read from the daemon's /metrics, so both sides of the balance come
// from outside the daemon's code. Nothing waits for time: the test polls for the conditions it
// needs, each bounded by a deadline.
#include <gtest/gtest.h>

#include <chrono>
#include <filesystem>
#include <fstream>
#include <functional>
#include <nlohmann/json.hpp>
#include <string>
#include <thread>
#include <vector>
#include <zmq.hpp>

#include "common/child_daemon.h"
#include "protocol/wire_protocol.h"

namespace nuwatch {
namespace {

using Clock = std::chrono::steady_clock;
using testing_data::ChildProcess;
using testing_data::HttpGet;
using testing_data::SeriesValue;
using testing_data::SumOfSeries;
namespace fs = std::filesystem;

constexpr auto kDeadline = std::chrono::seconds(60);  // generous: the machine is shared

// Polls (every few milliseconds) until `condition` holds or the deadline passes.
bool PollUntil(const std::function<bool()>& condition) {
  const auto until = Clock::now() + kDeadline;
  while (Clock::now() < until) {
    if (condition()) return true;
    std::this_thread::sleep_for(std::chrono::milliseconds(5));  // pacing, not a wait for time
  }
  return condition();
}

// A small result queue (publish.high_water_mark = 10), so that a subscriber that stops reading
// fills it quickly.
const char* const kConfig = R"(
[daemon]
log_level = "warn"
[ingest]
endpoints = ["tcp://127.0.0.1:*"]
[publish]
endpoint = "tcp://127.0.0.1:*"
high_water_mark = 10
[control]
endpoint = "tcp://127.0.0.1:*"
allow_unauthenticated_tcp = true
[metrics]
listen = "127.0.0.1:0"
[detector]
nu = 0.1
window = 40
warmup = 20
refit_every = 0
[[stream]]
match = "probe"
window = 1000
warmup = 1000
)";

std::string Payload(const std::vector<double>& times, const std::vector<double>& values, int dims) {
  std::string out;
  EncodeBinaryPayload(times, values.data(), dims, Dtype::kFloat64, &out);
  return out;
}

class PublishDrops : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = fs::temp_directory_path() / ("nuwatch_publish_drops_" + std::to_string(::getpid()));
    fs::remove_all(dir_);
    fs::create_directories(dir_);
    std::ofstream(dir_ / "nuwatchd.toml") << kConfig;
    daemon_ = std::make_unique<ChildProcess>(
        std::vector<std::string>{NUWATCHD_PROGRAM, "--config", (dir_ / "nuwatchd.toml").string(),
                                 "--ready-file", (dir_ / "ready.json").string()},
        (dir_ / "log.txt").string());
    ASSERT_GT(daemon_->pid(), 0);
    ASSERT_TRUE(PollUntil([&] { return fs::exists(dir_ / "ready.json"); }))
        << testing_data::ReadWholeFile((dir_ / "log.txt").string());
    endpoints_ = testing_data::ReadReadyFile((dir_ / "ready.json").string());
  }
  void TearDown() override {
    daemon_.reset();
    fs::remove_all(dir_);
  }
  std::string Metrics() const { return HttpGet(endpoints_.metrics, "/metrics"); }

  fs::path dir_;
  std::unique_ptr<ChildProcess> daemon_;
  testing_data::ReadyEndpoints endpoints_;
};

TEST_F(PublishDrops, ASubscriberThatDoesNotReadLosesNoResultWithoutACount) {
  zmq::context_t context(1);
  zmq::socket_t push(context, zmq::socket_type::push);
  zmq::socket_t sub(context, zmq::socket_type::sub);
  push.set(zmq::sockopt::linger, 0);
  sub.set(zmq::sockopt::linger, 0);
  // Small queues on the subscriber's side too, so that the daemon's queue fills after a few MB
  // of TCP buffers rather than after the subscriber's default 1000 messages plus those.
  sub.set(zmq::sockopt::rcvhwm, 10);
  sub.set(zmq::sockopt::rcvbuf, 4096);
  sub.set(zmq::sockopt::subscribe, "");
  push.connect(endpoints_.ingest.at(0));
  sub.connect(endpoints_.publish);

  // The subscription takes effect asynchronously: probe vectors until a result arrives.
  double probe_time = 0;
  auto send_probe = [&] {
    push.send(zmq::str_buffer("probe"), zmq::send_flags::sndmore);
    push.send(zmq::buffer(Payload({probe_time}, {0.0}, 1)), zmq::send_flags::none);
    probe_time += 1;
  };
  std::vector<zmq::pollitem_t> items = {{sub.handle(), 0, ZMQ_POLLIN, 0}};
  // Results counted for the balance: every pump-01 result, and the probe results of the final
  // probes (t >= counted_probes_from). Probes sent before the subscription took effect were
  // published to no subscriber (neither received nor dropped), so the first ones are left out.
  double results = 0, events = 0, counted_probes_from = 1e300;
  bool counted_probe_received = false;  // the result of one of the final probes came in
  zmq::message_t key, body;
  auto read_available = [&](std::chrono::milliseconds wait) -> std::string {
    std::string last_key;
    if (zmq::poll(items, wait) == 0) return last_key;
    while (sub.recv(key, zmq::recv_flags::dontwait)) {
      EXPECT_TRUE(key.more()) << "a result message has two frames (PROTOCOL.md §9)";
      (void)sub.recv(body);
      if (body.to_string_view().find("\"event\"") != std::string_view::npos) {
        ++events;
      } else {
        last_key = key.to_string();
        if (last_key != "probe") {
          ++results;
        } else if (nlohmann::json::parse(body.to_string_view())["t"].get<double>() >=
                   counted_probes_from) {
          ++results;
          counted_probe_received = true;
        }
      }
    }
    return last_key;
  };
  ASSERT_TRUE(PollUntil([&] {
    send_probe();
    return !read_available(std::chrono::milliseconds(20)).empty();
  }));
  const double first_probes = probe_time;
  ASSERT_TRUE(PollUntil([&] {
    return SeriesValue(Metrics(), "nuwatch_vectors_total{stream=\"probe\"}").value_or(0) ==
           first_probes;
  }));
  // Whatever became of the first probes' results is decided: drops from here on are counted.
  const double dropped_at_start = SumOfSeries(Metrics(), "nuwatch_results_dropped_total");

  // 128,000 vectors in 64-vector messages while the subscriber reads nothing: their results
  // (about 150 bytes each, 19 MB) overflow the TCP buffers of loopback (a few MB by default,
  // net.ipv4.tcp_wmem; common practice) and then the daemon's queue of 10.
  constexpr int kMessages = 2000, kPerMessage = 64, kDims = 2;
  std::vector<double> times(kPerMessage), values(kPerMessage * kDims);
  for (int m = 0; m < kMessages; ++m) {
    for (int i = 0; i < kPerMessage; ++i) {
      times[i] = 1000.0 + m * kPerMessage + i;
      values[2 * i] = 5 + 0.01 * ((m * 7 + i * 13) % 100);
      values[2 * i + 1] = 100 + 0.03 * ((m * 11 + i * 17) % 100);
    }
    push.send(zmq::str_buffer("pump-01"), zmq::send_flags::sndmore);
    push.send(zmq::buffer(Payload(times, values, kDims)), zmq::send_flags::none);
  }
  const double flood = static_cast<double>(kMessages) * kPerMessage;
  ASSERT_TRUE(PollUntil([&] {
    return SeriesValue(Metrics(), "nuwatch_vectors_total{stream=\"pump-01\"}").value_or(0) == flood;
  })) << "the daemon did not process every vector";
  const double dropped_while_stalled =
      SumOfSeries(Metrics(), "nuwatch_results_dropped_total") - dropped_at_start;
  EXPECT_GT(dropped_while_stalled, 0) << "the queue never filled: the test proves nothing";

  // Now read everything; a probe sent after the flood marks the end: once its result is in, every
  // earlier result has arrived (one queue per subscriber, in order) or was dropped. A probe can
  // itself be dropped while the queue still drains (counted): then another one is sent. The
  // results of the first probes may still be queued ahead of the flood's (the subscriber stopped
  // reading as soon as one had arrived), so only a final probe's result ends the wait.
  double dropped_before_probe = SumOfSeries(Metrics(), "nuwatch_results_dropped_total");
  counted_probes_from = probe_time;
  send_probe();
  const bool ended = PollUntil([&] {
    (void)read_available(std::chrono::milliseconds(50));
    if (counted_probe_received) return true;
    const double dropped = SumOfSeries(Metrics(), "nuwatch_results_dropped_total");
    if (dropped > dropped_before_probe) {  // perhaps the probe's result: send another
      dropped_before_probe = dropped;
      send_probe();
    }
    return false;
  });
  ASSERT_TRUE(ended) << "the last probe's result never arrived";

  const std::string text = Metrics();
  EXPECT_EQ(SumOfSeries(text, "nuwatch_vectors_total"), flood + probe_time)
      << "every vector sent is accepted";
  const double accepted = flood + (probe_time - counted_probes_from);  // since dropped_at_start
  const double dropped_slow =
      SeriesValue(text, "nuwatch_results_dropped_total{reason=\"subscriber_slow\"}").value_or(-1) -
      dropped_at_start;
  const double dropped_error =
      SeriesValue(text, "nuwatch_results_dropped_total{reason=\"send_error\"}").value_or(-1);
  EXPECT_EQ(dropped_error, 0);
  EXPECT_GE(dropped_slow, dropped_while_stalled);
  // The balance of issue 9 section 6: results received + drops counted = vectors accepted.
  EXPECT_EQ(results + dropped_slow + dropped_error, accepted)
      << "received " << results << ", dropped " << dropped_slow << " + " << dropped_error;
  EXPECT_GT(results, 0);
  EXPECT_TRUE(SeriesValue(text, "nuwatch_incident_events_dropped_total{reason=\"subscriber_slow\"}")
                  .has_value());
}

}  // namespace
}  // namespace nuwatch
