// nuwatchd as a library class, so that tests run the whole service in-process with real sockets.
//
// Threads: one socket thread owns the ingest PULL and SUB sockets, the control REP socket and an
// eventfd that other threads use to wake it; it polls them with zmq::poll, checks each ingest
// message's frames and hands the message (moved, not copied) over an inproc PUSH/PULL pair to the
// scoring thread that owns its stream (daemon.scoring_threads, default one per core; chosen by a
// hash of the key, so a stream's messages are scored in the order they arrived), and answers
// control requests, holding every scoring thread between two messages while it does. Each scoring
// thread owns its streams outright: it decodes, scores (Detector::Observe, ObserveBatch), keeps
// the incident state, updates the stream's metrics, records, and publishes on the result XPUB
// socket, which the scoring threads share under a mutex taken once per published message.
// Refits run on a Boost.Asio thread_pool of daemon.refit_threads threads (RefitPool), at a lower
// priority than scoring; a finished refit is reported to its stream's scoring thread. One
// Boost.Asio io_context
// thread runs the signal handlers (SIGTERM and SIGINT stop, SIGHUP reloads; only with
// handle_signals), the snapshot timer, the recording flush timer and the state-file writes, so
// that disk latency never stalls scoring. The prometheus-cpp Exposer serves /metrics from its own
// threads. With cluster.control_endpoint, a handoff thread (handoff.h) sends the streams a reload
// gave to other members to their new owners; a stream handed to this daemon is adopted on the
// socket thread (a control request), and its vectors that came first wait in its scoring thread.
//
// Log lines (spdlog, default logger) the tests and scripts rely on; each is a whole message:
//   listening ingest=ENDPOINT      one per bound PULL socket, the actual endpoint (a wildcard
//                                  port resolved)
//   connected subscribe=ENDPOINT   one per SUB connection, as configured
//   listening publish=ENDPOINT
//   listening control=ENDPOINT
//   listening metrics=HOST:PORT    the actual port
//   ready streams=N scoring_threads=M   after the lines above; N streams were restored
//   stopping: took N queued ingest messages   at a stop, after the ingest sockets were drained
//   stopping: N state files written           or, per failed stream, "stopping: stream KEY: the
//                                  state file could not be written: REASON"
//   stopped                        the last line of a shutdown
// The ready file (DaemonOptions::ready_file) is written atomically after the listening lines:
//   {"ingest":["tcp://..."],"publish":"tcp://...","control":"tcp://...","metrics":"HOST:PORT"}
//
// Thread safety: construct, Start, Wait and destroy from one thread; RequestStop, RequestReload,
// endpoints and MetricsText from any thread.
#pragma once

#include <memory>
#include <optional>
#include <stdexcept>
#include <string>
#include <vector>

#include "settings/config.h"

namespace nuwatch {

// The daemon could not start: a socket or the metrics endpoint could not be bound, the state
// directory could not be created. The message names the endpoint or directory.
class DaemonError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// Another process holds the state directory's lock (StateDirLock): the message names the directory
// and the holder's pid. The program exits with status 2, as for a configuration error.
class StateDirInUseError : public DaemonError {
 public:
  using DaemonError::DaemonError;
};

// nuwatchd's command-line flags that replace configuration values. They are applied to the file
// at start-up and again at every reload.
struct CommandLineOverrides {
  std::optional<std::vector<std::string>> ingest_endpoints;     // --ingest (repeatable)
  std::optional<std::vector<std::string>> subscribe_endpoints;  // --subscribe (repeatable)
  std::optional<std::string> publish_endpoint;                  // --publish
  std::optional<std::string> metrics_listen;                    // --metrics
  std::optional<std::string> control_endpoint;                  // --control
  std::optional<std::string> state_dir;                         // --state-dir
  std::optional<std::string> log_level;                         // --log-level
  std::optional<std::string> cluster_member;                    // --member
};
void ApplyOverrides(const CommandLineOverrides& overrides, DaemonSettings* settings);

// What the daemon needs beyond ParseConfig's checks: every stream's detector options (the
// [detector] section and each [[stream]] table applied to it) must pass CheckDetectorOptions, and
// cluster.member must be one of a non-empty cluster.members. `running`: at a reload, the
// configuration in force; a member that is in its list may then leave the new one (a departure,
// PROTOCOL.md §13.4: it hands its streams over and owns no key). At start-up (nullptr) a member
// outside the list is refused, as it is most likely a typing error.
// Throws ConfigError naming the file and the section.
void CheckConfigForDaemon(const Config& config, const Config* running = nullptr);

struct DaemonOptions {
  // The configuration, overrides applied; config.source_path is the file a reload reads again
  // ("" = started without a file: reload is refused).
  Config config;
  CommandLineOverrides overrides;  // re-applied to the file on reload
  std::string ready_file;          // "" = none
  bool handle_signals = false;     // SIGTERM/SIGINT stop, SIGHUP reloads (the program; not tests)
  // Values (rows x dims) a scoring thread scores at one go of a large message (PROTOCOL.md §7);
  // 0: the protocol's 16,384. Tests set fewer, so that slices come in small messages.
  int slice_values = 0;
};

struct DaemonEndpoints {
  std::vector<std::string> ingest;     // bound, as ZMQ_LAST_ENDPOINT reports them
  std::vector<std::string> subscribe;  // connected, as configured
  std::string publish;
  std::string control;
  std::string metrics;  // HOST:PORT with the actual port
};

class Daemon {
 public:
  // Checks the configuration (ConfigError), sets the log level, locks the state directory
  // (StateDirInUseError when another nuwatchd holds it), binds every socket and the metrics
  // endpoint and restores the state directory (DaemonError). A state file that cannot be
  // used is moved aside (state_store.h) and its stream starts afresh; that is not an error.
  explicit Daemon(DaemonOptions options);
  // RequestStop() and Wait() if started.
  ~Daemon();
  Daemon(const Daemon&) = delete;
  Daemon& operator=(const Daemon&) = delete;

  // Logs the listening lines, writes the ready file and starts the threads. Call once.
  void Start();
  // Stop: take what ZeroMQ has already queued on the ingest sockets (scored and published; until
  // they are quiet for 300 ms, at most 30 s), stop taking input, wait for the refits in flight,
  // write the state file of every stream that changed or whose last write failed, close the
  // sockets. Asynchronous; Wait() returns once it is done.
  void RequestStop();
  // Reread config.source_path as SIGHUP does (asynchronous; the outcome is logged).
  void RequestReload();
  // Blocks until the daemon has stopped (after RequestStop, a signal or a fatal error).
  void Wait();
  // After Wait(): true when a fatal error stopped the daemon (its socket or io thread failed) or
  // a final state write failed, so that the program exits non-zero and a supervisor notices.
  bool failed() const;

  const DaemonEndpoints& endpoints() const;
  // The text exposition of every metric, as /metrics serves it.
  std::string MetricsText() const;

 private:
  struct Impl;
  std::unique_ptr<Impl> impl_;
};

}  // namespace nuwatch
