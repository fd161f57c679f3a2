#include "nuwatch/calibration.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <sstream>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

std::string SixDigitText(double value) {
  char buffer[32];
  std::snprintf(buffer, sizeof buffer, "%.6g", value);
  return buffer;
}

// Below this |theta| * max(y) the profile likelihood is evaluated as the exponential limit.
constexpr double kExponentialLimit = 1e-9;
constexpr double kMinShape = -0.5;

// Incidents opened per flagged vector at the reference level, add-one smoothed so that a window
// in which no incident opened does not promise zero.
double OpenedPerFlag(const CalibrationSummary& s) {
  return (static_cast<double>(s.reference_opened) + 1) /
         (static_cast<double>(s.reference_flagged) + 1);
}

// Grimshaw's profile: for theta, shape = mean(log1p(theta y)), scale = shape / theta.
struct Profile {
  double log_likelihood = -std::numeric_limits<double>::infinity();
  GeneralizedPareto fit;
};

Profile ProfileAt(double theta, std::span<const double> y, double y_max, double y_mean,
                  double min_shape) {
  Profile out;
  const double n = static_cast<double>(y.size());
  if (std::abs(theta) * y_max < kExponentialLimit) {
    out.fit = {0.0, y_mean};
    out.log_likelihood = -n * std::log(y_mean) - n;
    return out;
  }
  if (1 + theta * y_max <= 0) return out;
  double sum = 0;
  for (const double v : y) sum += std::log1p(theta * v);
  const double shape = sum / n;
  if (shape < min_shape || shape == 0) return out;
  const double scale = shape / theta;
  if (!(scale > 0) || !std::isfinite(scale)) return out;
  out.fit = {shape, scale};
  // -n log(scale) - (1 + 1/shape) sum log1p(theta y) = -n log(scale) - n (shape + 1).
  out.log_likelihood = -n * std::log(scale) - n * (shape + 1);
  return out;
}

}  // namespace

double GeneralizedPareto::Survival(double y) const {
  if (y <= 0) return 1.0;
  if (shape == 0) return std::exp(-y / scale);
  const double t = 1 + shape * y / scale;
  if (t <= 0) return 0.0;
  return std::pow(t, -1.0 / shape);
}

double GeneralizedPareto::InverseSurvival(double q) const {
  if (q >= 1) return 0.0;
  if (shape == 0) return -scale * std::log(q);
  return scale / shape * (std::pow(q, -shape) - 1);
}

double GeneralizedPareto::LogLikelihood(std::span<const double> y) const {
  double total = 0;
  for (const double v : y) {
    if (v < 0) return -std::numeric_limits<double>::infinity();
    if (shape == 0) {
      total += -std::log(scale) - v / scale;
      continue;
    }
    const double t = 1 + shape * v / scale;
    if (t <= 0) return -std::numeric_limits<double>::infinity();
    total += -std::log(scale) - (1 + 1 / shape) * std::log(t);
  }
  return total;
}

GeneralizedPareto FitGeneralizedPareto(std::span<const double> y, double min_shape) {
  if (!(min_shape >= kMinShape && min_shape <= 0)) {
    throw PreconditionError("FitGeneralizedPareto: min_shape = " + SixDigitText(min_shape) +
                            " must be in [-0.5, 0]");
  }
  if (y.size() < 3) {
    throw PreconditionError("FitGeneralizedPareto: " + std::to_string(y.size()) +
                            " excesses, need at least 3");
  }
  double y_max = 0, y_sum = 0;
  double y_min = std::numeric_limits<double>::infinity();
  for (std::size_t i = 0; i < y.size(); ++i) {
    if (!std::isfinite(y[i]) || y[i] < 0) {
      throw PreconditionError("FitGeneralizedPareto: excess " + std::to_string(i) + " = " +
                              SixDigitText(y[i]) + " is not finite and >= 0");
    }
    y_max = std::max(y_max, y[i]);
    y_min = std::min(y_min, y[i]);
    y_sum += y[i];
  }
  if (y_max == y_min) {
    throw PreconditionError("FitGeneralizedPareto: all " + std::to_string(y.size()) +
                            " excesses equal " + SixDigitText(y_max));
  }
  const double y_mean = y_sum / static_cast<double>(y.size());

  // A coarse grid over theta on both sides of 0, then golden-section refinement around the best
  // grid point. Negative theta lives in (-1/y_max, 0); positive theta is spread over many decades
  // of 1/y_mean (heavy tails have large theta).
  std::vector<double> grid;
  for (int j = 1; j <= 80; ++j) {
    const double c = std::pow(10.0, -j / 8.0);  // 0.75 .. 1e-10 of the way to -1/y_max
    grid.push_back(-(1 - c) / y_max);
    grid.push_back(-c / y_max);
  }
  for (int j = -80; j <= 60; ++j) grid.push_back(std::pow(10.0, j / 8.0) / y_mean);
  grid.push_back(0.0);
  std::sort(grid.begin(), grid.end());
  std::size_t best = 0;
  std::vector<double> values(grid.size());
  for (std::size_t k = 0; k < grid.size(); ++k) {
    values[k] = ProfileAt(grid[k], y, y_max, y_mean, min_shape).log_likelihood;
    if (values[k] > values[best]) best = k;
  }
  if (!std::isfinite(values[best])) {
    // No feasible theta with shape >= -0.5 (cannot happen for data with spread: theta -> 0 is the
    // exponential); fall back to the exponential fit.
    return {0.0, y_mean};
  }
  double lo = grid[best > 0 ? best - 1 : best];
  double hi = grid[best + 1 < grid.size() ? best + 1 : best];
  const double golden = (std::sqrt(5.0) - 1) / 2;
  double x1 = hi - golden * (hi - lo), x2 = lo + golden * (hi - lo);
  double f1 = ProfileAt(x1, y, y_max, y_mean, min_shape).log_likelihood;
  double f2 = ProfileAt(x2, y, y_max, y_mean, min_shape).log_likelihood;
  for (int it = 0; it < 200 && hi - lo > 1e-14 * (std::abs(lo) + std::abs(hi)); ++it) {
    if (f1 >= f2) {
      hi = x2;
      x2 = x1;
      f2 = f1;
      x1 = hi - golden * (hi - lo);
      f1 = ProfileAt(x1, y, y_max, y_mean, min_shape).log_likelihood;
    } else {
      lo = x1;
      x1 = x2;
      f1 = f2;
      x2 = lo + golden * (hi - lo);
      f2 = ProfileAt(x2, y, y_max, y_mean, min_shape).log_likelihood;
    }
  }
  Profile refined = ProfileAt(f1 >= f2 ? x1 : x2, y, y_max, y_mean, min_shape);
  Profile at_grid = ProfileAt(grid[best], y, y_max, y_mean, min_shape);
  return refined.log_likelihood >= at_grid.log_likelihood ? refined.fit : at_grid.fit;
}

void CheckCalibrationOptions(const CalibrationOptions& o, std::string_view where) {
  auto fail = [&](const std::string& text) {
    throw PreconditionError(std::string(where) + ": " + text);
  };
  if (!(std::isfinite(o.false_alarm_rate) && o.false_alarm_rate >= 0 &&
        o.false_alarm_rate <= 0.5)) {
    fail("false_alarm_rate = " + SixDigitText(o.false_alarm_rate) + " must be in [0, 0.5]");
  }
  if (!(std::isfinite(o.false_incidents_per_day) && o.false_incidents_per_day >= 0)) {
    fail("false_incidents_per_day = " + SixDigitText(o.false_incidents_per_day) +
         " must be finite and >= 0");
  }
  if (o.false_alarm_rate == 0 && o.false_incidents_per_day == 0) {
    fail("false_alarm_rate and false_incidents_per_day are both 0: set at least one budget");
  }
  if (o.resolved_exceedances < 1) {
    fail("resolved_exceedances = " + std::to_string(o.resolved_exceedances) + " must be >= 1");
  }
  if (o.min_tail_exceedances < 3) {
    fail("min_tail_exceedances = " + std::to_string(o.min_tail_exceedances) + " must be >= 3");
  }
  if (!(o.min_tail_shape >= kMinShape && o.min_tail_shape <= 0)) {
    fail("min_tail_shape = " + SixDigitText(o.min_tail_shape) + " must be in [-0.5, 0]");
  }
  if (!(o.tail_fraction > 0 && o.tail_fraction <= 0.2)) {
    fail("tail_fraction = " + SixDigitText(o.tail_fraction) + " must be in (0, 0.2]");
  }
  if (o.reference_flags < 1) {
    fail("reference_flags = " + std::to_string(o.reference_flags) + " must be >= 1");
  }
  const IncidentTrackerOptions& d = o.debounce;
  if (d.open_window < 1 || d.open_after < 1 || d.open_after > d.open_window || d.close_after < 1) {
    fail("debounce open_after = " + std::to_string(d.open_after) + ", open_window = " +
         std::to_string(d.open_window) + ", close_after = " + std::to_string(d.close_after) +
         ": need 1 <= open_after <= open_window, close_after >= 1");
  }
}

IncidentCount CountIncidents(std::span<const double> p_values, std::span<const double> times,
                             double level, const IncidentTrackerOptions& debounce) {
  IncidentTracker tracker(debounce);
  IncidentCount count;
  for (std::size_t i = 0; i < p_values.size(); ++i) {
    const bool flagged = p_values[i] <= level;
    count.flagged += flagged;
    const double time = times.empty() ? static_cast<double>(i) : times[i];
    // The tracker only reports the decision back (peak_decision); the p-value serves as well.
    if (tracker.Update(time, flagged, p_values[i]).type == IncidentTransitionType::kOpened) {
      ++count.opened;
    }
  }
  return count;
}

double Calibration::PValue(double a) const {
  if (std::isnan(a)) return a;
  const auto& s = parts_.sorted_scores;
  const double n = static_cast<double>(s.size());
  if (parts_.has_tail && a > parts_.junction_score) {
    const double reference = parts_.tail.Survival(parts_.junction_score - parts_.tail_threshold);
    const double tail = parts_.tail.Survival(a - parts_.tail_threshold);
    return reference > 0 ? parts_.junction_p * tail / reference : 0.0;
  }
  // #{i : a_i >= a}: the scores from the first one not below a. Compared in float, the precision
  // the scores are stored in, so that a calibration score counts itself. The branch-free form of
  // lower_bound (Khuong & Morin, "Array layouts for comparison-based searching", ACM Journal of
  // Experimental Algorithmics 22, 2017): its comparisons become conditional moves, where
  // std::lower_bound's mispredicted branches made this lookup a tenth of nuwatchd's CPU (perf).
  const float key = static_cast<float>(a);
  const float* base = s.data();
  std::size_t length = s.size();  // valid(): at least 1
  while (length > 1) {
    const std::size_t half = length / 2;
    base = base[half] < key ? base + half : base;
    length -= half;
  }
  const std::size_t first = static_cast<std::size_t>(base - s.data()) + (*base < key ? 1 : 0);
  const double at_or_above = static_cast<double>(s.size() - first);
  return (1 + at_or_above) / (n + 1);
}

double Calibration::Threshold() const {
  const auto& s = parts_.sorted_scores;
  const int64_t n = static_cast<int64_t>(s.size());
  const double level = parts_.summary.level;
  if (parts_.has_tail && level < parts_.junction_p) {
    const double reference = parts_.tail.Survival(parts_.junction_score - parts_.tail_threshold);
    const double q = level * reference / parts_.junction_p;
    return parts_.tail_threshold + parts_.tail.InverseSurvival(q);
  }
  // Flagged iff at most k scores are >= a, with k = floor(level (n + 1) - 1): a above the
  // (k + 1)-th largest score.
  const int64_t k = static_cast<int64_t>(std::floor(level * static_cast<double>(n + 1) - 1 + 1e-9));
  if (k < 0) return std::numeric_limits<double>::infinity();
  if (k >= n) return -std::numeric_limits<double>::infinity();
  return static_cast<double>(s[static_cast<std::size_t>(n - k - 1)]);
}

std::string_view Calibration::Method() const {
  return parts_.has_tail ? "conformal with a generalised Pareto tail" : "conformal";
}

std::size_t Calibration::MemoryBytes() const {
  std::size_t bytes = sizeof(Calibration) + parts_.sorted_scores.capacity() * sizeof(float);
  for (const auto& w : parts_.summary.warnings) bytes += w.capacity();
  return bytes;
}

Calibration Calibration::FromParts(Parts parts) {
  const auto& s = parts.sorted_scores;
  if (s.empty()) throw PreconditionError("Calibration::FromParts: no scores");
  for (std::size_t i = 0; i < s.size(); ++i) {
    if (!std::isfinite(s[i]) || (i > 0 && s[i] < s[i - 1])) {
      throw PreconditionError("Calibration::FromParts: score " + std::to_string(i) +
                              " is not finite or not sorted");
    }
  }
  const double level = parts.summary.level;
  if (!(level > 0 && level <= 1)) {
    throw PreconditionError("Calibration::FromParts: level = " + SixDigitText(level) +
                            " is outside (0, 1]");
  }
  if (parts.has_tail) {
    const auto& t = parts.tail;
    if (!(std::isfinite(t.shape) && t.shape >= kMinShape && std::isfinite(t.scale) && t.scale > 0 &&
          std::isfinite(parts.tail_threshold) && std::isfinite(parts.junction_score) &&
          parts.junction_score >= parts.tail_threshold && parts.junction_p > 0 &&
          parts.junction_p <= 1)) {
      throw PreconditionError("Calibration::FromParts: inconsistent tail (shape " +
                              SixDigitText(t.shape) + ", scale " + SixDigitText(t.scale) +
                              ", threshold " + SixDigitText(parts.tail_threshold) + ", junction " +
                              SixDigitText(parts.junction_score) + ")");
    }
  }
  parts.summary.scores = static_cast<int64_t>(s.size());
  Calibration c;
  c.parts_ = std::move(parts);
  return c;
}

Calibration Calibration::Fit(std::span<const double> scores, std::span<const double> times,
                             const CalibrationOptions& o) {
  CheckCalibrationOptions(o, "Calibration::Fit");
  const int64_t n = static_cast<int64_t>(scores.size());
  if (n < 2) {
    throw PreconditionError("Calibration::Fit: " + std::to_string(n) + " scores, need at least 2");
  }
  if (!times.empty() && static_cast<int64_t>(times.size()) != n) {
    throw PreconditionError("Calibration::Fit: " + std::to_string(times.size()) + " times for " +
                            std::to_string(n) + " scores");
  }
  for (int64_t i = 0; i < n; ++i) {
    if (!std::isfinite(scores[i])) {
      throw PreconditionError("Calibration::Fit: score " + std::to_string(i) + " = " +
                              SixDigitText(scores[i]) + " is not finite");
    }
    if (!times.empty() && !std::isfinite(times[i])) {
      throw PreconditionError("Calibration::Fit: time " + std::to_string(i) + " = " +
                              SixDigitText(times[i]) + " is not finite");
    }
  }

  Parts parts;
  std::vector<double> sorted(scores.begin(), scores.end());
  std::sort(sorted.begin(), sorted.end());
  parts.sorted_scores.assign(sorted.begin(), sorted.end());
  // Sorting in double and storing float can leave equal neighbours, never a descent.
  CalibrationSummary& summary = parts.summary;
  summary.scores = n;
  summary.false_alarm_rate = o.false_alarm_rate;
  summary.false_incidents_per_day = o.false_incidents_per_day;
  const double resolution = 1.0 / static_cast<double>(n + 1);

  // The tail model.
  const int64_t exceedances = std::max<int64_t>(
      o.min_tail_exceedances, static_cast<int64_t>(std::ceil(o.tail_fraction * n)));
  if (n >= 5 * exceedances && o.resolved_exceedances < exceedances) {
    const double u = sorted[static_cast<std::size_t>(n - exceedances - 1)];
    std::vector<double> excess;
    for (int64_t i = n - exceedances; i < n; ++i) excess.push_back(sorted[i] - u);
    if (excess.back() > excess.front()) {
      parts.tail = FitGeneralizedPareto(excess, o.min_tail_shape);
      parts.has_tail = true;
      parts.tail_threshold = u;
      parts.junction_score =
          parts.sorted_scores[static_cast<std::size_t>(n - o.resolved_exceedances)];
      if (parts.junction_score < u) parts.junction_score = static_cast<float>(u);
    }
  }
  Calibration c;
  c.parts_ = parts;
  if (c.parts_.has_tail) {
    // The conformal p-value at the junction, computed before the tail takes over there.
    c.parts_.has_tail = false;
    c.parts_.junction_p = c.PValue(c.parts_.junction_score);
    c.parts_.has_tail = true;
  }

  // The per-vector level: the false-alarm budget, then the incident budget.
  double level = o.false_alarm_rate > 0 ? o.false_alarm_rate : 0.5;
  auto& warnings = c.parts_.summary.warnings;

  // The incident rate per flagged vector, measured whenever the data has a time span (reported
  // even without an incident budget), and the level that keeps it within the budget.
  double span = 0;
  if (!times.empty()) span = times[n - 1] - times[0];
  if (span > 0) {
    std::vector<double> p(static_cast<std::size_t>(n));
    for (int64_t i = 0; i < n; ++i) p[i] = c.PValue(scores[i]);
    CalibrationSummary& s = c.parts_.summary;
    s.span_days = span / 86400.0;
    s.vectors_per_day = static_cast<double>(n - 1) / s.span_days;
    s.reference_level = std::min(0.5, std::max(level, o.reference_flags / static_cast<double>(n)));
    const IncidentCount count = CountIncidents(p, times, s.reference_level, o.debounce);
    s.reference_flagged = count.flagged;
    s.reference_opened = count.opened;
    if (o.false_incidents_per_day > 0) {
      level = std::min(level, o.false_incidents_per_day / (OpenedPerFlag(s) * s.vectors_per_day));
      // The n scores cover n intervals of data time (the span runs from the first to the last).
      const double covered_days = s.span_days * static_cast<double>(n) / static_cast<double>(n - 1);
      if (covered_days < 1.0) {
        // Stable wording (no figures): callers log each distinct warning once per stream.
        warnings.push_back(
            "the false-incident estimate rests on less than a day of data (the window's span): "
            "it is rough; a window spanning more days makes it firmer");
      }
    }
  } else if (o.false_incidents_per_day > 0) {
    warnings.push_back(
        "false_incidents_per_day is not applied: the calibration data has no time span");
  }
  if (level < resolution) {
    if (c.parts_.has_tail) {
      c.parts_.summary.level_from_tail = true;
    } else {
      warnings.push_back(
          "the window is too short for the rate asked: fewer than 100 calibration scores resolve "
          "p-values down to 1 / (scores + 1) only, and a smaller level needs a tail model; "
          "flagging at 1 / (scores + 1) instead, so the realised rate will exceed the budget");
      level = resolution;
    }
  } else if (c.parts_.has_tail && level < c.parts_.junction_p) {
    c.parts_.summary.level_from_tail = true;
  } else if (!c.parts_.has_tail && level * static_cast<double>(n + 1) < o.resolved_exceedances) {
    warnings.push_back("the alarm level is backed by fewer than " +
                       std::to_string(o.resolved_exceedances) +
                       " calibration scores and there is no tail model (fewer than 100 scores): "
                       "the realised rate will scatter widely around it");
  }
  if (c.parts_.summary.level_from_tail) {
    const double tail_probability = static_cast<double>(exceedances) / static_cast<double>(n);
    if (level < tail_probability / 1000) {
      warnings.push_back(
          "the alarm level extrapolates the tail model more than 1000 times beyond the data it "
          "was fitted on: a longer window makes it trustworthy");
    }
  }
  c.parts_.summary.level = level;
  if (c.parts_.summary.vectors_per_day > 0) {
    c.parts_.summary.incidents_per_day =
        OpenedPerFlag(c.parts_.summary) * level * c.parts_.summary.vectors_per_day;
  }
  return c;
}

}  // namespace nuwatch
