#include "simulator/plant_simulator.h"

#include <algorithm>
#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <numbers>
#include <random>
#include <stdexcept>
#include <system_error>

#include "formats/timestamps.h"
#include "nuwatch/checked_file.h"
#include "nuwatch/types.h"

namespace nuwatch {
namespace {

// Physical constants and the fleet's design point (see the header comment).
constexpr double kWaterDensity = 998.0;  // kg/m^3, water near 20 degC
constexpr double kGravity = 9.81;        // m/s^2
constexpr double kRatedSpeedRpm = 1480.0;
constexpr double kRatedHeadM = 40.0;
constexpr double kStaticHeadM = 6.0;
constexpr double kSuctionPressureBar = 1.0;
constexpr double kSupplyVoltageV = 400.0;
constexpr double kPowerFactor = 0.88;
constexpr double kMotorDriveEfficiency = 0.93;
constexpr double kBarPerMetreHead = kWaterDensity * kGravity / 1e5;
constexpr double kMinDemand = 0.65;
constexpr double kMaxDemand = 1.08;
constexpr double kDay = 86400.0;
constexpr double kTwoPi = 2.0 * std::numbers::pi;

enum Feature { kPressure = 0, kFlow, kCurrent, kVibration, kTemperature, kSpeed, kFeatureCount };
enum class Fault { kBearingWear, kCavitation, kImpellerFouling, kStuckSensor, kSealLeak };

struct FaultSpec {
  const char* name;
  Fault fault;
  double min_seconds;
  double max_seconds;
  std::vector<Feature> features;  // for stuck_sensor: the candidates, one is chosen per incident
};

const std::vector<FaultSpec>& FaultSpecs() {
  static const std::vector<FaultSpec> specs = {
      {"bearing_wear", Fault::kBearingWear, 2 * 3600.0, 6 * 3600.0, {kVibration, kTemperature}},
      {"cavitation", Fault::kCavitation, 1800.0, 2 * 3600.0, {kPressure, kFlow, kVibration}},
      {"impeller_fouling", Fault::kImpellerFouling, 3600.0, 4 * 3600.0, {kPressure, kFlow}},
      {"stuck_sensor",
       Fault::kStuckSensor,
       2 * 3600.0,
       5 * 3600.0,
       {kPressure, kFlow, kCurrent, kSpeed}},
      {"seal_leak", Fault::kSealLeak, 2700.0, 3 * 3600.0, {kPressure, kFlow, kCurrent}},
  };
  return specs;
}

std::uint64_t SplitMix64(std::uint64_t x) {
  x += 0x9e3779b97f4a7c15ULL;
  x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9ULL;
  x = (x ^ (x >> 27)) * 0x94d049bb133111ebULL;
  return x ^ (x >> 31);
}

// mt19937_64 with transforms of our own, so that a seed gives the same numbers everywhere.
class Random {
 public:
  Random() = default;
  Random(std::uint64_t seed, std::uint64_t stream)
      : engine_(SplitMix64(seed ^ SplitMix64(stream * 0x632be59bd9b4e019ULL + 1))) {}

  double Uniform() { return static_cast<double>(engine_() >> 11) * 0x1.0p-53; }  // [0, 1)
  double Uniform(double low, double high) { return low + (high - low) * Uniform(); }
  // Uniform on [0, n) by multiply-shift; n > 0.
  std::int64_t Below(std::int64_t n) {
    return static_cast<std::int64_t>(
        (static_cast<unsigned __int128>(engine_()) * static_cast<std::uint64_t>(n)) >> 64);
  }
  double Normal() {  // Box-Muller
    if (has_spare_) {
      has_spare_ = false;
      return spare_;
    }
    const double u1 = 1.0 - Uniform();  // (0, 1]
    const double u2 = Uniform();
    const double radius = std::sqrt(-2.0 * std::log(u1));
    spare_ = radius * std::sin(kTwoPi * u2);
    has_spare_ = true;
    return radius * std::cos(kTwoPi * u2);
  }

 private:
  std::mt19937_64 engine_;
  bool has_spare_ = false;
  double spare_ = 0;
};

// Ornstein-Uhlenbeck process with unit stationary variance, stepped exactly.
struct UnitOrnsteinUhlenbeck {
  double value = 0;
  void Start(Random& random) { value = random.Normal(); }
  void Step(Random& random, double dt, double time_constant) {
    const double decay = std::exp(-dt / time_constant);
    value = value * decay + std::sqrt(1.0 - decay * decay) * random.Normal();
  }
  double Clamped() const { return std::clamp(value, -3.0, 3.0); }
};

double PositiveFmod(double x, double period) {
  const double r = std::fmod(x, period);
  return r < 0 ? r + period : r;
}

struct Pump {
  double rated_flow;       // m^3/h at the rated head and speed
  double shutoff_head;     // m at the rated speed
  double curve_k;          // m / (m^3/h)^2, pump curve
  double system_c;         // m / (m^3/h)^2, clean circuit
  double best_efficiency;  // pump only
  double vibration_base;   // mm/s at the rated point, new bearings
  double wear_growth;      // fraction vibration grows over months
  double temp_offset;      // degC
  double demand_trim;
  double demand_phase_h;
  double strainer_amplitude;
  double strainer_period_s;
  double strainer_phase;
  double pressure_offset;  // sensor calibration
  double flow_gain;
  double current_gain;
  Random noise;
  Random fault_noise;
  UnitOrnsteinUhlenbeck wobble;
  double bearing_temp = 0;  // lagged true temperature
  std::array<double, kFeatureCount> last_output{};
  std::vector<int> incidents;  // indices into State::planned, by start
  std::size_t next_incident = 0;
};

struct Planned {
  int pump;
  Fault fault;
  std::int64_t first_tick;
  std::int64_t last_tick;  // inclusive
  double severity;
  Feature stuck_feature;
};

// The operating point where the pump curve (head scaled by head_factor) meets the system curve,
// with an optional leak before the flow meter (flow = leak_coefficient * sqrt(H)).
struct OperatingPoint {
  double pump_flow;       // m^3/h through the pump
  double delivered_flow;  // m^3/h through the meter
  double head;            // m
};

OperatingPoint Operate(const Pump& pump, double speed, double system_c, double head_factor,
                       double leak_coefficient) {
  const double ratio = speed / kRatedSpeedRpm;
  const double shutoff = pump.shutoff_head * ratio * ratio * head_factor;
  if (leak_coefficient <= 0) {
    const double flow =
        std::sqrt(std::max(shutoff - kStaticHeadM, 0.0) / (pump.curve_k + system_c));
    return {flow, flow, kStaticHeadM + system_c * flow * flow};
  }
  // Pump flow sqrt((shutoff - H)/k) = delivered sqrt((H - static)/c) + leak L sqrt(H): the left
  // side falls and the right side rises with H, so bisection finds the one crossing.
  double low = kStaticHeadM, high = std::max(shutoff, kStaticHeadM);
  for (int i = 0; i < 60; ++i) {
    const double head = 0.5 * (low + high);
    const double excess = std::sqrt((shutoff - head) / pump.curve_k) -
                          std::sqrt((head - kStaticHeadM) / system_c) -
                          leak_coefficient * std::sqrt(head);
    (excess > 0 ? low : high) = head;
  }
  const double head = 0.5 * (low + high);
  return {std::sqrt(std::max(shutoff - head, 0.0) / pump.curve_k),
          std::sqrt(std::max(head - kStaticHeadM, 0.0) / system_c), head};
}

double ShaftPowerW(const Pump& pump, double speed, double flow, double head) {
  const double best_flow = 1.05 * pump.rated_flow * speed / kRatedSpeedRpm;
  const double off_best = flow / best_flow - 1.0;
  const double efficiency = pump.best_efficiency * (1.0 - 0.9 * off_best * off_best);
  return kWaterDensity * kGravity * (flow / 3600.0) * head / efficiency;
}

double CurrentA(double shaft_power_w) {
  return shaft_power_w / (kMotorDriveEfficiency * std::sqrt(3.0) * kSupplyVoltageV * kPowerFactor);
}

}  // namespace

struct PlantSimulator::State {
  PlantOptions options;
  std::vector<std::string> streams;
  std::vector<PlantIncident> incidents;
  std::vector<Planned> planned;
  std::vector<Pump> pumps;
  std::int64_t ticks = 0;

  Random plant_noise;
  UnitOrnsteinUhlenbeck plant_load;  // tau 3 days
  UnitOrnsteinUhlenbeck weather;     // tau 2 days
  UnitOrnsteinUhlenbeck sump_level;  // tau 6 h

  // Per tick.
  std::int64_t tick = 0;
  int pump = 0;
  double time = 0;
  double hour_of_day = 0;
  double days_elapsed = 0;
  double load = 1;
  double room_temp = 20;
  double suction_pressure = kSuctionPressureBar;

  void Plan();
  void AdvancePlant();
  void ComputePump(Pump& pump, std::span<double> out);
};

void PlantSimulator::State::Plan() {
  Random random(options.seed, 0x504c414eULL);  // "PLAN"
  std::vector<const FaultSpec*> kinds;
  for (const std::string& name : options.faults)
    for (const FaultSpec& spec : FaultSpecs())
      if (name == spec.name) kinds.push_back(&spec);
  for (std::size_t i = kinds.size(); i > 1; --i)
    std::swap(kinds[i - 1], kinds[random.Below(static_cast<std::int64_t>(i))]);

  const std::int64_t warm_up = std::max<std::int64_t>(
      1, static_cast<std::int64_t>(
             options.fault_free_seconds >= 0
                 ? std::ceil(options.fault_free_seconds / options.interval_seconds)
                 : std::ceil(0.25 * ticks)));
  const std::int64_t room = ticks - warm_up;
  if (kinds.empty() || room < 1 || options.faults_per_pump_week <= 0) return;
  std::int64_t count = std::llround(options.faults_per_pump_week * options.pumps *
                                    options.duration_seconds / (7 * kDay));
  count = std::max<std::int64_t>(count, 1);
  const std::int64_t gap = static_cast<std::int64_t>(std::ceil(3600.0 / options.interval_seconds));

  for (std::int64_t i = 0; i < count; ++i) {
    const FaultSpec& spec = *kinds[i % kinds.size()];
    const double seconds = random.Uniform(spec.min_seconds, spec.max_seconds);
    const std::int64_t length =
        std::clamp<std::int64_t>(std::llround(seconds / options.interval_seconds), 1, room);
    const double severity = random.Uniform(0.75, 1.25);
    const Feature stuck =
        spec.features[random.Below(static_cast<std::int64_t>(spec.features.size()))];
    for (int attempt = 0; attempt < 200; ++attempt) {
      const int pump = static_cast<int>(random.Below(options.pumps));
      const std::int64_t first = warm_up + random.Below(room - length + 1);
      const std::int64_t last = first + length - 1;
      // A frozen reading only parts from the others when the process moves: stuck sensors start
      // on a demand ramp (the daily cycle is steepest around 09:00 and 21:00), while one exists.
      if (spec.fault == Fault::kStuckSensor && attempt < 150) {
        const double hour =
            PositiveFmod(options.start_time + static_cast<double>(first) * options.interval_seconds,
                         kDay) /
            3600.0;
        const bool on_ramp = (hour >= 6.5 && hour <= 9.5) || (hour >= 18.5 && hour <= 21.5);
        if (!on_ramp && room * options.interval_seconds >= kDay) continue;
      }
      const bool clashes = std::any_of(planned.begin(), planned.end(), [&](const Planned& p) {
        return p.pump == pump && first <= p.last_tick + gap && p.first_tick <= last + gap;
      });
      if (clashes) continue;
      planned.push_back({pump, spec.fault, first, last, severity, stuck});
      break;
    }
  }
  std::sort(planned.begin(), planned.end(), [](const Planned& a, const Planned& b) {
    return a.first_tick != b.first_tick ? a.first_tick < b.first_tick : a.pump < b.pump;
  });
  const auto& names = PlantSimulator::FeatureNames();
  for (std::size_t i = 0; i < planned.size(); ++i) {
    const Planned& p = planned[i];
    const FaultSpec& spec = *std::find_if(FaultSpecs().begin(), FaultSpecs().end(),
                                          [&](const FaultSpec& s) { return s.fault == p.fault; });
    PlantIncident incident;
    incident.stream = streams[p.pump];
    incident.start =
        options.start_time + static_cast<double>(p.first_tick) * options.interval_seconds;
    incident.end = options.start_time + static_cast<double>(p.last_tick) * options.interval_seconds;
    incident.kind = spec.name;
    if (p.fault == Fault::kStuckSensor) {
      incident.features = {names[p.stuck_feature]};
    } else {
      for (Feature f : spec.features) incident.features.push_back(names[f]);
    }
    incidents.push_back(std::move(incident));
    pumps[p.pump].incidents.push_back(static_cast<int>(i));
  }
}

void PlantSimulator::State::AdvancePlant() {
  const double dt = options.interval_seconds;
  if (tick == 0) {
    plant_load.Start(plant_noise);
    weather.Start(plant_noise);
    sump_level.Start(plant_noise);
  } else {
    plant_load.Step(plant_noise, dt, 3 * kDay);
    weather.Step(plant_noise, dt, 2 * kDay);
    sump_level.Step(plant_noise, dt, 6 * 3600.0);
  }
  time = options.start_time + static_cast<double>(tick) * dt;
  hour_of_day = PositiveFmod(time, kDay) / 3600.0;
  days_elapsed = static_cast<double>(tick) * dt / kDay;
  load = 1.0 + 0.015 * plant_load.Clamped();
  // Outdoor air: a seasonal cycle (coldest around 20 January), a daily swing peaking at 15:00 and
  // weather; the pump house follows it damped.
  const double day_of_year = PositiveFmod(time / kDay, 365.2425);
  const double outdoor = 17.0 - 9.0 * std::cos(kTwoPi * (day_of_year - 20.0) / 365.2425) +
                         3.5 * std::sin(kTwoPi * (hour_of_day - 9.0) / 24.0) +
                         1.5 * weather.Clamped();
  room_temp = 22.0 + 0.4 * (outdoor - 12.0);
  suction_pressure = kSuctionPressureBar + 0.033 * sump_level.Clamped();
}

void PlantSimulator::State::ComputePump(Pump& pump, std::span<double> out) {
  const double dt = options.interval_seconds;
  if (tick == 0) {
    pump.wobble.Start(pump.noise);
  } else {
    pump.wobble.Step(pump.noise, dt, 900.0);
  }
  std::array<double, kFeatureCount> noise;
  for (double& n : noise) n = pump.noise.Normal();

  // Supervisory control: the speed that would deliver the demanded flow on the clean circuit.
  const double h = hour_of_day + pump.demand_phase_h;
  const double daily = 0.86 + 0.11 * std::sin(kTwoPi * (h - 9.0) / 24.0) +
                       0.025 * std::sin(2 * kTwoPi * (h - 4.0) / 24.0);
  const double demand =
      std::clamp(load * pump.demand_trim * daily * (1.0 + 0.01 * pump.wobble.Clamped()), kMinDemand,
                 kMaxDemand);
  const double demanded_flow = demand * pump.rated_flow;
  const double speed =
      kRatedSpeedRpm *
      std::sqrt((kStaticHeadM + (pump.system_c + pump.curve_k) * demanded_flow * demanded_flow) /
                pump.shutoff_head);

  const double strainer = PositiveFmod(
      static_cast<double>(tick) * dt / pump.strainer_period_s + pump.strainer_phase, 1.0);
  const double system_c = pump.system_c * (1.0 + pump.strainer_amplitude * strainer);
  const OperatingPoint healthy = Operate(pump, speed, system_c, 1.0, 0.0);
  const double healthy_power = ShaftPowerW(pump, speed, healthy.pump_flow, healthy.head);
  const double ratio = speed / kRatedSpeedRpm;

  const double best_flow = 1.05 * pump.rated_flow * ratio;
  const double off_best = healthy.pump_flow / best_flow - 1.0;
  const double wear = 1.0 + pump.wear_growth * (1.0 - std::exp(-days_elapsed / 60.0));
  const double vibration = pump.vibration_base * (0.55 + 0.45 * ratio * ratio) *
                           (1.0 + 1.5 * off_best * off_best) * wear;

  const double temp_target = room_temp + 16.0 + 16.0 * ratio * ratio + pump.temp_offset;
  if (tick == 0) {
    pump.bearing_temp = temp_target;
  } else {
    pump.bearing_temp += (temp_target - pump.bearing_temp) * (1.0 - std::exp(-dt / 1800.0));
  }

  std::array<double, kFeatureCount> value;
  value[kPressure] = suction_pressure + kBarPerMetreHead * healthy.head;
  value[kFlow] = healthy.delivered_flow;
  value[kCurrent] = CurrentA(healthy_power);
  value[kVibration] = vibration;
  value[kTemperature] = pump.bearing_temp;
  value[kSpeed] = speed;

  const Planned* fault = nullptr;
  while (pump.next_incident < pump.incidents.size() &&
         planned[pump.incidents[pump.next_incident]].last_tick < tick)
    ++pump.next_incident;
  if (pump.next_incident < pump.incidents.size()) {
    const Planned& p = planned[pump.incidents[pump.next_incident]];
    if (p.first_tick <= tick) fault = &p;
  }
  if (fault != nullptr) {
    const double length = static_cast<double>(fault->last_tick - fault->first_tick + 1);
    const double progress = static_cast<double>(tick - fault->first_tick + 1) / length;  // (0, 1]
    auto ramp_in = [&](double fraction) { return std::min(1.0, progress / fraction); };
    const double s = fault->severity;
    switch (fault->fault) {
      case Fault::kBearingWear: {
        const double r = std::pow(progress, 1.3);
        value[kVibration] += 2.6 * s * r;
        value[kTemperature] += 14.0 * s * r;
        break;
      }
      case Fault::kCavitation: {
        const double r = ramp_in(0.1);
        const OperatingPoint point = Operate(pump, speed, system_c, 1.0 - 0.07 * s * r, 0.0);
        value[kPressure] = suction_pressure - 0.25 * s * r + kBarPerMetreHead * point.head +
                           0.12 * s * r * pump.fault_noise.Normal();
        value[kFlow] = point.delivered_flow;
        value[kCurrent] = CurrentA(ShaftPowerW(pump, speed, point.pump_flow, point.head));
        value[kVibration] += s * r * (2.0 + 0.6 * std::abs(pump.fault_noise.Normal()));
        break;
      }
      case Fault::kImpellerFouling: {
        const double r = ramp_in(0.25);
        const OperatingPoint point = Operate(pump, speed, system_c, 1.0 - 0.14 * s * r, 0.0);
        value[kPressure] = suction_pressure + kBarPerMetreHead * point.head;
        value[kFlow] = point.delivered_flow;
        // Friction in the fouled impeller takes the hydraulic power it no longer delivers.
        value[kCurrent] = CurrentA(healthy_power);
        break;
      }
      case Fault::kSealLeak: {
        const double r = ramp_in(0.2);
        const double leak = 0.22 * s * r * pump.rated_flow / std::sqrt(kRatedHeadM);
        const OperatingPoint point = Operate(pump, speed, system_c, 1.0, leak);
        value[kPressure] = suction_pressure + kBarPerMetreHead * point.head;
        value[kFlow] = point.delivered_flow;
        value[kCurrent] = CurrentA(ShaftPowerW(pump, speed, point.pump_flow, point.head));
        break;
      }
      case Fault::kStuckSensor:
        break;
    }
  }

  std::array<double, kFeatureCount> reading;
  reading[kPressure] = value[kPressure] + pump.pressure_offset + 0.015 * noise[kPressure];
  reading[kFlow] = value[kFlow] * pump.flow_gain * (1.0 + 0.006 * noise[kFlow]);
  reading[kCurrent] =
      value[kCurrent] * pump.current_gain + (0.4 + 0.003 * value[kCurrent]) * noise[kCurrent];
  reading[kVibration] =
      std::max(0.05, value[kVibration] + (0.05 + 0.03 * value[kVibration]) * noise[kVibration]);
  reading[kTemperature] = value[kTemperature] + 0.15 * noise[kTemperature];
  reading[kSpeed] = value[kSpeed] + 1.5 * noise[kSpeed];
  if (fault != nullptr && fault->fault == Fault::kStuckSensor)
    reading[fault->stuck_feature] = pump.last_output[fault->stuck_feature];
  pump.last_output = reading;
  std::copy(reading.begin(), reading.end(), out.begin());
}

PlantSimulator::PlantSimulator(PlantOptions options) : state_(std::make_unique<State>()) {
  auto fail = [](const std::string& message) {
    throw std::invalid_argument("plant simulator: " + message);
  };
  if (options.pumps < 1 || options.pumps > 99)
    fail("pumps = " + std::to_string(options.pumps) + " is outside 1..99");
  if (!std::isfinite(options.interval_seconds) || options.interval_seconds <= 0)
    fail("interval = " + std::to_string(options.interval_seconds) + " s must be positive");
  if (!std::isfinite(options.duration_seconds) ||
      options.duration_seconds < options.interval_seconds)
    fail("duration = " + std::to_string(options.duration_seconds) +
         " s is shorter than one interval (" + std::to_string(options.interval_seconds) + " s)");
  if (options.duration_seconds / options.interval_seconds > 1e12)
    fail("duration / interval = " +
         std::to_string(options.duration_seconds / options.interval_seconds) +
         " ticks is more than 1e12");
  if (!std::isfinite(options.start_time)) fail("start time must be finite");
  if (!std::isfinite(options.fault_free_seconds) ||
      options.fault_free_seconds >= options.duration_seconds)
    fail("fault-free span = " + std::to_string(options.fault_free_seconds) +
         " s must be shorter than the duration (" + std::to_string(options.duration_seconds) +
         " s)");
  if (!std::isfinite(options.faults_per_pump_week) || options.faults_per_pump_week < 0)
    fail("faults per pump-week = " + std::to_string(options.faults_per_pump_week) +
         " must be >= 0");
  for (std::size_t i = 0; i < options.faults.size(); ++i) {
    const std::string& name = options.faults[i];
    if (std::find(FaultKinds().begin(), FaultKinds().end(), name) == FaultKinds().end()) {
      std::string known;
      for (const std::string& kind : FaultKinds()) known += (known.empty() ? "" : ", ") + kind;
      fail("unknown fault kind '" + name + "' (known: " + known + ")");
    }
    if (std::find(options.faults.begin(), options.faults.begin() + i, name) !=
        options.faults.begin() + i)
      fail("fault kind '" + name + "' is listed twice");
  }

  State& s = *state_;
  s.options = std::move(options);
  s.ticks = static_cast<std::int64_t>(
      std::floor(s.options.duration_seconds / s.options.interval_seconds * (1 + 1e-12)));
  s.plant_noise = Random(s.options.seed, 0x504c414e54ULL);  // "PLANT"
  Random parameters(s.options.seed, 0x50415241ULL);         // "PARA"
  for (int p = 0; p < s.options.pumps; ++p) {
    char name[16];
    std::snprintf(name, sizeof name, "pump-%02d", p + 1);
    s.streams.push_back(name);
    Pump pump;
    pump.rated_flow = parameters.Uniform(420, 480);
    pump.shutoff_head = parameters.Uniform(50, 54);
    pump.curve_k = (pump.shutoff_head - kRatedHeadM) / (pump.rated_flow * pump.rated_flow);
    pump.system_c = (kRatedHeadM - kStaticHeadM) / (pump.rated_flow * pump.rated_flow);
    pump.best_efficiency = parameters.Uniform(0.80, 0.84);
    pump.vibration_base = parameters.Uniform(1.2, 2.2);
    pump.wear_growth = parameters.Uniform(0.05, 0.2);
    pump.temp_offset = parameters.Uniform(-3, 3);
    pump.demand_trim = parameters.Uniform(0.97, 1.03);
    pump.demand_phase_h = parameters.Uniform(-0.75, 0.75);
    pump.strainer_amplitude = parameters.Uniform(0.015, 0.03);
    pump.strainer_period_s = parameters.Uniform(8, 16) * kDay;
    pump.strainer_phase = parameters.Uniform();
    pump.pressure_offset = parameters.Uniform(-0.03, 0.03);
    pump.flow_gain = parameters.Uniform(0.99, 1.01);
    pump.current_gain = parameters.Uniform(0.99, 1.01);
    pump.noise = Random(s.options.seed, 0x1000 + static_cast<std::uint64_t>(p));
    pump.fault_noise = Random(s.options.seed, 0x2000 + static_cast<std::uint64_t>(p));
    s.pumps.push_back(std::move(pump));
  }
  s.Plan();
}

PlantSimulator::~PlantSimulator() = default;
PlantSimulator::PlantSimulator(PlantSimulator&&) noexcept = default;
PlantSimulator& PlantSimulator::operator=(PlantSimulator&&) noexcept = default;

const std::vector<std::string>& PlantSimulator::FeatureNames() {
  static const std::vector<std::string> names = {"discharge_pressure_bar", "flow_m3h",
                                                 "motor_current_a",        "vibration_mm_s",
                                                 "bearing_temp_c",         "speed_rpm"};
  return names;
}

const std::vector<std::string>& PlantSimulator::FaultKinds() {
  static const std::vector<std::string> kinds = [] {
    std::vector<std::string> names;
    for (const FaultSpec& spec : FaultSpecs()) names.push_back(spec.name);
    return names;
  }();
  return kinds;
}

const PlantOptions& PlantSimulator::options() const { return state_->options; }
const std::vector<std::string>& PlantSimulator::streams() const { return state_->streams; }
const std::vector<PlantIncident>& PlantSimulator::incidents() const { return state_->incidents; }
std::int64_t PlantSimulator::ticks() const { return state_->ticks; }
std::int64_t PlantSimulator::rows() const { return state_->ticks * state_->options.pumps; }

bool PlantSimulator::Next(double* time, int* stream_index, std::span<double> features) {
  if (features.size() != kFeatureCount)
    throw std::invalid_argument("PlantSimulator::Next: features has " +
                                std::to_string(features.size()) + " entries, expected " +
                                std::to_string(kFeatureCount));
  State& s = *state_;
  if (s.tick >= s.ticks) return false;
  if (s.pump == 0) s.AdvancePlant();
  s.ComputePump(s.pumps[s.pump], features);
  *time = s.time;
  *stream_index = s.pump;
  if (++s.pump == s.options.pumps) {
    s.pump = 0;
    ++s.tick;
  }
  return true;
}

bool PlantSimulator::Next(double* time, std::string* stream, std::span<double> features) {
  int index = 0;
  if (!Next(time, &index, features)) return false;
  *stream = state_->streams[index];
  return true;
}

const std::array<FeatureRange, 6>& PlantNormalRanges() {
  static const std::array<FeatureRange, 6> ranges = {
      {{2.5, 6.5}, {250, 560}, {25, 150}, {0.5, 4}, {30, 80}, {1000, 1650}}};
  return ranges;
}

const std::array<FeatureRange, 6>& PlantAbsoluteRanges() {
  static const std::array<FeatureRange, 6> ranges = {
      {{1.5, 7.5}, {150, 600}, {20, 165}, {0.3, 10}, {25, 100}, {1000, 1650}}};
  return ranges;
}

std::string PlantStreamCsvHeader() {
  std::string header = "time,stream";
  for (const std::string& name : PlantSimulator::FeatureNames()) header += "," + name;
  return header + "\n";
}

void AppendPlantStreamCsvRow(std::string* out, std::string_view time_text, std::string_view stream,
                             std::span<const double> features) {
  out->append(time_text);
  out->push_back(',');
  out->append(stream);
  char buffer[64];
  for (double value : features) {
    out->push_back(',');
    const auto result =
        std::to_chars(buffer, buffer + sizeof buffer, value, std::chars_format::fixed, 4);
    out->append(buffer, result.ptr);
  }
  out->push_back('\n');
}

std::string PlantIncidentsCsv(const std::vector<PlantIncident>& incidents) {
  std::string text = "stream,start,end,kind\n";
  for (const PlantIncident& incident : incidents)
    text += incident.stream + "," + FormatTimestamp(incident.start) + "," +
            FormatTimestamp(incident.end) + "," + incident.kind + "\n";
  return text;
}

namespace {

// Writes through a temporary file in the same directory, which then replaces the file durably
// (nuwatch/checked_file.h's CommitFileDurably: fsync, rename, fsync of the directory).
class ReplacingFile {
 public:
  explicit ReplacingFile(std::string path) : path_(std::move(path)), temp_(path_ + ".tmp") {
    file_ = std::fopen(temp_.c_str(), "wb");
    if (file_ == nullptr) Fail("cannot create");
  }
  ~ReplacingFile() {
    if (file_ != nullptr) {
      std::fclose(file_);
      std::remove(temp_.c_str());
    }
  }
  void Write(std::string_view text) {
    if (std::fwrite(text.data(), 1, text.size(), file_) != text.size()) Fail("cannot write");
  }
  void Commit() {
    const bool closed = std::fclose(file_) == 0;
    file_ = nullptr;
    if (!closed) {
      std::remove(temp_.c_str());
      Fail("cannot write");
    }
    try {
      CommitFileDurably(temp_, path_);
    } catch (const ModelFileError& e) {
      throw std::runtime_error(e.what());
    }
  }

 private:
  [[noreturn]] void Fail(const char* what) {
    throw std::runtime_error(temp_ + ": " + what + ": " + std::generic_category().message(errno));
  }
  std::string path_;
  std::string temp_;
  std::FILE* file_ = nullptr;
};

void CreateDirectory(const std::string& dir) {
  std::error_code error;
  std::filesystem::create_directories(dir, error);
  if (error) throw std::runtime_error(dir + ": cannot create directory: " + error.message());
  if (!std::filesystem::is_directory(dir, error))
    throw std::runtime_error(dir + ": is not a directory");
}

}  // namespace

std::string WritePlantIncidents(const std::vector<PlantIncident>& incidents,
                                const std::string& dir) {
  CreateDirectory(dir);
  const std::string path = (std::filesystem::path(dir) / "incidents.csv").string();
  ReplacingFile file(path);
  file.Write(PlantIncidentsCsv(incidents));
  file.Commit();
  return path;
}

PlantFilesSummary WritePlantFiles(const PlantOptions& options, const std::string& dir) {
  PlantSimulator simulator(options);
  CreateDirectory(dir);
  PlantFilesSummary summary;
  summary.stream_path = (std::filesystem::path(dir) / "stream.csv").string();
  summary.streams = options.pumps;
  summary.incidents = simulator.incidents().size();

  ReplacingFile stream_file(summary.stream_path);
  std::string buffer = PlantStreamCsvHeader();
  buffer.reserve(1 << 20);
  std::array<double, 6> features;
  double time = 0, formatted_time = 0;
  std::string time_text;
  int stream = 0;
  while (simulator.Next(&time, &stream, features)) {
    if (time_text.empty() || time != formatted_time) {
      time_text = FormatTimestamp(time);
      formatted_time = time;
    }
    AppendPlantStreamCsvRow(&buffer, time_text, simulator.streams()[stream], features);
    ++summary.rows;
    if (buffer.size() > (1 << 20) - 256) {
      stream_file.Write(buffer);
      buffer.clear();
    }
  }
  stream_file.Write(buffer);
  stream_file.Commit();

  summary.incidents_path = WritePlantIncidents(simulator.incidents(), dir);
  return summary;
}

}  // namespace nuwatch
