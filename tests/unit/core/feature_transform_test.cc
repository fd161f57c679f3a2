#include "nuwatch/feature_transform.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <algorithm>
#include <atomic>
#include <cmath>
#include <cstdint>
#include <cstdlib>
#include <limits>
#include <new>
#include <random>
#include <vector>

#include "common/random_data.h"

// Every allocation is counted (g_allocations), for the tests that a path allocates nothing.
#include "common/counting_allocator.h"

namespace nuwatch {
namespace {

using ::testing::ElementsAre;
using ::testing::ElementsAreArray;
using ::testing::HasSubstr;
using Statistic = RollingStatistic;

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

FeatureTransformOptions Options(int lags, std::vector<int> windows,
                                std::vector<Statistic> statistics = {Statistic::kMean,
                                                                     Statistic::kStd,
                                                                     Statistic::kSlope},
                                double max_gap_seconds = 0) {
  FeatureTransformOptions o;
  o.lags = lags;
  o.rolling_windows = std::move(windows);
  o.rolling_statistics = std::move(statistics);
  o.max_gap_seconds = max_gap_seconds;
  return o;
}

std::span<const double> RowOf(const MatrixD& m, int64_t i) {
  return {m.data() + i * m.cols(), static_cast<std::size_t>(m.cols())};
}

std::vector<double> ToVector(std::span<const double> s) { return {s.begin(), s.end()}; }

// Pushes every row (times 0, 1, 2, ...) and returns the outputs, one per row (empty while filling).
std::vector<std::vector<double>> PushAll(FeatureTransform& transform, const MatrixD& rows,
                                         double first_time = 0) {
  std::vector<std::vector<double>> outputs;
  std::vector<double> out(static_cast<std::size_t>(transform.output_dims()));
  for (int64_t i = 0; i < rows.rows(); ++i) {
    if (transform.Push(first_time + static_cast<double>(i), RowOf(rows, i), out)) {
      outputs.push_back(out);
    } else {
      outputs.emplace_back();
    }
  }
  return outputs;
}

// The naive reference, written independently of feature_transform.cc in long double: the
// numpy-style formulas on the explicit window x[t-w+1 .. t] of feature j.
//   mean  = np.mean(v)
//   std   = np.std(v, ddof=1)          (two passes)
//   slope = np.polyfit(np.arange(w), v, 1)[0], the ordinary least-squares slope
//           sum (i - ibar)(v_i - mean) / sum (i - ibar)^2
struct Reference {
  long double mean = 0, std = 0, slope = 0, largest_magnitude = 0;
};

Reference NaiveWindow(const MatrixD& rows, int64_t t, int w, int j) {
  Reference r;
  long double sum = 0;
  for (int i = 0; i < w; ++i) {
    const long double v = rows(t - w + 1 + i, j);
    sum += v;
    r.largest_magnitude = std::max(r.largest_magnitude, std::fabs(v));
  }
  r.mean = sum / w;
  const long double ibar = (w - 1) / 2.0L;
  long double squares = 0, cross = 0, index_squares = 0;
  for (int i = 0; i < w; ++i) {
    const long double e = rows(t - w + 1 + i, j) - r.mean;
    squares += e * e;
    cross += (i - ibar) * e;
    index_squares += (i - ibar) * (i - ibar);
  }
  r.std = std::sqrt(squares / (w - 1));
  r.slope = cross / index_squares;
  return r;
}

// ---------------------------------------------------------------------------------------------
// Names and options.

TEST(RollingStatisticTest, NamesRoundTrip) {
  for (Statistic s : {Statistic::kMean, Statistic::kStd, Statistic::kSlope}) {
    EXPECT_EQ(ParseRollingStatistic(RollingStatisticName(s)), s);
  }
  EXPECT_EQ(RollingStatisticName(Statistic::kMean), "mean");
  EXPECT_EQ(RollingStatisticName(Statistic::kStd), "std");
  EXPECT_EQ(RollingStatisticName(Statistic::kSlope), "slope");
  EXPECT_EQ(ParseRollingStatistic("variance"), std::nullopt);
  EXPECT_EQ(ParseRollingStatistic(""), std::nullopt);
}

TEST(FeatureTransformOptionsTest, EachRuleNamesTheKeyAndTheValue) {
  auto message = [](const FeatureTransformOptions& o) -> std::string {
    try {
      CheckFeatureTransformOptions(o, "config [streams.pump-01]");
    } catch (const PreconditionError& e) {
      return e.what();
    }
    return "";
  };
  EXPECT_EQ(message(Options(0, {})), "");
  EXPECT_EQ(message(Options(1000, {2, 100000})), "");
  EXPECT_THAT(message(Options(-1, {})), HasSubstr("config [streams.pump-01]: lags = -1"));
  EXPECT_THAT(message(Options(1001, {})), HasSubstr("lags = 1001 is outside [0, 1000]"));
  EXPECT_THAT(message(Options(0, {6, 1})), HasSubstr("rolling_windows[1] = 1 is outside [2, "));
  EXPECT_THAT(message(Options(0, {100001})), HasSubstr("rolling_windows[0] = 100001"));
  EXPECT_THAT(message(Options(0, {6, 12, 6})), HasSubstr("rolling_windows = 6 is listed twice"));
  EXPECT_THAT(message(Options(0, {6}, {})), HasSubstr("rolling_statistics is empty"));
  EXPECT_EQ(message(Options(2, {}, {})), "");  // statistics do not matter without windows
  EXPECT_THAT(message(Options(0, {6}, {Statistic::kStd, Statistic::kMean, Statistic::kStd})),
              HasSubstr("rolling_statistics = \"std\" is listed twice"));
  EXPECT_THAT(message(Options(0, {6}, {static_cast<Statistic>(7)})),
              HasSubstr("rolling_statistics[0] = 7 is not a statistic"));
  EXPECT_THAT(message(Options(0, {}, {}, -1)), HasSubstr("max_gap_seconds = -1 must be finite"));
  EXPECT_THAT(message(Options(0, {}, {}, kNaN)), HasSubstr("max_gap_seconds = nan"));
  EXPECT_THAT(message(Options(0, {}, {}, std::numeric_limits<double>::infinity())),
              HasSubstr("max_gap_seconds = inf"));

  EXPECT_THROW(FeatureTransform(Options(-1, {}), 2), PreconditionError);
  try {
    FeatureTransform(Options(1, {}), 0);
    ADD_FAILURE() << "base_dims = 0 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("base_dims = 0"));
  }
  EXPECT_TRUE(Options(0, {}).identity());
  EXPECT_FALSE(Options(1, {}).identity());
  EXPECT_FALSE(Options(0, {2}).identity());
}

TEST(FeatureTransformTest, DimensionsAndHistoryNeeded) {
  // history_needed = max(lags, largest window - 1): a window of w holds the current vector and
  // w - 1 before it; L lags reach L vectors back.
  FeatureTransform a(Options(3, {2, 6}), 4);
  EXPECT_EQ(a.history_needed(), 5);
  EXPECT_EQ(a.output_dims(), 4 * (1 + 3 + 2 * 3));
  FeatureTransform b(Options(7, {6}, {Statistic::kSlope}), 2);
  EXPECT_EQ(b.history_needed(), 7);
  EXPECT_EQ(b.output_dims(), 2 * (1 + 7 + 1));
  FeatureTransform c(Options(0, {}, {}), 3);
  EXPECT_EQ(c.history_needed(), 0);
  EXPECT_EQ(c.output_dims(), 3);
  EXPECT_GE(a.MemoryBytes(), 6 * 4 * sizeof(double));  // the history buffer at least
  EXPECT_GT(FeatureTransform(Options(200, {}), 4).MemoryBytes(), a.MemoryBytes());
}

// ---------------------------------------------------------------------------------------------
// The transform itself.

TEST(FeatureTransformTest, IdentityOptionsPassTheVectorThrough) {
  FeatureTransform transform(FeatureTransformOptions{}, 3);
  EXPECT_EQ(transform.history_needed(), 0);
  EXPECT_TRUE(transform.ready());
  const MatrixD rows = testing_data::RandomGaussian(20, 3, 1);
  std::vector<double> out(3);
  for (int64_t i = 0; i < rows.rows(); ++i) {
    // Times going back do not matter: there is no history to protect.
    ASSERT_TRUE(transform.Push(static_cast<double>(-i), RowOf(rows, i), out));
    EXPECT_EQ(out, ToVector(RowOf(rows, i)));
  }
  for (const auto& source : transform.column_sources()) EXPECT_EQ(source.transform, "");
  std::vector<int64_t> mapping;
  const MatrixD all = transform.TransformAll(rows, {}, &mapping);
  EXPECT_EQ(all, rows);
  for (int64_t i = 0; i < rows.rows(); ++i) EXPECT_EQ(mapping[static_cast<std::size_t>(i)], i);
}

TEST(FeatureTransformTest, LagsStackPreviousVectorsAsInDynamicPca) {
  // Ku, Storer & Georgakis (1995), eq. for the augmented data matrix: row t is
  // [x_t^T  x_{t-1}^T ... x_{t-L}^T], starting at t = L. Here L = 2, d = 2, written out by hand.
  MatrixD rows(5, 2);
  rows << 1, 10,  //
      2, 20,      //
      3, 30,      //
      4, 40,      //
      5, 50;
  MatrixD expected(3, 6);
  expected << 3, 30, 2, 20, 1, 10,  //
      4, 40, 3, 30, 2, 20,          //
      5, 50, 4, 40, 3, 30;
  FeatureTransform transform(Options(2, {}), 2);
  std::vector<int64_t> mapping;
  EXPECT_EQ(transform.TransformAll(rows, {}, &mapping), expected);
  EXPECT_THAT(mapping, ElementsAre(-1, -1, 0, 1, 2));

  std::vector<double> out(6, -7.0);
  EXPECT_FALSE(transform.Push(0, RowOf(rows, 0), out));
  EXPECT_EQ(transform.history_size(), 1);
  EXPECT_FALSE(transform.Push(1, RowOf(rows, 1), out));
  EXPECT_THAT(out, ElementsAre(-7, -7, -7, -7, -7, -7));  // untouched while filling
  EXPECT_TRUE(transform.ready());
  EXPECT_TRUE(transform.Push(2, RowOf(rows, 2), out));
  EXPECT_EQ(out, ToVector(RowOf(expected, 0)));

  // A larger random case against the same definition, built by index arithmetic.
  const MatrixD big = testing_data::RandomGaussian(60, 3, 2);
  FeatureTransform five(Options(5, {}), 3);
  const MatrixD stacked = five.TransformAll(big, {}, nullptr);
  ASSERT_EQ(stacked.rows(), 55);
  for (int64_t t = 5; t < 60; ++t) {
    for (int lag = 0; lag <= 5; ++lag) {
      for (int j = 0; j < 3; ++j) EXPECT_EQ(stacked(t - 5, lag * 3 + j), big(t - lag, j));
    }
  }
}

TEST(FeatureTransformTest, RollingStatisticsMatchTheNaiveFormulas) {
  // Reference: NaiveWindow above (numpy's mean, std with ddof=1, polyfit slope), in long double.
  const int d = 3;
  MatrixD rows = testing_data::RandomGaussian(400, d, 3);
  for (int64_t i = 0; i < rows.rows(); ++i) {
    rows(i, 1) = 250.0 + 0.01 * i + rows(i, 1);  // an offset and a trend
    rows(i, 2) *= 1e-3;
  }
  const std::vector<int> windows = {7, 2, 30};
  const std::vector<Statistic> statistics = {Statistic::kSlope, Statistic::kMean, Statistic::kStd};
  FeatureTransform transform(Options(1, windows, statistics), d);
  ASSERT_EQ(transform.history_needed(), 29);
  const auto outputs = PushAll(transform, rows);
  for (int64_t t = 0; t < rows.rows(); ++t) {
    const auto& out = outputs[static_cast<std::size_t>(t)];
    ASSERT_EQ(out.empty(), t < 29) << t;
    if (out.empty()) continue;
    int column = 2 * d;  // after the current vector and lag 1
    for (int w : windows) {
      for (Statistic s : statistics) {
        for (int j = 0; j < d; ++j, ++column) {
          const Reference r = NaiveWindow(rows, t, w, j);
          const double got = out[static_cast<std::size_t>(column)];
          const double tolerance = 1e-13 * static_cast<double>(r.largest_magnitude);
          switch (s) {
            case Statistic::kMean:
              EXPECT_NEAR(got, static_cast<double>(r.mean), tolerance) << t << " w " << w;
              break;
            case Statistic::kStd:
              EXPECT_NEAR(got, static_cast<double>(r.std), tolerance) << t << " w " << w;
              break;
            case Statistic::kSlope:
              EXPECT_NEAR(got, static_cast<double>(r.slope), tolerance) << t << " w " << w;
              break;
          }
        }
      }
    }
  }
}

TEST(FeatureTransformTest, SampleStdAndSlopeOfATextbookExample) {
  // The data set {2, 4, 4, 4, 5, 5, 7, 9}, the usual worked example for the standard deviation
  // (its population standard deviation is 2). By hand: mean 5, squared deviations
  // 9+1+1+1+0+0+4+16 = 32, sample variance 32/7; slope against i = 0..7 (ibar = 3.5):
  // sum (i - ibar)(x_i - 5) = 10.5+2.5+1.5+0.5+0+0+5+14 = 34 over sum (i - ibar)^2 = 42: 17/21.
  const std::vector<double> values = {2, 4, 4, 4, 5, 5, 7, 9};
  FeatureTransform transform(Options(0, {8}), 1);
  std::vector<double> out(4);
  for (std::size_t i = 0; i < values.size(); ++i) {
    EXPECT_EQ(transform.Push(static_cast<double>(i), std::span(&values[i], 1), out),
              i + 1 == values.size());
  }
  EXPECT_EQ(out[0], 9);
  EXPECT_NEAR(out[1], 5.0, 1e-15);
  EXPECT_NEAR(out[2], std::sqrt(32.0 / 7.0), 1e-15);
  EXPECT_NEAR(out[3], 17.0 / 21.0, 1e-15);
}

TEST(FeatureTransformTest, RollingStdOfThePandasDocumentationExample) {
  // pandas' Rolling.std docstring (pandas 1.0): pd.Series([5, 5, 6, 7, 5, 5, 5]).rolling(3).std()
  // is NaN, NaN, 0.577350, 1.000000, 1.000000, 1.154701, 0.000000 (ddof = 1). By hand the
  // non-trivial ones are sqrt(1/3) and sqrt(4/3).
  const std::vector<double> values = {5, 5, 6, 7, 5, 5, 5};
  MatrixD rows(7, 1);
  for (int i = 0; i < 7; ++i) rows(i, 0) = values[static_cast<std::size_t>(i)];
  FeatureTransform transform(Options(0, {3}, {Statistic::kStd}), 1);
  std::vector<int64_t> mapping;
  const MatrixD all = transform.TransformAll(rows, {}, &mapping);
  EXPECT_THAT(mapping, ElementsAre(-1, -1, 0, 1, 2, 3, 4));
  const double published[5] = {0.577350, 1.000000, 1.000000, 1.154701, 0.000000};
  for (int i = 0; i < 5; ++i) EXPECT_NEAR(all(i, 1), published[i], 5e-7) << i;
  EXPECT_NEAR(all(0, 1), std::sqrt(1.0 / 3.0), 1e-15);
  EXPECT_NEAR(all(3, 1), std::sqrt(4.0 / 3.0), 1e-15);
  EXPECT_EQ(all(4, 1), 0.0);  // 5, 5, 5: every value and the mean are exact
}

TEST(FeatureTransformTest, ExactLineAndConstant) {
  // On x_t = a + b t: the slope is b (the least-squares fit of a line is the line), the window
  // mean is the value at the window's centre, and the sample std of w equally spaced values is
  // |b| sqrt(w (w + 1) / 12) (the sample variance of 0..w-1 is w (w + 1) / 12). A constant has std
  // 0 and slope 0. Feature 1 is the constant 0.1, which is not exact in binary.
  const double a = 1e4, b = -0.25;
  for (int w : {2, 5, 24}) {
    FeatureTransform transform(Options(0, {w}), 2);
    std::vector<double> out(static_cast<std::size_t>(transform.output_dims()));
    for (int t = 0; t < 200; ++t) {
      const double x[2] = {a + b * t, 0.1};
      if (!transform.Push(t, x, out)) continue;
      EXPECT_NEAR(out[2], a + b * (t - 0.5 * (w - 1)), 1e-12 * a) << "w " << w << " t " << t;
      EXPECT_NEAR(out[4], std::fabs(b) * std::sqrt(w * (w + 1) / 12.0), 1e-9) << w << " " << t;
      EXPECT_NEAR(out[6], b, 1e-10) << "w " << w << " t " << t;
      EXPECT_NEAR(out[3], 0.1, 1e-16);
      EXPECT_LE(out[5], 1e-16);  // std of a constant
      EXPECT_NEAR(out[7], 0.0, 1e-16);
    }
  }
}

TEST(FeatureTransformTest, TransformAllEqualsRepeatedPush) {
  const MatrixD rows = testing_data::RandomGaussian(300, 2, 4);
  std::vector<double> times(300);
  for (int i = 0; i < 300; ++i) times[static_cast<std::size_t>(i)] = 10.0 * i;
  times[120] = times[119] + 500;  // a gap of 500 s > 60: resets
  for (int i = 121; i < 300; ++i) times[static_cast<std::size_t>(i)] += 500 - 10;
  times[200] = times[199] - 1;  // time goes back: resets
  for (int i = 201; i < 300; ++i) times[static_cast<std::size_t>(i)] -= 11;
  const FeatureTransformOptions options = Options(2, {4, 9}, {Statistic::kStd}, 60);
  FeatureTransform batch(options, 2);
  std::vector<int64_t> mapping;
  const MatrixD all = batch.TransformAll(rows, times, &mapping);

  FeatureTransform stream(options, 2);
  std::vector<double> out(static_cast<std::size_t>(stream.output_dims()));
  int64_t produced = 0;
  for (int64_t i = 0; i < rows.rows(); ++i) {
    const bool wrote = stream.Push(times[static_cast<std::size_t>(i)], RowOf(rows, i), out);
    if (wrote) {
      ASSERT_EQ(mapping[static_cast<std::size_t>(i)], produced);
      EXPECT_EQ(out, ToVector(RowOf(all, produced))) << i;  // bit for bit
      ++produced;
    } else {
      EXPECT_EQ(mapping[static_cast<std::size_t>(i)], -1);
    }
  }
  EXPECT_EQ(all.rows(), produced);
  // history_needed = 8: the first 8 rows of each of the three spans fill the history.
  EXPECT_EQ(produced, 300 - 3 * 8);
  EXPECT_EQ(stream.gap_resets(), 1);
  EXPECT_EQ(stream.time_went_back_resets(), 1);
  EXPECT_EQ(batch.gap_resets(), 0);  // TransformAll leaves the object alone

  EXPECT_THROW(batch.TransformAll(rows, std::span(times).first(10), nullptr), PreconditionError);
  MatrixD bad = rows;
  bad(17, 1) = kNaN;
  try {
    batch.TransformAll(bad, times, nullptr);
    ADD_FAILURE() << "NaN accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("row 17"));
    EXPECT_THAT(e.what(), HasSubstr("value 1 = nan"));
  }
  EXPECT_EQ(batch.TransformAll(MatrixD(0, 0), {}, &mapping).rows(), 0);
  EXPECT_TRUE(mapping.empty());
}

TEST(FeatureTransformTest, OutputRowOfInputMapsAroundAGap) {
  // lags 2: rows 0-1 fill, rows 2-4 give outputs 0-2; the step 4 -> 100 (> 10 s) resets, rows 5-6
  // fill again, rows 7-8 give outputs 3-4. A step of exactly max_gap_seconds does not reset.
  const std::vector<double> times = {0, 1, 2, 3, 4, 100, 101, 111, 112};
  MatrixD rows(9, 1);
  for (int i = 0; i < 9; ++i) rows(i, 0) = i;
  FeatureTransform transform(Options(2, {}, {}, 10), 1);
  std::vector<int64_t> mapping;
  const MatrixD all = transform.TransformAll(rows, times, &mapping);
  EXPECT_THAT(mapping, ElementsAre(-1, -1, 0, 1, 2, -1, -1, 3, 4));
  ASSERT_EQ(all.rows(), 5);
  EXPECT_THAT(ToVector(RowOf(all, 3)), ElementsAre(7, 6, 5));
}

TEST(FeatureTransformTest, GapAndTimeGoingBackResetAndTheHistoryRefills) {
  const FeatureTransformOptions options = Options(1, {3}, {Statistic::kMean}, 30);
  FeatureTransform transform(options, 2);
  ASSERT_EQ(transform.history_needed(), 2);
  const MatrixD rows = testing_data::RandomGaussian(40, 2, 5);
  std::vector<double> out(static_cast<std::size_t>(transform.output_dims()));
  double t = 0;
  int i = 0;
  auto push = [&](double time) { return transform.Push(time, RowOf(rows, i++), out); };
  EXPECT_FALSE(push(t));
  EXPECT_FALSE(push(t += 10));
  EXPECT_TRUE(push(t += 30));  // exactly max_gap_seconds: no reset
  EXPECT_EQ(transform.last_push_reset(), HistoryReset::kNone);
  EXPECT_TRUE(push(t));  // equal times are fine
  EXPECT_EQ(transform.last_push_reset(), HistoryReset::kNone);

  EXPECT_FALSE(push(t += 30.5));  // a gap: reset, this vector starts the new history
  EXPECT_EQ(transform.last_push_reset(), HistoryReset::kGap);
  EXPECT_EQ(transform.gap_resets(), 1);
  EXPECT_EQ(transform.history_size(), 1);
  EXPECT_FALSE(push(t += 1));
  EXPECT_EQ(transform.last_push_reset(), HistoryReset::kNone);
  EXPECT_TRUE(push(t += 1));
  // After the refill the output is that of a fresh transform fed only the rows after the gap.
  {
    FeatureTransform fresh(options, 2);
    std::vector<double> expected(out.size());
    fresh.Push(0, RowOf(rows, 4), expected);
    fresh.Push(0, RowOf(rows, 5), expected);
    ASSERT_TRUE(fresh.Push(0, RowOf(rows, 6), expected));
    EXPECT_EQ(out, expected);
  }

  EXPECT_FALSE(push(t - 0.001));  // time went back
  EXPECT_EQ(transform.last_push_reset(), HistoryReset::kTimeWentBack);
  EXPECT_EQ(transform.time_went_back_resets(), 1);
  EXPECT_EQ(transform.gap_resets(), 1);

  // Without max_gap_seconds a gap never resets, but time going back still does.
  FeatureTransform no_gap(Options(1, {}, {}, 0), 2);
  std::vector<double> lagged(4);
  no_gap.Push(0, RowOf(rows, 0), lagged);
  EXPECT_TRUE(no_gap.Push(1e9, RowOf(rows, 1), lagged));
  EXPECT_FALSE(no_gap.Push(5, RowOf(rows, 2), lagged));
  EXPECT_EQ(no_gap.last_push_reset(), HistoryReset::kTimeWentBack);

  // Reset by hand: the history refills, the counters stay.
  transform.Reset();
  EXPECT_EQ(transform.history_size(), 0);
  EXPECT_EQ(transform.last_push_reset(), HistoryReset::kNone);
  EXPECT_EQ(transform.gap_resets(), 1);
  i = 10;
  EXPECT_FALSE(push(t));
  EXPECT_FALSE(push(t));
  EXPECT_TRUE(push(t));
}

TEST(FeatureTransformTest, BadPushIsRejectedAndChangesNothing) {
  const FeatureTransformOptions options = Options(1, {4});
  FeatureTransform transform(options, 2);
  FeatureTransform untouched(options, 2);
  const MatrixD rows = testing_data::RandomGaussian(30, 2, 6);
  std::vector<double> out(static_cast<std::size_t>(transform.output_dims()));
  std::vector<double> expected(out.size());
  for (int i = 0; i < 10; ++i) {
    transform.Push(i, RowOf(rows, i), out);
    untouched.Push(i, RowOf(rows, i), expected);
  }
  auto message = [&](double time, std::span<const double> x, std::span<double> o) -> std::string {
    try {
      transform.Push(time, x, o);
    } catch (const PreconditionError& e) {
      return e.what();
    }
    return "";
  };
  const double nan_row[2] = {1.0, kNaN};
  const double short_row[1] = {1.0};
  EXPECT_THAT(message(10, nan_row, out), HasSubstr("value 1 = nan is not finite"));
  EXPECT_THAT(message(kNaN, RowOf(rows, 10), out), HasSubstr("time = nan is not finite"));
  EXPECT_THAT(message(10, short_row, out), HasSubstr("1 values, base_dims = 2"));
  EXPECT_THAT(message(10, RowOf(rows, 10), std::span(out).first(3)),
              HasSubstr("out has 3 values, output_dims = " + std::to_string(out.size())));
  EXPECT_THAT(message(-1e300, nan_row, out), HasSubstr("nan"));  // no reset before the check
  EXPECT_EQ(transform.time_went_back_resets(), 0);
  for (int i = 10; i < 30; ++i) {
    transform.Push(i, RowOf(rows, i), out);
    untouched.Push(i, RowOf(rows, i), expected);
    EXPECT_EQ(out, expected);
  }
}

// ---------------------------------------------------------------------------------------------
// State.

TEST(FeatureTransformStateTest, ExportImportContinuesBitForBit) {
  const FeatureTransformOptions options =
      Options(2, {5, 50, 3}, {Statistic::kStd, Statistic::kSlope, Statistic::kMean});
  MatrixD rows = testing_data::RandomGaussian(3000, 3, 7);
  rows.col(0).array() += 1e5;
  rows(700, 1) = 1e7;  // an outlier: its exit triggers an exact recomputation
  for (int64_t cut : {1, 30, 49, 50, 51, 333, 1234}) {
    FeatureTransform original(options, 3);
    std::vector<double> a(static_cast<std::size_t>(original.output_dims()));
    std::vector<double> b(a.size());
    for (int64_t i = 0; i < cut; ++i) original.Push(i, RowOf(rows, i), a);
    const FeatureTransformState state = original.ExportState();
    EXPECT_EQ(state.history.rows(), std::min<int64_t>(cut, 49));
    EXPECT_EQ(state.running.empty(), cut < 50);  // only once the statistics exist

    FeatureTransform copy(options, 3);
    copy.ImportState(state);
    EXPECT_EQ(copy.ExportState(), state);
    EXPECT_EQ(copy.history_size(), original.history_size());
    for (int64_t i = cut; i < 3000; ++i) {
      const bool wrote_a = original.Push(i, RowOf(rows, i), a);
      const bool wrote_b = copy.Push(i, RowOf(rows, i), b);
      ASSERT_EQ(wrote_a, wrote_b) << "cut " << cut << " row " << i;
      if (wrote_a) {
        ASSERT_EQ(a, b) << "cut " << cut << " row " << i;
      }
    }
  }
}

TEST(FeatureTransformStateTest, WithoutTheRunningBlockTheStatisticsAreRecomputed) {
  // A state written without the running statistics (or for other windows) still resumes: the
  // statistics are recomputed exactly from the history, equal to rounding.
  const FeatureTransformOptions options = Options(0, {20, 6});
  MatrixD rows = testing_data::RandomGaussian(600, 2, 8);
  rows.col(1).array() += 300;
  FeatureTransform original(options, 2);
  std::vector<double> a(static_cast<std::size_t>(original.output_dims()));
  std::vector<double> b(a.size());
  for (int i = 0; i < 200; ++i) original.Push(i, RowOf(rows, i), a);
  FeatureTransformState state = original.ExportState();
  for (int variant = 0; variant < 2; ++variant) {
    FeatureTransformState partial = state;
    if (variant == 0) {
      partial.running.clear();
      partial.running_windows.clear();
    } else {
      partial.running_windows = {20, 7};  // another configuration's block: ignored
    }
    FeatureTransform copy(options, 2);
    copy.ImportState(partial);
    FeatureTransform reference = FeatureTransform(options, 2);
    reference.ImportState(state);
    for (int i = 200; i < 600; ++i) {
      ASSERT_TRUE(reference.Push(i, RowOf(rows, i), a));
      ASSERT_TRUE(copy.Push(i, RowOf(rows, i), b));
      for (std::size_t c = 0; c < a.size(); ++c) EXPECT_NEAR(a[c], b[c], 1e-12 * 300) << i;
    }
  }
}

TEST(FeatureTransformStateTest, ImportKeepsWhatPushingWouldKeep) {
  const MatrixD rows = testing_data::RandomGaussian(12, 1, 9);
  std::vector<double> times(12);
  for (int i = 0; i < 12; ++i) times[static_cast<std::size_t>(i)] = i;
  times[9] = 100;  // a gap before row 9 (and after it, rows 10 and 11 follow at 101, 102)
  times[10] = 101;
  times[11] = 102;
  // A state with more rows than this transform needs (say lags were lowered from 11 to 2): the
  // newest two are kept.
  FeatureTransformState state;
  state.history = rows;
  state.times = times;
  FeatureTransform lags(Options(2, {}), 1);
  lags.ImportState(state);
  const FeatureTransformState kept = lags.ExportState();
  ASSERT_EQ(kept.history.rows(), 2);
  EXPECT_EQ(kept.history(0, 0), rows(10, 0));
  EXPECT_EQ(kept.history(1, 0), rows(11, 0));
  // With a gap limit the rows before the last gap go, as pushing them would drop them.
  FeatureTransform gapped(Options(5, {}, {}, 50), 1);
  gapped.ImportState(state);
  EXPECT_EQ(gapped.history_size(), 3);
  EXPECT_EQ(gapped.ExportState().times, (std::vector<double>{100, 101, 102}));
  // The identity keeps nothing.
  FeatureTransform identity(FeatureTransformOptions{}, 1);
  identity.ImportState(state);
  EXPECT_EQ(identity.ExportState().history.rows(), 0);
}

TEST(FeatureTransformStateTest, ImportRejectsABadStateByNameAndChangesNothing) {
  const FeatureTransformOptions options = Options(1, {4});
  FeatureTransform source(options, 2);
  const MatrixD rows = testing_data::RandomGaussian(20, 2, 10);
  std::vector<double> out(static_cast<std::size_t>(source.output_dims()));
  for (int i = 0; i < 10; ++i) source.Push(i, RowOf(rows, i), out);
  const FeatureTransformState good = source.ExportState();
  ASSERT_EQ(good.history.rows(), 3);
  ASSERT_EQ(good.running.size(), 4u * 2);

  FeatureTransform target(options, 2);
  target.ImportState(good);
  auto message = [&](const FeatureTransformState& bad) -> std::string {
    try {
      target.ImportState(bad);
    } catch (const PreconditionError& e) {
      return e.what();
    }
    return "";
  };
  FeatureTransformState bad = good;
  bad.history = MatrixD::Zero(3, 3);
  EXPECT_THAT(message(bad), HasSubstr("history has 3 columns, base_dims = 2"));
  bad = good;
  bad.times.pop_back();
  EXPECT_THAT(message(bad), HasSubstr("times has 2 entries, history has 3 rows"));
  bad = good;
  bad.history(1, 0) = kNaN;
  EXPECT_THAT(message(bad), HasSubstr("history(1, 0) = nan is not finite"));
  bad = good;
  bad.times[2] = bad.times[1] - 1;
  EXPECT_THAT(message(bad), HasSubstr("times[2] = 7 is earlier than times[1] = 8"));
  bad = good;
  bad.running.push_back(0);
  EXPECT_THAT(message(bad), HasSubstr("running has 9 values, 8 expected"));
  bad = good;
  bad.running[3] = -1;  // a sum of squares
  EXPECT_THAT(message(bad), HasSubstr("running sum of squares -1 (window 4, feature 1)"));
  bad = good;
  bad.running[0] = std::numeric_limits<double>::infinity();
  EXPECT_THAT(message(bad), HasSubstr("running holds a value that is not finite"));
  bad = good;
  bad.running_outputs = -3;
  EXPECT_THAT(message(bad), HasSubstr("running_outputs = -3"));
  EXPECT_EQ(target.ExportState(), good);  // every failed import left it alone
}

// ---------------------------------------------------------------------------------------------
// Names.

TEST(FeatureTransformTest, NamesAndColumnSources) {
  FeatureTransform transform(Options(1, {6, 3}, {Statistic::kMean, Statistic::kSlope}), 2);
  EXPECT_THAT(transform.OutputNames({"flow_m3h", "current_a"}),
              ElementsAre("flow_m3h", "current_a", "flow_m3h, lag 1", "current_a, lag 1",
                          "flow_m3h, mean of 6", "current_a, mean of 6", "flow_m3h, slope of 6",
                          "current_a, slope of 6", "flow_m3h, mean of 3", "current_a, mean of 3",
                          "flow_m3h, slope of 3", "current_a, slope of 3"));
  EXPECT_THAT(transform.OutputNames({}),
              ElementsAre("x0", "x1", "x0, lag 1", "x1, lag 1", "x0, mean of 6", "x1, mean of 6",
                          "x0, slope of 6", "x1, slope of 6", "x0, mean of 3", "x1, mean of 3",
                          "x0, slope of 3", "x1, slope of 3"));
  using Source = FeatureTransform::ColumnSource;
  EXPECT_THAT(transform.column_sources(), ElementsAreArray(std::vector<Source>{{0, ""},
                                                                               {1, ""},
                                                                               {0, "lag 1"},
                                                                               {1, "lag 1"},
                                                                               {0, "mean of 6"},
                                                                               {1, "mean of 6"},
                                                                               {0, "slope of 6"},
                                                                               {1, "slope of 6"},
                                                                               {0, "mean of 3"},
                                                                               {1, "mean of 3"},
                                                                               {0, "slope of 3"},
                                                                               {1, "slope of 3"}}));
  EXPECT_THROW(transform.OutputNames({"only_one"}), PreconditionError);
  EXPECT_THAT(FeatureTransform(Options(0, {12}, {Statistic::kStd}), 1).OutputNames({"vib"}),
              ElementsAre("vib", "vib, std of 12"));
}

// ---------------------------------------------------------------------------------------------
// Numerics of the running updates.

TEST(FeatureTransformNumericsTest, MillionPushesStayWithRoundingOfTheNaiveRecomputation) {
  // Data made to hurt running sums: a large offset (1e6) under small noise (0.01) with a slow
  // swing, outliers of 1e9 whose exit from the window cancels almost the whole sum of squares, and
  // a feature that sticks at a constant for long stretches. Reference: NaiveWindow (long double,
  // two passes) at a sample of pushes and on every push around each outlier's exit.
  const int d = 2;
  const std::vector<int> windows = {2, 64, 1000};
  const int64_t pushes = 1000000;
  const int64_t outlier_every = 100003;
  MatrixD rows(pushes, d);
  std::mt19937_64 rng(11);
  std::normal_distribution<double> noise(0.0, 0.01);
  for (int64_t t = 0; t < pushes; ++t) {
    rows(t, 0) = 1e6 + 1e3 * std::sin(t / 5000.0) + noise(rng);
    if (t % outlier_every == outlier_every / 2) rows(t, 0) = 1e9;
    rows(t, 1) = (t / 20000) % 2 == 0 ? 42.125 + noise(rng) : 17.3;  // stuck half of the time
  }
  FeatureTransform transform(Options(0, windows), d);
  std::vector<double> out(static_cast<std::size_t>(transform.output_dims()));
  double worst_mean = 0, worst_std = 0, worst_slope = 0;  // in units of the tolerance
  int64_t checked = 0;
  for (int64_t t = 0; t < pushes; ++t) {
    if (!transform.Push(static_cast<double>(t), RowOf(rows, t), out)) continue;
    const int64_t since_outlier = (t - outlier_every / 2) % outlier_every;
    const bool near_exit = since_outlier >= 0 && since_outlier < 1100;
    if (!(near_exit || t % 997 == 0 || t >= pushes - 2000)) continue;
    ++checked;
    for (std::size_t k = 0; k < windows.size(); ++k) {
      const int w = windows[k];
      for (int j = 0; j < d; ++j) {
        const Reference r = NaiveWindow(rows, t, w, j);
        const std::size_t base = static_cast<std::size_t>(d + 3 * d * static_cast<int>(k) + j);
        // Tolerances: 1e-12 of the largest value in the window for the mean; for std and slope
        // 1e-9 of the value itself plus 1e-13 of the largest value (the data's own resolution).
        const double scale = static_cast<double>(r.largest_magnitude);
        const double mean_error = std::fabs(out[base] - static_cast<double>(r.mean));
        const double std_error = std::fabs(out[base + d] - static_cast<double>(r.std));
        const double slope_error = std::fabs(out[base + 2 * d] - static_cast<double>(r.slope));
        const double mean_tolerance = 1e-12 * scale;
        const double std_tolerance = 1e-9 * static_cast<double>(r.std) + 1e-13 * scale;
        const double slope_tolerance =
            1e-9 * std::fabs(static_cast<double>(r.slope)) + 1e-13 * scale / w;
        worst_mean = std::max(worst_mean, mean_error / mean_tolerance);
        worst_std = std::max(worst_std, std_error / std_tolerance);
        worst_slope = std::max(worst_slope, slope_error / slope_tolerance);
        ASSERT_LE(mean_error, mean_tolerance) << "t " << t << " w " << w << " j " << j;
        ASSERT_LE(std_error, std_tolerance) << "t " << t << " w " << w << " j " << j;
        ASSERT_LE(slope_error, slope_tolerance) << "t " << t << " w " << w << " j " << j;
      }
    }
  }
  EXPECT_GT(checked, 10000);
  RecordProperty("worst_mean_error_over_tolerance", std::to_string(worst_mean));
  RecordProperty("worst_std_error_over_tolerance", std::to_string(worst_std));
  RecordProperty("worst_slope_error_over_tolerance", std::to_string(worst_slope));
  std::printf("worst error / tolerance: mean %.3g, std %.3g, slope %.3g\n", worst_mean, worst_std,
              worst_slope);
}

TEST(FeatureTransformNumericsTest, StdOfAStuckSensorIsZeroAfterNoisyData) {
  // A feature that was noisy and then sticks (a stuck sensor, a fault of the demo plant): once the
  // window holds only the stuck value, its std is 0 (the std of a constant) up to the rounding of
  // the value itself. Removing the noisy vectors one by one cancels the whole sum of squares; the
  // result is garbage of the order of the rounding of the largest sum unless it is recomputed.
  const int w = 500;
  FeatureTransform transform(Options(0, {w}, {Statistic::kStd}), 1);
  std::vector<double> out(2);
  std::mt19937_64 rng(12);
  std::normal_distribution<double> noise(0.0, 5.0);
  int t = 0;
  for (; t < 1700; ++t) {
    const double x = 800 + noise(rng);
    transform.Push(t, std::span(&x, 1), out);
  }
  const double stuck = 812.7;
  for (int i = 0; i < 2 * w; ++i, ++t) {
    transform.Push(t, std::span(&stuck, 1), out);
    if (i >= w - 1) {
      EXPECT_LE(out[1], 1e-13 * stuck) << i;
    }
  }
}

// ---------------------------------------------------------------------------------------------
// Allocation.

TEST(FeatureTransformTest, PushAllocatesNothingInTheSteadyState) {
  const int d = 4;
  FeatureTransform transform(
      Options(3, {5, 40}, {Statistic::kMean, Statistic::kStd, Statistic::kSlope}, 100), d);
  const MatrixD rows = testing_data::RandomGaussian(2000, d, 13);
  std::vector<double> out(static_cast<std::size_t>(transform.output_dims()));
  for (int i = 0; i < 100; ++i) transform.Push(i, RowOf(rows, i), out);  // warm
  int64_t outputs = 0;
  const long before = g_allocations.load();
  // Includes scheduled exact recomputations (every 5 and 40 outputs), a gap reset and its refill,
  // a time-went-back reset, and Reset.
  for (int i = 100; i < 2000; ++i) {
    double time = i;
    if (i >= 1000) time += 1000;  // the gap
    if (i >= 1500) time -= 2000;  // going back
    if (i == 1800) transform.Reset();
    outputs += transform.Push(time, RowOf(rows, i), out);
  }
  const long after = g_allocations.load();
  EXPECT_EQ(after - before, 0);
  EXPECT_EQ(outputs, 1900 - 3 * 39);  // the allocation counter watched real work
  EXPECT_EQ(transform.gap_resets(), 1);
  EXPECT_EQ(transform.time_went_back_resets(), 1);
}

}  // namespace
}  // namespace nuwatch
