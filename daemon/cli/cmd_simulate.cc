// nuwatch simulate: the invented pump fleet of plant_simulator.h, written as recorded files
// (DIR/stream.csv + DIR/incidents.csv) or streamed live to stdout for the demo.
#include <algorithm>
#include <array>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <csignal>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <limits>
#include <memory>
#include <optional>
#include <string>
#include <string_view>
#include <thread>
#include <vector>

#include "cli/cli_util.h"
#include "cli/commands.h"
#include "formats/timestamps.h"
#include "simulator/plant_simulator.h"

namespace nuwatch::cli {
namespace {

struct SimulateArguments {
  std::string output;
  std::string pumps = "12";
  std::string duration = "7d";
  std::string interval = "10s";
  std::string seed = "1";
  std::string start = "2026-01-01T00:00:00Z";
  std::string faults;  // set from PlantSimulator::FaultKinds()
  std::string fault_rate = "0.5";
  std::string fault_free;
  bool live = false;
  bool force = false;
  std::string speed = "1";
  bool speed_given = false;
};

std::vector<std::string> ParseFaultList(const std::string& text) {
  if (text == "none") return {};
  if (text == "all") return PlantSimulator::FaultKinds();
  std::vector<std::string> kinds;
  std::size_t begin = 0;
  while (true) {
    const std::size_t comma = text.find(',', begin);
    std::string kind = text.substr(begin, comma == std::string::npos ? comma : comma - begin);
    while (!kind.empty() && kind.front() == ' ') kind.erase(kind.begin());
    while (!kind.empty() && kind.back() == ' ') kind.pop_back();
    const auto& known = PlantSimulator::FaultKinds();
    if (std::find(known.begin(), known.end(), kind) == known.end()) {
      std::string list;
      for (const std::string& k : known) list += (list.empty() ? "" : ", ") + k;
      throw CommandError("--faults: '" + kind + "' is not a fault kind (known: " + list +
                         "; or 'none', 'all')");
    }
    if (std::find(kinds.begin(), kinds.end(), kind) != kinds.end())
      throw CommandError("--faults: '" + kind + "' is listed twice");
    kinds.push_back(kind);
    if (comma == std::string::npos) break;
    begin = comma + 1;
  }
  return kinds;
}

PlantOptions ToOptions(const SimulateArguments& args) {
  PlantOptions options;
  options.pumps = static_cast<int>(WholeNumberFlagIn("--pumps", args.pumps, 1, 99));
  options.interval_seconds =
      DurationFlag("--interval", args.interval, INFINITY, LowBound::kExclusive);
  options.duration_seconds =
      DurationFlag("--duration", args.duration, INFINITY, LowBound::kExclusive);
  if (options.duration_seconds < options.interval_seconds)
    throw CommandError("--duration " + args.duration + " is shorter than --interval " +
                       args.interval);
  options.seed = static_cast<std::uint64_t>(
      WholeNumberFlagIn("--seed", args.seed, 0, std::numeric_limits<int64_t>::max()));
  if (args.start == "now") {
    const double now =
        std::chrono::duration<double>(std::chrono::system_clock::now().time_since_epoch()).count();
    options.start_time = std::floor(now / options.interval_seconds) * options.interval_seconds;
  } else {
    const std::optional<double> start = ParseTimestamp(args.start);
    if (!start)
      throw CommandError("--start: '" + args.start +
                         "' is not a time (ISO-8601 such as 2026-01-01T00:00:00Z, epoch seconds, "
                         "or 'now')");
    options.start_time = *start;
  }
  options.faults = ParseFaultList(args.faults);
  options.faults_per_pump_week = NumberFlagIn("--fault-rate", args.fault_rate, 0, INFINITY);
  if (!args.fault_free.empty())
    options.fault_free_seconds =
        DurationFlag("--fault-free", args.fault_free, INFINITY, LowBound::kExclusive);
  try {
    PlantSimulator check(options);  // the library's own checks, e.g. too many ticks
  } catch (const std::invalid_argument& e) {
    throw CommandError(e.what());
  }
  return options;
}

volatile std::sig_atomic_t simulate_stop_requested = 0;
extern "C" void RequestSimulateStop(int) { simulate_stop_requested = 1; }

// Installs the live mode's signal handling for its lifetime: SIGINT/SIGTERM end the run after the
// current tick; SIGPIPE is ignored so that a closed stdout shows up as a failed write (EPIPE).
class LiveSignals {
 public:
  LiveSignals() {
    simulate_stop_requested = 0;
    previous_pipe_ = std::signal(SIGPIPE, SIG_IGN);
    previous_int_ = std::signal(SIGINT, RequestSimulateStop);
    previous_term_ = std::signal(SIGTERM, RequestSimulateStop);
  }
  ~LiveSignals() {
    std::signal(SIGPIPE, previous_pipe_);
    std::signal(SIGINT, previous_int_);
    std::signal(SIGTERM, previous_term_);
  }
  LiveSignals(const LiveSignals&) = delete;
  LiveSignals& operator=(const LiveSignals&) = delete;

 private:
  void (*previous_pipe_)(int);
  void (*previous_int_)(int);
  void (*previous_term_)(int);
};

// Writes everything and flushes; false when the reader has gone away (EPIPE). Throws for other
// write failures.
bool WriteToStdout(std::string_view text) {
  if (std::fwrite(text.data(), 1, text.size(), stdout) == text.size() && std::fflush(stdout) == 0)
    return true;
  if (errno == EPIPE) return false;
  throw CommandError(std::string("stdout: write failed: ") + std::strerror(errno));
}

void RunLive(const SimulateArguments& args, const PlantOptions& options) {
  const double speed = NumberFlagIn("--speed", args.speed, 0, INFINITY, LowBound::kExclusive);
  PlantSimulator simulator(options);
  std::string incidents_note = "not written (no --output)";
  if (!args.output.empty()) {
    try {
      incidents_note = WritePlantIncidents(simulator.incidents(), args.output);
    } catch (const std::runtime_error& e) {
      throw CommandError(e.what());
    }
  }

  LiveSignals signals;
  std::int64_t rows = 0;
  const auto wall_start = std::chrono::steady_clock::now();
  const double wall_seconds_per_tick = options.interval_seconds / speed;
  bool open = WriteToStdout(PlantStreamCsvHeader());
  std::string buffer;
  std::array<double, 6> features;
  double time = 0;
  int stream = 0;
  for (std::int64_t tick = 0; open && !simulate_stop_requested && tick < simulator.ticks();
       ++tick) {
    buffer.clear();
    std::string time_text;
    for (int p = 0; p < options.pumps && simulator.Next(&time, &stream, features); ++p) {
      if (p == 0) time_text = FormatTimestamp(time);
      AppendPlantStreamCsvRow(&buffer, time_text, simulator.streams()[stream], features);
    }
    const auto due =
        wall_start +
        std::chrono::duration_cast<std::chrono::steady_clock::duration>(
            std::chrono::duration<double>(static_cast<double>(tick) * wall_seconds_per_tick));
    // Short naps so that Ctrl-C is honoured within a fraction of a second even at --speed 1.
    while (!simulate_stop_requested) {
      const auto now = std::chrono::steady_clock::now();
      if (now >= due) break;
      std::this_thread::sleep_for(
          std::min<std::chrono::steady_clock::duration>(due - now, std::chrono::milliseconds(100)));
    }
    if (simulate_stop_requested) break;
    open = WriteToStdout(buffer);
    if (open) rows += options.pumps;
  }
  std::fprintf(stderr, "nuwatch simulate: streamed %lld rows for %d streams%s; %zu incidents, %s\n",
               static_cast<long long>(rows), options.pumps, open ? "" : " (stdout closed)",
               simulator.incidents().size(), incidents_note.c_str());
}

void RunSimulate(const SimulateArguments& args) {
  if (args.speed_given && !args.live) throw CommandError("--speed only applies with --live");
  if (!args.live && args.output.empty())
    throw CommandError("--output DIR is required (or stream to stdout with --live)");
  const PlantOptions options = ToOptions(args);
  // A recording may be the only copy of a labelled run: replace it only when asked to.
  if (!args.output.empty() && !args.force) {
    for (const char* name : {"stream.csv", "incidents.csv"}) {
      if (args.live && std::string_view(name) == "stream.csv") continue;  // not written live
      const std::filesystem::path path = std::filesystem::path(args.output) / name;
      if (std::filesystem::exists(path))
        throw CommandError(path.string() + " exists; add --force to replace it");
    }
  }
  if (args.live) {
    RunLive(args, options);
    return;
  }
  PlantFilesSummary summary;
  try {
    summary = WritePlantFiles(options, args.output);
  } catch (const std::runtime_error& e) {
    throw CommandError(e.what());
  }
  std::fprintf(stderr, "nuwatch simulate: %lld rows, %d streams, %zu incidents -> %s, %s\n",
               static_cast<long long>(summary.rows), summary.streams, summary.incidents,
               summary.stream_path.c_str(), summary.incidents_path.c_str());
}

void AddSimulateCommand(CLI::App& app) {
  auto args = std::make_shared<SimulateArguments>();
  for (const std::string& kind : PlantSimulator::FaultKinds())
    args->faults += (args->faults.empty() ? "" : ",") + kind;
  CLI::App* command = app.add_subcommand(
      "simulate",
      "Generate the invented demo plant: a cooling-water pump fleet with labelled injected faults");
  command
      ->add_option("--output,-o", args->output,
                   "Directory for stream.csv and incidents.csv (created if missing); with "
                   "--live only incidents.csv is written there")
      ->type_name("DIR");
  command->add_option("--pumps", args->pumps, "Number of pumps (streams pump-01 ...), 1..99")
      ->type_name("INTEGER")
      ->capture_default_str();
  command->add_option("--duration", args->duration, "Simulated time span (e.g. 90m, 12h, 7d)")
      ->type_name("DURATION")
      ->capture_default_str();
  command->add_option("--interval", args->interval, "Time between vectors of one pump")
      ->type_name("DURATION")
      ->capture_default_str();
  command->add_option("--seed", args->seed, "Seed; the same seed gives the same rows")
      ->type_name("INTEGER")
      ->capture_default_str();
  command
      ->add_option("--start", args->start,
                   "Time of the first vector: ISO-8601, epoch seconds, or 'now'")
      ->type_name("TIME")
      ->capture_default_str();
  command
      ->add_option("--faults", args->faults,
                   "Fault kinds to inject, comma-separated, or 'none' / 'all'")
      ->type_name("LIST")
      ->capture_default_str();
  command
      ->add_option("--fault-rate", args->fault_rate,
                   "Incidents planned per pump per week of simulated time")
      ->type_name("NUMBER")
      ->capture_default_str();
  command
      ->add_option("--fault-free", args->fault_free,
                   "No fault starts within this span from the start, e.g. a detector's warm-up "
                   "(default: the first 25% of the run)")
      ->type_name("DURATION");
  command->add_flag("--force", args->force, "Replace stream.csv and incidents.csv if they exist");
  command->add_flag("--live", args->live,
                    "Stream stream.csv rows to stdout in time (one tick per interval / speed)");
  command
      ->add_option("--speed", args->speed,
                   "With --live: simulated seconds per wall-clock second (60 = a minute a second)")
      ->type_name("NUMBER")
      ->capture_default_str()
      ->each([args](const std::string&) { args->speed_given = true; });
  command->callback([args] { RunSimulate(*args); });
}

}  // namespace

NUWATCH_REGISTER_COMMAND(60, AddSimulateCommand);

}  // namespace nuwatch::cli
