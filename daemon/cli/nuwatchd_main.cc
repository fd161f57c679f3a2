// nuwatchd: the nuwatch service. Receives feature vectors on ZeroMQ, scores each stream against
// its learnt envelope, publishes results and incident events, serves Prometheus metrics, keeps its
// state across restarts (daemon/service/daemon.h, daemon/protocol/PROTOCOL.md,
// config/REFERENCE.md).
//
// Exit status: 0 after SIGTERM or SIGINT (queued input taken, every state file written); 2 for a
// configuration or command-line error, or a state directory another nuwatchd holds (one line on
// stderr); 1 when the daemon cannot start (a socket or the metrics endpoint cannot be bound, the
// state directory cannot be created), stops on a fatal error, or a final state write failed.
#include <pthread.h>
#include <spdlog/sinks/stdout_sinks.h>
#include <spdlog/spdlog.h>

#include <CLI/CLI.hpp>
#include <csignal>
#include <exception>
#include <iostream>
#include <string>
#include <vector>

#include "service/daemon.h"
#include "settings/config.h"

namespace {

std::string OneLine(std::string text) {
  for (char& c : text)
    if (c == '\n' || c == '\r') c = ' ';
  return text;
}

}  // namespace

int main(int argc, char** argv) {
  CLI::App app{
      "nuwatchd: learns each stream's normal envelope with a nu one-class SVM, scores every "
      "vector received on ZeroMQ, publishes results and incident events, and serves Prometheus "
      "metrics. Flags override the configuration file."};
  std::string config_path;
  std::vector<std::string> ingest, subscribe;
  std::string publish, metrics, control, state_dir, log_level, ready_file, member;
  app.add_option("--config", config_path,
                 "TOML configuration file (config/REFERENCE.md); without it every key keeps its "
                 "default")
      ->type_name("FILE");
  auto* ingest_flag =
      app.add_option("--ingest", ingest,
                     "Bind a PULL socket on ENDPOINT (repeatable; replaces ingest.endpoints)")
          ->type_name("ENDPOINT");
  auto* subscribe_flag =
      app.add_option("--subscribe", subscribe,
                     "Connect a SUB socket to ENDPOINT (repeatable; replaces ingest.subscribe)")
          ->type_name("ENDPOINT");
  auto* publish_flag =
      app.add_option("--publish", publish, "Bind the PUB socket on ENDPOINT (publish.endpoint)")
          ->type_name("ENDPOINT");
  auto* metrics_flag =
      app.add_option("--metrics", metrics,
                     "Prometheus endpoint HOST:PORT, port 0 = any free (metrics.listen)")
          ->type_name("HOST:PORT");
  auto* control_flag =
      app.add_option("--control", control, "Bind the REP control socket on ENDPOINT")
          ->type_name("ENDPOINT");
  auto* state_flag =
      app.add_option("--state-dir", state_dir, "State directory (state.dir)")->type_name("DIR");
  auto* level_flag =
      app.add_option("--log-level", log_level,
                     "trace, debug, info, warn, error, critical or off (daemon.log_level)")
          ->type_name("LEVEL");
  auto* member_flag =
      app.add_option(
             "--member", member,
             "This replica's name among cluster.members, e.g. the pod name (cluster.member)")
          ->type_name("NAME");
  app.add_option("--ready-file", ready_file,
                 "Write the actual endpoints as JSON to this file once everything listens")
      ->type_name("FILE");
  bool print_defaults = false;
  app.add_flag(
      "--print-defaults", print_defaults,
      "Print every config key at its default, documented (config/nuwatchd.toml), and exit");
  app.set_version_flag("--version", NUWATCH_VERSION);
  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    const int code = app.exit(e);
    return code == 0 ? 0 : 2;
  }
  if (print_defaults) {
    std::cout << nuwatch::DefaultConfigToml();
    return 0;
  }

  nuwatch::CommandLineOverrides overrides;
  if (ingest_flag->count() > 0) overrides.ingest_endpoints = ingest;
  if (subscribe_flag->count() > 0) overrides.subscribe_endpoints = subscribe;
  if (publish_flag->count() > 0) overrides.publish_endpoint = publish;
  if (metrics_flag->count() > 0) overrides.metrics_listen = metrics;
  if (control_flag->count() > 0) overrides.control_endpoint = control;
  if (state_flag->count() > 0) overrides.state_dir = state_dir;
  if (level_flag->count() > 0) overrides.log_level = log_level;
  if (member_flag->count() > 0) overrides.cluster_member = member;

  // A flag's value is reported under the flag the user typed ("--log-level verbose: ..."), not
  // only under the config key it replaces. The endpoints' syntax is checked here; the rules
  // between keys (an endpoint bound twice) need the whole configuration and come after.
  const auto check_endpoint = [](const std::string& flag, const std::string& value) {
    const std::string problem = nuwatch::EndpointSyntaxProblem(value);
    if (!problem.empty()) throw nuwatch::ConfigError(flag + ": " + problem);
  };
  try {
    for (const std::string& e : ingest) check_endpoint("--ingest", e);
    for (const std::string& e : subscribe) check_endpoint("--subscribe", e);
    if (publish_flag->count() > 0) check_endpoint("--publish", publish);
    if (control_flag->count() > 0) check_endpoint("--control", control);
    if (level_flag->count() > 0) {
      nuwatch::CommandLineOverrides level;
      level.log_level = log_level;
      nuwatch::DaemonSettings probe = nuwatch::DefaultConfig().daemon;
      nuwatch::ApplyOverrides(level, &probe);
      try {
        nuwatch::ValidateDaemonSettings(probe, "");
      } catch (const nuwatch::ConfigError& e) {
        throw nuwatch::ConfigError("--log-level " + log_level + ": " + e.what());
      }
    }
  } catch (const nuwatch::ConfigError& e) {
    std::cerr << "nuwatchd: " << OneLine(e.what()) << "\n";
    return 2;
  }

  nuwatch::DaemonOptions options;
  try {
    options.config =
        config_path.empty() ? nuwatch::DefaultConfig() : nuwatch::LoadConfig(config_path);
    nuwatch::ApplyOverrides(overrides, &options.config.daemon);
    nuwatch::ValidateDaemonSettings(options.config.daemon, "command line");
    nuwatch::CheckConfigForDaemon(options.config);
  } catch (const nuwatch::ConfigError& e) {
    std::cerr << "nuwatchd: " << OneLine(e.what()) << "\n";
    return 2;
  }
  options.overrides = overrides;
  options.ready_file = ready_file;
  options.handle_signals = true;

  auto logger = spdlog::stderr_logger_mt("nuwatchd");
  spdlog::set_default_logger(logger);
  spdlog::set_pattern("%Y-%m-%dT%H:%M:%S.%eZ %l %v", spdlog::pattern_time_type::utc);
  spdlog::flush_on(spdlog::level::trace);

  // Every thread the daemon starts inherits this mask; only its signal thread unblocks them, so
  // that no other thread's system calls are interrupted.
  sigset_t signals;
  sigemptyset(&signals);
  sigaddset(&signals, SIGINT);
  sigaddset(&signals, SIGTERM);
  sigaddset(&signals, SIGHUP);
  pthread_sigmask(SIG_BLOCK, &signals, nullptr);

  try {
    nuwatch::Daemon daemon(std::move(options));
    daemon.Start();
    daemon.Wait();
    if (daemon.failed()) return 1;  // logged: a fatal error, or a final state write failed
  } catch (const nuwatch::ConfigError& e) {
    std::cerr << "nuwatchd: " << OneLine(e.what()) << "\n";
    return 2;
  } catch (const nuwatch::StateDirInUseError& e) {
    std::cerr << "nuwatchd: " << OneLine(e.what()) << "\n";
    return 2;
  } catch (const std::exception& e) {
    spdlog::critical("{}", OneLine(e.what()));
    return 1;
  }
  return 0;
}
