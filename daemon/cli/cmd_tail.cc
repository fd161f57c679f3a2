// nuwatch tail: subscribes to nuwatchd's result socket and prints what it publishes
// (daemon/protocol/PROTOCOL.md §9), one line per result or incident event, until a count, a timeout
// or Ctrl-C. It reads every result form: single JSON results, JSON batches (§9.4) and binary
// batches (§9.5).
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <csignal>
#include <cstdio>
#include <cstring>
#include <limits>
#include <memory>
#include <nlohmann/json.hpp>
#include <optional>
#include <string>
#include <string_view>
#include <vector>
#include <zmq.hpp>
#include <zmq_addon.hpp>

#include "cli/cli_util.h"
#include "cli/client_keys.h"
#include "cli/commands.h"
#include "formats/timestamps.h"
#include "protocol/result_batch.h"

namespace nuwatch::cli {
namespace {

using Clock = std::chrono::steady_clock;
using nlohmann::json;

// How long tail waits for a publisher to answer before it says that none has.
constexpr std::chrono::seconds kQuietNote{3};

struct TailArguments {
  std::string connect;
  std::vector<std::string> streams;
  bool anomalies_only = false;
  std::string count = "0";
  std::string timeout = "0";
  bool json_output = false;
  ClientKeyFlags keys;
};

volatile std::sig_atomic_t tail_stop_requested = 0;
extern "C" void RequestTailStop(int) { tail_stop_requested = 1; }

// For the lifetime of this object: SIGINT and SIGTERM end the run (installed without SA_RESTART so
// that a wait returns at once), and SIGPIPE is ignored so that a reader that went away (`| head`)
// shows up as a failed write.
class TailSignals {
 public:
  TailSignals() {
    tail_stop_requested = 0;
    struct sigaction action {};
    action.sa_handler = RequestTailStop;
    sigemptyset(&action.sa_mask);
    sigaction(SIGINT, &action, &previous_int_);
    sigaction(SIGTERM, &action, &previous_term_);
    struct sigaction ignore {};
    ignore.sa_handler = SIG_IGN;
    sigemptyset(&ignore.sa_mask);
    sigaction(SIGPIPE, &ignore, &previous_pipe_);
  }
  ~TailSignals() {
    sigaction(SIGINT, &previous_int_, nullptr);
    sigaction(SIGTERM, &previous_term_, nullptr);
    sigaction(SIGPIPE, &previous_pipe_, nullptr);
  }
  TailSignals(const TailSignals&) = delete;
  TailSignals& operator=(const TailSignals&) = delete;

 private:
  struct sigaction previous_int_ {};
  struct sigaction previous_term_ {};
  struct sigaction previous_pipe_ {};
};

// The member `name` of `object` (an object), or null when it is absent.
const json& Member(const json& object, const char* name) {
  static const json null_value;
  const auto it = object.find(name);
  return it == object.end() ? null_value : *it;
}

std::string FormatTime(const json& value) {
  if (!value.is_number()) return "?";
  return FormatTimestamp(value.get<double>());
}

std::string FormatDecision(const json& value) {
  if (!value.is_number()) return "-";
  char buffer[32];
  std::snprintf(buffer, sizeof buffer, "%.4f", value.get<double>());
  return buffer;
}

std::string FormatTopFeatures(const json& object) {
  const auto it = object.find("top_features");
  if (it == object.end() || !it->is_array()) return "";
  std::string text;
  for (const json& entry : *it) {
    if (!entry.is_object()) continue;
    const auto feature = entry.find("feature");
    const auto share = entry.find("share");
    if (feature == entry.end() || !feature->is_string()) continue;
    if (!text.empty()) text += ", ";
    text += feature->get<std::string>();
    if (share != entry.end() && share->is_number()) {
      char buffer[16];
      std::snprintf(buffer, sizeof buffer, " %.0f%%", 100.0 * share->get<double>());
      text += buffer;
    }
  }
  return text;
}

// A number of a §9.5 row as the JSON form writes it: NaN (not scoring, or no p-value) is null.
json NumberOrNull(double value) { return std::isnan(value) ? json(nullptr) : json(value); }

// Row `row` of a §9.5 binary batch as the §9.1 object the JSON form carries, so that both forms
// print alike. Features are named by their column index, as the JSON form names them for a stream
// without feature_names (tail does not know the daemon's configuration).
json ResultObject(const ResultBatch& batch, const ResultBatchRow& row) {
  json object = json::object();
  object["t"] = row.t;
  object["state"] = std::string(ResultStateName(row.state));
  object["decision"] = NumberOrNull(row.decision);
  object["p_value"] = NumberOrNull(row.p_value);
  object["anomaly"] = row.anomaly;
  object["incident"] = row.incident_id < 0 ? json(nullptr) : json(row.incident_id);
  object["model_version"] = row.model_version;
  object["support_vectors"] = row.support_vectors;
  if (row.anomaly) {
    json features = json::array();
    for (std::uint32_t k = 0; k < row.feature_count; ++k) {
      const ResultBatchFeature& feature = batch.features[row.first_feature + k];
      features.push_back({{"feature", std::to_string(feature.index)}, {"share", feature.share}});
    }
    object["top_features"] = std::move(features);
  }
  return object;
}

// One message's place in the output.
enum class Kind { kResult, kAnomaly, kIncidentEvent, kSkipped };

// Prints results and events in aligned columns, or as JSON lines. Not thread-safe.
class Printer {
 public:
  Printer(bool json_output, bool anomalies_only)
      : json_output_(json_output), anomalies_only_(anomalies_only) {}

  // Returns what the message was; kSkipped when it is filtered out or not for a version 1
  // subscriber. Appends the line to print, if any, to *line.
  Kind Format(std::string_view key, std::string_view text, const json& object, std::string* line) {
    // §10: an object of a later version is dropped; an unknown event SHOULD be ignored.
    if (const auto v = object.find("v"); v != object.end() && *v != 1) return Kind::kSkipped;
    if (const auto event = object.find("event"); event != object.end()) {
      if (*event != "incident_open" && *event != "incident_close") return Kind::kSkipped;
      if (json_output_)
        AppendJsonLine(key, text, line);
      else
        AppendEventLine(key, object, *event == "incident_open", line);
      return Kind::kIncidentEvent;
    }
    const bool anomaly = Member(object, "anomaly") == true;
    if (anomalies_only_ && !anomaly) return Kind::kSkipped;
    if (json_output_)
      AppendJsonLine(key, text, line);
    else
      AppendResultLine(key, object, anomaly, line);
    return anomaly ? Kind::kAnomaly : Kind::kResult;
  }

  // The column names, for a terminal.
  std::string Header() {
    key_width_ = std::max<std::size_t>(key_width_, 6);
    char buffer[256];
    std::snprintf(buffer, sizeof buffer, "%-24s  %-*s  %-8s  %9s  %-7s  %-8s  %-6s  %s\n", "TIME",
                  static_cast<int>(key_width_), "STREAM", "STATE", "DECISION", "FLAG", "INCIDENT",
                  "MODEL", "TOP FEATURES");
    return buffer;
  }

 private:
  // The published object with the stream key added as its first member, "stream"; the rest of
  // the text is passed on byte for byte.
  static void AppendJsonLine(std::string_view key, std::string_view text, std::string* line) {
    const std::size_t brace = text.find('{');
    std::string_view rest = text.substr(brace + 1);
    while (!rest.empty() && (rest.front() == ' ' || rest.front() == '\n' || rest.front() == '\r' ||
                             rest.front() == '\t'))
      rest.remove_prefix(1);
    *line += "{\"stream\":";
    *line += json(std::string(key)).dump(-1, ' ', false, json::error_handler_t::replace);
    if (!rest.empty() && rest.front() != '}') *line += ',';
    *line += rest;
    while (!line->empty() && (line->back() == '\n' || line->back() == '\r')) line->pop_back();
    *line += '\n';
  }

  void AppendResultLine(std::string_view key, const json& object, bool anomaly, std::string* line) {
    key_width_ = std::max(key_width_, key.size());
    const json& incident = Member(object, "incident");
    const std::string incident_text =
        incident.is_number_integer() ? std::to_string(incident.get<int64_t>()) : "-";
    const json& version = Member(object, "model_version");
    const std::string model_text = version.is_number_integer() && version.get<int64_t>() > 0
                                       ? "v" + std::to_string(version.get<int64_t>())
                                       : "-";
    const json& state_member = Member(object, "state");
    const std::string state = state_member.is_string() ? state_member.get<std::string>() : "?";
    char buffer[512];
    std::snprintf(buffer, sizeof buffer, "%-24s  %-*.*s  %-8s  %9s  %-7s  %-8s  %-6s  ",
                  FormatTime(Member(object, "t")).c_str(), static_cast<int>(key_width_),
                  static_cast<int>(key.size()), key.data(), state.c_str(),
                  FormatDecision(Member(object, "decision")).c_str(), anomaly ? "ANOMALY" : "-",
                  incident_text.c_str(), model_text.c_str());
    *line += buffer;
    *line += FormatTopFeatures(object);
    while (!line->empty() && line->back() == ' ') line->pop_back();
    *line += '\n';
  }

  static void AppendEventLine(std::string_view key, const json& object, bool open,
                              std::string* line) {
    const json& id = Member(object, "incident");
    *line += "INCIDENT ";
    *line += id.is_number_integer() ? std::to_string(id.get<int64_t>()) : "?";
    *line += open ? " OPENED on " : " CLOSED on ";
    *line += key;
    *line += " at ";
    *line += FormatTime(Member(object, "t"));
    if (open) {
      *line += ", first flagged vector at ";
      *line += FormatTime(Member(object, "start"));
    } else {
      const json& start = Member(object, "start");
      const json& end = Member(object, "end");
      *line += ", flagged from ";
      *line += FormatTime(start);
      *line += " to ";
      *line += FormatTime(end);
      if (start.is_number() && end.is_number()) {
        char buffer[48];
        std::snprintf(buffer, sizeof buffer, " (%.0f s)", end.get<double>() - start.get<double>());
        *line += buffer;
      }
    }
    const json& peak = Member(object, "peak_decision");
    if (peak.is_number()) {
      *line += ", lowest decision ";
      *line += FormatDecision(peak);
    }
    *line += '\n';
  }

  bool json_output_;
  bool anomalies_only_;
  std::size_t key_width_ = 10;
};

// Writes and flushes; false when the reader has gone away (EPIPE). Throws for other failures.
bool WriteLine(std::string_view text) {
  if (std::fwrite(text.data(), 1, text.size(), stdout) == text.size() && std::fflush(stdout) == 0)
    return true;
  if (errno == EPIPE) return false;
  throw CommandError(std::string("standard output: write failed: ") + std::strerror(errno));
}

struct Tally {
  int64_t printed = 0;
  int64_t results = 0;
  int64_t anomalies = 0;
  int64_t events = 0;
  int64_t malformed = 0;
};

void RunTail(const TailArguments& args) {
  CheckEndpoint("--connect", args.connect);
  const int64_t count =
      WholeNumberFlagIn("--count", args.count, 0, std::numeric_limits<int64_t>::max());
  const double timeout = DurationFlag("--timeout", args.timeout);
  for (const std::string& stream : args.streams)
    if (stream.empty()) throw CommandError("--stream: the key is empty");

  zmq::context_t context(1);
  zmq::socket_t socket(context, zmq::socket_type::sub);
  socket.set(zmq::sockopt::linger, 0);
  ApplyClientKeys(args.keys, socket);
  // ZeroMQ subscriptions match prefixes (§9): subscribe to each key, then compare whole keys.
  if (args.streams.empty()) {
    socket.set(zmq::sockopt::subscribe, "");
  } else {
    for (const std::string& stream : args.streams) socket.set(zmq::sockopt::subscribe, stream);
  }
  // The connection is watched: a peer that is not a PUB socket (nuwatchd's ingest PULL or control
  // REP) fails ZeroMQ's handshake, which checks that the socket types match (ZMTP 3.1), and would
  // otherwise leave tail waiting in silence. libzmq 4.3 reports that as a connection closed before
  // its handshake succeeded (CONNECTED, then DISCONNECTED), or as a failed handshake.
  zmq::socket_t monitor(context, zmq::socket_type::pair);
  const std::string monitor_endpoint = "inproc://tail-monitor";
  if (zmq_socket_monitor(socket.handle(), monitor_endpoint.c_str(),
                         ZMQ_EVENT_CONNECTED | ZMQ_EVENT_DISCONNECTED |
                             ZMQ_EVENT_HANDSHAKE_SUCCEEDED | ZMQ_EVENT_HANDSHAKE_FAILED_PROTOCOL |
                             ZMQ_EVENT_HANDSHAKE_FAILED_NO_DETAIL |
                             ZMQ_EVENT_HANDSHAKE_FAILED_AUTH) != 0)
    throw CommandError(std::string("cannot watch the connection: ") + zmq_strerror(zmq_errno()));
  monitor.connect(monitor_endpoint);
  try {
    socket.connect(args.connect);
  } catch (const zmq::error_t& e) {
    throw CommandError("--connect: cannot connect to '" + args.connect + "': " + e.what());
  }
  bool handshake_done = false;     // a publisher answered at least once
  bool handshake_pending = false;  // connected, handshake not finished yet
  bool told_quiet = false;

  TailSignals signals;
  Printer printer(args.json_output, args.anomalies_only);
  Tally tally;
  const bool terminal = ::isatty(STDOUT_FILENO) == 1;
  bool open = true;
  if (terminal && !args.json_output) open = WriteLine(printer.Header());
  const auto started = Clock::now();
  const auto deadline =
      started + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(timeout));
  bool timed_out = false;
  std::vector<zmq::message_t> frames;
  std::string line;
  ResultBatch binary_batch;
  while (open && !tail_stop_requested && (count == 0 || tally.printed < count)) {
    auto wait = std::chrono::milliseconds(200);
    if (timeout > 0) {
      const auto now = Clock::now();
      if (now >= deadline) {
        timed_out = true;
        break;
      }
      wait = std::min(wait, std::chrono::duration_cast<std::chrono::milliseconds>(deadline - now) +
                                std::chrono::milliseconds(1));
    }
    if (!handshake_done && !told_quiet && Clock::now() - started > kQuietNote) {
      std::fprintf(stderr,
                   "nuwatch tail: no publisher has answered at %s yet; still waiting (is nuwatchd "
                   "running, and is this its publish socket, publish.endpoint?)\n",
                   args.connect.c_str());
      told_quiet = true;
    }
    try {
      zmq::pollitem_t items[] = {{socket.handle(), 0, ZMQ_POLLIN, 0},
                                 {monitor.handle(), 0, ZMQ_POLLIN, 0}};
      if (zmq::poll(items, 2, wait) == 0) continue;
      if (items[1].revents & ZMQ_POLLIN) {
        std::vector<zmq::message_t> event;
        (void)zmq::recv_multipart(monitor, std::back_inserter(event));
        uint16_t id = 0;
        uint32_t value = 0;
        if (!event.empty() && event[0].size() >= sizeof id + sizeof value) {
          std::memcpy(&id, event[0].data(), sizeof id);
          std::memcpy(&value, static_cast<const char*>(event[0].data()) + sizeof id, sizeof value);
        }
        if (id == ZMQ_EVENT_CONNECTED) handshake_pending = true;
        // CURVE (PROTOCOL.md §12): a refused key, or a plain client at a daemon with [auth].
        // ZAP status 400: without CURVE only the subscriber limit refuses (curve_auth.h); with
        // it, a key the daemon does not list, or the limit.
        if (id == ZMQ_EVENT_HANDSHAKE_FAILED_AUTH && !args.keys.enabled())
          throw CommandError(args.connect + ": nuwatchd refused the subscription (ZAP status " +
                             std::to_string(value) +
                             "): it has as many subscribers as its publish.max_subscribers "
                             "allows; try again later, or raise the limit");
        if (id == ZMQ_EVENT_HANDSHAKE_FAILED_AUTH)
          throw CommandError(args.connect + ": nuwatchd refused this client key (ZAP status " +
                             std::to_string(value) +
                             "): is its public key in the daemon's auth.client_keys? (or it has "
                             "as many subscribers as its publish.max_subscribers allows)");
        if (id == ZMQ_EVENT_HANDSHAKE_FAILED_PROTOCOL &&
            value == ZMQ_PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH)
          throw CommandError(args.connect +
                             (args.keys.enabled()
                                  ? ": the peer does not use CURVE: leave out --client-key and "
                                    "--server-key"
                                  : ": the daemon requires CURVE authentication: pass "
                                    "--client-key and --server-key"));
        if (id == ZMQ_EVENT_HANDSHAKE_SUCCEEDED) {
          handshake_done = true;
          handshake_pending = false;
        }
        // A close during the handshake: a socket of another type (ZMTP checks the pair), a CURVE
        // server that cannot open this client's HELLO, or one that closed before this side read
        // the mechanism mismatch.
        const bool unexplained_close = (id == ZMQ_EVENT_DISCONNECTED && handshake_pending) ||
                                       id == ZMQ_EVENT_HANDSHAKE_FAILED_NO_DETAIL;
        if (args.keys.enabled() && unexplained_close)
          throw CommandError(args.connect +
                             ": the connection closed during the CURVE handshake: is "
                             "--server-key this daemon's key, and is this its publish socket?");
        if (unexplained_close || id == ZMQ_EVENT_HANDSHAKE_FAILED_PROTOCOL)
          throw CommandError(args.connect +
                             " is not a PUB socket: it refused the subscription (tail reads "
                             "nuwatchd's publish socket, publish.endpoint; the ingest and control "
                             "sockets never publish), or the daemon requires CURVE (pass "
                             "--client-key and --server-key)");
      }
      if (!(items[0].revents & ZMQ_POLLIN)) continue;
      frames.clear();
      if (!zmq::recv_multipart(socket, std::back_inserter(frames), zmq::recv_flags::dontwait))
        continue;
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      throw CommandError(std::string("receive failed: ") + e.what());
    }
    if (frames.size() != 2) {
      ++tally.malformed;
      std::fprintf(stderr, "nuwatch tail: skipped a message of %zu frames (2 expected)\n",
                   frames.size());
      continue;
    }
    const std::string_view key = frames[0].to_string_view();
    const std::string_view text = frames[1].to_string_view();
    if (!args.streams.empty() &&
        std::find(args.streams.begin(), args.streams.end(), key) == args.streams.end())
      continue;
    // §9.5: a binary batch of results (publish.result_form = "binary") is printed as its
    // results, one line each, each as the JSON form would have carried it.
    std::vector<json> items;
    std::string_view whole_text;  // the frame, when it is one JSON object
    if (LooksLikeResultBatch(text)) {
      const std::string problem = DecodeResultBatch(text, &binary_batch);
      if (!problem.empty()) {
        ++tally.malformed;
        std::fprintf(stderr, "nuwatch tail: skipped a message for %.*s: %s\n",
                     static_cast<int>(key.size()), key.data(), problem.c_str());
        continue;
      }
      for (const ResultBatchRow& row : binary_batch.rows)
        items.push_back(ResultObject(binary_batch, row));
    } else {
      json object = json::parse(text, nullptr, /*allow_exceptions=*/false);
      if (!object.is_object()) {
        ++tally.malformed;
        std::fprintf(stderr,
                     "nuwatch tail: skipped a message for %.*s that is neither a JSON object nor "
                     "a binary result batch\n",
                     static_cast<int>(key.size()), key.data());
        continue;
      }
      // §9.4: a batch of results (publish.batches) is printed as its results, one line each.
      const auto batch = object.find("results");
      if (batch != object.end() && batch->is_array() && !object.contains("event")) {
        items = std::move(*batch).get<std::vector<json>>();
      } else {
        items.push_back(std::move(object));
        whole_text = text;  // a single object is passed on byte for byte
      }
    }
    for (std::size_t i = 0; i < items.size() && open && (count == 0 || tally.printed < count);
         ++i) {
      const json& item = items[i];
      if (!item.is_object()) {
        ++tally.malformed;
        std::fprintf(stderr, "nuwatch tail: skipped a batch entry for %.*s that is not an object\n",
                     static_cast<int>(key.size()), key.data());
        continue;
      }
      const std::string item_text = whole_text.empty() ? item.dump() : std::string();
      line.clear();
      const Kind kind =
          printer.Format(key, whole_text.empty() ? item_text : whole_text, item, &line);
      if (kind == Kind::kSkipped) continue;
      tally.events += kind == Kind::kIncidentEvent;
      tally.anomalies += kind == Kind::kAnomaly;
      tally.results += kind != Kind::kIncidentEvent;
      ++tally.printed;
      open = WriteLine(line);
    }
  }
  if (!open) return;  // the reader went away: nobody to tell
  std::fprintf(
      stderr, "nuwatch tail: %lld result(s), %lld flagged, %lld incident event(s) from %s%s\n",
      static_cast<long long>(tally.results), static_cast<long long>(tally.anomalies),
      static_cast<long long>(tally.events), args.connect.c_str(),
      tally.malformed > 0
          ? ("; " + std::to_string(tally.malformed) + " malformed message(s) skipped").c_str()
          : "");
  if (timed_out && count > 0 && tally.printed < count)
    throw CommandError("--timeout " + args.timeout + " passed after " +
                       std::to_string(tally.printed) + " of --count " + std::to_string(count) +
                       " messages");
}

void AddTailCommand(CLI::App& app) {
  auto args = std::make_shared<TailArguments>();
  CLI::App* command = app.add_subcommand(
      "tail", "Print the results and incident events nuwatchd publishes, as they arrive");
  command
      ->add_option("--connect", args->connect,
                   "ZeroMQ endpoint of nuwatchd's result socket (SUB connects to it)")
      ->type_name("ENDPOINT")
      ->required();
  command->add_option("--stream", args->streams, "Only this stream (repeat for several)")
      ->type_name("STREAM")
      ->multi_option_policy(CLI::MultiOptionPolicy::TakeAll);
  command->add_flag("--anomalies-only", args->anomalies_only,
                    "Only flagged results and incident events");
  command
      ->add_option("--count", args->count,
                   "Exit after printing this many messages; 0: no limit (with --timeout, "
                   "exit 1 if fewer arrive in time)")
      ->type_name("INTEGER")
      ->capture_default_str();
  command->add_option("--timeout", args->timeout, "Exit after this long (e.g. 30s); 0: never")
      ->type_name("DURATION")
      ->capture_default_str();
  command->add_flag("--json", args->json_output,
                    "Print each result and event as one JSON object per line, with the stream key "
                    "added as its first member \"stream\" (a single object as received; a "
                    "batch's results, JSON or binary, as the result objects of the JSON form)");
  AddClientKeyFlags(command, &args->keys);
  command->callback([args] { RunTail(*args); });
}

}  // namespace

NUWATCH_REGISTER_COMMAND(100, AddTailCommand);

}  // namespace nuwatch::cli
