// nuwatchd's configuration: a TOML file (TOML 1.0) with daemon sections, a [detector] section that
// maps key for key onto DetectorOptions, and [[stream]] overrides chosen by a glob on the stream
// key. Two key tables define every key (nuwatch/setting.h): core's DetectorKeys() and DaemonKeys()
// here; reading, range checks, the restart-only keys and config/nuwatchd.toml (DefaultConfigToml)
// follow from them. config/REFERENCE.md documents each key at length.
//
// Loading is strict: an unknown section or key, a value of the wrong type or outside its range is a
// ConfigError whose message starts with "FILE:LINE:COL: " and names the key, e.g.
//   nuwatchd.toml:12:1: key 'detector.nuu' is not a known key (did you mean 'nu'?)
// Thread safety: value types and reentrant functions; nothing here keeps global state.
#pragma once

#include <cstddef>
#include <cstdint>
#include <span>
#include <stdexcept>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/detector_options.h"
#include "nuwatch/detector_settings.h"
#include "nuwatch/setting.h"

namespace nuwatch {

class ConfigError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// Everything outside the detectors. The TOML key of each member is given beside it; DaemonKeys()
// is the table of these keys (range, unit, documentation, reload behaviour). The member
// initialisers are the defaults.
struct DaemonSettings {
  // [ingest] (PULL sockets bound on `endpoints`; a SUB socket connected to `subscribe`)
  std::vector<std::string> ingest_endpoints = {"tcp://127.0.0.1:7601"};  // endpoints
  std::vector<std::string> subscribe_endpoints;                          // subscribe
  int receive_high_water_mark = 10000;                                   // receive_high_water_mark
  int64_t scoring_queue_bytes = int64_t{64} << 20;                       // scoring_queue_bytes
  int64_t ingest_max_unread_bytes = int64_t{256} << 20;                  // max_unread_bytes
  // [publish]
  std::string publish_endpoint = "tcp://127.0.0.1:7602";  // endpoint
  int publish_high_water_mark = 10000;                    // high_water_mark
  int64_t publish_max_subscribers = 32;                   // max_subscribers
  int64_t ingest_max_senders = 256;                       // ingest.max_senders
  bool publish_learning = true;                           // include_learning
  bool publish_batches = false;                           // batches
  std::string publish_result_form = "json";               // result_form: "json" or "binary"
  // [control] ("" = ipc://STATE_DIR/nuwatchd.control, else in the runtime directory:
  // DefaultControlEndpoint)
  std::string control_endpoint;                    // endpoint
  bool control_allow_unauthenticated_tcp = false;  // allow_unauthenticated_tcp
  // [auth] (CURVE on the ingest, result and control sockets; PROTOCOL.md §12)
  std::string server_secret_key_file;  // server_secret_key_file ("" = no authentication)
  std::string client_keys;             // client_keys (a file or a directory of public keys)
  // subscribe_server_key_file: the publishers' public key for ingest.subscribe ("" = plain SUB)
  std::string subscribe_server_key_file;
  // [metrics]
  std::string metrics_listen = "127.0.0.1:9464";  // listen ("HOST:PORT"; port 0: ephemeral)
  std::string metrics_basic_auth_user;            // basic_auth_user ("" = no authentication)
  std::string metrics_basic_auth_password_file;   // basic_auth_password_file
  int64_t anomaly_ratio_window = 1000;            // anomaly_ratio_window (vectors)
  // [state]
  std::string state_dir;                   // dir ("" = no state is kept)
  double snapshot_interval_seconds = 300;  // snapshot_interval_seconds
  // [daemon]
  std::string log_level = "info";  // log_level: trace, debug, info, warn, error, critical, off
  int refit_threads = 1;           // refit_threads
  int scoring_threads = 0;         // scoring_threads (0 = one per core)
  // [limits] (the wire bounds are daemon/protocol/PROTOCOL.md §7's)
  int64_t max_streams = 1000;                // max_streams
  double idle_expiry_seconds = 0;            // idle_expiry_seconds (0 = never)
  int max_dims = 256;                        // max_dims, 1..65535
  std::size_t max_message_bytes = 4u << 20;  // max_message_bytes, >= 28
  int max_vectors_per_message = 4096;        // max_vectors_per_message, >= 1
  // [recording]
  std::string record_dir;                       // dir ("" = recording off)
  std::size_t record_rotate_bytes = 64u << 20;  // rotate_bytes
  int record_keep_files = 10;                   // keep_files (0 = keep every file)
  // [cluster] (replicas that share the streams by owner: daemon/protocol/PROTOCOL.md §13)
  std::vector<std::string> cluster_members;  // members ([] = a lone daemon: owns every stream)
  std::string cluster_member;                // member (this daemon's name; required with members)
  // control_endpoint: each member's control endpoint, "{member}" standing for its name ("" = no
  // handoff: a stream that changes owner starts afresh there)
  std::string cluster_control_endpoint;
  double cluster_handoff_timeout_seconds = 30;  // handoff_timeout_seconds

  bool operator==(const DaemonSettings&) const = default;
};

struct Config {
  // A [[stream]] table: `match` is a glob on the stream key (fnmatch(3) without flags: `*`, `?`,
  // `[...]` classes, `\` escapes; `*` also matches `/`). Only the keys it sets override [detector].
  struct StreamOverride {
    std::string match;
    std::vector<std::string> keys;  // the detector keys this table sets, in file order
    DetectorOptions values;         // holds the set keys' values; the other members are unused
    std::string origin;             // "FILE:LINE" of the [[stream]] header, for log messages
  };

  DaemonSettings daemon;
  DetectorOptions detector;
  std::vector<StreamOverride> overrides;  // file order; the first match wins
  std::string source_path;                // "" for DefaultConfig()
};

// Reads and parses the file. Throws ConfigError for an unreadable file and as ParseConfig does.
Config LoadConfig(const std::string& path);

// Parses TOML text; `path_for_messages` starts every error message. Keys that are absent keep their
// defaults. Ensures: the result passes ValidateDaemonSettings, ValidateDetectorOptions (for
// [detector] and for [detector] with each override applied), and every override matches a
// non-empty pattern. Throws ConfigError otherwise.
Config ParseConfig(std::string_view toml_text, const std::string& path_for_messages);

// All defaults, no overrides: what an empty file gives.
Config DefaultConfig();

// The options of the stream `stream_key`: [detector] with the first matching override applied.
DetectorOptions DetectorOptionsFor(const Config& config, std::string_view stream_key);
// The first override whose pattern matches `stream_key`, or nullptr.
const Config::StreamOverride* MatchingOverride(const Config& config, std::string_view stream_key);

// The table's checks (FindDetectorViolation), for the command-line tools that build DetectorOptions
// from flags. Throws ConfigError "WHERE: MESSAGE" for the first violation, e.g.
// "nuwatch replay: nu = 1.5 is outside (0, 1]" (keys named without a section).
void ValidateDetectorOptions(const DetectorOptions& options, const std::string& where);
// The same for the daemon settings (for nuwatchd after command-line flags replaced some of them).
void ValidateDaemonSettings(const DaemonSettings& settings, const std::string& where);

// "" when `endpoint` is of the form TRANSPORT://ADDRESS (lower-case transport; ZeroMQ checks the
// address itself); else what is wrong, with a hint: "'127.0.0.1:7601' is not a ZeroMQ endpoint;
// write tcp://127.0.0.1:7601". For the flags that take an endpoint.
std::string EndpointSyntaxProblem(std::string_view endpoint);

// The control endpoint when control.endpoint is "": ipc://STATE_DIR/nuwatchd.control with a state
// directory, else ipc://RUNTIME/nuwatchd.control where RUNTIME is $RUNTIME_DIRECTORY (systemd's
// RuntimeDirectory=, the first of a list), else $XDG_RUNTIME_DIR, else /tmp/nuwatchd-UID (which
// the daemon creates 0700 and refuses if another user owns it). A pure function of its inputs.
std::string DefaultControlEndpoint(const std::string& state_dir, const char* runtime_directory,
                                   const char* xdg_runtime_dir, unsigned uid);

// True for a tcp:// endpoint (which any process that can reach the address may use).
bool IsTcpEndpoint(std::string_view endpoint);

// A [detector] section with every key, which ParseConfig reads back to the same options (numbers
// are written with round-trip precision). Used for `nuwatch tune`'s best.toml.
std::string DescribeDetectorOptions(const DetectorOptions& options);

// Member-by-member equality of every key (DetectorOptions itself has no operator==).
bool SameDetectorOptions(const DetectorOptions& a, const DetectorOptions& b);

// The daemon's keys: every member of DaemonSettings, section by section in file order.
std::span<const Setting<DaemonSettings>> DaemonKeys();

// The restart-only keys (ReloadEffect::kRestart) whose values differ, as "section.key".
std::vector<std::string> RestartOnlyChanges(const DaemonSettings& running,
                                            const DaemonSettings& next);
// Copies the restart-only keys of `running` into `next`: what a reload keeps.
void KeepRestartOnly(const DaemonSettings& running, DaemonSettings* next);

// config/nuwatchd.toml: every key at its default, with its documentation line, unit, range and
// reload behaviour as comments. ParseConfig reads it back to DefaultConfig().
std::string DefaultConfigToml();

// Every key ParseConfig accepts, as "section.key" ("stream.match" for the override pattern; the
// detector keys are also valid in [[stream]] tables). For documentation checks and completion.
std::vector<std::string> KnownConfigKeys();

}  // namespace nuwatch
