// nuwatch_daemon_bench: nuwatchd against bare ZeroMQ, in one run, with the same frames (issue 9,
// section 6). Not a test (ctest does not run it): a benchmark whose figures go into README.md.
//
// Two targets are started as child processes on loopback ephemeral ports:
//   relay     this program with --relay: a PULL socket forwarding every message as it is to a
//             PUB socket, the bare transport cost of a PUSH/PULL + PUB/SUB hop;
//   nuwatchd  the daemon, --streams streams warmed up first (d = 16, window 2000, nu chosen for
//             about 150 support vectors, refit_every = 0 so that only scoring runs during the
//             phases), daemon.scoring_threads = --scoring-threads (0: one per core). Messages go
//             to the streams in turn; nuwatchd gives each scoring thread an equal share of the
//             streams (checked against status's scoring_thread).
// For each message form (1 vector JSON, 1 vector binary, 64 vectors binary; frames made by the
// protocol library's encoders) the phases alternate relay and nuwatchd (--rounds times), each
// sending as fast as PUSH takes them for --seconds and waiting until every message was handled.
// Per form it reports the vectors/s through each (vectors sent / time from the first send to the
// last result received), their ratio, results received by the subscriber against vectors accepted
// (nuwatch_vectors_total, from /metrics) and drops counted (nuwatch_results_dropped_total),
// vectors sent against those accepted and those in messages shed at ingest
// (nuwatch_ingest_shed_messages_total, past ingest.max_unread_bytes), the
// CPU seconds per vector of the nuwatchd process, of its socket thread and of its scoring threads
// together in the full-rate phases (from /proc, so that a busy machine stretches wall time but
// not these), and then p50/p99 ingest-to-result latency at
// half of nuwatchd's maximum rate for that form (the result's `t` is the send time).
// --latency-trace FILE appends every latency sample to a CSV file, with when it came in.
// --compare-result-forms: instead of the relay comparison, one nuwatchd takes 64-vector binary
// messages while its publish.result_form alternates between "json" (with publish.batches, one
// §9.4 JSON batch per message) and "binary" (one §9.5 batch per message), switched by `reload`
// between phases (--rounds each); it reports vectors/s, CPU per vector and bytes per result of
// each form and their ratios.
// --shutdown-streams N: a second nuwatchd gets N streams (one vector each, window 2000, a state
// directory) and the time from SIGTERM to its exit is measured, with its RSS per stream.
// --shutdown-vectors M gives each stream M vectors instead (2000 fills its window). RSS is read
// once the refits those vectors set off are done (rss_bytes_per_stream) and at its highest before
// that (rss_peak_bytes_per_stream).
//
// Usage: nuwatch_daemon_bench [--nuwatchd PATH] [--seconds 1.0] [--rounds 2] [--json]
//                             [--streams 4] [--scoring-threads 0] [--publish-batches]
//                             [--compare-result-forms] [--forms binary_1 ...]
//                             [--result-form json|binary]
//                             [--shutdown-streams 0] [--shutdown-without-state]
//                             [--shutdown-vectors 1] [--latency-rate V]
//                             [--latency-trace FILE]
#include <CLI/CLI.hpp>
#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <iostream>
#include <nlohmann/json.hpp>
#include <random>
#include <sstream>
#include <string>
#include <string_view>
#include <thread>
#include <utility>
#include <vector>
#include <zmq.hpp>

#include "common/child_daemon.h"
#include "protocol/wire_protocol.h"

namespace nuwatch {
namespace {

using json = nlohmann::json;
using Clock = std::chrono::steady_clock;
namespace fs = std::filesystem;
using testing_data::ChildProcess;
using testing_data::CpuSeconds;
using testing_data::HttpGet;
using testing_data::ReadyEndpoints;
using testing_data::SumOfSeries;

constexpr int kDims = 16;
constexpr int kWindow = 2000;
constexpr int kHighWaterMark = 10000;     // both targets, both directions: the daemon's default
const char* const kKeyPrefix = "bench-";  // the streams' keys: bench-0, bench-1, ...
int g_streams = 4;                        // --streams
std::vector<std::string> g_forms;         // --forms: empty is all
std::string g_result_form = "json";       // --result-form: publish.result_form
int g_receive_high_water_mark = 10000;    // --receive-high-water-mark
int g_scoring_threads = 0;                // --scoring-threads
double g_latency_rate = 0;                // --latency-rate: vectors/s, 0 for half the best rate
std::string g_latency_trace;              // --latency-trace: a CSV file of every latency sample

// The scoring threads of the measured nuwatchd (daemon.scoring_threads; 0 is one per core).
int ScoringThreadsOfDaemon() {
  return g_scoring_threads > 0 ? g_scoring_threads
                               : std::max(1, static_cast<int>(std::thread::hardware_concurrency()));
}

// g_streams keys, bench-0, bench-1, ... nuwatchd places each new stream on the scoring thread with
// the fewest (service/stream_placement.h), so the streams share the threads evenly; WarmUp checks
// that against status. Before that placement a hash of the key put the first four keys three to
// one on two threads, and the bench measured one thread's speed more than the daemon's.
std::vector<std::string> Keys() {
  std::vector<std::string> keys;
  for (int i = 0; i < g_streams; ++i) keys.push_back(kKeyPrefix + std::to_string(i));
  return keys;
}

double WallSeconds() {
  return std::chrono::duration<double>(std::chrono::system_clock::now().time_since_epoch()).count();
}

// ---------------------------------------------------------------------------------------------
// The relay: bare ZeroMQ.

int RunRelay(const std::string& ready_file) {
  zmq::context_t context(1);
  zmq::socket_t pull(context, zmq::socket_type::pull);
  zmq::socket_t pub(context, zmq::socket_type::pub);
  pull.set(zmq::sockopt::rcvhwm, kHighWaterMark);
  pub.set(zmq::sockopt::sndhwm, kHighWaterMark);
  pull.bind("tcp://127.0.0.1:*");
  pub.bind("tcp://127.0.0.1:*");
  const json ready = {{"ingest", {pull.get(zmq::sockopt::last_endpoint)}},
                      {"publish", pub.get(zmq::sockopt::last_endpoint)},
                      {"control", ""},
                      {"metrics", ""}};
  std::ofstream(ready_file + ".tmp") << ready.dump() << "\n";
  fs::rename(ready_file + ".tmp", ready_file);
  zmq::message_t frame;
  while (true) {
    if (!pull.recv(frame)) continue;
    const bool more = frame.more();
    pub.send(frame, more ? zmq::send_flags::sndmore : zmq::send_flags::none);
  }
}

// ---------------------------------------------------------------------------------------------
// Frames.

enum class Form { kJson1, kBinary1, kBinary64 };
const char* FormName(Form f) {
  switch (f) {
    case Form::kJson1:
      return "1 vector per message, JSON";
    case Form::kBinary1:
      return "1 vector per message, binary f32";
    case Form::kBinary64:
      return "64 vectors per message, binary f32";
  }
  return "";
}
const char* FormId(Form f) {
  return f == Form::kJson1 ? "json_1" : f == Form::kBinary1 ? "binary_1" : "binary_64";
}
int VectorsPerMessage(Form f) { return f == Form::kBinary64 ? 64 : 1; }

// Normal vectors, d = 16, N(0, 1) in every feature: what the model learnt during the warm-up.
std::vector<double> NormalValues(int vectors, uint64_t seed) {
  std::mt19937_64 random(seed);
  std::normal_distribution<double> noise(0, 1);
  std::vector<double> values(static_cast<std::size_t>(vectors) * kDims);
  for (double& v : values) v = noise(random);
  return values;
}

// A ring of pre-encoded payloads of one form whose timestamps are set to the send time just
// before each send: binary timestamps are patched in place (offset 16, PROTOCOL.md §6.2); a JSON
// payload is kept as the text around its `t`, which is written with a fixed 6 decimals.
class Frames {
 public:
  explicit Frames(Form form) : form_(form) {
    const int per = VectorsPerMessage(form);
    const std::vector<double> values = NormalValues(kRing * per, 7);
    const double placeholder = 1234567890.5;  // encoded as exactly "1234567890.5"
    std::vector<double> times(static_cast<std::size_t>(per), placeholder);
    for (int i = 0; i < kRing; ++i) {
      std::string payload;
      const double* rows = values.data() + static_cast<std::size_t>(i) * per * kDims;
      if (form == Form::kJson1) {
        EncodeJsonPayload(times, rows, kDims, &payload);
        const auto at = payload.find("1234567890.5");
        json_prefix_.push_back(payload.substr(0, at));
        json_suffix_.push_back(payload.substr(at + std::strlen("1234567890.5")));
      } else {
        EncodeBinaryPayload(times, rows, kDims, Dtype::kFloat32, &payload);
      }
      payloads_.push_back(std::move(payload));
    }
  }
  // The next payload, its vectors stamped `now` (+1 us per vector of a batch).
  const std::string& Next(double now) {
    const std::size_t i = next_++ % kRing;
    std::string& p = payloads_[i];
    if (form_ == Form::kJson1) {
      char t[32];
      const int n = std::snprintf(t, sizeof t, "%.6f", now);
      p.assign(json_prefix_[i]).append(t, static_cast<std::size_t>(n)).append(json_suffix_[i]);
    } else {
      for (int v = 0; v < VectorsPerMessage(form_); ++v) {
        const double t = now + 1e-6 * v;
        std::memcpy(p.data() + 16 + 8 * v, &t, 8);
      }
    }
    return p;
  }

 private:
  static constexpr int kRing = 256;
  Form form_;
  std::size_t next_ = 0;
  std::vector<std::string> payloads_;
  std::vector<std::string> json_prefix_, json_suffix_;
};

// The send time a message on the result socket carries: a result's (or an event's) `t` for
// nuwatchd; for the relay the ingest payload itself (binary: offset 16; JSON: its `t`).
// --publish-batches: nuwatchd publishes a message's results as one §9.4 batch.
bool g_publish_batches = false;

// The results a published message holds: a §9.5 binary batch says how many at offset 8; a §9.4
// batch holds one "t" member per result.
double ResultsIn(std::string_view text) {
  if (text.starts_with("NUWR") && text.size() >= 12) {
    std::uint32_t rows;
    std::memcpy(&rows, text.data() + 8, sizeof rows);
    return rows;
  }
  if (!text.starts_with("{\"results\":")) return 1;
  double n = 0;
  for (std::size_t at = text.find("\"t\":"); at != std::string_view::npos;
       at = text.find("\"t\":", at + 4))
    ++n;
  return n;
}

double CarriedTime(const zmq::message_t& body) {
  const char* data = static_cast<const char*>(body.data());
  if (body.size() >= 24 && data[0] == 'N') {
    double t;
    std::memcpy(&t, data + 16, 8);
    return t;
  }
  const std::string_view text(data, body.size());
  const auto at = text.find("\"t\":");
  return at == std::string_view::npos ? NAN : std::strtod(data + at + 4, nullptr);
}

// ---------------------------------------------------------------------------------------------
// A target and its client sockets.

struct Target {
  explicit Target(std::string target_name) : name(std::move(target_name)) {}
  std::string name;
  std::unique_ptr<ChildProcess> process;
  ReadyEndpoints endpoints;
  pid_t socket_thread = 0;             // nuwatchd: the thread that receives and hands over
  std::vector<pid_t> scoring_threads;  // nuwatchd: the threads that score and publish
  zmq::socket_t push, sub;
  bool daemon() const { return name == "nuwatchd"; }
};

bool WaitForFile(const std::string& path, double seconds) {
  const auto until = Clock::now() + std::chrono::duration<double>(seconds);
  while (Clock::now() < until) {
    if (fs::exists(path)) return true;
    std::this_thread::sleep_for(std::chrono::milliseconds(10));
  }
  return false;
}

void Connect(zmq::context_t& context, Target& t) {
  t.push = zmq::socket_t(context, zmq::socket_type::push);
  t.sub = zmq::socket_t(context, zmq::socket_type::sub);
  t.push.set(zmq::sockopt::sndhwm, kHighWaterMark);
  t.push.set(zmq::sockopt::linger, 0);
  t.sub.set(zmq::sockopt::rcvhwm, kHighWaterMark);
  t.sub.set(zmq::sockopt::linger, 0);
  t.sub.set(zmq::sockopt::subscribe, kKeyPrefix);
  t.push.connect(t.endpoints.ingest.at(0));
  t.sub.connect(t.endpoints.publish);
}

// Counters read around a phase.
struct Reading {
  double vectors = 0, dropped = 0, cpu_process = 0, cpu_thread = 0, cpu_scoring = 0;
  double shed_messages = 0;  // dropped unscored past ingest.max_unread_bytes
};
Reading Read(const Target& t) {
  Reading r;
  r.cpu_process = CpuSeconds(t.process->pid());
  if (!t.daemon()) return r;
  const std::string text = HttpGet(t.endpoints.metrics, "/metrics");
  r.vectors = SumOfSeries(text, "nuwatch_vectors_total");
  r.dropped = SumOfSeries(text, "nuwatch_results_dropped_total");
  r.shed_messages = SumOfSeries(text, "nuwatch_ingest_shed_messages_total");
  r.cpu_thread = t.socket_thread > 0 ? CpuSeconds(t.process->pid(), t.socket_thread) : 0;
  for (pid_t tid : t.scoring_threads) r.cpu_scoring += CpuSeconds(t.process->pid(), tid);
  return r;
}

struct Phase {
  double vectors_sent = 0, vectors_accepted = 0, results = 0, dropped = 0, seconds = 0;
  double shed = 0;          // vectors in messages shed at ingest (never accepted)
  double result_bytes = 0;  // frame 2 of the result messages received (not of the events)
  double cpu_process = 0, cpu_thread = 0, cpu_scoring = 0;
  std::vector<double> latencies;  // seconds, latency phases only
  std::vector<double> arrivals;   // wall seconds each latency sample was taken at
  double rate() const { return seconds > 0 ? vectors_sent / seconds : 0; }
};

// Appends one row per latency sample of `phase` to the --latency-trace file: when it came in
// (seconds from the phase's first result) and its latency, so that stalls show as runs of late
// results at one time and queueing as a spread; and when it came in as Unix time, to line the
// trace up with what other tools saw at that moment (perf sched, /proc, core_stalls.py).
void WriteLatencyTrace(const std::string& form, const std::string& target, const Phase& phase) {
  const bool fresh = !fs::exists(g_latency_trace);
  std::ofstream out(g_latency_trace, std::ios::app);
  if (fresh) out << "form,target,seconds_from_first_result,latency_ms,unix_seconds\n";
  const double first = phase.arrivals.empty() ? 0 : phase.arrivals.front();
  char line[128];
  for (std::size_t i = 0; i < phase.latencies.size(); ++i) {
    std::snprintf(line, sizeof line, ",%.6f,%.4f,%.6f\n", phase.arrivals[i] - first,
                  1e3 * phase.latencies[i], phase.arrivals[i]);
    out << form << ',' << target << line;
  }
  if (!out) throw std::runtime_error("cannot write --latency-trace " + g_latency_trace);
}

// Sends `form` to `t` for `seconds` (at `rate` messages/s, or as fast as PUSH takes them when 0),
// then waits until every vector was processed and its result received or counted as dropped.
Phase RunPhase(Target& t, Form form, double seconds, double rate, bool latency) {
  Frames frames(form);
  const int per = VectorsPerMessage(form);
  const std::vector<std::string> keys = Keys();
  const Reading before = Read(t);
  std::atomic<bool> sending{true};
  std::atomic<double> results{0};
  std::atomic<double> result_bytes{0};
  std::atomic<double> last_result{0};
  std::atomic<double> expected{-1};  // results to wait for, once known
  Phase phase;
  if (latency) {
    // Grown in the receiver, a vector of a million samples would copy itself while results wait.
    const std::size_t expected_samples = static_cast<std::size_t>(rate * seconds * 1.25) + 1024;
    phase.latencies.reserve(expected_samples);
    phase.arrivals.reserve(expected_samples);
  }
  std::thread receiver([&] {
    std::vector<zmq::pollitem_t> items = {{t.sub.handle(), 0, ZMQ_POLLIN, 0}};
    zmq::message_t key, body;
    double count = 0;
    double bytes = 0;
    auto quiet_since = Clock::now();
    while (true) {
      if (zmq::poll(items, std::chrono::milliseconds(20)) == 0) {
        const double e = expected.load();
        if (e >= 0 && count >= e) break;
        if (!sending.load() && Clock::now() - quiet_since > std::chrono::seconds(2)) break;
        continue;
      }
      while (t.sub.recv(key, zmq::recv_flags::dontwait)) {
        (void)t.sub.recv(body);
        quiet_since = Clock::now();
        const std::string_view text(static_cast<const char*>(body.data()), body.size());
        // nuwatchd writes "event" first in an incident event (EncodeIncidentEventJson): a prefix
        // test, not a scan of every result, keeps this receiver's cost near the relay's.
        if (t.daemon() && text.starts_with("{\"event\":")) continue;
        count += t.daemon() ? ResultsIn(text) : per;  // the relay forwards whole messages
        bytes += static_cast<double>(text.size());
        const double now = WallSeconds();
        if (latency) {
          phase.latencies.push_back(now - CarriedTime(body));
          phase.arrivals.push_back(now);
        }
        last_result = now;
        results = count;
        result_bytes = bytes;
      }
    }
  });
  const double start = WallSeconds();
  const auto started = Clock::now();
  const auto until = started + std::chrono::duration<double>(seconds);
  double messages = 0;
  while (true) {
    const auto now = Clock::now();
    if (now >= until) break;
    if (rate > 0) {
      const auto due = started + std::chrono::duration<double>(messages / rate);
      if (due > now) {
        std::this_thread::sleep_until(due);
        continue;
      }
    }
    const std::string& payload = frames.Next(WallSeconds());
    const std::string& key = keys[static_cast<std::size_t>(messages) % keys.size()];
    t.push.send(zmq::buffer(key), zmq::send_flags::sndmore);
    t.push.send(zmq::buffer(payload), zmq::send_flags::none);
    ++messages;
  }
  phase.vectors_sent = messages * per;
  if (t.daemon()) {
    // Every vector processed (counted by the daemon), then every result is in or dropped.
    Reading after;
    const auto deadline = Clock::now() + std::chrono::seconds(60);
    do {
      std::this_thread::sleep_for(std::chrono::milliseconds(20));
      after = Read(t);
    } while (after.vectors - before.vectors + per * (after.shed_messages - before.shed_messages) <
                 phase.vectors_sent &&
             Clock::now() < deadline);
    expected = (after.vectors - before.vectors) - (after.dropped - before.dropped);
  } else {
    expected = phase.vectors_sent;
  }
  sending = false;
  receiver.join();
  const Reading after = Read(t);
  phase.vectors_accepted = t.daemon() ? after.vectors - before.vectors : phase.vectors_sent;
  phase.dropped = after.dropped - before.dropped;
  phase.shed = per * (after.shed_messages - before.shed_messages);
  phase.results = results.load();
  phase.result_bytes = result_bytes.load();
  phase.seconds = last_result.load() - start;
  phase.cpu_process = after.cpu_process - before.cpu_process;
  phase.cpu_thread = after.cpu_thread - before.cpu_thread;
  phase.cpu_scoring = after.cpu_scoring - before.cpu_scoring;
  return phase;
}

double Percentile(std::vector<double> v, double q) {
  if (v.empty()) return NAN;
  std::sort(v.begin(), v.end());
  return v[static_cast<std::size_t>(std::min<double>(v.size() - 1, q * (v.size() - 1) + 0.5))];
}

// The share of `v` above `limit`: steadier than a p99 when a few stalls decide which side of
// the limit the p99 falls, and comparable between the two targets.
double FractionOver(const std::vector<double>& v, double limit) {
  if (v.empty()) return NAN;
  const auto over = std::count_if(v.begin(), v.end(), [limit](double x) { return x > limit; });
  return static_cast<double>(over) / static_cast<double>(v.size());
}

double LoadAverage() {
  double one = NAN;
  std::ifstream("/proc/loadavg") >> one;
  return one;
}

std::string DaemonConfig(const std::string& extra, const std::string& result_form = "json") {
  std::string text = R"([daemon]
log_level = "warn"
[ingest]
endpoints = ["tcp://127.0.0.1:*"]
receive_high_water_mark = )" +
                     std::to_string(g_receive_high_water_mark) + R"(
[publish]
endpoint = "tcp://127.0.0.1:*"
high_water_mark = 10000
[control]
endpoint = "tcp://127.0.0.1:*"
allow_unauthenticated_tcp = true
[metrics]
listen = "127.0.0.1:0"
[detector]
nu = 0.05
window = 2000
refit_every = 0
)" + extra;
  {
    const std::string section = "[daemon]\n";
    text.insert(text.find(section) + section.size(),
                "scoring_threads = " + std::to_string(g_scoring_threads) + "\n");
  }
  if (g_publish_batches) {
    const std::string section = "[publish]\n";
    text.insert(text.find(section) + section.size(), "batches = true\n");
  }
  {
    const std::string section = "[publish]\n";
    text.insert(text.find(section) + section.size(), "result_form = \"" + result_form + "\"\n");
  }
  return text;
}

std::unique_ptr<ChildProcess> StartDaemon(const std::string& program, const fs::path& dir,
                                          const std::string& name, const std::string& config,
                                          ReadyEndpoints* endpoints) {
  const std::string config_path = (dir / (name + ".toml")).string();
  const std::string ready = (dir / (name + ".ready.json")).string();
  std::ofstream(config_path) << config;
  auto process = std::make_unique<ChildProcess>(
      std::vector<std::string>{program, "--config", config_path, "--ready-file", ready},
      (dir / (name + ".log")).string());
  if (process->pid() <= 0 || !WaitForFile(ready, 30)) {
    throw std::runtime_error(program + " did not start; see " + (dir / (name + ".log")).string());
  }
  *endpoints = testing_data::ReadReadyFile(ready);
  return process;
}

json Control(zmq::context_t& context, const std::string& endpoint, const std::string& request) {
  zmq::socket_t req(context, zmq::socket_type::req);
  req.set(zmq::sockopt::linger, 0);
  req.set(zmq::sockopt::rcvtimeo, 20000);
  req.connect(endpoint);
  req.send(zmq::buffer(request), zmq::send_flags::none);
  zmq::message_t reply;
  if (!req.recv(reply)) throw std::runtime_error("no reply from the control socket");
  return json::parse(reply.to_string());
}

// Sends normal vectors (the same to every stream) until every stream scores; returns the first
// stream's support vectors.
int WarmUp(zmq::context_t& context, Target& t) {
  const std::vector<double> values = NormalValues(kWindow, 3);
  std::string payload;
  double now = WallSeconds() - kWindow;
  const std::vector<std::string> keys = Keys();
  for (int i = 0; i < kWindow; ++i) {
    const double time = now + i;
    EncodeBinaryPayload(std::span<const double>(&time, 1),
                        values.data() + static_cast<std::size_t>(i) * kDims, kDims, Dtype::kFloat64,
                        &payload);
    for (const std::string& key : keys) {
      t.push.send(zmq::buffer(key), zmq::send_flags::sndmore);
      t.push.send(zmq::buffer(payload), zmq::send_flags::none);
    }
  }
  const auto until = Clock::now() + std::chrono::seconds(300);
  while (Clock::now() < until) {
    std::this_thread::sleep_for(std::chrono::milliseconds(100));
    zmq::message_t frame;
    while (t.sub.recv(frame, zmq::recv_flags::dontwait)) {
    }
    const json status = Control(context, t.endpoints.control, R"({"command":"status"})");
    int scoring = 0;
    int support_vectors = 0;
    std::vector<int> per_thread(static_cast<std::size_t>(ScoringThreadsOfDaemon()), 0);
    for (const json& s : status["streams"]) {
      const int thread = s["scoring_thread"];
      if (thread >= 0 && thread < static_cast<int>(per_thread.size())) ++per_thread[thread];
      if (s["state"] != "scoring") continue;
      if (s["stream"] == keys.front()) support_vectors = s["support_vectors"];
      ++scoring;
    }
    if (scoring == g_streams) {
      const auto [fewest, most] = std::minmax_element(per_thread.begin(), per_thread.end());
      if (*most - *fewest > 1) {
        throw std::runtime_error(
            "the streams are not spread evenly over nuwatchd's scoring threads (status: " +
            status["streams"].dump() + "); has its placement of streams changed?");
      }
      return support_vectors;
    }
  }
  throw std::runtime_error("the streams never left their warm-up");
}

double RssBytes(pid_t pid) {
  std::ifstream status("/proc/" + std::to_string(pid) + "/status");
  for (std::string line; std::getline(status, line);) {
    if (line.rfind("VmRSS:", 0) == 0) return 1024.0 * std::stod(line.substr(6));
  }
  return NAN;
}

int g_shutdown_vectors = 1;  // --shutdown-vectors

// N streams, g_shutdown_vectors vectors each, then SIGTERM: seconds to exit and RSS per stream.
json MeasureShutdown(const std::string& program, const fs::path& dir, int streams, bool state) {
  zmq::context_t context(1);
  ReadyEndpoints endpoints;
  fs::create_directories(dir / "state");
  std::string extra = "[limits]\nmax_streams = " + std::to_string(streams + 1) + "\n";
  if (state) extra += "[state]\ndir = \"" + (dir / "state").string() + "\"\n";
  auto process = StartDaemon(program, dir, "shutdown", DaemonConfig(extra), &endpoints);
  const double rss_before = RssBytes(process->pid());
  zmq::socket_t push(context, zmq::socket_type::push);
  push.set(zmq::sockopt::linger, 0);
  push.connect(endpoints.ingest.at(0));
  // Messages of at most 16 vectors, each stream's in time order (small, so that the per-stream
  // batch buffers, which hold a message's rows, do not hide the window's memory).
  const int per_message = std::min(g_shutdown_vectors, 16);
  const std::vector<double> values = NormalValues(per_message, 5);
  std::string payload;
  const double time0 = WallSeconds();
  std::vector<double> times(static_cast<std::size_t>(per_message));
  for (int sent = 0; sent < g_shutdown_vectors; sent += per_message) {
    const int n = std::min(per_message, g_shutdown_vectors - sent);
    times.resize(static_cast<std::size_t>(n));
    for (int k = 0; k < n; ++k) times[k] = time0 + sent + k;
    EncodeBinaryPayload(times, values.data(), kDims, Dtype::kFloat32, &payload);
    for (int i = 0; i < streams; ++i) {
      const std::string key = "pump-" + std::to_string(i);
      push.send(zmq::buffer(key), zmq::send_flags::sndmore);
      push.send(zmq::buffer(payload), zmq::send_flags::none);
    }
  }
  const auto until = Clock::now() + std::chrono::seconds(300);
  const double expected = static_cast<double>(streams) * g_shutdown_vectors;
  double windows = 0;
  // Until every vector is scored and the refits they caused are done: none queued and the count
  // of finished refits unchanged for 2 s. A queued refit holds a packed copy of its window
  // (SampleWindow::Packed), so that RSS taken during the wave of refits that full windows set off
  // measures the backlog, not the streams; its peak is reported apart.
  double rss_peak = 0;
  double refits_seen = -1;
  auto refits_settled_since = Clock::now();
  while (Clock::now() < until) {
    const std::string text = HttpGet(endpoints.metrics, "/metrics");
    rss_peak = std::max(rss_peak, RssBytes(process->pid()));
    windows = SumOfSeries(text, "nuwatch_window_vectors");
    const double refits = SumOfSeries(text, "nuwatch_refits_total");
    if (refits != refits_seen) {
      refits_seen = refits;
      refits_settled_since = Clock::now();
    }
    if (testing_data::SeriesValue(text, "nuwatch_streams").value_or(0) >= streams &&
        SumOfSeries(text, "nuwatch_vectors_total") >= expected &&
        testing_data::SeriesValue(text, "nuwatch_refits_queued").value_or(0) == 0 &&
        Clock::now() - refits_settled_since >= std::chrono::seconds(2))
      break;
    std::this_thread::sleep_for(std::chrono::milliseconds(50));
  }
  // After the daemon's periodic malloc_trim (every 5 s), which hands back what the burst of
  // ingest messages and the refits left freed, so that RSS shows what the streams hold.
  std::this_thread::sleep_for(std::chrono::seconds(6));
  const double rss_after = RssBytes(process->pid());
  const auto signalled = Clock::now();
  process->Signal(SIGTERM);
  const int status = process->Wait();
  const double seconds = std::chrono::duration<double>(Clock::now() - signalled).count();
  std::size_t files = 0;
  for ([[maybe_unused]] const auto& f : fs::directory_iterator(dir / "state")) ++files;
  return {{"streams", streams},
          {"state_dir", state},
          {"sigterm_to_exit_seconds", seconds},
          {"exit_status", status},
          {"state_files", files},
          {"vectors_per_stream", g_shutdown_vectors},
          {"window_vectors_per_stream", windows / streams},
          {"rss_bytes_per_stream", (rss_after - rss_before) / streams},
          {"rss_peak_bytes_per_stream", (rss_peak - rss_before) / streams}};
}

// --compare-result-forms: one nuwatchd, 64-vector binary messages, publish.result_form switched
// between "json" (with batches) and "binary" by `reload` before each phase, alternating.
int CompareResultForms(const std::string& program, double seconds, int rounds, bool as_json) {
  const fs::path dir =
      fs::temp_directory_path() / ("nuwatch_daemon_bench_" + std::to_string(::getpid()));
  fs::create_directories(dir);
  zmq::context_t context(1);
  const double load_before = LoadAverage();
  g_publish_batches = true;  // the JSON form's one-message-per-ingest-message variant (§9.4)
  Target daemon{"nuwatchd"};
  daemon.process = StartDaemon(program, dir, "nuwatchd", DaemonConfig(""), &daemon.endpoints);
  Connect(context, daemon);
  const int support_vectors = WarmUp(context, daemon);
  for (int i = 0;; ++i) {
    const pid_t tid = testing_data::ThreadNamed(
        daemon.process->pid(), ("nuwatchd-score" + std::to_string(i)).substr(0, 15));
    if (tid == 0) break;
    daemon.scoring_threads.push_back(tid);
  }
  const auto use_form = [&](const std::string& form) {
    std::ofstream((dir / "nuwatchd.toml").string()) << DaemonConfig("", form);
    const json reply = Control(context, daemon.endpoints.control, R"({"command":"reload"})");
    if (reply.value("ok", false) != true)
      throw std::runtime_error("reload to result_form " + form + " failed: " + reply.dump());
  };
  struct Totals {
    Phase best;
    double vectors = 0, results = 0, dropped = 0, bytes = 0, cpu_process = 0, cpu_scoring = 0;
  };
  const std::string forms[] = {"json", "binary"};
  Totals totals[2];
  for (int r = 0; r < rounds; ++r) {
    for (int f = 0; f < 2; ++f) {
      use_form(forms[f]);
      const Phase p = RunPhase(daemon, Form::kBinary64, seconds, 0, false);
      Totals& t = totals[f];
      if (p.rate() > t.best.rate()) t.best = p;
      t.vectors += p.vectors_accepted;
      t.results += p.results;
      t.dropped += p.dropped;
      t.bytes += p.result_bytes;
      t.cpu_process += p.cpu_process;
      t.cpu_scoring += p.cpu_scoring;
    }
  }
  daemon.process.reset();
  fs::remove_all(dir);
  json out = {{"dims", kDims},
              {"support_vectors", support_vectors},
              {"seconds_per_phase", seconds},
              {"rounds", rounds},
              {"streams", g_streams},
              {"scoring_threads", daemon.scoring_threads.size()},
              {"ingest", FormName(Form::kBinary64)},
              {"result_forms", json::array()}};
  for (int f = 0; f < 2; ++f) {
    const Totals& t = totals[f];
    out["result_forms"].push_back(
        {{"result_form", forms[f]},
         {"vectors_per_second", t.best.rate()},
         {"vectors_accepted", t.vectors},
         {"results_received", t.results},
         {"results_dropped_counted", t.dropped},
         {"unaccounted", t.vectors - t.results - t.dropped},
         {"cpu_us_per_vector_process", 1e6 * t.cpu_process / t.vectors},
         {"cpu_us_per_vector_scoring_threads", 1e6 * t.cpu_scoring / t.vectors},
         {"bytes_per_result", t.bytes / t.results}});
  }
  const json& j = out["result_forms"][0];
  const json& b = out["result_forms"][1];
  out["binary_to_json"] = {
      {"vectors_per_second",
       b["vectors_per_second"].get<double>() / j["vectors_per_second"].get<double>()},
      {"cpu_us_per_vector_process",
       b["cpu_us_per_vector_process"].get<double>() / j["cpu_us_per_vector_process"].get<double>()},
      {"cpu_us_per_vector_scoring_threads",
       b["cpu_us_per_vector_scoring_threads"].get<double>() /
           j["cpu_us_per_vector_scoring_threads"].get<double>()},
      {"bytes_per_result",
       b["bytes_per_result"].get<double>() / j["bytes_per_result"].get<double>()}};
  out["load_average_before"] = load_before;
  out["load_average_after"] = LoadAverage();
  if (as_json) {
    std::cout << out.dump(2) << "\n";
    return 0;
  }
  std::printf(
      "nuwatchd, %s, d = %d, %d support vectors, %d streams, %zu scoring threads; result forms "
      "alternated by reload, best of %d x %.1f s, load average %.1f -> %.1f\n\n",
      FormName(Form::kBinary64), kDims, support_vectors, g_streams, daemon.scoring_threads.size(),
      rounds, seconds, load_before, LoadAverage());
  std::printf("%-28s %12s %12s %12s %10s %10s %10s\n", "result form", "vectors/s", "cpu us/v",
              "scoring us/v", "bytes/res", "received", "dropped");
  for (const json& f : out["result_forms"]) {
    std::printf("%-28s %12.0f %12.3f %12.3f %10.1f %10.0f %10.0f\n",
                f["result_form"].get<std::string>().c_str(), f["vectors_per_second"].get<double>(),
                f["cpu_us_per_vector_process"].get<double>(),
                f["cpu_us_per_vector_scoring_threads"].get<double>(),
                f["bytes_per_result"].get<double>(), f["results_received"].get<double>(),
                f["results_dropped_counted"].get<double>());
  }
  const json& ratio = out["binary_to_json"];
  std::printf("binary / json                %11.2fx %11.2fx %11.2fx %9.2fx\n",
              ratio["vectors_per_second"].get<double>(),
              ratio["cpu_us_per_vector_process"].get<double>(),
              ratio["cpu_us_per_vector_scoring_threads"].get<double>(),
              ratio["bytes_per_result"].get<double>());
  return 0;
}

int Run(const std::string& program, double seconds, int rounds, bool as_json, int shutdown_streams,
        bool shutdown_state) {
  const fs::path dir =
      fs::temp_directory_path() / ("nuwatch_daemon_bench_" + std::to_string(::getpid()));
  fs::create_directories(dir);
  zmq::context_t context(1);
  const double load_before = LoadAverage();
  if (rounds == 0) {  // the shutdown measure only
    const json shutdown = MeasureShutdown(program, dir, shutdown_streams, shutdown_state);
    fs::remove_all(dir);
    std::cout << json{{"shutdown", shutdown},
                      {"load_average_before", load_before},
                      {"load_average_after", LoadAverage()}}
                     .dump(as_json ? 2 : -1)
              << "\n";
    return 0;
  }

  Target relay{"relay"}, daemon{"nuwatchd"};
  relay.process = std::make_unique<ChildProcess>(
      std::vector<std::string>{fs::read_symlink("/proc/self/exe").string(), "--relay",
                               (dir / "relay.ready.json").string()},
      (dir / "relay.log").string());
  if (!WaitForFile((dir / "relay.ready.json").string(), 30)) {
    throw std::runtime_error("the relay did not start");
  }
  relay.endpoints = testing_data::ReadReadyFile((dir / "relay.ready.json").string());
  daemon.process =
      StartDaemon(program, dir, "nuwatchd", DaemonConfig("", g_result_form), &daemon.endpoints);
  Connect(context, relay);
  Connect(context, daemon);
  const int support_vectors = WarmUp(context, daemon);
  // Named once it runs, which is after the ready file is written: look for it after the warm-up.
  daemon.socket_thread = testing_data::ThreadNamed(daemon.process->pid(), "nuwatchd-socket");
  if (daemon.socket_thread == 0) throw std::runtime_error("no thread named nuwatchd-socket");
  for (int i = 0;; ++i) {
    const pid_t tid = testing_data::ThreadNamed(
        daemon.process->pid(), ("nuwatchd-score" + std::to_string(i)).substr(0, 15));
    if (tid == 0) break;
    daemon.scoring_threads.push_back(tid);
  }
  // PUB/SUB subscriptions take effect asynchronously: the relay's is in place once a message
  // sent through it arrives.
  {
    Frames frames(Form::kBinary1);
    std::vector<zmq::pollitem_t> items = {{relay.sub.handle(), 0, ZMQ_POLLIN, 0}};
    do {
      relay.push.send(zmq::buffer(Keys().front()), zmq::send_flags::sndmore);
      relay.push.send(zmq::buffer(frames.Next(WallSeconds())), zmq::send_flags::none);
    } while (zmq::poll(items, std::chrono::milliseconds(50)) == 0);
    zmq::message_t frame;
    while (zmq::poll(items, std::chrono::milliseconds(100)) > 0) (void)relay.sub.recv(frame);
  }

  json out = {{"dims", kDims},
              {"window", kWindow},
              {"support_vectors", support_vectors},
              {"seconds_per_phase", seconds},
              {"rounds", rounds},
              {"cores", std::thread::hardware_concurrency()},
              {"publish_batches", g_publish_batches},
              {"result_form", g_result_form},
              {"streams", g_streams},
              {"scoring_threads", daemon.scoring_threads.size()},
              {"forms", json::array()}};
  for (Form form : {Form::kJson1, Form::kBinary1, Form::kBinary64}) {
    if (!g_forms.empty() &&
        std::find(g_forms.begin(), g_forms.end(), FormId(form)) == g_forms.end()) {
      continue;
    }
    // Best of the rounds for each target (the machine is shared); CPU per vector summed over all.
    Phase best_relay, best_daemon;
    double daemon_sent = 0, daemon_accepted = 0, daemon_results = 0, daemon_dropped = 0;
    double daemon_shed = 0;
    double cpu_process = 0, cpu_thread = 0, cpu_scoring = 0, relay_cpu = 0, relay_vectors = 0;
    // The CPU is read over the full-rate phases only, so it is divided by their vectors alone:
    // dividing by all those accepted (the latency phase's too) understated it by a factor
    // rounds / (rounds + 0.5), a third with --rounds 1.
    double cpu_vectors = 0;
    for (int r = 0; r < rounds; ++r) {
      const Phase a = RunPhase(relay, form, seconds, 0, false);
      const Phase b = RunPhase(daemon, form, seconds, 0, false);
      if (a.rate() > best_relay.rate()) best_relay = a;
      if (b.rate() > best_daemon.rate()) best_daemon = b;
      relay_cpu += a.cpu_process;
      relay_vectors += a.vectors_sent;
      daemon_sent += b.vectors_sent;
      daemon_accepted += b.vectors_accepted;
      cpu_vectors += b.vectors_accepted;
      daemon_results += b.results;
      daemon_dropped += b.dropped;
      daemon_shed += b.shed;
      cpu_process += b.cpu_process;
      cpu_thread += b.cpu_thread;
      cpu_scoring += b.cpu_scoring;
    }
    // Latency at half of nuwatchd's best rate (or at --latency-rate), through both.
    const double message_rate =
        (g_latency_rate > 0 ? g_latency_rate : 0.5 * best_daemon.rate()) / VectorsPerMessage(form);
    const Phase lat_daemon = RunPhase(daemon, form, seconds, message_rate, true);
    const Phase lat_relay = RunPhase(relay, form, seconds, message_rate, true);
    if (!g_latency_trace.empty()) {
      WriteLatencyTrace(FormId(form), "nuwatchd", lat_daemon);
      WriteLatencyTrace(FormId(form), "bare", lat_relay);
    }
    daemon_sent += lat_daemon.vectors_sent;
    daemon_accepted += lat_daemon.vectors_accepted;
    daemon_results += lat_daemon.results;
    daemon_dropped += lat_daemon.dropped;
    daemon_shed += lat_daemon.shed;
    out["forms"].push_back(
        {{"form", FormId(form)},
         {"description", FormName(form)},
         {"bare_vectors_per_second", best_relay.rate()},
         {"nuwatchd_vectors_per_second", best_daemon.rate()},
         {"ratio", best_daemon.rate() / best_relay.rate()},
         {"nuwatchd_vectors_sent", daemon_sent},
         {"nuwatchd_vectors_accepted", daemon_accepted},
         {"nuwatchd_results_received", daemon_results},
         {"nuwatchd_results_dropped_counted", daemon_dropped},
         {"nuwatchd_unaccounted", daemon_accepted - daemon_results - daemon_dropped},
         // Sent but neither accepted nor shed (counted) at ingest.
         {"nuwatchd_vectors_shed", daemon_shed},
         {"nuwatchd_unaccounted_at_ingest", daemon_sent - daemon_accepted - daemon_shed},
         {"nuwatchd_cpu_us_per_vector_process", 1e6 * cpu_process / cpu_vectors},
         {"nuwatchd_cpu_us_per_vector_socket_thread", 1e6 * cpu_thread / cpu_vectors},
         {"nuwatchd_cpu_us_per_vector_scoring_threads", 1e6 * cpu_scoring / cpu_vectors},
         {"bare_cpu_us_per_vector", 1e6 * relay_cpu / relay_vectors},
         {"latency_rate_vectors_per_second", message_rate * VectorsPerMessage(form)},
         {"nuwatchd_latency_p50_ms", 1e3 * Percentile(lat_daemon.latencies, 0.5)},
         {"nuwatchd_latency_p99_ms", 1e3 * Percentile(lat_daemon.latencies, 0.99)},
         {"bare_latency_p50_ms", 1e3 * Percentile(lat_relay.latencies, 0.5)},
         {"bare_latency_p99_ms", 1e3 * Percentile(lat_relay.latencies, 0.99)},
         {"nuwatchd_latency_over_1ms_fraction", FractionOver(lat_daemon.latencies, 1e-3)},
         {"bare_latency_over_1ms_fraction", FractionOver(lat_relay.latencies, 1e-3)}});
  }
  daemon.process.reset();
  relay.process.reset();
  if (shutdown_streams > 0)
    out["shutdown"] = MeasureShutdown(program, dir, shutdown_streams, shutdown_state);
  out["load_average_before"] = load_before;
  out["load_average_after"] = LoadAverage();
  fs::remove_all(dir);

  if (as_json) {
    std::cout << out.dump(2) << "\n";
    return 0;
  }
  std::printf(
      "nuwatchd against bare ZeroMQ (PUSH/PULL + PUB/SUB relay), d = %d, %d support "
      "vectors, %d streams, %zu scoring threads, %s results, best of %d x %.1f s, load "
      "average %.1f -> %.1f\n\n",
      kDims, support_vectors, g_streams, daemon.scoring_threads.size(), g_result_form.c_str(),
      rounds, seconds, load_before, LoadAverage());
  std::printf("%-36s %12s %12s %6s %12s %12s %10s %9s %9s %9s\n", "form", "bare vec/s",
              "nuwatchd v/s", "ratio", "accepted", "received", "dropped", "cpu us/v", "p50 ms",
              "p99 ms");
  for (const json& f : out["forms"]) {
    std::printf(
        "%-36s %12.0f %12.0f %5.1f%% %12.0f %12.0f %10.0f %9.2f %9.3f %9.3f\n",
        f["description"].get<std::string>().c_str(), f["bare_vectors_per_second"].get<double>(),
        f["nuwatchd_vectors_per_second"].get<double>(), 100 * f["ratio"].get<double>(),
        f["nuwatchd_vectors_accepted"].get<double>(), f["nuwatchd_results_received"].get<double>(),
        f["nuwatchd_results_dropped_counted"].get<double>(),
        f["nuwatchd_cpu_us_per_vector_process"].get<double>(),
        f["nuwatchd_latency_p50_ms"].get<double>(), f["nuwatchd_latency_p99_ms"].get<double>());
  }
  std::printf(
      "\ncpu us/v: CPU time of the whole nuwatchd process per vector accepted at full rate (the "
      "socket "
      "thread's and the scoring threads' in --json); latency at half of nuwatchd's best rate for "
      "the form.\n");
  if (out.contains("shutdown")) std::printf("shutdown: %s\n", out["shutdown"].dump().c_str());
  return 0;
}

}  // namespace
}  // namespace nuwatch

int main(int argc, char** argv) {
  CLI::App app{"nuwatchd against bare ZeroMQ with the same frames (issue 9, section 6)"};
  std::string program = NUWATCHD_PROGRAM;
  std::string relay_ready;
  double seconds = 1.0;
  int rounds = 2;
  bool as_json = false;
  int shutdown_streams = 0;
  bool shutdown_state = true;
  app.add_option("--nuwatchd", program, "the nuwatchd program to measure");
  app.add_option("--seconds", seconds, "sending time of each phase")->check(CLI::Range(0.1, 30.0));
  app.add_option("--rounds", rounds,
                 "phases per target and form, the best one reported (0: none, only the "
                 "--shutdown-streams measure)")
      ->check(CLI::Range(0, 10));
  app.add_flag("--json", as_json, "print JSON instead of the table");
  app.add_option("--shutdown-streams", shutdown_streams,
                 "also time SIGTERM-to-exit of a nuwatchd holding this many streams")
      ->check(CLI::Range(0, 100000));
  app.add_option("--shutdown-vectors", nuwatch::g_shutdown_vectors,
                 "vectors each --shutdown-streams stream gets (2000 fills its window)")
      ->check(CLI::Range(1, 1000000));
  app.add_flag("!--shutdown-without-state", shutdown_state,
               "--shutdown-streams without a state directory: no state files to write");
  app.add_flag("--publish-batches", nuwatch::g_publish_batches,
               "configure nuwatchd with publish.batches = true (one result message per ingest "
               "message, PROTOCOL.md §9.4)");
  app.add_option("--streams", nuwatch::g_streams,
                 "streams the messages go to in turn (each warmed up first)")
      ->check(CLI::Range(1, 64));
  app.add_option("--forms", nuwatch::g_forms,
                 "measure only these message forms (json_1, binary_1, binary_64; default: all)")
      ->check(CLI::IsMember({"json_1", "binary_1", "binary_64"}));
  app.add_option("--result-form", nuwatch::g_result_form,
                 "publish.result_form of the measured nuwatchd: json (one message a result) or "
                 "binary (one PROTOCOL.md §9.5 batch per ingest message)")
      ->check(CLI::IsMember({"json", "binary"}));
  app.add_option("--scoring-threads", nuwatch::g_scoring_threads,
                 "daemon.scoring_threads of the measured nuwatchd (0: one per core)")
      ->check(CLI::Range(0, 64));
  app.add_option("--receive-high-water-mark", nuwatch::g_receive_high_water_mark,
                 "ingest.receive_high_water_mark of the measured nuwatchd (messages per "
                 "connection)")
      ->check(CLI::Range(1, 1000000));
  app.add_option("--latency-rate", nuwatch::g_latency_rate,
                 "vectors/s of the latency phases (default: half of nuwatchd's best rate), to "
                 "compare two builds at the same load")
      ->check(CLI::Range(1.0, 1e8));
  app.add_option("--latency-trace", nuwatch::g_latency_trace,
                 "append every latency sample (form, target, seconds from the phase's first "
                 "result, latency in ms, Unix time) to this CSV file, to tell stalls from "
                 "queueing");
  bool compare_result_forms = false;
  app.add_flag("--compare-result-forms", compare_result_forms,
               "instead of the relay comparison: 64-vector binary messages into one nuwatchd whose "
               "publish.result_form alternates between json (batches) and binary (PROTOCOL.md "
               "§9.5), switched by reload");
  app.add_option("--relay", relay_ready, "internal: run as the bare relay")->group("");
  CLI11_PARSE(app, argc, argv);
  try {
    if (!relay_ready.empty()) return nuwatch::RunRelay(relay_ready);
    if (compare_result_forms) {
      if (rounds < 1) throw std::runtime_error("--compare-result-forms needs --rounds >= 1");
      return nuwatch::CompareResultForms(program, seconds, rounds, as_json);
    }
    return nuwatch::Run(program, seconds, rounds, as_json, shutdown_streams, shutdown_state);
  } catch (const std::exception& e) {
    std::fprintf(stderr, "nuwatch_daemon_bench: %s\n", e.what());
    return 1;
  }
}
