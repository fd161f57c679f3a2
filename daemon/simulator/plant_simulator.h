// The invented demo plant behind `nuwatch simulate`: the cooling-water pump fleet of a fictional
// plant (it stands for no real site). Every tick (default every 10 s) each pump "pump-01" ...
// "pump-NN" emits one vector with the columns of FeatureNames():
//   discharge_pressure_bar, flow_m3h, motor_current_a, vibration_mm_s, bearing_temp_c, speed_rpm
//
// The model, per pump (textbook centrifugal-pump relations; per-pump values drawn from the seed):
// - Pump curve scaled by the affinity laws: H = H0 (n/n0)^2 - k Q^2, n0 = 1480 rpm, shut-off head
//   H0 = 50..54 m, rated point Q_r = 420..480 m^3/h at H_r = 40 m.
// - Open cooling-tower circuit: system curve H = 6 m (static lift) + c Q^2, the rated point on it
//   at n0. A strainer slowly fouls the circuit (c rises 1.5..3 % over 8..16 days, then is
//   cleaned), so the operating point drifts over days.
// - Supervisory control sets the speed for a cooling demand: a daily cycle (low at night, peak
//   mid-afternoon UTC), a plant load wandering by about 1.5 % over days and a 1 % per-pump wobble
//   over minutes; demand stays within 0.65..1.08 of the rated flow. The drive holds the speed; the
//   operating point is where the pump and system curves cross.
// - Discharge pressure = suction (1.0 bar gauge, +-0.1 with the sump level) + rho g H, with
//   rho = 998 kg/m^3, g = 9.81 m/s^2. Pump efficiency eta_best (0.80..0.84) times
//   (1 - 0.9 (Q/Q_bep - 1)^2), Q_bep = 1.05 Q_r n/n0. Shaft power rho g Q H / eta; motor current
//   = shaft power / (0.93 motor-and-drive efficiency * sqrt(3) * 400 V * power factor 0.88).
// - Bearing vibration (RMS velocity) grows with speed^2 and away from the best-efficiency point,
//   and slowly with wear over weeks. Bearing temperature follows the pump-house air (season, time
//   of day, weather) plus a load-dependent rise, through a 30 min thermal lag.
// - Sensor noise (1 sigma): pressure 0.015 bar, flow 0.6 %, current 0.4 A + 0.3 %, vibration
//   0.05 mm/s + 3 %, temperature 0.15 degC, speed 1.5 rpm.
//
// Ranges outside incidents (PlantNormalRanges()): pressure 2.5..6.5 bar, flow 250..560 m^3/h,
// current 25..150 A, vibration 0.5..4 mm/s, bearing temperature 30..80 degC, speed 1000..1650 rpm.
// Every sample, faults included, stays within PlantAbsoluteRanges(): pressure 1.5..7.5 bar, flow
// 150..600 m^3/h, current 20..165 A, vibration 0.3..10 mm/s, bearing temperature 25..100 degC,
// speed 1000..1650 rpm.
//
// Injected faults (FaultKinds()), each labelled as an incident. The window [start, end] holds
// exactly the samples the fault changes; every other sample is identical to the one a fault-free
// run with the same seed gives (a fault is cleared at its end and the pump returns to its
// fault-free trajectory). Typical effects late in the window, against that fault-free trajectory:
// - bearing_wear (2..6 h): vibration and bearing temperature creep up, to +2.6 mm/s and +14 degC
//   at the end (severity 1).
// - cavitation (30 min..2 h): low suction pressure; the head breaks down: flow -3..5 %, discharge
//   pressure -0.35..0.55 bar with a 0.12 bar ripple, current -8..12 %; erratic broadband
//   vibration +2..3 mm/s.
// - impeller_fouling (1..4 h): head coefficient -14 %: flow -7..10 %, pressure -0.25..0.5 bar,
//   while the shaft power, hence the current, stays the same.
// - stuck_sensor (2..5 h): one of pressure, flow, current or speed repeats its last reading. It
//   starts on a demand ramp (06:30..09:30 or 18:30..21:30) when the run is long enough, so that the
//   process moves away from the frozen value.
// - seal_leak (45 min..3 h): water leaves before the flow meter: delivered flow -5..7 %, pressure
//   -0.15..0.45 bar, and the pump runs further out on its curve: current +3..6 %.
// Each incident draws a severity in 0.75..1.25 and most faults ramp in. Placement:
// round(faults_per_pump_week * pumps * weeks) incidents (at least one when a kind is enabled, the
// rate is positive and there is room), kinds taken in turn from a shuffled list so that each kind
// appears once enough incidents are planned, none in the first 25 % of the run (or the first
// fault_free_seconds), at least 1 h apart
// on the same pump; an incident that finds no free place is dropped.
//
// Determinism: the rows depend only on the options. Random numbers come from std::mt19937_64 with
// our own uniform and Box-Muller normal transforms (standard library distributions differ between
// implementations); each pump, the plant and the fault effects draw from their own streams.
// Thread safety: a PlantSimulator is a value with no shared state; use one per thread.
#pragma once

#include <array>
#include <cstdint>
#include <memory>
#include <span>
#include <string>
#include <string_view>
#include <vector>

namespace nuwatch {

struct PlantOptions {
  int pumps = 12;                         // 1..99; streams "pump-01" ... "pump-NN"
  double duration_seconds = 7 * 86400.0;  // >= interval_seconds; floor(duration/interval) ticks
  double interval_seconds = 10.0;         // > 0; seconds between ticks
  std::uint64_t seed = 1;
  double start_time = 1767225600.0;  // time of the first tick (2026-01-01T00:00:00Z)
  // Kinds to inject, each one of FaultKinds(), no duplicates; empty = a fault-free run.
  std::vector<std::string> faults = {"bearing_wear", "cavitation", "impeller_fouling",
                                     "stuck_sensor", "seal_leak"};
  double faults_per_pump_week = 0.5;  // >= 0; how many incidents to plan (see above)
  // No fault starts before this much simulated time (e.g. a detector's warm-up); < 0: the first
  // 25 % of the run. Must leave room: less than the duration.
  double fault_free_seconds = -1;
};

struct PlantIncident {
  std::string stream;                 // "pump-07"
  double start = 0;                   // time of the first affected sample
  double end = 0;                     // time of the last affected sample (closed interval)
  std::string kind;                   // one of FaultKinds()
  std::vector<std::string> features;  // the columns the fault moves (not written to the CSV)
};

struct FeatureRange {
  double low;
  double high;
};

class PlantSimulator {
 public:
  // Requires: options as documented in PlantOptions. Throws std::invalid_argument naming the option
  // and the value otherwise. Plans the incidents up front.
  explicit PlantSimulator(PlantOptions options);
  ~PlantSimulator();
  PlantSimulator(PlantSimulator&&) noexcept;
  PlantSimulator& operator=(PlantSimulator&&) noexcept;

  static const std::vector<std::string>& FeatureNames();
  static const std::vector<std::string>& FaultKinds();

  const PlantOptions& options() const;
  const std::vector<std::string>& streams() const;
  // Sorted by start time, then stream.
  const std::vector<PlantIncident>& incidents() const;
  std::int64_t ticks() const;  // floor(duration / interval); rows() = ticks() * pumps
  std::int64_t rows() const;

  // The next row: all pumps at one tick (in stream order) before the next tick. Requires
  // features.size() == FeatureNames().size() (else std::invalid_argument). Returns false, touching
  // nothing, once every row has been produced.
  bool Next(double* time, std::string* stream, std::span<double> features);
  // Same, giving the stream as an index into streams().
  bool Next(double* time, int* stream_index, std::span<double> features);

 private:
  struct State;
  std::unique_ptr<State> state_;
};

// Bounds per feature, in FeatureNames() order (see the header comment).
const std::array<FeatureRange, 6>& PlantNormalRanges();
const std::array<FeatureRange, 6>& PlantAbsoluteRanges();

// The CSV text nuwatch simulate writes: "time,stream,<features>\n" and one row per sample with the
// time in ISO-8601 UTC and the values with 4 decimals.
std::string PlantStreamCsvHeader();
void AppendPlantStreamCsvRow(std::string* out, std::string_view time_text, std::string_view stream,
                             std::span<const double> features);
// "stream,start,end,kind\n" and one row per incident, ISO-8601 UTC times.
std::string PlantIncidentsCsv(const std::vector<PlantIncident>& incidents);

struct PlantFilesSummary {
  std::int64_t rows = 0;
  int streams = 0;
  std::size_t incidents = 0;
  std::string stream_path;
  std::string incidents_path;
};

// Writes DIR/incidents.csv (creating DIR if missing) and returns its path. Throws
// std::runtime_error naming the path on failure.
std::string WritePlantIncidents(const std::vector<PlantIncident>& incidents,
                                const std::string& dir);

// Writes DIR/stream.csv and DIR/incidents.csv (creating DIR if missing; each file is written to a
// temporary name and renamed, so a reader never sees half a file under the final name).
// Throws std::invalid_argument for bad options, std::runtime_error naming the path for I/O
// failures.
PlantFilesSummary WritePlantFiles(const PlantOptions& options, const std::string& dir);

}  // namespace nuwatch
