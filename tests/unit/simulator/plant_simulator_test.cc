// Tests of the invented demo plant (plant_simulator.h) and of `nuwatch simulate`.
#include "simulator/plant_simulator.h"

#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <array>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <numeric>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "formats/csv_table.h"
#include "formats/timestamps.h"

namespace nuwatch {
namespace {

enum { kPressure = 0, kFlow, kCurrent, kVibration, kTemperature, kSpeed };
using Row = std::array<double, 6>;

struct Recording {
  std::vector<double> times;
  std::vector<int> streams;
  std::vector<Row> rows;
  std::vector<PlantIncident> incidents;
  std::vector<std::string> stream_names;
};

Recording Record(const PlantOptions& options) {
  PlantSimulator simulator(options);
  Recording recording;
  recording.incidents = simulator.incidents();
  recording.stream_names = simulator.streams();
  double time;
  int stream;
  Row row;
  while (simulator.Next(&time, &stream, row)) {
    recording.times.push_back(time);
    recording.streams.push_back(stream);
    recording.rows.push_back(row);
  }
  return recording;
}

PlantOptions FaultFree(PlantOptions options) {
  options.faults.clear();
  return options;
}

int FeatureIndex(const std::string& name) {
  const auto& names = PlantSimulator::FeatureNames();
  return static_cast<int>(std::find(names.begin(), names.end(), name) - names.begin());
}

// Samples of one stream that lie inside some incident window of that stream.
std::vector<bool> InsideIncidents(const Recording& r) {
  std::vector<bool> inside(r.rows.size(), false);
  for (const PlantIncident& incident : r.incidents)
    for (std::size_t i = 0; i < r.rows.size(); ++i)
      if (r.stream_names[r.streams[i]] == incident.stream && r.times[i] >= incident.start &&
          r.times[i] <= incident.end)
        inside[i] = true;
  return inside;
}

double Slope(const std::vector<double>& x, const std::vector<double>& y) {
  const double mx = std::accumulate(x.begin(), x.end(), 0.0) / x.size();
  const double my = std::accumulate(y.begin(), y.end(), 0.0) / y.size();
  double sxy = 0, sxx = 0;
  for (std::size_t i = 0; i < x.size(); ++i) {
    sxy += (x[i] - mx) * (y[i] - my);
    sxx += (x[i] - mx) * (x[i] - mx);
  }
  return sxy / sxx;
}

TEST(PlantSimulator, SameSeedGivesIdenticalRowsAndIncidents) {
  PlantOptions options;
  options.pumps = 3;
  options.duration_seconds = 2 * 86400;
  options.interval_seconds = 60;
  options.seed = 42;
  const Recording a = Record(options);
  const Recording b = Record(options);
  ASSERT_EQ(a.rows.size(), b.rows.size());
  EXPECT_EQ(a.rows, b.rows);
  EXPECT_EQ(a.times, b.times);
  ASSERT_EQ(a.incidents.size(), b.incidents.size());
  for (std::size_t i = 0; i < a.incidents.size(); ++i) {
    EXPECT_EQ(a.incidents[i].stream, b.incidents[i].stream);
    EXPECT_EQ(a.incidents[i].start, b.incidents[i].start);
    EXPECT_EQ(a.incidents[i].end, b.incidents[i].end);
    EXPECT_EQ(a.incidents[i].kind, b.incidents[i].kind);
  }

  options.seed = 43;
  const Recording c = Record(options);
  ASSERT_EQ(a.rows.size(), c.rows.size());
  std::size_t differing = 0;
  for (std::size_t i = 0; i < a.rows.size(); ++i) differing += a.rows[i] != c.rows[i];
  EXPECT_EQ(differing, a.rows.size()) << "sensor noise alone should make every row differ";
}

TEST(PlantSimulator, EmitsAllPumpsPerTickInTimeOrder) {
  PlantOptions options;
  options.pumps = 4;
  options.duration_seconds = 3600 + 5;  // a partial interval at the end is not a tick
  options.interval_seconds = 10;
  PlantSimulator simulator(options);
  EXPECT_EQ(simulator.ticks(), 360);
  EXPECT_EQ(simulator.rows(), 4 * 360);
  EXPECT_EQ(simulator.streams(),
            (std::vector<std::string>{"pump-01", "pump-02", "pump-03", "pump-04"}));
  double time;
  std::string stream;
  Row row;
  std::int64_t count = 0;
  while (simulator.Next(&time, &stream, row)) {
    const std::int64_t tick = count / 4;
    EXPECT_EQ(time, options.start_time + static_cast<double>(tick) * 10.0);
    EXPECT_EQ(stream, simulator.streams()[count % 4]);
    ++count;
  }
  EXPECT_EQ(count, 4 * 360);
  EXPECT_FALSE(simulator.Next(&time, &stream, row)) << "stays at the end";
  EXPECT_EQ(PlantSimulator::FeatureNames(),
            (std::vector<std::string>{"discharge_pressure_bar", "flow_m3h", "motor_current_a",
                                      "vibration_mm_s", "bearing_temp_c", "speed_rpm"}));
}

TEST(PlantSimulator, ValuesStayWithinTheDocumentedRanges) {
  // Four weeks in the coldest and the warmest part of the seasonal cycle, two seeds each.
  for (double start : {1767225600.0 /*2026-01-01*/, 1782864000.0 /*2026-07-01*/}) {
    for (std::uint64_t seed : {1u, 7u}) {
      PlantOptions options;
      options.duration_seconds = 28 * 86400;
      options.interval_seconds = 120;
      options.seed = seed;
      options.start_time = start;
      options.faults_per_pump_week = 2;  // plenty of faulty samples for the absolute bounds
      const Recording r = Record(options);
      const std::vector<bool> inside = InsideIncidents(r);
      const auto& normal = PlantNormalRanges();
      const auto& absolute = PlantAbsoluteRanges();
      for (std::size_t i = 0; i < r.rows.size(); ++i) {
        for (int f = 0; f < 6; ++f) {
          const double v = r.rows[i][f];
          ASSERT_TRUE(std::isfinite(v));
          ASSERT_GE(v, absolute[f].low) << PlantSimulator::FeatureNames()[f] << " seed " << seed;
          ASSERT_LE(v, absolute[f].high) << PlantSimulator::FeatureNames()[f] << " seed " << seed;
          if (inside[i]) continue;
          ASSERT_GE(v, normal[f].low) << PlantSimulator::FeatureNames()[f] << " seed " << seed;
          ASSERT_LE(v, normal[f].high) << PlantSimulator::FeatureNames()[f] << " seed " << seed;
        }
      }
    }
  }
}

// The affinity laws of centrifugal pumps (textbook, e.g. Karassik et al., Pump Handbook; cited from
// memory): at similar operating points Q ~ n, H ~ n^2, P ~ n^3. On a circuit with static head the
// operating points are not exactly similar (flow rises faster than speed, so the exponents are
// only roughly 1, 2, 3), hence the tolerances. Fitted as log-log slopes over each pump's day.
TEST(PlantSimulator, FollowsTheAffinityLawsRoughly) {
  PlantOptions options;
  options.duration_seconds = 3 * 86400;
  options.interval_seconds = 60;
  options.faults.clear();
  const Recording r = Record(options);
  for (int pump = 0; pump < options.pumps; ++pump) {
    std::vector<double> log_speed, log_flow, log_head, log_current;
    double low_speed = 1e9, high_speed = 0;
    for (std::size_t i = 0; i < r.rows.size(); ++i) {
      if (r.streams[i] != pump) continue;
      const Row& x = r.rows[i];
      log_speed.push_back(std::log(x[kSpeed]));
      log_flow.push_back(std::log(x[kFlow]));
      // Pressure rise over the nominal 1.0 bar suction, proportional to the head.
      log_head.push_back(std::log(x[kPressure] - 1.0));
      log_current.push_back(std::log(x[kCurrent]));
      low_speed = std::min(low_speed, x[kSpeed]);
      high_speed = std::max(high_speed, x[kSpeed]);
    }
    SCOPED_TRACE(r.stream_names[pump]);
    EXPECT_GT(high_speed / low_speed, 1.25) << "the daily cycle should move the speed";
    EXPECT_NEAR(Slope(log_speed, log_flow), 1.0, 0.5);
    EXPECT_NEAR(Slope(log_speed, log_head), 2.0, 0.5);
    EXPECT_NEAR(Slope(log_speed, log_current), 3.0, 0.6);
  }
}

// Energy balance: hydraulic power Q * delta p (= rho g Q H, textbook) must stay below the
// electrical input sqrt(3) V I cos(phi) (three-phase power, textbook), with the electrical
// constants the header documents (400 V, power factor 0.88) and the nominal 1.0 bar suction.
// Wire-to-water efficiency of a pump set of this size is typically 0.6..0.85 (common practice).
TEST(PlantSimulator, HydraulicPowerStaysBelowElectricalPower) {
  PlantOptions options;
  options.duration_seconds = 2 * 86400;
  options.interval_seconds = 60;
  options.faults.clear();
  const Recording r = Record(options);
  double lowest = 1, highest = 0;
  for (const Row& x : r.rows) {
    const double hydraulic_w = x[kFlow] / 3600.0 * (x[kPressure] - 1.0) * 1e5;
    const double electrical_w = std::sqrt(3.0) * 400.0 * x[kCurrent] * 0.88;
    const double efficiency = hydraulic_w / electrical_w;
    lowest = std::min(lowest, efficiency);
    highest = std::max(highest, efficiency);
  }
  EXPECT_LT(highest, 0.9);
  EXPECT_GT(lowest, 0.55);
}

// Noise level of each feature on one stream, from the fault-free twin's samples before a time:
// sensor noise is white and the process moves slowly, so the standard deviation of first
// differences over sqrt(2) estimates it (common practice).
Row NoiseSigma(const Recording& r, int stream, double from, double to) {
  Row sigma{};
  std::vector<Row> samples;
  for (std::size_t i = 0; i < r.rows.size(); ++i)
    if (r.streams[i] == stream && r.times[i] >= from && r.times[i] < to)
      samples.push_back(r.rows[i]);
  for (int f = 0; f < 6; ++f) {
    double sum = 0, sum2 = 0;
    for (std::size_t i = 1; i < samples.size(); ++i) {
      const double d = samples[i][f] - samples[i - 1][f];
      sum += d;
      sum2 += d * d;
    }
    const double n = static_cast<double>(samples.size() - 1);
    sigma[f] = std::sqrt(std::max(sum2 / n - (sum / n) * (sum / n), 1e-12) / 2.0);
  }
  return sigma;
}

// Each fault, against the pump's own fault-free trajectory (the same seed with no faults): every
// sample outside the incident windows is identical, the first and the last sample of each window
// differ, and late in the window the faulted features are off by many noise sigmas in the
// direction the fault's physics gives.
TEST(PlantSimulator, FaultsMoveTheirFeaturesAndNothingElse) {
  std::map<std::string, int> seen;
  for (std::uint64_t seed : {1u, 2u, 3u}) {
    PlantOptions options;
    options.seed = seed;
    options.interval_seconds = 30;
    options.faults_per_pump_week = 1;
    const Recording faulty = Record(options);
    const Recording twin = Record(FaultFree(options));
    ASSERT_EQ(faulty.rows.size(), twin.rows.size());
    const std::vector<bool> inside = InsideIncidents(faulty);
    for (std::size_t i = 0; i < faulty.rows.size(); ++i)
      if (!inside[i]) {
        ASSERT_EQ(faulty.rows[i], twin.rows[i]) << "row " << i << " seed " << seed;
      }

    for (const PlantIncident& incident : faulty.incidents) {
      SCOPED_TRACE(incident.kind + " on " + incident.stream + " from " +
                   FormatTimestamp(incident.start) + " seed " + std::to_string(seed));
      ++seen[incident.kind];
      const int stream = static_cast<int>(
          std::find(faulty.stream_names.begin(), faulty.stream_names.end(), incident.stream) -
          faulty.stream_names.begin());
      const Row sigma = NoiseSigma(twin, stream, incident.start - 3600, incident.start);
      std::vector<std::size_t> window;
      for (std::size_t i = 0; i < faulty.rows.size(); ++i)
        if (faulty.streams[i] == stream && faulty.times[i] >= incident.start &&
            faulty.times[i] <= incident.end)
          window.push_back(i);
      ASSERT_GE(window.size(), 30u);
      EXPECT_NE(faulty.rows[window.front()], twin.rows[window.front()]);
      EXPECT_NE(faulty.rows[window.back()], twin.rows[window.back()]);

      // Mean and spread of (faulty - twin) in the last third of the window, in noise sigmas.
      Row mean{}, spread{};
      const std::size_t late = window.size() - window.size() / 3;
      for (std::size_t k = late; k < window.size(); ++k)
        for (int f = 0; f < 6; ++f)
          mean[f] += (faulty.rows[window[k]][f] - twin.rows[window[k]][f]) / sigma[f];
      for (int f = 0; f < 6; ++f) mean[f] /= static_cast<double>(window.size() - late);
      for (std::size_t k = late; k < window.size(); ++k)
        for (int f = 0; f < 6; ++f) {
          const double d = (faulty.rows[window[k]][f] - twin.rows[window[k]][f]) / sigma[f];
          spread[f] += (d - mean[f]) * (d - mean[f]);
        }
      for (int f = 0; f < 6; ++f)
        spread[f] = std::sqrt(spread[f] / static_cast<double>(window.size() - late));

      if (incident.kind != "stuck_sensor") {
        EXPECT_EQ(mean[kSpeed], 0) << "no fault changes the drive's speed";
      }
      if (incident.kind == "bearing_wear") {
        EXPECT_GT(mean[kVibration], 5);
        EXPECT_GT(mean[kTemperature], 5);
        EXPECT_EQ(mean[kFlow], 0);
      } else if (incident.kind == "cavitation") {
        EXPECT_LT(mean[kFlow], -3);
        EXPECT_LT(mean[kPressure], -3);
        EXPECT_GT(mean[kVibration], 5);
        EXPECT_GT(spread[kPressure], 3) << "pressure ripple";
      } else if (incident.kind == "impeller_fouling") {
        EXPECT_LT(mean[kFlow], -5);
        EXPECT_LT(mean[kPressure], -5);
        EXPECT_EQ(mean[kCurrent], 0) << "flow drops at the same current";
      } else if (incident.kind == "seal_leak") {
        EXPECT_LT(mean[kFlow], -3);
        EXPECT_LT(mean[kPressure], -3);
        EXPECT_GT(mean[kCurrent], 3);
      } else if (incident.kind == "stuck_sensor") {
        ASSERT_EQ(incident.features.size(), 1u);
        const int f = FeatureIndex(incident.features[0]);
        ASSERT_LT(f, 6);
        // Frozen at the reading just before the window.
        std::size_t before = window.front() - faulty.stream_names.size();
        for (std::size_t i : window) EXPECT_EQ(faulty.rows[i][f], faulty.rows[before][f]);
        for (int g = 0; g < 6; ++g)
          if (g != f) {
            EXPECT_EQ(mean[g], 0);
          }
        double largest = 0;
        for (std::size_t i : window)
          largest = std::max(largest, std::abs(faulty.rows[i][f] - twin.rows[i][f]) / sigma[f]);
        EXPECT_GT(largest, 4) << "the process should move away from the frozen reading";
      } else {
        ADD_FAILURE() << "unknown kind";
      }
    }
  }
  for (const std::string& kind : PlantSimulator::FaultKinds()) EXPECT_GT(seen[kind], 0) << kind;
}

TEST(PlantSimulator, IncidentsAreOnTheGridAfterWarmUpAndApartPerPump) {
  for (std::uint64_t seed = 1; seed <= 6; ++seed) {
    PlantOptions options;
    options.seed = seed;
    PlantSimulator simulator(options);
    const auto& incidents = simulator.incidents();
    // round(0.5 per pump-week * 12 pumps * 1 week) = 6; collisions are retried.
    EXPECT_EQ(incidents.size(), 6u) << "seed " << seed;
    std::set<std::string> kinds;
    const double last_tick = options.start_time + (simulator.ticks() - 1) * 10.0;
    const double warm_up_end = options.start_time + 0.25 * options.duration_seconds;
    for (std::size_t i = 0; i < incidents.size(); ++i) {
      const PlantIncident& a = incidents[i];
      kinds.insert(a.kind);
      EXPECT_GE(a.start, warm_up_end);
      EXPECT_LE(a.end, last_tick);
      EXPECT_GE(a.end - a.start, 1800 - 10);
      EXPECT_LE(a.end - a.start, 6 * 3600);
      EXPECT_EQ(std::fmod(a.start - options.start_time, 10.0), 0);
      EXPECT_EQ(std::fmod(a.end - options.start_time, 10.0), 0);
      if (i > 0) {
        EXPECT_LE(incidents[i - 1].start, a.start) << "sorted by start";
      }
      for (std::size_t j = 0; j < i; ++j)
        if (incidents[j].stream == a.stream) {
          EXPECT_TRUE(incidents[j].end + 3600 <= a.start || a.end + 3600 <= incidents[j].start)
              << a.stream << " has overlapping incidents";
        }
    }
    EXPECT_EQ(kinds.size(), 5u) << "six incidents cover all five kinds, seed " << seed;
  }

  PlantOptions only;
  only.faults = {"seal_leak"};
  // A named simulator: a range-for over incidents() of a temporary reads a destroyed vector
  // (heap use-after-free, found by AddressSanitizer; issue 10).
  const PlantSimulator seal_leaks_only(only);
  for (const PlantIncident& incident : seal_leaks_only.incidents())
    EXPECT_EQ(incident.kind, "seal_leak");
  EXPECT_TRUE(PlantSimulator(FaultFree(only)).incidents().empty());
  only.faults_per_pump_week = 0;
  EXPECT_TRUE(PlantSimulator(only).incidents().empty());

  // A short run still gets one incident, after its warm-up quarter.
  PlantOptions short_run;
  short_run.pumps = 2;
  short_run.duration_seconds = 3600;
  PlantSimulator simulator(short_run);
  ASSERT_EQ(simulator.incidents().size(), 1u);
  EXPECT_GE(simulator.incidents()[0].start, short_run.start_time + 900);
  EXPECT_LE(simulator.incidents()[0].end, short_run.start_time + 3590);
}

TEST(PlantSimulator, FaultFreeSpanKeepsFaultsOutOfAWarmUp) {
  // fault_free_seconds replaces the default first quarter (plant_simulator.h): with two days and
  // one fault-free day, every planned incident starts on day two, and the plan still holds faults.
  PlantOptions options;
  options.duration_seconds = 2 * 86400.0;
  options.interval_seconds = 60;
  options.faults_per_pump_week = 3;
  options.fault_free_seconds = 86400;
  PlantSimulator simulator(options);
  ASSERT_FALSE(simulator.incidents().empty());
  for (const PlantIncident& incident : simulator.incidents())
    EXPECT_GE(incident.start, options.start_time + 86400)
        << incident.stream << " " << incident.kind;
  options.fault_free_seconds = options.duration_seconds;  // no room left
  EXPECT_THROW(PlantSimulator{options}, std::invalid_argument);
}

TEST(PlantSimulator, RejectsBadOptions) {
  auto rejects = [](PlantOptions options, const std::string& fragment) {
    try {
      PlantSimulator simulator(options);
      ADD_FAILURE() << "accepted; expected an error mentioning " << fragment;
    } catch (const std::invalid_argument& e) {
      EXPECT_NE(std::string(e.what()).find(fragment), std::string::npos) << e.what();
    }
  };
  PlantOptions o;
  o.pumps = 0;
  rejects(o, "pumps = 0");
  o.pumps = 100;
  rejects(o, "pumps = 100");
  o = {};
  o.interval_seconds = 0;
  rejects(o, "interval");
  o.interval_seconds = -5;
  rejects(o, "interval");
  o.interval_seconds = std::nan("");
  rejects(o, "interval");
  o = {};
  o.duration_seconds = 5;
  rejects(o, "duration");
  o = {};
  o.faults = {"cavitation", "gremlins"};
  rejects(o, "'gremlins'");
  o.faults = {"cavitation", "cavitation"};
  rejects(o, "twice");
  o = {};
  o.faults_per_pump_week = -1;
  rejects(o, "faults per pump-week");
  o = {};
  o.start_time = INFINITY;
  rejects(o, "start");

  PlantSimulator simulator{PlantOptions{}};
  double time;
  std::string stream;
  std::array<double, 5> too_short;
  EXPECT_THROW(simulator.Next(&time, &stream, too_short), std::invalid_argument);
}

class TempDir {
 public:
  explicit TempDir(const std::string& name)
      : path_(std::filesystem::temp_directory_path() /
              ("nuwatch_plant_test_" + std::to_string(::getpid()) + "_" + name)) {
    std::filesystem::remove_all(path_);
  }
  ~TempDir() { std::filesystem::remove_all(path_); }
  std::string operator/(const std::string& file) const { return (path_ / file).string(); }
  std::string str() const { return path_.string(); }

 private:
  std::filesystem::path path_;
};

std::string Slurp(const std::string& path) {
  std::ifstream in(path);
  std::stringstream text;
  text << in.rdbuf();
  return text.str();
}

TEST(PlantFiles, WritesStreamAndIncidentsThatReadBack) {
  TempDir dir("files");
  PlantOptions options;
  options.pumps = 2;
  options.duration_seconds = 6 * 3600;
  const PlantFilesSummary summary = WritePlantFiles(options, dir / "nested/out");
  EXPECT_EQ(summary.rows, 2 * 2160);
  EXPECT_EQ(summary.streams, 2);

  const CsvTable stream = ReadCsv(summary.stream_path);
  std::vector<std::string> header = {"time", "stream"};
  for (const std::string& name : PlantSimulator::FeatureNames()) header.push_back(name);
  EXPECT_EQ(stream.header, header);
  ASSERT_EQ(stream.rows.size(), 2u * 2160);

  const Recording r = Record(options);
  for (std::size_t i = 0; i < stream.rows.size(); ++i) {
    ASSERT_EQ(ParseTimestamp(stream.rows[i][0]), r.times[i]) << stream.Where(i);
    ASSERT_EQ(stream.rows[i][1], r.stream_names[r.streams[i]]);
    for (int f = 0; f < 6; ++f)
      ASSERT_NEAR(*ParseFiniteNumber(stream.rows[i][2 + f]), r.rows[i][f], 0.5e-4 + 1e-9)
          << stream.Where(i);
  }

  const CsvTable incidents = ReadCsv(summary.incidents_path);
  EXPECT_EQ(incidents.header, (std::vector<std::string>{"stream", "start", "end", "kind"}));
  ASSERT_EQ(incidents.rows.size(), r.incidents.size());
  ASSERT_EQ(summary.incidents, r.incidents.size());
  for (std::size_t i = 0; i < r.incidents.size(); ++i) {
    EXPECT_EQ(incidents.rows[i][0], r.incidents[i].stream);
    EXPECT_EQ(ParseTimestamp(incidents.rows[i][1]), r.incidents[i].start);
    EXPECT_EQ(ParseTimestamp(incidents.rows[i][2]), r.incidents[i].end);
    EXPECT_EQ(incidents.rows[i][3], r.incidents[i].kind);
  }
  EXPECT_FALSE(std::filesystem::exists(summary.stream_path + ".tmp"));
}

TEST(PlantFiles, UnwritableDirectoryNamesThePath) {
  TempDir dir("unwritable");
  std::filesystem::create_directories(dir.str());
  std::ofstream(dir / "plain-file") << "x";
  PlantOptions options;
  options.pumps = 1;
  options.duration_seconds = 60;
  try {
    WritePlantFiles(options, dir / "plain-file");
    ADD_FAILURE() << "wrote into a regular file";
  } catch (const std::runtime_error& e) {
    EXPECT_NE(std::string(e.what()).find("plain-file"), std::string::npos) << e.what();
  }
}

// Runs a shell command; returns its exit status.
int RunShell(const std::string& command) {
  const int status = std::system(command.c_str());
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

std::vector<std::string> Lines(const std::string& text) {
  std::vector<std::string> lines;
  std::stringstream in(text);
  for (std::string line; std::getline(in, line);) lines.push_back(line);
  return lines;
}

const std::string kNuwatch = NUWATCH_PROGRAM;

TEST(SimulateCommand, WritesTheFiles) {
  TempDir dir("command");
  std::filesystem::create_directories(dir.str());
  ASSERT_EQ(RunShell(kNuwatch + " simulate --output " + (dir / "out") +
                     " --duration 1h --pumps 2 2>" + (dir / "stderr.log")),
            0);
  const std::vector<std::string> stream = Lines(Slurp(dir / "out/stream.csv"));
  ASSERT_EQ(stream.size(), 1u + 2 * 360);
  EXPECT_EQ(stream[0],
            "time,stream,discharge_pressure_bar,flow_m3h,motor_current_a,vibration_mm_s,"
            "bearing_temp_c,speed_rpm");
  EXPECT_EQ(stream[1].substr(0, 29), "2026-01-01T00:00:00Z,pump-01,");
  EXPECT_EQ(stream[2].substr(0, 29), "2026-01-01T00:00:00Z,pump-02,");
  EXPECT_EQ(stream.back().substr(0, 29), "2026-01-01T00:59:50Z,pump-02,");
  const std::vector<std::string> incidents = Lines(Slurp(dir / "out/incidents.csv"));
  ASSERT_EQ(incidents.size(), 2u) << "header and the one incident a short run gets";
  EXPECT_EQ(incidents[0], "stream,start,end,kind");
  const std::vector<std::string> log = Lines(Slurp(dir / "stderr.log"));
  ASSERT_EQ(log.size(), 1u);
  EXPECT_NE(log[0].find("720 rows"), std::string::npos) << log[0];
}

TEST(SimulateCommand, BadInputExitsWithOneLine) {
  TempDir dir("bad");
  std::filesystem::create_directories(dir.str());
  const std::string err = dir / "err.txt";
  for (const std::string& arguments : std::vector<std::string>{
           "--output " + dir.str() + " --pumps 0", "--output " + dir.str() + " --pumps two",
           "--output " + dir.str() + " --duration 7x", "--output " + dir.str() + " --faults rust",
           std::string("--duration 1h"), "--output " + dir.str() + " --speed 5",
           "--live --speed 0 --duration 1m"}) {
    SCOPED_TRACE(arguments);
    EXPECT_EQ(RunShell(kNuwatch + " simulate " + arguments + " >/dev/null 2>" + err), 1);
    const std::vector<std::string> lines = Lines(Slurp(err));
    ASSERT_EQ(lines.size(), 1u);
    EXPECT_EQ(lines[0].rfind("nuwatch simulate: ", 0), 0u) << lines[0];
  }
}

TEST(SimulateCommand, LiveStreamsRowsAndStopsQuietlyWhenTheReaderLeaves) {
  TempDir dir("live");
  std::filesystem::create_directories(dir.str());
  // --speed 1e9: ticks are due every 10 ns, so the run takes no noticeable wall time.
  ASSERT_EQ(RunShell(kNuwatch + " simulate --live --speed 1e9 --duration 10m --pumps 3 --output " +
                     dir.str() + " >" + (dir / "out.csv") + " 2>/dev/null"),
            0);
  const std::vector<std::string> rows = Lines(Slurp(dir / "out.csv"));
  ASSERT_EQ(rows.size(), 1u + 3 * 60);
  EXPECT_EQ(rows[0].substr(0, 12), "time,stream,");
  EXPECT_TRUE(std::filesystem::exists(dir / "incidents.csv"));
  EXPECT_FALSE(std::filesystem::exists(dir / "stream.csv"));

  // A reader that stops after two lines: nuwatch must end on its own with status 0.
  EXPECT_EQ(RunShell("bash -c 'set -o pipefail; " + kNuwatch +
                     " simulate --live --speed 1e9 2>/dev/null | head -n 2 >/dev/null'"),
            0);
}

}  // namespace
}  // namespace nuwatch
