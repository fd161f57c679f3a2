// Calibration: conformal p-values, the generalised Pareto tail, the level chosen from the budgets
// and the incident-rate estimate. The distributional checks against scipy are in
// tests/reference/calibration_reference_test.cc.
#include "nuwatch/calibration.h"

#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <random>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

std::vector<double> Normal(int n, uint64_t seed) {
  std::mt19937_64 generator(seed);
  std::normal_distribution<double> normal(0.0, 1.0);
  std::vector<double> out(n);
  for (double& v : out) v = normal(generator);
  return out;
}

CalibrationOptions Rate(double false_alarm_rate) {
  CalibrationOptions o;
  o.false_alarm_rate = false_alarm_rate;
  return o;
}

// The definition p = (1 + #{a_i >= a}) / (n + 1) (Vovk, Gammerman & Shafer 2005, ch. 2; Bates et
// al. 2023, eq. (2)), worked by hand on five scores.
TEST(CalibrationTest, ConformalPValuesMatchTheDefinitionOnAWorkedExample) {
  const std::vector<double> scores = {0.3, -1.0, 2.0, 0.3, 1.0};  // nonconformity a
  const Calibration c = Calibration::Fit(scores, {}, Rate(0.4));
  ASSERT_TRUE(c.valid());
  EXPECT_FALSE(c.parts().has_tail);  // five scores are far too few for a tail model
  // a = 2.5: no score >= 2.5 -> 1/6.
  EXPECT_DOUBLE_EQ(c.PValue(2.5), 1.0 / 6);
  // a = 2.0: one score (2.0) -> 2/6.
  EXPECT_DOUBLE_EQ(c.PValue(2.0), 2.0 / 6);
  // a = 0.3: 0.3, 0.3, 1.0, 2.0 -> 5/6.
  EXPECT_NEAR(c.PValue(0.3), 5.0 / 6, 1e-7);
  // a = -5: all five -> 6/6.
  EXPECT_DOUBLE_EQ(c.PValue(-5.0), 1.0);
  // Level 0.4: flagged iff p <= 0.4, i.e. at most one score >= a: a above the 2nd largest (1.0).
  EXPECT_DOUBLE_EQ(c.Threshold(), 1.0);
  EXPECT_TRUE(c.Flagged(1.5));
  EXPECT_FALSE(c.Flagged(1.0));
  EXPECT_TRUE(std::isnan(c.PValue(std::nan(""))));
}

// The same definition counted directly, for every calibration size from 2 (the least Fit takes) to
// 64 (each length the branch-free search walks) with ties, and keys on, between, below and above
// the scores.
TEST(CalibrationTest, ConformalPValuesCountTheScoresAtOrAboveForEverySizeAndTies) {
  std::mt19937_64 generator(23);
  std::uniform_int_distribution<int> tenths(-20, 20);
  for (int n = 2; n <= 64; ++n) {
    std::vector<double> scores(n);
    for (double& a : scores) a = tenths(generator) / 10.0;  // many ties among 41 values
    const Calibration c = Calibration::Fit(scores, {}, Rate(0.5));
    ASSERT_TRUE(c.valid());
    ASSERT_FALSE(c.parts().has_tail) << "n = " << n;
    for (int k = -25; k <= 25; ++k) {
      for (const double a : {k / 10.0, k / 10.0 + 0.05}) {
        // Counted in float, as the scores are stored (the worked example above).
        const auto at_or_above = std::count_if(scores.begin(), scores.end(), [&](double s) {
          return static_cast<float>(s) >= static_cast<float>(a);
        });
        EXPECT_DOUBLE_EQ(c.PValue(a), (1.0 + at_or_above) / (n + 1))
            << "n = " << n << ", a = " << a;
      }
    }
  }
}

// A p-value must not grow as the vector gets stranger (a property of any valid p-value family
// built from a nonconformity score; common practice), including across the tail junction.
TEST(CalibrationTest, PValueIsMonotoneAndContinuousAtTheTailJunction) {
  const std::vector<double> scores = Normal(4000, 1);
  const Calibration c = Calibration::Fit(scores, {}, Rate(0.0005));
  ASSERT_TRUE(c.parts().has_tail);
  double last = 1.0;
  for (double a = -4; a <= 8; a += 0.001) {
    const double p = c.PValue(a);
    ASSERT_LE(p, last + 1e-15) << "a = " << a;
    ASSERT_GE(p, 0) << "a = " << a;  // 0 beyond a fitted negative-shape tail's endpoint
    last = p;
  }
  const double junction = c.parts().junction_score;
  EXPECT_NEAR(c.PValue(junction + 1e-9), c.PValue(junction), 1e-6);
  EXPECT_TRUE(c.summary().level_from_tail);
  // The threshold is where the p-value crosses the level.
  const double t = c.Threshold();
  EXPECT_TRUE(c.Flagged(t + 1e-6));
  EXPECT_FALSE(c.Flagged(t - 1e-6));
}

TEST(CalibrationTest, ThresholdAgreesWithFlaggedInTheConformalRegion) {
  // Scores are stored in float; float-valued inputs make the in-sample counts exact.
  std::vector<double> scores = Normal(999, 2);
  for (double& v : scores) v = static_cast<float>(v);
  // Levels backed by at least resolved_exceedances (10) scores stay conformal.
  for (double rate : {0.02, 0.05, 0.2}) {
    const Calibration c = Calibration::Fit(scores, {}, Rate(rate));
    ASSERT_FALSE(c.summary().level_from_tail) << rate;
    const double t = c.Threshold();
    int64_t flagged = 0;
    for (double s : scores) {
      EXPECT_EQ(c.Flagged(s), s > t) << "rate " << rate << " score " << s;
      flagged += c.Flagged(s);
    }
    // With n + 1 = 1000 and level = k/1000, exactly k - 1 calibration scores lie strictly above
    // the (k)-th largest: the in-sample flagged count is floor(level (n + 1)) - 1.
    EXPECT_EQ(flagged, static_cast<int64_t>(std::floor(rate * 1000 + 1e-9)) - 1) << rate;
  }
}

// Survival and inverse survival of the generalised Pareto distribution (definitions: Pickands
// 1975; the exponential limit for shape 0).
TEST(CalibrationTest, GeneralizedParetoSurvivalAndInverseAgree) {
  for (GeneralizedPareto g :
       {GeneralizedPareto{0.0, 2.0}, GeneralizedPareto{0.3, 1.5}, GeneralizedPareto{-0.4, 1.0}}) {
    for (double q : {0.9, 0.5, 0.1, 1e-3, 1e-6}) {
      EXPECT_NEAR(g.Survival(g.InverseSurvival(q)), q, 1e-12 * std::max(1.0, 1 / q))
          << g.shape << " " << q;
    }
  }
  // Worked values: exponential S(y) = exp(-y / 2); shape 0.5, scale 1: S(2) = (1 + 1)^-2 = 0.25;
  // shape -0.5, scale 1: the support ends at y = 2, S(1) = 0.5^2 = 0.25.
  EXPECT_DOUBLE_EQ(GeneralizedPareto({0.0, 2.0}).Survival(2.0), std::exp(-1.0));
  EXPECT_DOUBLE_EQ(GeneralizedPareto({0.5, 1.0}).Survival(2.0), 0.25);
  EXPECT_DOUBLE_EQ(GeneralizedPareto({-0.5, 1.0}).Survival(1.0), 0.25);
  EXPECT_EQ(GeneralizedPareto({-0.5, 1.0}).Survival(3.0), 0.0);
}

// Maximum likelihood recovers the parameters of a large sample drawn by inversion (consistency of
// the MLE for shape > -0.5: Smith 1985).
TEST(CalibrationTest, FitRecoversParametersOfALargeSample) {
  std::mt19937_64 generator(3);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  for (GeneralizedPareto truth :
       {GeneralizedPareto{0.2, 1.0}, GeneralizedPareto{-0.2, 2.0}, GeneralizedPareto{0.0, 0.5}}) {
    std::vector<double> y(20000);
    for (double& v : y) v = truth.InverseSurvival(1 - uniform(generator));
    const GeneralizedPareto fit = FitGeneralizedPareto(y);
    EXPECT_NEAR(fit.shape, truth.shape, 0.03) << truth.shape;
    EXPECT_NEAR(fit.scale / truth.scale, 1.0, 0.05) << truth.shape;
    EXPECT_GE(fit.LogLikelihood(y), truth.LogLikelihood(y) - 1e-9) << "the MLE beats the truth";
  }
}

TEST(CalibrationTest, FitRejectsBadSamples) {
  EXPECT_THROW(FitGeneralizedPareto(std::vector<double>{1.0, 2.0}), PreconditionError);
  EXPECT_THROW(FitGeneralizedPareto(std::vector<double>{1.0, 1.0, 1.0}), PreconditionError);
  EXPECT_THROW(FitGeneralizedPareto(std::vector<double>{1.0, -1.0, 2.0}), PreconditionError);
  EXPECT_THROW(FitGeneralizedPareto(std::vector<double>{1.0, NAN, 2.0}), PreconditionError);
}

TEST(CalibrationTest, RejectsBadOptionsAndInputsNamingThem) {
  const std::vector<double> scores = Normal(50, 4);
  CalibrationOptions o;
  o.false_alarm_rate = 0;
  o.false_incidents_per_day = 0;
  try {
    Calibration::Fit(scores, {}, o);
    FAIL();
  } catch (const PreconditionError& e) {
    EXPECT_NE(std::string(e.what()).find("both 0"), std::string::npos) << e.what();
  }
  EXPECT_THROW(Calibration::Fit(scores, {}, Rate(0.7)), PreconditionError);
  EXPECT_THROW(Calibration::Fit(scores, {}, Rate(NAN)), PreconditionError);
  EXPECT_THROW(Calibration::Fit(std::vector<double>{1.0}, {}, Rate(0.1)), PreconditionError);
  EXPECT_THROW(Calibration::Fit(std::vector<double>{1.0, INFINITY}, {}, Rate(0.1)),
               PreconditionError);
  EXPECT_THROW(Calibration::Fit(scores, std::vector<double>{1.0, 2.0}, Rate(0.1)),
               PreconditionError);
}

// A rate below what the window resolves: without a tail model (n < 100) the level is raised to
// 1/(n + 1) and the warning says so; no silent dead alarm.
TEST(CalibrationTest, WarnsWhenTheWindowIsTooShortForTheRate) {
  const std::vector<double> scores = Normal(60, 5);
  const Calibration c = Calibration::Fit(scores, {}, Rate(0.001));
  EXPECT_FALSE(c.parts().has_tail);
  EXPECT_DOUBLE_EQ(c.level(), 1.0 / 61);
  ASSERT_FALSE(c.summary().warnings.empty());
  EXPECT_NE(c.summary().warnings[0].find("too short"), std::string::npos);
  // With a tail model the same rate is reachable, and a far extrapolation is warned about.
  const Calibration tail = Calibration::Fit(Normal(2000, 6), {}, Rate(1e-6));
  EXPECT_TRUE(tail.summary().level_from_tail);
  EXPECT_DOUBLE_EQ(tail.level(), 1e-6);
  ASSERT_FALSE(tail.summary().warnings.empty());
  EXPECT_NE(tail.summary().warnings[0].find("extrapolates"), std::string::npos);
}

// The debounce rule run over a hand-made flag sequence: open after 2 of 3, close after 2 clean.
TEST(CalibrationTest, CountIncidentsRunsTheDebounceRule) {
  const std::vector<double> p = {0.5, 0.01, 0.5, 0.01, 0.5, 0.5, 0.01, 0.5, 0.5, 0.01, 0.01};
  IncidentTrackerOptions rule{2, 3, 2};
  const IncidentCount count = CountIncidents(p, {}, 0.05, rule);
  EXPECT_EQ(count.flagged, 5);
  // Flags at 1, 3 (2 of the last 3: opens at 3), clean 4, 5 (closes), flag 6, clean 7, 8, flags 9,
  // 10 (opens again).
  EXPECT_EQ(count.opened, 2);
}

// An AR(1) process (phi = 0.95) is strongly autocorrelated: flags cluster. The estimate counts
// incidents in time order, so the level it chooses keeps the realised incident rate on fresh data
// of the same process within the budget, where the independence formula (the binomial
// probability of k of m flags) would promise far fewer incidents than occur.
TEST(CalibrationTest, IncidentBudgetHoldsOnAutocorrelatedDataWhereIndependenceFails) {
  const double phi = 0.95, interval = 10.0;  // seconds between vectors
  std::mt19937_64 generator(7);
  std::normal_distribution<double> normal(0.0, 1.0);
  double x = 0;
  auto next = [&] { return x = phi * x + std::sqrt(1 - phi * phi) * normal(generator); };
  for (int i = 0; i < 1000; ++i) next();
  const int n = 8640 * 2;  // two days of calibration data
  std::vector<double> scores(n), times(n);
  for (int i = 0; i < n; ++i) {
    scores[i] = next();
    times[i] = i * interval;
  }
  CalibrationOptions o;
  o.false_alarm_rate = 0.01;
  o.false_incidents_per_day = 1.0;
  o.debounce = {3, 5, 10};
  const Calibration c = Calibration::Fit(scores, times, o);
  EXPECT_LT(c.level(), 0.01) << "the incident budget must bind here";
  EXPECT_LE(c.summary().incidents_per_day, 1.0 + 1e-9);

  // 200 fresh days of the same process, scored at the chosen level.
  const int fresh_days = 200;
  IncidentTracker tracker(o.debounce);
  int64_t opened = 0, flagged = 0;
  for (int64_t i = 0; i < int64_t{8640} * fresh_days; ++i) {
    const double a = next();
    const bool flag = c.Flagged(a);
    flagged += flag;
    opened += tracker.Update(static_cast<double>(i) * interval, flag, -a).type ==
              IncidentTransitionType::kOpened;
  }
  const double realised_per_day = static_cast<double>(opened) / fresh_days;
  // Measured when written: level 0.0011, estimate 1.0 per day, realised 1.1 per day.
  EXPECT_LE(realised_per_day, 1.5) << "estimate must not be optimistic";
  EXPECT_GE(realised_per_day, 0.05) << "nor absurdly conservative";
  // Under independence, P(at least 3 of 5 flagged) at level eps is about C(5,3) eps^3: the
  // incident rate it predicts is orders of magnitude below what the clustered data gives.
  const double eps = c.level();
  const double independent_per_day = 10 * eps * eps * eps * 8640;
  EXPECT_GT(realised_per_day, 20 * independent_per_day);
  EXPECT_GT(flagged, 0);
}

TEST(CalibrationTest, FromPartsRoundTripsAndValidates) {
  const Calibration c = Calibration::Fit(Normal(3000, 8), {}, Rate(0.0003));
  const Calibration back = Calibration::FromParts(c.parts());
  for (double a : {5.0, 3.0, 2.5, 1.0, 0.0, -2.0}) EXPECT_EQ(back.PValue(a), c.PValue(a));
  EXPECT_EQ(back.level(), c.level());
  Calibration::Parts bad = c.parts();
  std::swap(bad.sorted_scores[0], bad.sorted_scores[10]);
  EXPECT_THROW(Calibration::FromParts(bad), PreconditionError);
  bad = c.parts();
  bad.summary.level = 0;
  EXPECT_THROW(Calibration::FromParts(bad), PreconditionError);
  bad = c.parts();
  bad.tail.scale = -1;
  EXPECT_THROW(Calibration::FromParts(bad), PreconditionError);
}

}  // namespace
}  // namespace nuwatch
