// Calibrated alarms: turns decision values into out-of-sample p-values and chooses the level at
// which a vector is flagged from the user's false-alarm budget (methods.md, "Calibrated alarms").
//
// Nonconformity a (model.h's Score: -log of the rbf kernel sum, -f(x) otherwise): the larger, the
// stranger. The calibration scores a_1..a_n are nonconformities of normal data that the model
// scoring them was NOT fitted on (the detector gets them by cross-fitting over contiguous blocks
// of its window, see detector.h). Then
//   p(x) = (1 + #{i : a_i >= a(x)}) / (n + 1)                        (conformal p-value)
// and, when x and the calibration data are exchangeable, P(p(x) <= eps) <= eps (Vovk, Gammerman &
// Shafer 2005; Laxhammar & Falkman 2015; Bates et al., Annals of Statistics 51(1), 2023).
//
// The tail. A p-value backed by fewer than `resolved_exceedances` calibration scores is poorly
// resolved, and none below 1/(n + 1) exists. Beyond the `resolved_exceedances`-th largest score the
// p-value comes from a generalised Pareto distribution fitted by maximum likelihood to the
// excesses over a high threshold u (peaks over threshold: Pickands 1975; Balkema & de Haan 1974;
// on streams, Siffer, Fouque, Termier & Largouet, KDD 2017), scaled so that it joins the conformal
// p-value continuously: p(a) = p_J * S(a - u) / S(a_J - u) for a > a_J, where a_J is the junction
// score and S the fitted survival function. p is non-increasing in a everywhere.
//
// Incidents. Neighbouring vectors are correlated, so flagged vectors cluster and an
// "open after k of the last m" rule opens far more often than independence would predict. The
// rate of false incidents at level eps is estimated by running the rule over the calibration
// scores' own p-values in time order: at a reference level where enough vectors are flagged, the
// number of incidents opened per flagged vector r is counted (add-one smoothed, so a window in
// which no incident opens does not promise zero), and
//   incidents per day (eps) ~= r * eps * (vectors per day).
// Assumption: the share of flagged vectors that open an incident does not grow at more extreme
// levels. For processes whose extremes cluster less at higher levels (asymptotic independence,
// e.g. Gaussian autoregressions) the estimate is conservative.
//
// Thread safety: Calibration is immutable after construction; const methods are thread-safe.
#pragma once

#include <cstdint>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/incident_tracker.h"

namespace nuwatch {

// Generalised Pareto distribution with location 0: S(y) = (1 + shape y / scale)^(-1 / shape) for
// y >= 0 (and 1 + shape y / scale > 0); the exponential distribution when shape == 0.
struct GeneralizedPareto {
  double shape = 0;  // xi
  double scale = 1;  // sigma > 0
  double Survival(double y) const;
  // The y with Survival(y) == q, for q in (0, 1].
  double InverseSurvival(double q) const;
  // Sum of the log densities of the sample (-inf if a value lies outside the support).
  double LogLikelihood(std::span<const double> y) const;
};

// Maximum-likelihood fit to excesses y_i >= 0 (location fixed at 0), by Grimshaw's reduction to a
// one-dimensional search (Grimshaw, Technometrics 35(2):185-191, 1993): for theta = shape / scale
// the likelihood is maximised by shape(theta) = mean(log(1 + theta y_i)); the profile likelihood
// is searched over theta. The shape is restricted to >= -0.5, where maximum likelihood is regular
// (Smith, Biometrika 72:67-90, 1985); for shape < -1 the likelihood is unbounded. min_shape in
// [-0.5, 0] restricts it further (the maximum over shape >= min_shape).
// Requires: at least 3 values, all finite and >= 0, not all equal. Throws PreconditionError.
GeneralizedPareto FitGeneralizedPareto(std::span<const double> excesses, double min_shape = -0.5);

struct CalibrationOptions {
  // Per-vector false-alarm budget eps: flag when p <= eps. 0: not set (false_incidents_per_day
  // must be set then).
  double false_alarm_rate = 0.001;
  // Budget of false incidents per day of data time. 0: not set.
  double false_incidents_per_day = 0;
  // The debounce rule whose incident rate is estimated.
  IncidentTrackerOptions debounce;
  // A conformal p-value is used as it is while at least this many calibration scores back it.
  int resolved_exceedances = 10;
  // The tail model is fitted to the largest max(min_tail_exceedances, tail_fraction * n) scores;
  // it needs n >= 5 times that many scores, or there is no tail model.
  int min_tail_exceedances = 20;
  double tail_fraction = 0.02;
  // The tail's shape is kept >= this. 0: a light tail is extrapolated as exponential, never with a
  // finite endpoint that a few dozen excesses suggest, so the level errs on the side of fewer
  // false alarms (the rbf nonconformity, about gamma times a squared distance, has an
  // exponential-like tail for Gaussian-like data: shape 0 is its limit).
  double min_tail_shape = 0;
  // The incident rate is measured at a level with at least this many flagged calibration vectors.
  int reference_flags = 50;
};

// Throws PreconditionError "WHERE: key = value ..." for the first violation: rates finite and in
// [0, 0.5] (false_alarm_rate) or >= 0 (false_incidents_per_day), at least one of them > 0; the
// counts >= 1 (min_tail_exceedances >= 3); tail_fraction in (0, 0.2]; a valid debounce rule.
void CheckCalibrationOptions(const CalibrationOptions& options, std::string_view where);

// What Calibrate measured and decided; stored with the model.
struct CalibrationSummary {
  int64_t scores = 0;           // n
  double false_alarm_rate = 0;  // the targets as set (0: not set)
  double false_incidents_per_day = 0;
  double level = 0;              // the per-vector p-value level in force: flag when p <= level
  bool level_from_tail = false;  // the level lies beyond the conformal resolution (tail model)
  // The incident estimate (all 0 when there are no times or no incident budget).
  double span_days = 0;  // data time the calibration scores cover
  double vectors_per_day = 0;
  double reference_level = 0;  // the level at which incidents were counted
  int64_t reference_flagged = 0;
  int64_t reference_opened = 0;
  double incidents_per_day = 0;       // estimated false incidents per day at `level`
  std::vector<std::string> warnings;  // why the alarm may not mean what was set
};

class Calibration {
 public:
  Calibration() = default;  // uncalibrated: valid() is false

  // Builds the calibration from out-of-sample nonconformity scores in time order (times: the data
  // time of each, non-decreasing, or empty when unknown: no incident estimate then).
  // Requires: at least 2 finite scores; times empty or of the same size and finite; valid options
  // (CheckCalibrationOptions). Throws PreconditionError otherwise.
  // Ensures: valid(); summary().level in (0, 0.5]; warnings say when the window is too short for
  // the rate asked (the level is then the smallest the data can resolve, and the realised rate
  // will exceed the target) or when the tail is extrapolated far beyond the data.
  static Calibration Fit(std::span<const double> nonconformity, std::span<const double> times,
                         const CalibrationOptions& options);

  // Rebuilds a stored calibration (model files). Requires: sorted, finite scores; consistent tail
  // fields; level in (0, 1]. Throws PreconditionError otherwise.
  struct Parts {
    std::vector<float> sorted_scores;  // ascending
    bool has_tail = false;
    double tail_threshold = 0;  // u
    double junction_score = 0;  // a_J
    double junction_p = 0;      // p at a_J
    GeneralizedPareto tail;
    CalibrationSummary summary;
  };
  static Calibration FromParts(Parts parts);
  const Parts& parts() const { return parts_; }

  bool valid() const { return !parts_.sorted_scores.empty(); }
  const CalibrationSummary& summary() const { return parts_.summary; }
  double level() const { return parts_.summary.level; }

  // The p-value of a nonconformity score; 0 beyond the endpoint of a tail fitted with a negative
  // shape. Requires valid(); NaN in, NaN out. Allocates nothing.
  double PValue(double nonconformity) const;
  bool Flagged(double nonconformity) const { return FlaggedByPValue(PValue(nonconformity)); }
  // The same rule given the p-value already looked up (the per-vector path needs both).
  bool FlaggedByPValue(double p_value) const { return p_value <= parts_.summary.level; }
  // The nonconformity above which vectors are flagged at `level` (informational: the boundary of
  // the alarm region; +inf when nothing can be flagged).
  double Threshold() const;

  // "conformal" or "conformal with a generalised Pareto tail".
  std::string_view Method() const;
  std::size_t MemoryBytes() const;

 private:
  Parts parts_;
};

// Runs the debounce rule over flags (p_values[i] <= level) in time order and counts the incidents
// it opens. times are the vectors' data times (used as the tracker's times only).
struct IncidentCount {
  int64_t flagged = 0;
  int64_t opened = 0;
};
IncidentCount CountIncidents(std::span<const double> p_values, std::span<const double> times,
                             double level, const IncidentTrackerOptions& debounce);

}  // namespace nuwatch
