#include "nuwatch/page_hinkley.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <cmath>
#include <cstdint>
#include <limits>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

PageHinkleyOptions Options(double delta, double lambda, int64_t min_samples,
                           DriftDirection direction) {
  PageHinkleyOptions options;
  options.delta = delta;
  options.lambda = lambda;
  options.min_samples = min_samples;
  options.direction = direction;
  return options;
}

// Returns the 1-based step of the first alarm, 0 if none.
int64_t FirstAlarm(PageHinkley& test, const std::vector<double>& xs) {
  for (std::size_t t = 0; t < xs.size(); ++t) {
    if (test.Update(xs[t])) return static_cast<int64_t>(t) + 1;
  }
  return 0;
}

// Derived by hand from the definition in Page 1954 / Gama et al. 2014 (see page_hinkley.h): the
// running mean x_bar_t includes x_t; m_t = m_{t-1} + (x_t - x_bar_t - delta); M_t = min(m_1..m_t);
// the increase statistic is m_t - M_t. delta = 0.5.
//
//   t  x   x_bar         x - x_bar - delta   m_t     M_t    m_t - M_t
//   1  2   2/1  = 2      2 - 2 - 0.5 = -0.5   -0.5   -0.5   0
//   2  0   2/2  = 1      0 - 1 - 0.5 = -1.5   -2.0   -2.0   0
//   3  1   3/3  = 1      1 - 1 - 0.5 = -0.5   -2.5   -2.5   0
//   4  1   4/4  = 1      1 - 1 - 0.5 = -0.5   -3.0   -3.0   0
//   5  6   10/5 = 2      6 - 2 - 0.5 =  3.5    0.5   -3.0   3.5
//   6  2   12/6 = 2      2 - 2 - 0.5 = -0.5    0.0   -3.0   3.0
//   7  9   21/7 = 3      9 - 3 - 0.5 =  5.5    5.5   -3.0   8.5
//   8  3   24/8 = 3      3 - 3 - 0.5 = -0.5    5.0   -3.0   8.0
//   9  12  36/9 = 4     12 - 4 - 0.5 =  7.5   12.5   -3.0  15.5
// With lambda = 5 the first step with m_t - M_t > 5 is t = 7 (t = 6 has 3.0: the statistic falls
// back between jumps, it is not a running maximum).
const std::vector<double> kIncrease = {2, 0, 1, 1, 6, 2, 9, 3, 12};
const double kIncreaseSum[] = {-0.5, -2.0, -2.5, -3.0, 0.5, 0.0, 5.5, 5.0, 12.5};
const double kIncreaseMin[] = {-0.5, -2.0, -2.5, -3.0, -3.0, -3.0, -3.0, -3.0, -3.0};

TEST(PageHinkleyTest, HandWorkedIncrease) {
  PageHinkley test(Options(0.5, 5.0, 0, DriftDirection::kUp));
  for (std::size_t t = 0; t < kIncrease.size(); ++t) {
    const bool alarm = test.Update(kIncrease[t]);
    const int step = static_cast<int>(t) + 1;
    EXPECT_NEAR(test.up_sum(), kIncreaseSum[t], 1e-12) << "t = " << step;
    EXPECT_NEAR(test.up_min(), kIncreaseMin[t], 1e-12) << "t = " << step;
    EXPECT_NEAR(test.up_statistic(), kIncreaseSum[t] - kIncreaseMin[t], 1e-12) << "t = " << step;
    // The alarm is raised from t = 7 on and stays raised (8.0 and 15.5 > 5) until Reset.
    EXPECT_EQ(alarm, step >= 7) << "t = " << step;
  }
  EXPECT_NEAR(test.mean(), 4.0, 1e-12);
  EXPECT_TRUE(test.increase_detected());
  EXPECT_FALSE(test.decrease_detected());
}

TEST(PageHinkleyTest, HandWorkedAlarmStepFollowsLambda) {
  // Same table: the first t with m_t - M_t > lambda is 5 for lambda = 3 (3.5), 7 for lambda = 5
  // (8.5) and 9 for lambda = 10 (15.5).
  const double lambdas[] = {3.0, 5.0, 10.0};
  const int64_t expected[] = {5, 7, 9};
  for (int i = 0; i < 3; ++i) {
    PageHinkley test(Options(0.5, lambdas[i], 0, DriftDirection::kUp));
    EXPECT_EQ(FirstAlarm(test, kIncrease), expected[i]) << "lambda = " << lambdas[i];
  }
}

// Derived by hand from the mirrored definition (Gama et al. 2014): u_t = u_{t-1} + (x_t - x_bar_t
// + delta), U_t = max(u_1..u_t), the decrease statistic is U_t - u_t. delta = 0.05; the values
// look like decision values that fall below the envelope.
//
//   t  x     x_bar            x - x_bar + delta      u_t     U_t    U_t - u_t
//   1  0.3   0.3/1 =  0.3      0.3 - 0.3 + 0.05 =  0.05    0.05   0.05   0
//   2  0.1   0.4/2 =  0.2      0.1 - 0.2 + 0.05 = -0.05    0.00   0.05   0.05
//   3  0.2   0.6/3 =  0.2      0.2 - 0.2 + 0.05 =  0.05    0.05   0.05   0
//   4  0.2   0.8/4 =  0.2      0.2 - 0.2 + 0.05 =  0.05    0.10   0.10   0
//   5  0.2   1.0/5 =  0.2      0.2 - 0.2 + 0.05 =  0.05    0.15   0.15   0
//   6 -0.4   0.6/6 =  0.1     -0.4 - 0.1 + 0.05 = -0.45   -0.30   0.15   0.45
//   7 -0.6   0.0/7 =  0       -0.6 - 0   + 0.05 = -0.55   -0.85   0.15   1.00
//   8 -0.4  -0.4/8 = -0.05    -0.4 + 0.05 + 0.05 = -0.30  -1.15   0.15   1.30
// With lambda = 0.6 the first step with U_t - u_t > 0.6 is t = 7. The increase side only falls
// (every x - x_bar - delta <= -0.05), so it never alarms.
const std::vector<double> kDecrease = {0.3, 0.1, 0.2, 0.2, 0.2, -0.4, -0.6, -0.4};
const double kDecreaseSum[] = {0.05, 0.0, 0.05, 0.10, 0.15, -0.30, -0.85, -1.15};
const double kDecreaseMax[] = {0.05, 0.05, 0.05, 0.10, 0.15, 0.15, 0.15, 0.15};

TEST(PageHinkleyTest, HandWorkedDecrease) {
  PageHinkley test(Options(0.05, 0.6, 0, DriftDirection::kDown));
  for (std::size_t t = 0; t < kDecrease.size(); ++t) {
    const bool alarm = test.Update(kDecrease[t]);
    const int step = static_cast<int>(t) + 1;
    EXPECT_NEAR(test.down_sum(), kDecreaseSum[t], 1e-12) << "t = " << step;
    EXPECT_NEAR(test.down_max(), kDecreaseMax[t], 1e-12) << "t = " << step;
    EXPECT_EQ(alarm, step >= 7) << "t = " << step;
  }
  EXPECT_TRUE(test.decrease_detected());
  EXPECT_FALSE(test.increase_detected());
}

TEST(PageHinkleyTest, DirectionSelectsWhichSideAlarms) {
  // The two hand-worked sequences: kIncrease only ever raises the increase side, kDecrease only
  // the decrease side (tables above; the opposite statistic stays <= 0.5 and 0 respectively).
  PageHinkley up_on_decrease(Options(0.05, 0.6, 0, DriftDirection::kUp));
  EXPECT_EQ(FirstAlarm(up_on_decrease, kDecrease), 0);
  PageHinkley both_on_decrease(Options(0.05, 0.6, 0, DriftDirection::kBoth));
  EXPECT_EQ(FirstAlarm(both_on_decrease, kDecrease), 7);
  PageHinkley down_on_increase(Options(0.5, 5.0, 0, DriftDirection::kDown));
  EXPECT_EQ(FirstAlarm(down_on_increase, kIncrease), 0);
  PageHinkley both_on_increase(Options(0.5, 5.0, 0, DriftDirection::kBoth));
  EXPECT_EQ(FirstAlarm(both_on_increase, kIncrease), 7);
}

TEST(PageHinkleyTest, MinSamplesHoldsTheAlarmBack) {
  // kIncrease with lambda = 5: the statistic exceeds 5 from t = 7 (8.5); with min_samples = 8
  // the first allowed alarm is t = 8 (8.0 > 5).
  PageHinkley test(Options(0.5, 5.0, 8, DriftDirection::kUp));
  EXPECT_EQ(FirstAlarm(test, kIncrease), 8);
}

TEST(PageHinkleyTest, ConstantStreamNeverAlarms) {
  // Property of the definition: for x_t = c the running mean is c from t = 1, every deviation is
  // 0, so m_t = -t delta is its own minimum and u_t = t delta its own maximum: both statistics 0.
  for (double delta : {0.0, 0.005, 1.0}) {
    PageHinkley test(Options(delta, 1e-9, 0, DriftDirection::kBoth));
    for (int t = 0; t < 10000; ++t) ASSERT_FALSE(test.Update(3.7)) << "t = " << t;
    EXPECT_EQ(test.up_statistic(), 0.0);
    EXPECT_EQ(test.down_statistic(), 0.0);
  }
}

// 200 values alternating +-0.1 around 0, then a step of size h around h.
std::vector<double> StepStream(double h) {
  std::vector<double> xs;
  for (int t = 0; t < 200; ++t) xs.push_back(t % 2 == 0 ? 0.1 : -0.1);
  for (int t = 0; t < 50; ++t) xs.push_back(h + (t % 2 == 0 ? 0.1 : -0.1));
  return xs;
}

TEST(PageHinkleyTest, StepUpIsDetectedAtOnce) {
  // Bound from the definition: the statistic is >= 0 and, when an increment is positive, it grows
  // by at least that increment (M_t does not move). At the first step sample x >= 0.9 and
  // x_bar <= (0.1 + 1.1) / 201 < 0.006, so the increment is >= 0.9 - 0.006 - 0.005 > 0.5 = lambda:
  // the alarm comes at step 201. Before the step the increments alternate in sign with size
  // about 0.1 (the running mean stays within 0.1 / t of 0), so the cumulative sums oscillate and
  // the statistics stay near 0.1, far below lambda: an earlier alarm would fail the check.
  PageHinkley test(Options(0.005, 0.5, 0, DriftDirection::kBoth));
  EXPECT_EQ(FirstAlarm(test, StepStream(1.0)), 201);
  EXPECT_TRUE(test.increase_detected());
}

TEST(PageHinkleyTest, StepDownIsDetectedWithinTheDerivedDelay) {
  // Mirror of the above with lambda = 5: after k step samples x_bar >= (-0.1 - 1.1 k) / (200 + k)
  // >= -0.06 for k <= 10, so each increment of the decrease side is <= -0.9 + 0.06 + 0.005
  // = -0.835, and the statistic passes 5 after at most ceil(5 / 0.835) = 6 step samples.
  PageHinkley test(Options(0.005, 5.0, 0, DriftDirection::kDown));
  const int64_t alarm = FirstAlarm(test, StepStream(-1.0));
  EXPECT_GT(alarm, 200);
  EXPECT_LE(alarm, 206);
}

TEST(PageHinkleyTest, SmallerLambdaAlarmsEarlierOnARamp) {
  // The statistic does not depend on lambda, so the first crossing can only come earlier as
  // lambda falls (published property of threshold tests; Gama et al. 2014 on the lambda
  // trade-off). On a slow ramp the crossings are distinct.
  std::vector<double> ramp;
  for (int t = 0; t < 2000; ++t) ramp.push_back(0.001 * t);
  int64_t previous = std::numeric_limits<int64_t>::max();
  for (double lambda : {8.0, 4.0, 2.0, 1.0, 0.5, 0.25}) {
    PageHinkley test(Options(0.005, lambda, 0, DriftDirection::kUp));
    const int64_t alarm = FirstAlarm(test, ramp);
    ASSERT_GT(alarm, 0) << "lambda = " << lambda;
    EXPECT_LT(alarm, previous) << "lambda = " << lambda;
    previous = alarm;
  }
}

TEST(PageHinkleyTest, ResetStartsANewTest) {
  PageHinkley test(Options(0.5, 5.0, 0, DriftDirection::kUp));
  EXPECT_EQ(FirstAlarm(test, kIncrease), 7);
  test.Reset();
  EXPECT_EQ(test.count(), 0);
  EXPECT_FALSE(test.increase_detected());
  // After Reset the same sequence gives the same table, so the same first alarm.
  EXPECT_EQ(FirstAlarm(test, kIncrease), 7);
}

TEST(PageHinkleyTest, RestoredStateContinuesTheSameTest) {
  PageHinkley original(Options(0.05, 0.6, 0, DriftDirection::kBoth));
  for (int t = 0; t < 5; ++t) original.Update(kDecrease[t]);
  PageHinkley restored(original.options());
  restored.Restore(original.state());
  for (std::size_t t = 5; t < kDecrease.size(); ++t) {
    EXPECT_EQ(restored.Update(kDecrease[t]), original.Update(kDecrease[t]));
  }
  EXPECT_NEAR(restored.down_sum(), kDecreaseSum[7], 1e-12);
  EXPECT_NEAR(restored.down_max(), kDecreaseMax[7], 1e-12);
}

TEST(PageHinkleyTest, RejectsBadOptionsAndInput) {
  try {
    PageHinkley test(Options(-0.1, 1.0, 0, DriftDirection::kUp));
    FAIL() << "negative delta accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("delta = -0.1"));
  }
  try {
    PageHinkley test(Options(0.1, 0.0, 0, DriftDirection::kUp));
    FAIL() << "lambda 0 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("lambda = 0"));
  }
  EXPECT_THROW(PageHinkley(Options(0.1, 1.0, -1, DriftDirection::kUp)), PreconditionError);
  EXPECT_THROW(PageHinkley(Options(std::nan(""), 1.0, 0, DriftDirection::kUp)), PreconditionError);
  EXPECT_THROW(PageHinkley(Options(0.1, 1.0, 0, static_cast<DriftDirection>(7))),
               PreconditionError);

  PageHinkley test(Options(0.5, 5.0, 0, DriftDirection::kUp));
  test.Update(1.0);
  EXPECT_THROW(test.Update(std::numeric_limits<double>::infinity()), PreconditionError);
  EXPECT_EQ(test.count(), 1);  // unchanged by the rejected value
  PageHinkleyState bad = test.state();
  bad.up_min = bad.up_sum + 1;
  EXPECT_THROW(test.Restore(bad), PreconditionError);
}

}  // namespace
}  // namespace nuwatch
