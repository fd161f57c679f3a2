// nuwatch send: the rows of a recorded stream file, or rows piped in on standard input, to a
// daemon's ingest socket as daemon/protocol/PROTOCOL.md ingest messages (two frames: stream key,
// payload), paced at a fixed rate.
//
// A file is read and checked whole before the first message goes out, so a bad row never leaves a
// half-sent file behind. Standard input is read line by line and each row is sent as soon as it
// arrives (`nuwatch simulate --live | nuwatch send --input -`): a batch that is not yet full is
// sent whenever the pipe has nothing more to read at the moment, so batching never holds a live
// row back waiting for rows that have not been produced yet.
//
// Several replicas (PROTOCOL.md §13): with --member NAME=ENDPOINT (repeatable), or --member NAME
// with --member-endpoint TEMPLATE, each stream goes to its owner among the named members, computed
// with the protocol's rendezvous hash, over one PUSH socket per member: a stream always takes the
// same socket, so its vectors arrive in order. Without --member, --connect names one daemon that
// owns every stream, as before.
//
// ZeroMQ's PUSH socket says nothing about what the daemon did with a message. With --metrics,
// send reads the daemon's rejection counters (nuwatch_rejected_messages_total, PROTOCOL.md §8)
// before the first message and again once the daemon has processed the last one, prints the
// increase by reason and exits 3 when it is not zero. The counters are the daemon's, not this
// sender's: a rejection of another sender's message in the same interval counts too, and the
// output says so whenever it reports one.
#include <poll.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <csignal>
#include <cstdio>
#include <cstring>
#include <limits>
#include <map>
#include <memory>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <thread>
#include <unordered_map>
#include <vector>
#include <zmq.hpp>

#include "cli/cli_util.h"
#include "cli/client_keys.h"
#include "cli/commands.h"
#include "cli/daemon_metrics.h"
#include "cli/progress_line.h"
#include "formats/csv_reader.h"
#include "formats/stream_file.h"
#include "formats/timestamps.h"
#include "offline/replay.h"
#include "protocol/ownership.h"
#include "protocol/wire_protocol.h"

namespace nuwatch::cli {
namespace {

using Clock = std::chrono::steady_clock;

struct SendArguments {
  std::string connect;
  std::vector<std::string> members;  // NAME=ENDPOINT, or NAME with member_endpoint
  std::string member_endpoint;       // a template with {member}
  std::string input;
  std::string stream;
  std::string rate = "0";
  std::string format = "json";
  std::string dtype = "f64";
  std::string batch = "1";
  std::string linger = "5s";
  std::string metrics;
  std::string metrics_user;
  std::string metrics_password_file;
  std::string metrics_wait = "10s";
  ClientKeyFlags keys;
};

// A daemon to send to: with --connect the one, unnamed; with --member a replica and its name.
struct Destination {
  std::string member;  // "" for --connect
  std::string endpoint;
};

// The arguments after parsing and range checks.
struct SendSettings {
  std::vector<Destination> destinations;  // one for --connect; else one per --member
  std::vector<std::string> member_names;  // the names of `destinations`, for OwnerOf
  std::string endpoint;                   // what the messages name: the endpoint, or the members
  std::string input;                      // a path, or "-" for standard input
  std::string default_stream;
  double rate = 0;  // vectors per second; 0: as fast as the socket takes them
  PayloadFormat format = PayloadFormat::kJson;
  Dtype dtype = Dtype::kFloat64;
  int batch = 1;
  std::chrono::milliseconds linger{5000};
  std::string linger_text = "5s";
  ClientKeyFlags keys;
  std::optional<MetricsClient> metrics;  // with --metrics
  std::chrono::milliseconds metrics_wait{10000};
  std::string metrics_wait_text = "10s";
};

volatile std::sig_atomic_t send_stop_requested = 0;
extern "C" void RequestSendStop(int) { send_stop_requested = 1; }

// SIGINT and SIGTERM end the run after the message being sent, for the lifetime of this object.
// Installed without SA_RESTART so that a blocking wait returns at once with EINTR.
class StopSignals {
 public:
  StopSignals() {
    send_stop_requested = 0;
    struct sigaction action {};
    action.sa_handler = RequestSendStop;
    sigemptyset(&action.sa_mask);
    action.sa_flags = 0;
    sigaction(SIGINT, &action, &previous_int_);
    sigaction(SIGTERM, &action, &previous_term_);
  }
  ~StopSignals() {
    sigaction(SIGINT, &previous_int_, nullptr);
    sigaction(SIGTERM, &previous_term_, nullptr);
  }
  StopSignals(const StopSignals&) = delete;
  StopSignals& operator=(const StopSignals&) = delete;

 private:
  struct sigaction previous_int_ {};
  struct sigaction previous_term_ {};
};

SendSettings ToSettings(const SendArguments& args) {
  SendSettings settings;
  settings.input = args.input;
  settings.default_stream = args.stream;
  if (args.members.empty()) {
    if (args.connect.empty())
      throw CommandError(
          "name the daemon with --connect, or the replicas "
          "with --member NAME=ENDPOINT");
    if (!args.member_endpoint.empty()) throw CommandError("--member-endpoint needs --member NAME");
    CheckEndpoint("--connect", args.connect);
    settings.destinations.push_back({"", args.connect});
    settings.endpoint = args.connect;
  } else {
    if (!args.connect.empty())
      throw CommandError(
          "--connect and --member exclude each other: --connect names one daemon "
          "that owns every stream, --member the replicas that share them");
    for (const std::string& flag : args.members) {
      const std::size_t equals = flag.find('=');
      Destination d;
      d.member = flag.substr(0, equals);
      if (const std::string error = MemberNameError(d.member); !error.empty())
        throw CommandError("--member " + flag + ": " + error);
      if (equals != std::string::npos) {
        d.endpoint = flag.substr(equals + 1);
      } else if (!args.member_endpoint.empty()) {
        d.endpoint = args.member_endpoint;
        for (std::size_t at; (at = d.endpoint.find("{member}")) != std::string::npos;)
          d.endpoint.replace(at, 8, d.member);
      } else {
        throw CommandError("--member " + flag +
                           ": no endpoint: give --member NAME=ENDPOINT, or --member-endpoint "
                           "TEMPLATE (e.g. 'tcp://{member}.nuwatchd:7601')");
      }
      CheckEndpoint("--member " + d.member, d.endpoint);
      settings.member_names.push_back(d.member);
      settings.destinations.push_back(std::move(d));
    }
    if (const std::string error = MemberListError(settings.member_names); !error.empty())
      throw CommandError("--member: " + error);
    settings.endpoint = std::to_string(settings.destinations.size()) + " member(s)";
    if (!args.metrics.empty())
      throw CommandError(
          "--metrics reads one daemon's counters, and --member sends to several: "
          "read each replica's nuwatch_rejected_messages_total instead");
  }
  settings.rate = NumberFlag("--rate", args.rate);
  // Below a vector every 1000 s the schedule's arithmetic would stop meaning anything useful.
  if (settings.rate < 0 || (settings.rate > 0 && settings.rate < 1e-3))
    throw OutOfRange("--rate", args.rate, "0: as fast as possible, or >= 0.001 vectors per second");
  if (args.format == "json") {
    settings.format = PayloadFormat::kJson;
  } else if (args.format == "binary") {
    settings.format = PayloadFormat::kBinary;
  } else {
    throw CommandError("--format: '" + args.format + "' is neither json nor binary");
  }
  if (args.dtype == "f64") {
    settings.dtype = Dtype::kFloat64;
  } else if (args.dtype == "f32") {
    settings.dtype = Dtype::kFloat32;
  } else {
    throw CommandError("--dtype: '" + args.dtype + "' is neither f64 nor f32");
  }
  if (args.dtype != "f64" && settings.format != PayloadFormat::kBinary)
    throw CommandError("--dtype only applies with --format binary");
  // The protocol's default max_vectors_per_message (PROTOCOL.md §7): a larger batch would be
  // rejected by a daemon with default limits.
  settings.batch = static_cast<int>(
      WholeNumberFlagIn("--batch", args.batch, 1, WireLimits{}.max_vectors_per_message));
  const double linger = DurationFlag("--linger", args.linger, 3600);
  settings.linger = std::chrono::milliseconds(static_cast<int64_t>(std::llround(linger * 1000)));
  settings.linger_text = args.linger;
  settings.keys = args.keys;
  if (args.metrics.empty()) {
    if (!args.metrics_user.empty() || !args.metrics_password_file.empty())
      throw CommandError(
          std::string(args.metrics_user.empty() ? "--metrics-password-file" : "--metrics-user") +
          " needs --metrics HOST:PORT");
  } else {
    settings.metrics.emplace(args.metrics, args.metrics_user, args.metrics_password_file);
  }
  const double wait = DurationFlag("--metrics-wait", args.metrics_wait, 3600, LowBound::kExclusive);
  settings.metrics_wait =
      std::chrono::milliseconds(static_cast<int64_t>(std::llround(wait * 1000)));
  settings.metrics_wait_text = args.metrics_wait;
  return settings;
}

std::string KeyError(std::string_view key) {
  return "stream key '" + std::string(key) +
         "' is not valid (1 to 128 bytes of A-Z a-z 0-9 . _ : / -, daemon/protocol/PROTOCOL.md §3)";
}

// Ensures: "" when every value fits a binary32, else a message naming the first that does not.
std::string Float32Overflow(std::span<const double> values,
                            const std::vector<std::string>& feature_names) {
  constexpr double kMaxFloat = std::numeric_limits<float>::max();
  for (std::size_t j = 0; j < values.size(); ++j) {
    // Values within half an ulp above FLT_MAX still round to FLT_MAX; a little beyond it they round
    // to infinity, which the protocol rejects. Casting and testing is exact either way.
    if (std::fabs(values[j]) > kMaxFloat && !std::isfinite(static_cast<float>(values[j])))
      return "column " + feature_names[j] + ": " + FormatNumber(values[j]) +
             " does not fit a 32-bit float (use --dtype f64)";
  }
  return "";
}

// Owns the PUSH socket: buffers vectors per stream up to the batch size, paces them, encodes and
// sends. Not thread-safe (one thread drives it, as ZeroMQ requires for its socket).
class Sender {
 public:
  Sender(const SendSettings& settings, int dims) : settings_(settings), dims_(dims), context_(1) {
    for (const Destination& destination : settings.destinations) {
      auto route = std::make_unique<Route>(context_, destination);
      route->socket.set(zmq::sockopt::linger, static_cast<int>(settings.linger.count()));
      // Queue only on a connection whose handshake succeeded: a daemon that refuses this client
      // (CURVE, PROTOCOL.md §12) then holds up the first send, where the watch below names the
      // reason, instead of taking messages that can never leave. The keys apply to every member.
      route->socket.set(zmq::sockopt::immediate, true);
      ApplyClientKeys(settings.keys, route->socket);
      route->watch.emplace(context_, route->socket, settings.keys);
      try {
        route->socket.connect(destination.endpoint);
      } catch (const zmq::error_t& e) {
        throw CommandError(route->Flag() + ": cannot connect to '" + destination.endpoint +
                           "': " + e.what());
      }
      routes_.push_back(std::move(route));
    }
  }

  // Queues one vector of `stream` (whose key the caller has validated), first waiting until it is
  // due at the configured rate; sends the stream's batch once it is full. Returns false when a stop
  // was requested (the vector is then not queued).
  bool Add(const std::string& stream, double time, std::span<const double> values) {
    if (!WaitUntilDue(vectors_queued_)) return false;
    auto [it, inserted] = pending_.try_emplace(stream);
    Pending& pending = it->second;
    if (inserted) {
      order_.push_back(stream);
      // The owner, once per stream: every message of the stream takes its socket (§13.2).
      pending.route = routes_.size() == 1 ? routes_[0].get()
                                          : routes_[OwnerOf(stream, settings_.member_names)].get();
      ++pending.route->streams;
    }
    pending.times.push_back(time);
    pending.values.insert(pending.values.end(), values.begin(), values.end());
    ++vectors_queued_;
    if (static_cast<int>(pending.times.size()) >= settings_.batch) return SendPending(it->first);
    return true;
  }

  // Sends every partly filled batch. Returns false when a stop was requested.
  bool SendAllPending() {
    for (const std::string& stream : order_)
      if (!SendPending(stream)) return false;
    return true;
  }

  int64_t vectors_queued() const { return vectors_queued_; }
  int64_t vectors_sent() const { return vectors_sent_; }
  int64_t messages_sent() const { return messages_sent_; }
  std::size_t streams() const { return order_.size(); }

  // With --member: one line per member, what it was sent.
  void PrintRoutes() const {
    if (settings_.member_names.empty()) return;
    for (const auto& route : routes_) {
      std::fprintf(stderr, "nuwatch send: member %s (%s): %lld vectors of %zu stream(s)\n",
                   route->destination.member.c_str(), route->destination.endpoint.c_str(),
                   static_cast<long long>(route->vectors), route->streams);
    }
  }

  // Closes the socket and waits up to the linger time for the queued messages to leave. Returns
  // false when they did not all leave in time.
  // After an interruption the wait is cut to at most a second: the user asked to stop. With
  // --linger 0 the queue is dropped at once, by request, and reported as delivered.
  bool Close(bool interrupted) {
    const std::chrono::milliseconds linger =
        interrupted ? std::min(settings_.linger, std::chrono::milliseconds(1000))
                    : settings_.linger;
    const auto started = Clock::now();
    for (auto& route : routes_) {
      route->socket.set(zmq::sockopt::linger, static_cast<int>(linger.count()));
      route->watch.reset();  // its socket must be closed before the context can end
      route->socket.close();
    }
    context_.close();
    // zmq_ctx_term returns as soon as everything queued has left, and only at the linger deadline
    // when something is still queued, so reaching the deadline means messages were left behind.
    return linger.count() == 0 || Clock::now() - started < linger - std::chrono::milliseconds(20);
  }

 private:
  // One daemon's PUSH socket.
  struct Route {
    Route(zmq::context_t& context, const Destination& d)
        : destination(d), socket(context, zmq::socket_type::push) {}
    std::string Flag() const {
      return destination.member.empty() ? "--connect" : "--member " + destination.member;
    }
    Destination destination;
    zmq::socket_t socket;
    std::optional<HandshakeWatch> watch;  // after socket: destroyed before it
    int64_t vectors = 0;
    std::size_t streams = 0;
  };

  struct Pending {
    Route* route = nullptr;
    std::vector<double> times;
    std::vector<double> values;
  };

  // Vector `index` (0-based) is due `index / rate` seconds after the first: computed from the
  // index, not by adding up intervals, so the pace does not drift however long the run.
  bool WaitUntilDue(int64_t index) {
    if (send_stop_requested) return false;
    if (index == 0) start_ = Clock::now();
    if (settings_.rate == 0) return true;
    const auto due = start_ + std::chrono::duration_cast<Clock::duration>(
                                  std::chrono::duration<double>(index / settings_.rate));
    while (true) {
      if (send_stop_requested) return false;
      const auto now = Clock::now();
      if (now >= due) return true;
      // Short naps so that Ctrl-C is honoured promptly even at a slow rate.
      std::this_thread::sleep_for(
          std::min<Clock::duration>(due - now, std::chrono::milliseconds(100)));
    }
  }

  bool SendPending(const std::string& stream) {
    Pending& pending = pending_[stream];
    if (pending.times.empty()) return true;
    try {
      if (settings_.format == PayloadFormat::kJson) {
        EncodeJsonPayload(pending.times, pending.values.data(), dims_, &payload_);
      } else {
        EncodeBinaryPayload(pending.times, pending.values.data(), dims_, settings_.dtype,
                            &payload_);
      }
    } catch (const PreconditionError& e) {
      throw CommandError(std::string("cannot encode a message for stream ") + stream + ": " +
                         e.what());
    }
    if (!SendFrames(*pending.route, stream, payload_)) return false;
    vectors_sent_ += static_cast<int64_t>(pending.times.size());
    pending.route->vectors += static_cast<int64_t>(pending.times.size());
    ++messages_sent_;
    pending.times.clear();
    pending.values.clear();
    return true;
  }

  // Both frames, or neither when a stop is requested before the first one could go out.
  bool SendFrames(Route& route, std::string_view key, std::string_view payload) {
    zmq::socket_t& socket = route.socket;
    const std::string& endpoint = route.destination.endpoint;
    const auto blocked_since = Clock::now();
    bool told_waiting = false;
    while (true) {
      if (send_stop_requested) return false;
      try {
        if (socket.send(zmq::buffer(key), zmq::send_flags::sndmore | zmq::send_flags::dontwait))
          break;
        // The queue is full (or no peer ever connected): wait until the socket takes more.
        zmq::pollitem_t item{socket.handle(), 0, ZMQ_POLLOUT, 0};
        zmq::poll(&item, 1, std::chrono::milliseconds(200));
        if (const auto failure = route.watch->Failure()) {
          throw CommandError(endpoint + ": " + *failure);
        }
      } catch (const zmq::error_t& e) {
        if (e.num() != EINTR) throw CommandError(std::string("send failed: ") + e.what());
      }
      if (!told_waiting && Clock::now() - blocked_since > std::chrono::seconds(3)) {
        std::fprintf(stderr,
                     "%snuwatch send: waiting for %s to take messages (is nuwatchd "
                     "running?)\n",
                     ::isatty(STDERR_FILENO) == 1 ? "\n" : "", endpoint.c_str());
        told_waiting = true;
      }
    }
    // ZeroMQ takes the later frames of a multipart message once it took the first; the loop only
    // guards against a signal interrupting the call.
    while (true) {
      try {
        socket.send(zmq::buffer(payload), zmq::send_flags::none);
        return true;
      } catch (const zmq::error_t& e) {
        if (e.num() != EINTR) throw CommandError(std::string("send failed: ") + e.what());
      }
    }
  }

  const SendSettings& settings_;
  const int dims_;
  zmq::context_t context_;
  std::vector<std::unique_ptr<Route>> routes_;  // after context_: destroyed before it
  std::unordered_map<std::string, Pending> pending_;
  std::vector<std::string> order_;  // streams in order of first appearance
  std::string payload_;             // reused: stops allocating once grown to the largest message
  Clock::time_point start_ = Clock::now();
  int64_t vectors_queued_ = 0;
  int64_t vectors_sent_ = 0;
  int64_t messages_sent_ = 0;
};

// The vectors sent so far, on a terminal's stderr (ProgressLine), erased before the summary.
class Progress {
 public:
  explicit Progress(int64_t total) : total_(total) {}

  void Update(Sender& sender) {
    const auto now = Clock::now();
    if (!line_.Due(now)) return;
    const double elapsed = std::chrono::duration<double>(now - started_).count();
    const int64_t done = sender.vectors_sent();
    const double rate = elapsed > 0 ? static_cast<double>(done) / elapsed : 0.0;
    char text[160];
    if (total_ > 0) {
      std::snprintf(text, sizeof text, "nuwatch send: %lld / %lld vectors (%.0f%%), %.0f/s",
                    static_cast<long long>(done), static_cast<long long>(total_),
                    100.0 * static_cast<double>(done) / static_cast<double>(total_), rate);
    } else {
      std::snprintf(text, sizeof text, "nuwatch send: %lld vectors of %zu streams, %.0f/s",
                    static_cast<long long>(done), sender.streams(), rate);
    }
    line_.Draw(text, now);
  }

  // Erases the progress line, so that the summary starts on a clean line.
  void Finish() { line_.Clear(); }

 private:
  int64_t total_;
  ProgressLine line_ = ProgressLine::ForStderr();
  Clock::time_point started_ = Clock::now();
};

// Returns false when interrupted.
bool SendRecording(Sender& sender, const StreamRecording& recording,
                   const std::vector<std::string>& keys, Progress& progress) {
  const int dims = static_cast<int>(recording.values.cols());
  for (int64_t i = 0; i < recording.rows(); ++i) {
    const std::span<const double> row(recording.values.row(i).data(), dims);
    if (!sender.Add(keys[recording.stream_of_row[i]], recording.times[i], row)) return false;
    progress.Update(sender);
  }
  return sender.SendAllPending();
}

// Standard input's bytes as they arrive, handed to a CsvReader in push mode, so that a row is
// sent as soon as its line is complete, without waiting for the end of the input.
class StdinFeeder {
 public:
  enum class Result { kRead, kNothingYet, kEnd, kStopped };

  // Waits at most `wait` for bytes and appends what there is to `reader` (EndInput at the end of
  // the input). Throws CommandError when reading fails.
  Result Feed(CsvReader& reader, std::chrono::milliseconds wait) {
    while (true) {
      if (send_stop_requested) return Result::kStopped;
      pollfd item{STDIN_FILENO, POLLIN, 0};
      const int ready = ::poll(&item, 1, static_cast<int>(wait.count()));
      if (ready < 0) {
        if (errno == EINTR) continue;
        throw CommandError(std::string("standard input: poll failed: ") + std::strerror(errno));
      }
      if (ready == 0) return Result::kNothingYet;
      const ssize_t n = ::read(STDIN_FILENO, chunk_, sizeof chunk_);
      if (n < 0) {
        if (errno == EINTR || errno == EAGAIN) continue;
        throw CommandError(std::string("standard input: read failed: ") + std::strerror(errno));
      }
      if (n == 0) {
        reader.EndInput();
        return Result::kEnd;
      }
      reader.Append(std::string_view(chunk_, static_cast<std::size_t>(n)));
      return Result::kRead;
    }
  }

 private:
  char chunk_[65536];
};

// Checks of the stream-file columns that only `send` makes: a stream key for every row, and no
// more features than a message holds.
void CheckSendColumns(const StreamFileColumns& columns, const std::string& input,
                      const std::string& default_stream) {
  if (columns.dims() > 65535)
    throw CommandError(input + ": " + std::to_string(columns.dims()) +
                       " feature columns; a message holds at most 65535");
  if (!columns.has_stream() && default_stream.empty())
    throw CommandError(input + " has no stream column: name the stream with --stream KEY");
  if (columns.has_stream() && !default_stream.empty())
    throw CommandError("--stream: " + input + " has a stream column already");
}

struct SendSummary {
  bool interrupted = false;
  int64_t vectors = 0;
  std::size_t streams = 0;
  int64_t messages = 0;
  bool delivered = true;
};

// The socket is created after the header, which fixes the number of features.
SendSummary SendStdin(const SendSettings& settings, double* elapsed_seconds) {
  CsvReader reader("standard input");
  StdinFeeder feeder;
  std::optional<StreamFileColumns> columns;
  std::unique_ptr<Sender> sender;
  std::optional<Progress> progress;
  std::vector<double> values;
  std::string stream;
  bool interrupted = false;
  const auto started = Clock::now();
  try {
    while (!interrupted) {
      const CsvReader::Status status = reader.Next();
      if (!columns && reader.has_header()) {
        columns.emplace(reader);
        CheckSendColumns(*columns, "standard input", settings.default_stream);
        values.resize(columns->dims());
        sender = std::make_unique<Sender>(settings, columns->dims());
        progress.emplace(0);
      }
      if (status == CsvReader::Status::kEnd) break;
      if (status == CsvReader::Status::kRow) {
        const double time = columns->Parse(reader, values);
        if (settings.format == PayloadFormat::kBinary && settings.dtype == Dtype::kFloat32) {
          const std::string overflow = Float32Overflow(values, columns->feature_names());
          if (!overflow.empty()) throw CommandError(reader.Where() + overflow);
        }
        const std::string_view key = columns->has_stream()
                                         ? columns->Stream(reader)
                                         : std::string_view(settings.default_stream);
        if (key != stream) {
          stream.assign(key);
          if (ValidateStreamKey(stream, WireLimits{}) != RejectReason::kNone)
            throw CommandError(reader.Where() + KeyError(stream));
        }
        if (!sender->Add(stream, time, values)) interrupted = true;
        progress->Update(*sender);
        continue;
      }
      // No complete row buffered: take what the pipe has; when it has nothing at the moment, the
      // producer has paused, so what is batched goes out before we wait.
      StdinFeeder::Result fed = feeder.Feed(reader, std::chrono::milliseconds(0));
      if (fed == StdinFeeder::Result::kNothingYet) {
        if (sender && !sender->SendAllPending()) {
          interrupted = true;
          break;
        }
        do {
          fed = feeder.Feed(reader, std::chrono::milliseconds(200));
        } while (fed == StdinFeeder::Result::kNothingYet);
      }
      if (fed == StdinFeeder::Result::kStopped) interrupted = true;
    }
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  if (!columns && !interrupted) throw CommandError("standard input: empty input (no header row)");
  SendSummary summary;
  if (sender) {
    if (!interrupted && !sender->SendAllPending()) interrupted = true;
    summary.vectors = sender->vectors_sent();
    summary.streams = sender->streams();
    summary.messages = sender->messages_sent();
    progress->Finish();
    *elapsed_seconds = std::chrono::duration<double>(Clock::now() - started).count();
    sender->PrintRoutes();
    summary.delivered = sender->Close(interrupted);
  }
  summary.interrupted = interrupted;
  return summary;
}

void PrintSummary(const SendSettings& settings, const SendSummary& s, double elapsed) {
  const char* format = settings.format == PayloadFormat::kJson ? "json"
                       : settings.dtype == Dtype::kFloat32     ? "binary f32"
                                                               : "binary f64";
  // Counted as handed to ZeroMQ; whether they all left is known only after Close.
  std::fprintf(stderr,
               "nuwatch send: %lld vectors of %zu stream(s) in %lld %s message(s) to %s in %.1f s "
               "(%.0f vectors/s)%s\n",
               static_cast<long long>(s.vectors), s.streams, static_cast<long long>(s.messages),
               format, settings.endpoint.c_str(), elapsed,
               elapsed > 0 ? static_cast<double>(s.vectors) / elapsed : 0.0,
               !s.interrupted ? ""
               : s.delivered  ? "; interrupted"
                              : "; interrupted, and the messages still queued were dropped");
  if (!s.delivered && !s.interrupted) {
    throw CommandError("messages were still queued when --linger " + settings.linger_text +
                       " ran out: " + settings.endpoint +
                       " did not take them all (is nuwatchd running?)");
  }
}

// With --metrics, once the messages have left: waits until the daemon has processed them, then
// reports what it rejected since `before`. Throws CommandStatusError (exit 3) when that is not
// nothing, CommandError when the counters did not settle within --metrics-wait.
//
// "Processed" is read off the daemon's counters: vectors processed (nuwatch_vectors_total over
// the streams) plus rejected messages. They settle when they have not changed for kQuiet and
// could account for every vector sent (a rejected message holds at most --batch vectors); with
// nothing rejected and every vector counted there is nothing left to wait for.
void ReportRejections(const SendSettings& settings, const SendSummary& summary,
                      const DaemonCounters& before) {
  constexpr auto kQuiet = std::chrono::milliseconds(500);
  constexpr auto kPollEvery = std::chrono::milliseconds(100);
  const MetricsClient& metrics = *settings.metrics;
  const auto deadline = Clock::now() + settings.metrics_wait;
  const auto scrape_timeout = std::max(settings.metrics_wait, std::chrono::milliseconds(1000));
  DaemonCounters after = metrics.Read(scrape_timeout);
  auto last_change = Clock::now();
  std::map<std::string, double> rejected;
  double processed_vectors = 0;
  double rejected_messages = 0;
  while (true) {
    rejected = RejectedSince(before, after);
    rejected_messages = 0;
    for (const auto& [reason, count] : rejected) rejected_messages += count;
    processed_vectors = std::max(0.0, after.vectors_processed - before.vectors_processed);
    const auto sent = static_cast<double>(summary.vectors);
    const bool could_be_complete = processed_vectors + rejected_messages * settings.batch >= sent;
    const auto now = Clock::now();
    if (rejected_messages == 0 && processed_vectors >= sent) break;
    if (could_be_complete && now - last_change >= kQuiet) break;
    if (now >= deadline) {
      throw CommandError("--metrics-wait " + settings.metrics_wait_text + " ran out before " +
                         metrics.host_port() + "'s counters accounted for the " +
                         std::to_string(summary.vectors) + " vectors sent (so far " +
                         FormatNumber(processed_vectors) + " vectors processed, " +
                         FormatNumber(rejected_messages) + " messages rejected" +
                         (rejected.empty() ? "" : ": " + FormatByReason(rejected)) +
                         "); the daemon may still be busy: allow longer with --metrics-wait");
    }
    std::this_thread::sleep_for(kPollEvery);
    DaemonCounters next = metrics.Read(scrape_timeout);
    if (next.vectors_processed != after.vectors_processed ||
        next.rejected_by_reason != after.rejected_by_reason)
      last_change = Clock::now();
    after = std::move(next);
  }
  if (rejected.empty()) {
    std::fprintf(stderr, "nuwatch send: %s rejected no messages during this send\n",
                 metrics.host_port().c_str());
    return;
  }
  throw CommandStatusError(
      kExitDaemonRejected,
      "the daemon at " + metrics.host_port() + " rejected " + FormatNumber(rejected_messages) +
          " message(s) during this send: " + FormatByReason(rejected) +
          " (nuwatch_rejected_messages_total, reasons in PROTOCOL.md §8; the counters are "
          "daemon-wide: another sender's rejections in the same interval count too)");
}

// What the daemon's counters read before the first message, or nothing without --metrics.
std::optional<DaemonCounters> CountersBefore(const SendSettings& settings) {
  if (!settings.metrics) return std::nullopt;
  return settings.metrics->Read(std::max(settings.metrics_wait, std::chrono::milliseconds(1000)));
}

void FinishSend(const SendSettings& settings, const SendSummary& summary, double elapsed,
                const std::optional<DaemonCounters>& before) {
  PrintSummary(settings, summary, elapsed);
  if (!before) return;
  if (summary.interrupted) {
    std::fprintf(stderr,
                 "nuwatch send: interrupted, so the daemon's rejection counters were not read "
                 "again\n");
    return;
  }
  ReportRejections(settings, summary, *before);
}

void RunSend(const SendArguments& args) {
  const SendSettings settings = ToSettings(args);
  StopSignals signals;
  if (settings.input == "-") {
    const std::optional<DaemonCounters> before = CountersBefore(settings);
    double elapsed = 0;
    const SendSummary summary = SendStdin(settings, &elapsed);
    FinishSend(settings, summary, elapsed, before);
    return;
  }

  StreamRecording recording;
  try {
    recording = ReadStreamRecording(settings.input);
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  const bool has_stream_column = !(recording.streams.size() == 1 && recording.streams[0].empty());
  if (!has_stream_column && settings.default_stream.empty())
    throw CommandError(settings.input + " has no stream column: name the stream with --stream KEY");
  if (has_stream_column && !settings.default_stream.empty())
    throw CommandError("--stream: " + settings.input + " has a stream column already");
  std::vector<std::string> keys = recording.streams;
  if (!has_stream_column) keys[0] = settings.default_stream;
  for (std::size_t s = 0; s < keys.size(); ++s) {
    if (ValidateStreamKey(keys[s], WireLimits{}) == RejectReason::kNone) continue;
    const auto row = std::find(recording.stream_of_row.begin(), recording.stream_of_row.end(),
                               static_cast<int32_t>(s)) -
                     recording.stream_of_row.begin();
    throw CommandError(settings.input + ": data row " + std::to_string(row + 1) + ": " +
                       KeyError(keys[s]));
  }
  const int dims = static_cast<int>(recording.values.cols());
  if (recording.values.cols() > 65535)
    throw CommandError(settings.input + ": " + std::to_string(recording.values.cols()) +
                       " feature columns; a message holds at most 65535");
  if (settings.format == PayloadFormat::kBinary && settings.dtype == Dtype::kFloat32) {
    for (int64_t i = 0; i < recording.rows(); ++i) {
      const std::string overflow = Float32Overflow(
          std::span<const double>(recording.values.row(i).data(), dims), recording.feature_names);
      if (!overflow.empty())
        throw CommandError(settings.input + ": data row " + std::to_string(i + 1) + " (time " +
                           std::string(recording.time_text[i]) + "): " + overflow);
    }
  }

  const std::optional<DaemonCounters> before = CountersBefore(settings);
  Sender sender(settings, dims);
  const auto started = Clock::now();
  Progress progress(recording.rows());
  const bool completed = SendRecording(sender, recording, keys, progress);
  progress.Finish();
  SendSummary summary;
  summary.interrupted = !completed;
  summary.vectors = sender.vectors_sent();
  summary.streams = sender.streams();
  summary.messages = sender.messages_sent();
  const double elapsed = std::chrono::duration<double>(Clock::now() - started).count();
  sender.PrintRoutes();
  summary.delivered = sender.Close(summary.interrupted);
  FinishSend(settings, summary, elapsed, before);
}

void AddSendCommand(CLI::App& app) {
  auto args = std::make_shared<SendArguments>();
  CLI::App* command = app.add_subcommand(
      "send",
      "Send the vectors of a stream file (or of rows piped in) to nuwatchd's ingest socket");
  command
      ->add_option("--connect", args->connect,
                   "ZeroMQ endpoint of nuwatchd's ingest socket (PUSH connects to it); for one "
                   "daemon that owns every stream")
      ->type_name("ENDPOINT");
  command
      ->add_option(
          "--member", args->members,
          "A replica among several (cluster.members) and its ingest endpoint; repeat for "
          "each member. Each stream goes to its owner (PROTOCOL.md §13), always over the "
          "same socket, so in order. List every member, as the daemons' cluster.members do")
      ->type_name("NAME[=ENDPOINT]");
  command
      ->add_option("--member-endpoint", args->member_endpoint,
                   "Endpoint of each --member given without one, {member} standing for its name, "
                   "e.g. 'tcp://{member}.nuwatchd:7601' for a StatefulSet's headless service")
      ->type_name("TEMPLATE");
  command
      ->add_option("--input", args->input,
                   "Stream CSV: a time column (ISO-8601 or epoch seconds), a stream column, "
                   "feature columns; '-' reads rows from standard input as they arrive")
      ->type_name("FILE")
      ->required();
  command
      ->add_option("--stream", args->stream,
                   "Stream key for every row, when the input has no stream column")
      ->type_name("STREAM");
  command->add_option("--rate", args->rate, "Vectors per second; 0: as fast as possible")
      ->type_name("NUMBER")
      ->capture_default_str();
  command->add_option("--format", args->format, "Payload form: json or binary (PROTOCOL.md §5, §6)")
      ->type_name("json|binary")
      ->capture_default_str();
  command->add_option("--dtype", args->dtype, "Value type of the binary form: f64 or f32")
      ->type_name("f64|f32")
      ->capture_default_str();
  command
      ->add_option("--batch", args->batch,
                   "Vectors of one stream per message at most (1..4096); a partly filled batch "
                   "is sent at the end, and with --input - whenever the input pauses")
      ->type_name("INTEGER")
      ->capture_default_str();
  command
      ->add_option("--linger", args->linger,
                   "How long to wait at the end for queued messages to reach the daemon")
      ->type_name("DURATION")
      ->capture_default_str();
  command
      ->add_option("--metrics", args->metrics,
                   "nuwatchd's metrics endpoint (its metrics.listen): read its rejection counters "
                   "before and after sending, report by reason what it rejected meanwhile, and "
                   "exit 3 if it rejected anything (the counters are daemon-wide: other senders' "
                   "rejections count too). Without it, nothing tells what the daemon rejected")
      ->type_name("HOST:PORT");
  command
      ->add_option("--metrics-user", args->metrics_user,
                   "User for the metrics endpoint's basic authentication (metrics.basic_auth_user)")
      ->type_name("USER");
  command
      ->add_option("--metrics-password-file", args->metrics_password_file,
                   "File whose first line is that user's password")
      ->type_name("FILE");
  command
      ->add_option("--metrics-wait", args->metrics_wait,
                   "With --metrics: how long at most to wait after the last message for the "
                   "daemon's counters to account for every vector sent (exit 1 if they do not)")
      ->type_name("DURATION")
      ->capture_default_str();
  AddClientKeyFlags(command, &args->keys);
  command->footer(
      "Exit status: 0 sent (and, with --metrics, nothing rejected); 1 bad input or a failed send; "
      "3 with --metrics, the daemon rejected messages during the send.\n");
  command->callback([args] { RunSend(*args); });
}

}  // namespace

NUWATCH_REGISTER_COMMAND(90, AddSendCommand);

}  // namespace nuwatch::cli
