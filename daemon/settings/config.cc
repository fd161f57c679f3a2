// Strict TOML loading for nuwatchd. The key tables (core's DetectorKeys(), DaemonKeys() below)
// drive parsing, copying, comparison, range checks, description and the default file, so a key
// added to a table is read, checked, overridden, compared, written back and documented in
// config/nuwatchd.toml without further code.
#include "settings/config.h"

#include <fnmatch.h>
#include <toml++/toml.h>

#include <algorithm>
#include <cctype>
#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <limits>
#include <map>
#include <optional>
#include <set>
#include <sstream>
#include <type_traits>
#include <variant>

#include "settings/setting_text.h"

namespace nuwatch {
namespace {

// ---------------------------------------------------------------------------------------------
// Values as TOML text (for DescribeDetectorOptions and for quoting values in messages).

std::string FormatDouble(double v) {
  std::string text = SettingNumberText(v);
  // TOML reads "3" as an integer; keep floats floats so the round trip keeps the type.
  if (std::isfinite(v) && text.find_first_of(".eE") == std::string::npos) text += ".0";
  return text;
}

std::string Quote(std::string_view s) { return SettingQuoted(s); }

std::string ToToml(double v) { return FormatDouble(v); }
std::string ToToml(bool v) { return v ? "true" : "false"; }
std::string ToToml(const std::string& v) { return Quote(v); }
std::string ToToml(KernelType v) { return Quote(KernelName(v)); }
std::string ToToml(ScalerType v) { return Quote(ScalerName(v)); }
std::string ToToml(const GammaSpec& v) {
  switch (v.mode) {
    case GammaSpec::Mode::kScale:
      return Quote("scale");
    case GammaSpec::Mode::kMedian:
      return Quote("median");
    case GammaSpec::Mode::kMinVolume:
      return Quote("min_volume");
    case GammaSpec::Mode::kValue:
      break;
  }
  return FormatDouble(v.value);
}
std::string ToToml(const std::vector<std::string>& v) {
  std::string out = "[";
  for (std::size_t i = 0; i < v.size(); ++i) {
    if (i > 0) out += ", ";
    out += Quote(v[i]);
  }
  return out + "]";
}
std::string ToToml(const std::vector<int64_t>& v) {
  std::string out = "[";
  for (std::size_t i = 0; i < v.size(); ++i) {
    if (i > 0) out += ", ";
    out += std::to_string(v[i]);
  }
  return out + "]";
}
template <class T>
requires std::is_integral_v<T> std::string ToToml(T v) { return std::to_string(v); }

// `text` as "# " comment lines of at most 100 columns, broken at spaces.
std::string WrapComment(std::string_view text) {
  constexpr std::size_t kWidth = 100 - 2;
  std::string out;
  while (!text.empty()) {
    std::size_t cut = text.size();
    if (cut > kWidth) {
      cut = text.rfind(' ', kWidth);
      if (cut == std::string_view::npos || cut == 0) cut = text.find(' ', kWidth);
      if (cut == std::string_view::npos) cut = text.size();
    }
    out += "# " + std::string(text.substr(0, cut)) + "\n";
    text.remove_prefix(std::min(text.size(), cut + 1));
  }
  return out;
}

bool SameValue(const GammaSpec& a, const GammaSpec& b) {
  return a.mode == b.mode && (a.mode != GammaSpec::Mode::kValue || a.value == b.value);
}
template <class T>
bool SameValue(const T& a, const T& b) {
  return a == b;
}

// ---------------------------------------------------------------------------------------------
// The daemon's key table (the detector's is core's DetectorKeys()).

template <class S>
using Member = SettingMember<S>;
using D = DetectorOptions;

using S = DaemonSettings;

constexpr std::string_view kLogLevels[] = {"trace", "debug",    "info", "warn",
                                           "error", "critical", "off"};
constexpr std::string_view kResultForms[] = {"json", "binary"};
constexpr SettingBounds AtLeast(double min) { return {.min = min}; }
constexpr SettingBounds Positive() { return {.min = 0, .min_open = true}; }
constexpr ReloadEffect kNow = ReloadEffect::kImmediate;
constexpr ReloadEffect kRestart = ReloadEffect::kRestart;

// The daemon's keys, section by section in the order config/nuwatchd.toml lists them. The
// defaults are DaemonSettings' member initialisers; config/REFERENCE.md explains each key.
const Setting<S> kDaemonKeys[] = {
    {.section = "daemon",
     .name = "log_level",
     .member = &S::log_level,
     .doc = "How much the daemon logs.",
     .choices = kLogLevels,
     .reload = kNow},
    {.section = "daemon",
     .name = "refit_threads",
     .member = &S::refit_threads,
     .doc = "Threads that run refits in the background. Scoring never waits for a refit; more "
            "threads let more streams refit at once, at the cost of that many cores.",
     .unit = "threads",
     .bounds = AtLeast(1),
     .reload = kRestart},
    {.section = "daemon",
     .name = "scoring_threads",
     .member = &S::scoring_threads,
     .doc = "Threads that score vectors; each owns a share of the streams (a stream always "
            "belongs to one thread, so its vectors are scored in order) and scores them without "
            "locks. 0: one per core.",
     .unit = "threads",
     .bounds = AtLeast(0),
     .reload = kRestart},
    {.section = "ingest",
     .name = "endpoints",
     .member = &S::ingest_endpoints,
     .doc = "Endpoints the daemon binds a PULL socket on; senders connect PUSH sockets and send "
            "ingest messages (daemon/protocol/PROTOCOL.md).",
     .unit = "ZeroMQ endpoints",
     .reload = kRestart},
    {.section = "ingest",
     .name = "subscribe",
     .member = &S::subscribe_endpoints,
     .doc = "Endpoints of upstream publishers the daemon connects a SUB socket to (all messages, "
            "each an ingest message as on the PULL socket). Empty: none.",
     .unit = "ZeroMQ endpoints",
     .reload = kRestart},
    {.section = "ingest",
     .name = "receive_high_water_mark",
     .member = &S::receive_high_water_mark,
     .doc = "Messages ZeroMQ queues on each ingest socket before senders block or drop; 0: no "
            "limit.",
     .unit = "messages",
     .bounds = AtLeast(0),
     .bounds_note = " (0: no limit)",
     .reload = kRestart},
    {.section = "ingest",
     .name = "max_senders",
     .member = &S::ingest_max_senders,
     .doc = "Connections the ingest sockets admit at once, all of them together; a further one is "
            "refused (ZAP status 400) and counted (nuwatch_auth_refusals_total{reason=\"sender_"
            "limit\"}), so that ZeroMQ's ingest queues take at most max_senders x "
            "receive_high_water_mark messages and idle connections cannot use up the daemon's "
            "file descriptors; 0: no limit.",
     .unit = "connections",
     .bounds = AtLeast(0),
     .bounds_note = " (0: no limit)",
     .reload = kRestart},
    {.section = "ingest",
     .name = "scoring_queue_bytes",
     .member = &S::scoring_queue_bytes,
     .doc = "Bytes of ingest messages handed to each scoring thread and not yet scored, at most "
            "(one message always goes, however large); beyond it, ingest waits in ZeroMQ's "
            "queues and then in the senders (nuwatch_ingest_waits_total{bound=\"bytes\"}).",
     .unit = "bytes",
     .bounds = {.min = 1, .max = int64_t{1} << 40},
     .bounds_note = " (1 TiB)",
     .reload = kNow},
    {.section = "ingest",
     .name = "max_unread_bytes",
     .member = &S::ingest_max_unread_bytes,
     .doc = "Bytes ZeroMQ and the kernel may hold for all ingest TCP connections together, "
            "received and not yet read by the daemon, while it cannot keep up; past it the "
            "daemon reads on and drops messages from the senders holding most until half of it "
            "is left, counted in nuwatch_ingest_shed_messages_total and "
            "nuwatch_ingest_shed_bytes_total, so that a flood of large messages cannot take "
            "memory without bound (ZeroMQ bounds its queues in messages only). A sender within "
            "its share loses nothing. 0: no budget (the senders wait instead, and ZeroMQ may "
            "hold max_senders x receive_high_water_mark x limits.max_message_bytes).",
     .unit = "bytes",
     .bounds = {.min = 0, .max = int64_t{1} << 40},
     .bounds_note = " (0: no budget; 1 TiB)",
     .reload = kNow},
    {.section = "publish",
     .name = "endpoint",
     .member = &S::publish_endpoint,
     .doc = "Endpoint the daemon binds its result socket (XPUB) on, for results and incident "
            "events.",
     .unit = "ZeroMQ endpoint",
     .reload = kRestart},
    {.section = "publish",
     .name = "high_water_mark",
     .member = &S::publish_high_water_mark,
     .doc = "Messages queued per subscriber; while one is full, results are dropped for all "
            "and counted (nuwatch_results_dropped_total); 0: no limit.",
     .unit = "messages",
     .bounds = AtLeast(0),
     .bounds_note = " (0: no limit)",
     .reload = kRestart},
    {.section = "publish",
     .name = "max_subscribers",
     .member = &S::publish_max_subscribers,
     .doc = "Connections the result socket admits at once; a further one is refused (ZAP status "
            "400) and counted (nuwatch_auth_refusals_total{reason=\"subscriber_limit\"}), so "
            "that queued results take at most max_subscribers x high_water_mark messages; 0: no "
            "limit.",
     .unit = "connections",
     .bounds = AtLeast(0),
     .bounds_note = " (0: no limit)",
     .reload = kRestart},
    {.section = "publish",
     .name = "include_learning",
     .member = &S::publish_learning,
     .doc = "Also publish results for vectors that arrive while their stream has no model yet "
            "(state \"learning\", decision null).",
     .reload = kNow},
    {.section = "publish",
     .name = "batches",
     .member = &S::publish_batches,
     .doc = "Publish the results of one ingest message as one message, {\"results\": [...]} "
            "(PROTOCOL.md §9.4), instead of one message per vector: fewer messages for "
            "subscribers that read batches. Off: every subscriber keeps the one-per-vector form. "
            "For the JSON form only (result_form = \"binary\" always publishes one message per "
            "ingest message).",
     .reload = kNow},
    {.section = "publish",
     .name = "result_form",
     .member = &S::publish_result_form,
     .doc = "How results are written: \"json\", the JSON objects of PROTOCOL.md §9.1 (or §9.4 "
            "with batches); \"binary\", one little-endian binary batch per ingest message "
            "(§9.5), features named by column index: less CPU and fewer bytes, for subscribers "
            "that read §9.5. Incident events stay JSON either way.",
     .choices = kResultForms,
     .reload = kNow},
    {.section = "control",
     .name = "endpoint",
     .member = &S::control_endpoint,
     .doc = "Endpoint the daemon binds its REP socket on, for control requests (relearn, forget, "
            "reload: whoever reaches it steers the daemon). \"\": an ipc:// socket of mode 0600, "
            "STATE_DIR/nuwatchd.control, else nuwatchd.control in $RUNTIME_DIRECTORY, "
            "$XDG_RUNTIME_DIR or /tmp/nuwatchd-UID (0700).",
     .unit = "ZeroMQ endpoint",
     .reload = kRestart},
    {.section = "control",
     .name = "allow_unauthenticated_tcp",
     .member = &S::control_allow_unauthenticated_tcp,
     .doc = "A tcp:// control endpoint without [auth] is refused unless this says, in words, that "
            "anyone who can reach it may steer the daemon.",
     .reload = kRestart},
    {.section = "auth",
     .name = "server_secret_key_file",
     .member = &S::server_secret_key_file,
     .doc = "The daemon's CURVE certificate with its secret key (NAME.key_secret of nuwatch "
            "keygen, mode 0600). Set: the ingest, result and control sockets require CURVE and "
            "admit only client_keys. \"\": no authentication.",
     .unit = "file",
     .reload = kRestart},
    {.section = "auth",
     .name = "client_keys",
     .member = &S::client_keys,
     .doc = "The client public keys admitted: a file of Z85 keys (one a line) or a directory of "
            "NAME.key certificates. Reread on reload, so that keys can be added and revoked.",
     .unit = "file or directory",
     .reload = kNow},
    {.section = "auth",
     .name = "subscribe_server_key_file",
     .member = &S::subscribe_server_key_file,
     .doc = "The public key (NAME.key) of the publishers ingest.subscribe connects to. Set: the "
            "SUB socket is a CURVE client that offers the daemon's own key pair "
            "(server_secret_key_file) and takes data only from a publisher holding this key. "
            "\"\": a plain SUB socket.",
     .unit = "file",
     .reload = kRestart},
    {.section = "metrics",
     .name = "listen",
     .member = &S::metrics_listen,
     .doc = "HOST:PORT of the Prometheus /metrics endpoint; port 0 picks a free port.",
     .reload = kRestart},
    {.section = "metrics",
     .name = "basic_auth_user",
     .member = &S::metrics_basic_auth_user,
     .doc = "User name that /metrics requires (HTTP basic authentication, RFC 7617); \"\": none. "
            "Needs basic_auth_password_file.",
     .reload = kRestart},
    {.section = "metrics",
     .name = "basic_auth_password_file",
     .member = &S::metrics_basic_auth_password_file,
     .doc = "File whose first line is the password of basic_auth_user (mode 0600 or 0400: the "
            "daemon refuses a file others may read).",
     .unit = "file",
     .reload = kRestart},
    {.section = "metrics",
     .name = "anomaly_ratio_window",
     .member = &S::anomaly_ratio_window,
     .doc = "The nuwatch_anomaly_ratio gauge is the flagged fraction of each stream's last this "
            "many vectors.",
     .unit = "vectors",
     .bounds = {.min = 1, .max = 1e7},  // a ring per stream, allocated up front
     .reload = kNow},
    {.section = "state",
     .name = "dir",
     .member = &S::state_dir,
     .doc = "Directory for model snapshots, restored at start-up so that a restart does not "
            "relearn every stream. \"\": no state is kept.",
     .unit = "directory",
     .reload = kRestart},
    {.section = "state",
     .name = "snapshot_interval_seconds",
     .member = &S::snapshot_interval_seconds,
     .doc = "Time between snapshots of the streams to dir.",
     .unit = "seconds",
     .bounds = Positive(),
     .reload = kNow},
    {.section = "limits",
     .name = "max_streams",
     .member = &S::max_streams,
     .doc = "Streams the daemon keeps at most; vectors of further new streams are rejected "
            "(stream_limit).",
     .unit = "streams",
     .bounds = AtLeast(1),
     .reload = kNow},
    {.section = "limits",
     .name = "idle_expiry_seconds",
     .member = &S::idle_expiry_seconds,
     .doc = "A stream that sends no vector for this long is forgotten as the forget control "
            "command does (model, window, metric series and state file go), so that its place "
            "under max_streams comes back; its next vector starts it afresh. 0: never.",
     .unit = "seconds",
     .bounds = {.min = 0, .max = 1e9},
     .reload = kNow},
    // The wire bounds of daemon/protocol/PROTOCOL.md §7: the binary dims field is 16 bits, and
    // 28 bytes is the smallest binary message.
    {.section = "limits",
     .name = "max_dims",
     .member = &S::max_dims,
     .doc = "Features per vector at most (dims_limit).",
     .unit = "features",
     .bounds = {.min = 1, .max = 65535},
     .reload = kNow},
    {.section = "limits",
     .name = "max_message_bytes",
     .member = &S::max_message_bytes,
     .doc = "Bytes of one ingest payload at most (message_too_large).",
     .unit = "bytes",
     // Up to twice this reaches the decoder (daemon.cc, ZMQ_MAXMSGSIZE): 2 x 2^62 overflowed
     // that limit and let frames of any size in (issue 10).
     .bounds = {.min = 28, .max = 1 << 30},
     .bounds_note = " (the smallest binary message; 1 GiB)",
     .reload = kNow},
    {.section = "limits",
     .name = "max_vectors_per_message",
     .member = &S::max_vectors_per_message,
     .doc = "Vectors in one ingest message at most (count_limit).",
     .unit = "vectors",
     .bounds = AtLeast(1),
     .reload = kNow},
    {.section = "recording",
     .name = "dir",
     .member = &S::record_dir,
     .doc = "Directory where the received vectors are also written, for replay and tuning. \"\": "
            "no recording.",
     .unit = "directory",
     .reload = kRestart},
    {.section = "recording",
     .name = "rotate_bytes",
     .member = &S::record_rotate_bytes,
     .doc = "A recording file is closed and a new one started when it reaches this size.",
     .unit = "bytes",
     .bounds = AtLeast(1),
     .reload = kNow},
    {.section = "recording",
     .name = "keep_files",
     .member = &S::record_keep_files,
     .doc = "Recording files kept; the oldest beyond this are deleted. 0: keep every file.",
     .unit = "files",
     .bounds = AtLeast(0),
     .bounds_note = " (0: keep every file)",
     .reload = kNow},
    {.section = "cluster",
     .name = "members",
     .member = &S::cluster_members,
     .doc = "Names of every replica that shares the streams (StatefulSet pod names such as "
            "nuwatchd-0); each stream is owned by one of them (PROTOCOL.md §13) and a vector for "
            "another member's stream is rejected (not_owner). []: a lone daemon owns every stream.",
     .unit = "member names",
     .distinct = true,
     .reload = kNow},
    {.section = "cluster",
     .name = "member",
     .member = &S::cluster_member,
     .doc = "This daemon's name, one of members (nuwatchd --member NAME overrides it, e.g. with "
            "the pod's name); a reload that leaves it out of members makes it depart, handing "
            "its streams over (PROTOCOL.md §13.4). \"\": none, for a lone daemon.",
     .unit = "member name",
     .reload = kNow},
    {.section = "cluster",
     .name = "control_endpoint",
     .member = &S::cluster_control_endpoint,
     .doc = "Every member's control endpoint, {member} standing for the member's name (e.g. "
            "\"tcp://{member}.nuwatchd:7603\"): when a reload of members moves a stream, its old "
            "owner hands the stream's state to the new owner there, so that scoring goes on "
            "without a new warm-up (PROTOCOL.md §13.4). \"\": no handoff; a stream that changes "
            "owner starts afresh at its new owner.",
     .unit = "ZeroMQ endpoint template",
     .reload = kNow},
    {.section = "cluster",
     .name = "handoff_timeout_seconds",
     .member = &S::cluster_handoff_timeout_seconds,
     .doc = "After a change of members, how long an old owner keeps offering a stream's state to "
            "its new owner, and how long the new owner holds the vectors of a stream whose state "
            "has not come yet; then the stream starts afresh at its new owner.",
     .unit = "seconds",
     .bounds = {.min = 0, .min_open = true, .max = 86400},
     .reload = kNow},
};

constexpr std::string_view kDaemonSections[] = {"daemon",    "ingest",  "publish", "control",
                                                "auth",      "metrics", "state",   "limits",
                                                "recording", "cluster"};
constexpr std::string_view kDetectorSection = "detector";
constexpr std::string_view kStreamSection = "stream";
constexpr std::string_view kMatchKey = "match";

const Setting<D>* FindDetectorKey(std::string_view name) {
  return FindSetting(DetectorKeys(), name);
}

template <class T>
void CopyMember(const Member<T>& member, const T& from, T& to) {
  std::visit([&](auto pointer) { to.*pointer = from.*pointer; }, member);
}

// ---------------------------------------------------------------------------------------------
// Suggestions for misspelt keys.

// ---------------------------------------------------------------------------------------------
// Reading nodes.

std::string Position(const std::string& path, const toml::source_region& region) {
  return path + ":" + std::to_string(region.begin.line) + ":" + std::to_string(region.begin.column);
}

std::string Describe(const toml::node& node) {
  switch (node.type()) {
    case toml::node_type::string:
      return "the string " + Quote(node.as_string()->get());
    case toml::node_type::integer:
      return "an integer";
    case toml::node_type::floating_point:
      return "a floating-point number";
    case toml::node_type::boolean:
      return "a boolean";
    case toml::node_type::array:
      return "an array";
    case toml::node_type::table:
      return "a table";
    case toml::node_type::date:
      return "a date";
    case toml::node_type::time:
      return "a time";
    case toml::node_type::date_time:
      return "a date-time";
    case toml::node_type::none:
      break;
  }
  return "nothing";
}

class Reader {
 public:
  explicit Reader(const std::string& path) : path_(path) {}

  const std::string& path() const { return path_; }
  std::string At(const toml::source_region& region) const { return Position(path_, region) + ": "; }

  [[noreturn]] void Fail(const toml::source_region& region, const std::string& message) const {
    throw ConfigError(At(region) + message);
  }
  [[noreturn]] void WrongType(const toml::node& node, const std::string& key,
                              std::string_view expected) const {
    Fail(node.source(),
         "key '" + key + "' must be " + std::string(expected) + ", not " + Describe(node));
  }

  template <class T>
  T Read(const toml::node& node, const std::string& key) const {
    if constexpr (std::is_same_v<T, double>) {
      if (const auto* f = node.as_floating_point()) return f->get();
      if (const auto* i = node.as_integer()) return static_cast<double>(i->get());
      WrongType(node, key, "a number");
    } else if constexpr (std::is_same_v<T, bool>) {
      if (const auto* b = node.as_boolean()) return b->get();
      WrongType(node, key, "a boolean (true or false)");
    } else if constexpr (std::is_integral_v<T>) {
      const auto* i = node.as_integer();
      if (i == nullptr) WrongType(node, key, "an integer");
      const int64_t v = i->get();
      if constexpr (std::is_unsigned_v<T>) {
        if (v < 0) Fail(node.source(), key + " = " + std::to_string(v) + " must not be negative");
      } else {
        if (v < std::numeric_limits<T>::min() || v > std::numeric_limits<T>::max()) {
          Fail(node.source(), key + " = " + std::to_string(v) + " is out of range [" +
                                  std::to_string(std::numeric_limits<T>::min()) + ", " +
                                  std::to_string(std::numeric_limits<T>::max()) + "]");
        }
      }
      return static_cast<T>(v);
    } else if constexpr (std::is_same_v<T, std::string>) {
      if (const auto* s = node.as_string()) return s->get();
      WrongType(node, key, "a string");
    } else if constexpr (std::is_same_v<T, std::vector<std::string>>) {
      const auto* array = node.as_array();
      if (array == nullptr) WrongType(node, key, "an array of strings");
      std::vector<std::string> out;
      for (std::size_t i = 0; i < array->size(); ++i) {
        const auto* s = (*array)[i].as_string();
        if (s == nullptr) {
          Fail((*array)[i].source(), "key '" + key + "' must be an array of strings; element " +
                                         std::to_string(i + 1) + " is " + Describe((*array)[i]));
        }
        out.push_back(s->get());
      }
      return out;
    } else if constexpr (std::is_same_v<T, std::vector<int64_t>>) {
      const auto* array = node.as_array();
      if (array == nullptr) WrongType(node, key, "an array of integers");
      std::vector<int64_t> out;
      for (std::size_t i = 0; i < array->size(); ++i) {
        const auto* v = (*array)[i].as_integer();
        if (v == nullptr) {
          Fail((*array)[i].source(), "key '" + key + "' must be an array of integers; element " +
                                         std::to_string(i + 1) + " is " + Describe((*array)[i]));
        }
        out.push_back(v->get());
      }
      return out;
    } else if constexpr (std::is_same_v<T, KernelType>) {
      constexpr std::string_view kExpected = "one of \"rbf\", \"linear\", \"poly\"";
      const auto* s = node.as_string();
      if (s == nullptr) WrongType(node, key, kExpected);
      const auto parsed = ParseKernelType(s->get());
      if (!parsed) WrongType(node, key, kExpected);
      return *parsed;
    } else if constexpr (std::is_same_v<T, ScalerType>) {
      constexpr std::string_view kExpected = "one of \"none\", \"standard\", \"robust\"";
      const auto* s = node.as_string();
      if (s == nullptr) WrongType(node, key, kExpected);
      const auto parsed = ParseScalerType(s->get());
      if (!parsed) WrongType(node, key, kExpected);
      return *parsed;
    } else if constexpr (std::is_same_v<T, GammaSpec>) {
      constexpr std::string_view kExpected =
          "\"scale\", \"median\", \"min_volume\" or a positive number";
      if (const auto* s = node.as_string()) {
        const auto parsed = GammaSpec::Parse(s->get());
        if (!parsed) WrongType(node, key, kExpected);
        return *parsed;
      }
      if (node.is_number()) {
        // The range check (> 0, finite) is ValidateDetectorOptions's, shared with the tools.
        GammaSpec spec;
        spec.mode = GammaSpec::Mode::kValue;
        spec.value = Read<double>(node, key);
        return spec;
      }
      WrongType(node, key, kExpected);
    } else {
      static_assert(sizeof(T) == 0, "no reader for this member type");
    }
  }

  template <class T>
  void ReadInto(const Member<T>& member, const toml::node& node, const std::string& key,
                T& target) const {
    std::visit(
        [&](auto pointer) {
          using Value = std::remove_cvref_t<decltype(target.*pointer)>;
          target.*pointer = Read<Value>(node, key);
        },
        member);
  }

 private:
  const std::string& path_;
};

struct Entry {
  const toml::key* key;
  const toml::node* node;
};

// toml::table iterates in key order; errors and StreamOverride::keys follow the file instead.
std::vector<Entry> InFileOrder(const toml::table& table) {
  std::vector<Entry> entries;
  for (const auto& [key, node] : table) entries.push_back({&key, &node});
  std::sort(entries.begin(), entries.end(), [](const Entry& a, const Entry& b) {
    const auto& pa = a.key->source().begin;
    const auto& pb = b.key->source().begin;
    return pa.line != pb.line ? pa.line < pb.line : pa.column < pb.column;
  });
  return entries;
}

// Where the keys of one table were set: key name -> the value's position.
using KeyPositions = std::map<std::string, toml::source_region, std::less<>>;

// "key 'detector.nuu' is not a known key (did you mean 'nu'?)"; `table` is "" at the top level.
[[noreturn]] void UnknownKey(const Reader& reader, const toml::key& key, const toml::node& node,
                             std::string_view table, const std::vector<std::string_view>& valid) {
  const std::string typed(key.str());
  std::string message;
  if (table.empty()) {
    const bool is_section = node.is_table() || node.is_array();
    message = std::string(is_section ? "section '" : "key '") + typed + "' is not a known " +
              (is_section ? "section" : "key at the top level");
  } else {
    message = "key '" + std::string(table) + "." + typed + "' is not a known key";
  }
  std::string hint;
  if (const auto close = ClosestName(typed, valid)) {
    hint = "did you mean '" + std::string(*close) + "'?";
  } else {
    // The right key in the wrong section: name the section it belongs to.
    std::vector<std::string> homes;
    for (const auto& k : DaemonKeys()) {
      if (k.name == typed && k.section != table) homes.push_back(std::string(k.section));
    }
    if (FindDetectorKey(typed) != nullptr && table != kDetectorSection && table != kStreamSection) {
      homes.push_back(std::string(kDetectorSection));
    }
    if (!homes.empty()) {
      hint = "did you mean '" + homes.front() + "." + typed + "'?";
    } else if (valid.size() <= 10) {
      hint = std::string(table.empty() ? "known sections: " : "known keys here: ");
      for (std::size_t i = 0; i < valid.size(); ++i) {
        hint += (i > 0 ? ", " : "") + std::string(valid[i]);
      }
    }
  }
  if (!hint.empty()) message += " (" + hint + ")";
  reader.Fail(key.source(), message);
}

const toml::table& RequireTable(const Reader& reader, const toml::key& key,
                                const toml::node& node) {
  const auto* table = node.as_table();
  if (table == nullptr) {
    reader.Fail(node.source(), "key '" + std::string(key.str()) + "' must be a table ([" +
                                   std::string(key.str()) + "]), not " + Describe(node));
  }
  return *table;
}

void ParseDaemonSection(const Reader& reader, std::string_view section, const toml::table& table,
                        DaemonSettings& out, KeyPositions& positions) {
  std::vector<std::string_view> valid;
  for (const auto& k : DaemonKeys()) {
    if (k.section == section) valid.push_back(k.name);
  }
  for (const Entry& entry : InFileOrder(table)) {
    const Setting<S>* spec = nullptr;
    for (const auto& k : DaemonKeys()) {
      if (k.section == section && k.name == entry.key->str()) spec = &k;
    }
    if (spec == nullptr) UnknownKey(reader, *entry.key, *entry.node, section, valid);
    const std::string full = std::string(section) + "." + std::string(spec->name);
    reader.ReadInto(spec->member, *entry.node, full, out);
    positions[full] = entry.node->source();
  }
}

std::vector<std::string_view> DetectorKeyNames() {
  std::vector<std::string_view> names;
  for (const auto& k : DetectorKeys()) names.push_back(k.name);
  return names;
}

void ParseDetectorSection(const Reader& reader, const toml::table& table, DetectorOptions& out,
                          KeyPositions& positions) {
  const auto valid = DetectorKeyNames();
  for (const Entry& entry : InFileOrder(table)) {
    const auto* spec = FindDetectorKey(entry.key->str());
    if (spec == nullptr) UnknownKey(reader, *entry.key, *entry.node, kDetectorSection, valid);
    const std::string name(spec->name);
    reader.ReadInto(spec->member, *entry.node, "detector." + name, out);
    positions[name] = entry.node->source();
  }
}

Config::StreamOverride ParseOverride(const Reader& reader, const toml::table& table,
                                     KeyPositions& positions) {
  Config::StreamOverride result;
  result.origin = reader.path() + ":" + std::to_string(table.source().begin.line);
  auto valid = DetectorKeyNames();
  valid.insert(valid.begin(), kMatchKey);
  bool has_match = false;
  for (const Entry& entry : InFileOrder(table)) {
    const std::string name(entry.key->str());
    if (name == kMatchKey) {
      result.match = reader.Read<std::string>(*entry.node, "stream.match");
      if (result.match.empty()) {
        reader.Fail(entry.node->source(),
                    "stream.match is empty; it must be a glob on the stream key, e.g. "
                    "match = \"pump-0*\"");
      }
      has_match = true;
      positions[name] = entry.node->source();
      continue;
    }
    const auto* spec = FindDetectorKey(name);
    if (spec == nullptr) UnknownKey(reader, *entry.key, *entry.node, kStreamSection, valid);
    reader.ReadInto(spec->member, *entry.node, "stream." + name, result.values);
    result.keys.push_back(name);
    positions[name] = entry.node->source();
  }
  if (!has_match) {
    reader.Fail(table.source(),
                "[[stream]] has no 'match' key (a glob on the stream key, e.g. "
                "match = \"pump-0*\")");
  }
  return result;
}

void ApplyOverride(const Config::StreamOverride& override_table, DetectorOptions& options) {
  for (const auto& name : override_table.keys) {
    // ParseOverride only records names of the table, so the lookup cannot fail.
    if (const auto* spec = FindDetectorKey(name)) {
      CopyMember(spec->member, override_table.values, options);
    }
  }
}

// ---------------------------------------------------------------------------------------------
// Checks. The per-key rules are the tables' (CheckSettings); here are only the daemon's rules that
// span keys (endpoint syntax, endpoints bound twice, nothing to receive from). A violation names
// the keys it involves (the most specific first) so that the loader can point at the one the file
// set.

using Violation = SettingViolation;

std::string QualifiedName(std::string_view section, std::string_view key) {
  return std::string(section) + "." + std::string(key);
}

std::optional<Violation> CheckDetector(const DetectorOptions& o, const SettingNamer& name) {
  return FindDetectorViolation(o, name);
}

// "TRANSPORT://ADDRESS" with a lower-case transport; ZeroMQ itself checks the address.
bool LooksLikeEndpoint(std::string_view endpoint) {
  const auto separator = endpoint.find("://");
  if (separator == std::string_view::npos || separator == 0) return false;
  if (separator + 3 >= endpoint.size()) return false;
  for (const char c : endpoint.substr(0, separator)) {
    if (!std::islower(static_cast<unsigned char>(c)) &&
        !std::isdigit(static_cast<unsigned char>(c)))
      return false;
  }
  return true;
}

// An ephemeral port ("tcp://127.0.0.1:*" or ":0") can be bound any number of times.
bool IsEphemeral(std::string_view endpoint) {
  return endpoint.ends_with(":*") || endpoint.ends_with(":0");
}

// "HOST:PORT" (IPv6 hosts in brackets), port 0..65535.
bool LooksLikeListenAddress(std::string_view address) {
  const auto colon = address.rfind(':');
  if (colon == std::string_view::npos || colon == 0 || colon + 1 == address.size()) return false;
  const std::string_view host = address.substr(0, colon);
  const std::string_view port = address.substr(colon + 1);
  if (port.size() > 5) return false;
  int value = 0;
  const auto [end, ec] = std::from_chars(port.data(), port.data() + port.size(), value);
  if (ec != std::errc() || end != port.data() + port.size() || value > 65535) return false;
  if (host.find(':') != std::string_view::npos) {
    return host.size() > 2 && host.front() == '[' && host.back() == ']';
  }
  return true;
}

std::optional<Violation> CheckDaemon(const DaemonSettings& s) {
  auto fail = [](std::string key, std::string message) {
    return std::optional<Violation>(Violation{"", {std::move(key)}, std::move(message)});
  };
  const std::string example = " (TRANSPORT://ADDRESS, e.g. tcp://127.0.0.1:7601)";
  // Every endpoint the daemon binds, with the key it came from, for the duplicate check.
  std::vector<std::pair<std::string, std::string>> bound;
  for (std::size_t i = 0; i < s.ingest_endpoints.size(); ++i) {
    const std::string& e = s.ingest_endpoints[i];
    if (!LooksLikeEndpoint(e)) {
      return fail("ingest.endpoints", "ingest.endpoints element " + std::to_string(i + 1) + " = " +
                                          Quote(e) + " is not a ZeroMQ endpoint" + example);
    }
    bound.emplace_back("ingest.endpoints", e);
  }
  for (std::size_t i = 0; i < s.subscribe_endpoints.size(); ++i) {
    const std::string& e = s.subscribe_endpoints[i];
    if (!LooksLikeEndpoint(e)) {
      return fail("ingest.subscribe", "ingest.subscribe element " + std::to_string(i + 1) + " = " +
                                          Quote(e) + " is not a ZeroMQ endpoint" + example);
    }
  }
  if (s.ingest_endpoints.empty() && s.subscribe_endpoints.empty()) {
    return std::optional<Violation>(
        Violation{"ingest",
                  {"ingest.endpoints", "ingest.subscribe"},
                  "ingest.endpoints and ingest.subscribe are both empty: the daemon would "
                  "receive nothing"});
  }
  if (!LooksLikeEndpoint(s.publish_endpoint)) {
    return fail("publish.endpoint", "publish.endpoint = " + Quote(s.publish_endpoint) +
                                        " is not a ZeroMQ endpoint" + example);
  }
  bound.emplace_back("publish.endpoint", s.publish_endpoint);
  if (!s.control_endpoint.empty()) {
    if (!LooksLikeEndpoint(s.control_endpoint)) {
      return fail("control.endpoint", "control.endpoint = " + Quote(s.control_endpoint) +
                                          " is not a ZeroMQ endpoint" + example);
    }
    bound.emplace_back("control.endpoint", s.control_endpoint);
  }
  // The control socket relearns, forgets and reloads: on TCP anyone who reaches the port could.
  if (IsTcpEndpoint(s.control_endpoint) && s.server_secret_key_file.empty() &&
      !s.control_allow_unauthenticated_tcp) {
    return std::optional<Violation>(Violation{
        "control",
        {"control.endpoint", "auth.server_secret_key_file", "control.allow_unauthenticated_tcp"},
        "control.endpoint = " + Quote(s.control_endpoint) +
            " is a TCP control socket without authentication: anyone who can reach it could "
            "relearn, forget and reload. Leave control.endpoint unset (an ipc:// socket of mode "
            "0600), set [auth] server_secret_key_file and client_keys, or set "
            "control.allow_unauthenticated_tcp = true"});
  }
  if (s.server_secret_key_file.empty() != s.client_keys.empty()) {
    const bool server_only = s.client_keys.empty();
    return std::optional<Violation>(Violation{
        "auth",
        {server_only ? "auth.server_secret_key_file" : "auth.client_keys",
         server_only ? "auth.client_keys" : "auth.server_secret_key_file"},
        server_only ? "auth.server_secret_key_file is set but auth.client_keys is not: CURVE "
                      "would admit no client"
                    : "auth.client_keys is set but auth.server_secret_key_file is not: the "
                      "daemon has no key to offer CURVE clients"});
  }
  if (!s.subscribe_server_key_file.empty() && s.server_secret_key_file.empty()) {
    return std::optional<Violation>(Violation{
        "auth",
        {"auth.subscribe_server_key_file", "auth.server_secret_key_file"},
        "auth.subscribe_server_key_file is set but auth.server_secret_key_file is not: the "
        "daemon's key pair is what it offers the publishers as a CURVE client"});
  }
  for (std::size_t i = 0; i < bound.size(); ++i) {
    for (std::size_t j = 0; j < i; ++j) {
      if (bound[i].second == bound[j].second && !IsEphemeral(bound[i].second)) {
        return fail(bound[i].first, bound[i].first + " = " + Quote(bound[i].second) +
                                        " is also bound by " + bound[j].first +
                                        "; each socket needs its own endpoint");
      }
    }
  }
  if (s.metrics_basic_auth_user.empty() != s.metrics_basic_auth_password_file.empty()) {
    const bool user_only = s.metrics_basic_auth_password_file.empty();
    return std::optional<Violation>(Violation{
        "metrics",
        {user_only ? "metrics.basic_auth_user" : "metrics.basic_auth_password_file",
         user_only ? "metrics.basic_auth_password_file" : "metrics.basic_auth_user"},
        user_only ? "metrics.basic_auth_user is set but metrics.basic_auth_password_file is not"
                  : "metrics.basic_auth_password_file is set but metrics.basic_auth_user is not"});
  }
  if (!LooksLikeListenAddress(s.metrics_listen)) {
    return fail("metrics.listen", "metrics.listen = " + Quote(s.metrics_listen) +
                                      " must be HOST:PORT, e.g. 127.0.0.1:9464 (port 0: any free "
                                      "port)");
  }
  if (auto violation = CheckSettings(DaemonKeys(), s, QualifiedName)) {
    // The loader finds daemon keys by their qualified name.
    for (std::string& key : violation->keys) key = QualifiedName(violation->section, key);
    return violation;
  }
  return std::nullopt;
}

// "FILE:LINE:COL: " of the first key of the violation that the table set, else `fallback`.
std::string Locate(const Reader& reader, const Violation& violation, const KeyPositions& positions,
                   const std::string& fallback) {
  for (const auto& key : violation.keys) {
    if (const auto it = positions.find(key); it != positions.end()) return reader.At(it->second);
  }
  return fallback;
}

}  // namespace

// -----------------------------------------------------------------------------------------------

Config DefaultConfig() { return Config{}; }

Config ParseConfig(std::string_view toml_text, const std::string& path_for_messages) {
  const Reader reader(path_for_messages);
  toml::table root;
  try {
    root = toml::parse(toml_text, std::string_view(path_for_messages));
  } catch (const toml::parse_error& error) {
    throw ConfigError(reader.At(error.source()) +
                      "TOML syntax error: " + std::string(error.description()));
  }

  Config config;
  config.source_path = path_for_messages;
  KeyPositions daemon_positions;
  KeyPositions detector_positions;
  std::vector<KeyPositions> override_positions;

  std::vector<std::string_view> sections(std::begin(kDaemonSections), std::end(kDaemonSections));
  sections.push_back(kDetectorSection);
  sections.push_back(kStreamSection);

  for (const Entry& entry : InFileOrder(root)) {
    const std::string_view name = entry.key->str();
    if (name == kDetectorSection) {
      ParseDetectorSection(reader, RequireTable(reader, *entry.key, *entry.node), config.detector,
                           detector_positions);
    } else if (name == kStreamSection) {
      const auto* array = entry.node->as_array();
      if (array == nullptr) {
        reader.Fail(entry.node->source(),
                    "'stream' must be an array of tables: write [[stream]] (double brackets), "
                    "not " +
                        Describe(*entry.node));
      }
      for (const auto& element : *array) {
        const auto* table = element.as_table();
        if (table == nullptr) {
          reader.Fail(element.source(),
                      "each 'stream' entry must be a table ([[stream]]), not " + Describe(element));
        }
        KeyPositions positions;
        config.overrides.push_back(ParseOverride(reader, *table, positions));
        override_positions.push_back(std::move(positions));
      }
    } else if (std::find(std::begin(kDaemonSections), std::end(kDaemonSections), name) !=
               std::end(kDaemonSections)) {
      ParseDaemonSection(reader, name, RequireTable(reader, *entry.key, *entry.node), config.daemon,
                         daemon_positions);
    } else {
      UnknownKey(reader, *entry.key, *entry.node, "", sections);
    }
  }

  const std::string file_prefix = path_for_messages + ": ";
  if (const auto violation = CheckDaemon(config.daemon)) {
    throw ConfigError(Locate(reader, *violation, daemon_positions, file_prefix) +
                      violation->message);
  }
  const auto in_detector = [](std::string_view, std::string_view key) {
    return "detector." + std::string(key);
  };
  if (const auto violation = CheckDetector(config.detector, in_detector)) {
    throw ConfigError(Locate(reader, *violation, detector_positions, file_prefix) +
                      violation->message);
  }
  const auto check_dims = [&](const DetectorOptions& options, const std::string& key_name,
                              const std::string& where) {
    if (options.feature_names.size() > static_cast<std::size_t>(config.daemon.max_dims)) {
      throw ConfigError(where + key_name + " has " + std::to_string(options.feature_names.size()) +
                        " names but limits.max_dims = " + std::to_string(config.daemon.max_dims));
    }
  };
  {
    const auto it = detector_positions.find("feature_names");
    check_dims(config.detector, "detector.feature_names",
               it == detector_positions.end() ? file_prefix : reader.At(it->second));
  }

  for (std::size_t i = 0; i < config.overrides.size(); ++i) {
    const auto& override_table = config.overrides[i];
    const auto& positions = override_positions[i];
    for (std::size_t j = 0; j < i; ++j) {
      if (config.overrides[j].match == override_table.match) {
        throw ConfigError(reader.At(positions.at(std::string(kMatchKey))) +
                          "stream.match = " + Quote(override_table.match) +
                          " repeats the [[stream]] at " + config.overrides[j].origin +
                          "; the first match wins, so this one would never apply");
      }
    }
    DetectorOptions merged = config.detector;
    ApplyOverride(override_table, merged);
    const auto namer = [&](std::string_view, std::string_view key) {
      const bool set_here = positions.find(key) != positions.end();
      return std::string(set_here ? "stream." : "detector.") + std::string(key);
    };
    const std::string origin_prefix = override_table.origin + ": ";
    if (const auto violation = CheckDetector(merged, namer)) {
      throw ConfigError(Locate(reader, *violation, positions, origin_prefix) + violation->message);
    }
    const auto it = positions.find("feature_names");
    if (it != positions.end()) check_dims(merged, "stream.feature_names", reader.At(it->second));
  }
  return config;
}

Config LoadConfig(const std::string& path) {
  std::error_code error;
  if (std::filesystem::is_directory(path, error)) {
    throw ConfigError(path + ": is a directory, not a config file");
  }
  std::ifstream in(path, std::ios::binary);
  if (!in) {
    throw ConfigError(path + ": cannot open the config file: " + std::strerror(errno));
  }
  std::ostringstream text;
  text << in.rdbuf();
  if (in.bad()) {
    throw ConfigError(path + ": cannot read the config file: " + std::strerror(errno));
  }
  return ParseConfig(text.str(), path);
}

const Config::StreamOverride* MatchingOverride(const Config& config, std::string_view stream_key) {
  const std::string key(stream_key);  // fnmatch needs a terminated string
  for (const auto& override_table : config.overrides) {
    if (fnmatch(override_table.match.c_str(), key.c_str(), 0) == 0) return &override_table;
  }
  return nullptr;
}

DetectorOptions DetectorOptionsFor(const Config& config, std::string_view stream_key) {
  DetectorOptions options = config.detector;
  if (const auto* override_table = MatchingOverride(config, stream_key)) {
    ApplyOverride(*override_table, options);
  }
  return options;
}

std::string EndpointSyntaxProblem(std::string_view endpoint) {
  if (endpoint.empty()) return "the endpoint is empty";
  if (LooksLikeEndpoint(endpoint)) return "";
  const bool host_and_port = endpoint.find("://") == std::string_view::npos &&
                             endpoint.find(':') != std::string_view::npos;
  return Quote(std::string(endpoint)) + " is not a ZeroMQ endpoint" +
         (host_and_port ? "; write tcp://" + std::string(endpoint)
                        : " (TRANSPORT://ADDRESS, e.g. tcp://127.0.0.1:7601 or "
                          "ipc:///run/nuwatch/ingest)");
}

void ValidateDetectorOptions(const DetectorOptions& options, const std::string& where) {
  const auto plain = [](std::string_view, std::string_view key) { return std::string(key); };
  if (const auto violation = CheckDetector(options, plain)) {
    throw ConfigError(where.empty() ? violation->message : where + ": " + violation->message);
  }
}

void ValidateDaemonSettings(const DaemonSettings& settings, const std::string& where) {
  if (const auto violation = CheckDaemon(settings)) {
    throw ConfigError(where.empty() ? violation->message : where + ": " + violation->message);
  }
}

bool IsTcpEndpoint(std::string_view endpoint) { return endpoint.starts_with("tcp://"); }

std::string DefaultControlEndpoint(const std::string& state_dir, const char* runtime_directory,
                                   const char* xdg_runtime_dir, unsigned uid) {
  constexpr std::string_view kName = "nuwatchd.control";
  std::string dir;
  if (!state_dir.empty()) {
    dir = state_dir;
  } else if (runtime_directory != nullptr && *runtime_directory != '\0') {
    dir = runtime_directory;
    dir = dir.substr(0, dir.find(':'));  // systemd lists several directories with ':'
  } else if (xdg_runtime_dir != nullptr && *xdg_runtime_dir != '\0') {
    dir = xdg_runtime_dir;
  } else {
    dir = "/tmp/nuwatchd-" + std::to_string(uid);
  }
  while (dir.size() > 1 && dir.back() == '/') dir.pop_back();
  return "ipc://" + dir + "/" + std::string(kName);
}

std::string DescribeDetectorOptions(const DetectorOptions& options) {
  std::string out = "[detector]\n";
  for (const auto& key : DetectorKeys()) {
    out += std::string(key.name) + " = " +
           std::visit([&](auto pointer) { return ToToml(options.*pointer); }, key.member) + "\n";
  }
  return out;
}

bool SameDetectorOptions(const DetectorOptions& a, const DetectorOptions& b) {
  for (const auto& key : DetectorKeys()) {
    const bool same =
        std::visit([&](auto pointer) { return SameValue(a.*pointer, b.*pointer); }, key.member);
    if (!same) return false;
  }
  return true;
}

std::vector<std::string> KnownConfigKeys() {
  std::vector<std::string> keys;
  for (const auto& k : DaemonKeys()) keys.push_back(QualifiedName(k.section, k.name));
  for (const auto& k : DetectorKeys()) keys.push_back(QualifiedName(k.section, k.name));
  keys.push_back("stream.match");
  return keys;
}

std::span<const Setting<DaemonSettings>> DaemonKeys() { return kDaemonKeys; }

std::vector<std::string> RestartOnlyChanges(const DaemonSettings& running,
                                            const DaemonSettings& next) {
  std::vector<std::string> changed;
  for (const auto& key : DaemonKeys()) {
    if (key.reload != ReloadEffect::kRestart) continue;
    const bool same = std::visit(
        [&](auto pointer) { return SameValue(running.*pointer, next.*pointer); }, key.member);
    if (!same) changed.push_back(QualifiedName(key.section, key.name));
  }
  return changed;
}

void KeepRestartOnly(const DaemonSettings& running, DaemonSettings* next) {
  for (const auto& key : DaemonKeys()) {
    if (key.reload == ReloadEffect::kRestart) CopyMember(key.member, running, *next);
  }
}

namespace {

// One key of config/nuwatchd.toml: its doc line as comment lines, then its unit, range, choices and
// "restart" in brackets on a comment line of their own; then "key = default".
template <class S>
std::string DefaultKeyLines(const Setting<S>& key, const S& defaults) {
  std::vector<std::string> facts;
  if (!key.unit.empty()) facts.emplace_back(key.unit);
  if (std::string range = SettingBoundsText(key.bounds); !range.empty()) {
    facts.push_back(std::move(range));
  }
  if (!key.choices.empty()) facts.push_back("one of " + setting_internal::ChoicesText(key.choices));
  if (!key.at_most.empty()) facts.push_back("<= " + std::string(key.at_most));
  if (key.reload == ReloadEffect::kRestart) facts.emplace_back("restart");
  std::string lines = WrapComment(key.doc);
  for (std::size_t i = 0; i < facts.size(); ++i) {
    lines += i == 0 ? "# [" : "; ";
    lines += facts[i];
  }
  if (!facts.empty()) lines += "]\n";
  lines += key.name;
  lines += " = ";
  lines += std::visit([&](auto pointer) { return ToToml(defaults.*pointer); }, key.member);
  lines += "\n";
  return lines;
}

}  // namespace

std::string DefaultConfigToml() {
  std::string out = R"(# nuwatchd configuration: every key, set to its default.
#
# This file is what nuwatchd runs with when it is given no file at all; copy it and change what you
# need. config/REFERENCE.md describes each key in full (type, unit, range and trade-off). Unknown
# keys are errors, so a misspelt key never goes unnoticed. Sizes are in bytes, times in seconds,
# windows and counts in vectors. Keys marked "restart" keep their running value on a reload.
#
# Generated from the key tables (`nuwatchd --print-defaults`); the config test checks that it is.
)";
  // Static: GCC 12 warns falsely that a temporary's unused string alternative "may be used
  // uninitialized" when the variant visit is inlined.
  static const DaemonSettings daemon_defaults;
  static const DetectorOptions detector_defaults;
  std::string_view section;
  for (const auto& key : DaemonKeys()) {
    if (key.section != section) {
      section = key.section;
      out += "\n[";
      out += section;
      out += "]\n";
    }
    out += DefaultKeyLines(key, daemon_defaults);
  }
  out += "\n[detector]\n";
  std::string_view group;
  for (const auto& key : DetectorKeys()) {
    if (key.group != group) {
      if (!group.empty()) out += "\n";
      group = key.group;
      out += "# --- ";
      out += group;
      out += " ---\n";
    }
    out += DefaultKeyLines(key, detector_defaults);
  }
  out += R"(
# Per-stream overrides: a [[stream]] table with `match`, a glob on the stream key (`*`, `?`,
# `[...]`), and any detector keys. The first table whose pattern matches a stream wins; its keys
# replace those of [detector] for that stream and the other keys keep the [detector] values.
#
# [[stream]]
# match = "pump-0*"
# nu = 0.02
# window = 4000
)";
  return out;
}

}  // namespace nuwatch
