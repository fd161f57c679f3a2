// Scaler: hand-worked standard and robust parameters, the moments after transformation, the
// zero-spread guards, and the agreement of the row and matrix paths.
#include "nuwatch/scaler.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <Eigen/Cholesky>
#include <cmath>
#include <limits>
#include <random>

#include "common/random_data.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

using testing_data::RandomGaussian;

TEST(ScalerStandard, HandWorkedParameters) {
  // Column 0 = {1, 2, 3, 4}: mean 2.5, population variance ((1.5^2 + 0.5^2) * 2) / 4 = 1.25.
  // Column 1 = {-2, -2, -2, -2}: zero variance, scale 1 (scaler.h), centre -2.
  MatrixD x(4, 2);
  x << 3, -2, 1, -2, 4, -2, 2, -2;
  const Scaler s = Scaler::Fit(ScalerType::kStandard, x);
  ASSERT_EQ(s.dims(), 2);
  EXPECT_EQ(s.type(), ScalerType::kStandard);
  EXPECT_DOUBLE_EQ(s.center()[0], 2.5);
  EXPECT_DOUBLE_EQ(s.scale()[0], std::sqrt(1.25));
  EXPECT_DOUBLE_EQ(s.center()[1], -2.0);
  EXPECT_EQ(s.scale()[1], 1.0);
  const MatrixD z = s.Transform(x);
  // Row 0: (3 - 2.5) / sqrt(1.25) = 0.4472135955, and the constant column maps to 0.
  EXPECT_NEAR(z(0, 0), 0.5 / std::sqrt(1.25), 1e-15);
  EXPECT_EQ(z(0, 1), 0.0);
}

TEST(ScalerStandard, TransformedColumnsHaveMeanZeroAndPopulationSdOne) {
  MatrixD x = RandomGaussian(500, 4, 7);
  // Different locations and spreads per column, including a tiny and a huge one.
  const double shift[4] = {100.0, -3.0, 0.0, 1e6};
  const double spread[4] = {5.0, 1e-3, 1.0, 2e4};
  for (int j = 0; j < 4; ++j) x.col(j) = (x.col(j).array() * spread[j] + shift[j]).matrix();
  const MatrixD z = Scaler::Fit(ScalerType::kStandard, x).Transform(x);
  for (int j = 0; j < 4; ++j) {
    const double mean = z.col(j).mean();
    const double sd = std::sqrt((z.col(j).array() - mean).square().mean());
    EXPECT_NEAR(mean, 0.0, 1e-9) << "column " << j;
    EXPECT_NEAR(sd, 1.0, 1e-9) << "column " << j;
  }
}

// Quantiles by linear interpolation between order statistics: numpy.percentile's default
// method="linear" (Hyndman & Fan type 7), position q (n - 1) in the sorted column. Values below
// were worked by hand and agree with numpy.percentile(column, [25, 50, 75]).
TEST(ScalerRobust, HandWorkedParametersWithInterpolatedQuantiles) {
  // Column 0 = {5, 0, 6, 1}, sorted {0, 1, 5, 6}, n - 1 = 3:
  //   q25 at 0.75: 0 + 0.75 (1 - 0) = 0.75;  q50 at 1.5: 1 + 0.5 (5 - 1) = 3;
  //   q75 at 2.25: 5 + 0.25 (6 - 5) = 5.25;  IQR = 4.5, scale = 4.5 / 1.349 = 3.33580...
  // Column 1 = {2, 2, 2, 2}: IQR 0 and sd 0, so scale 1 (scaler.h), centre 2.
  MatrixD x(4, 2);
  x << 5, 2, 0, 2, 6, 2, 1, 2;
  const Scaler s = Scaler::Fit(ScalerType::kRobust, x);
  EXPECT_EQ(s.type(), ScalerType::kRobust);
  EXPECT_DOUBLE_EQ(s.center()[0], 3.0);
  EXPECT_DOUBLE_EQ(s.scale()[0], 4.5 / 1.349);
  EXPECT_DOUBLE_EQ(s.center()[1], 2.0);
  EXPECT_EQ(s.scale()[1], 1.0);
  const MatrixD z = s.Transform(x);
  // Row 1: (0 - 3) / (4.5 / 1.349) = -0.899333.
  EXPECT_NEAR(z(1, 0), -3.0 * 1.349 / 4.5, 1e-15);
}

TEST(ScalerRobust, HandWorkedOddCountAndIqrZeroFallsBackToSd) {
  // Column 0 = {10, 1, 4, 2, 3}, sorted {1, 2, 3, 4, 10}, n - 1 = 4: q25 = 2, q50 = 3, q75 = 4,
  // IQR = 2, scale = 2 / 1.349. The outlier 10 moves neither (the point of the robust scaler).
  // Column 1 = {0, 8, 0, 0, 0}: q25 = q75 = 0, so IQR 0; the population sd is
  // sqrt((4 * 1.6^2 + 6.4^2) / 5) = sqrt(10.24) = 3.2, which scaler.h says is used instead.
  MatrixD x(5, 2);
  x << 10, 0, 1, 8, 4, 0, 2, 0, 3, 0;
  const Scaler s = Scaler::Fit(ScalerType::kRobust, x);
  EXPECT_DOUBLE_EQ(s.center()[0], 3.0);
  EXPECT_DOUBLE_EQ(s.scale()[0], 2.0 / 1.349);
  EXPECT_DOUBLE_EQ(s.center()[1], 0.0);
  EXPECT_DOUBLE_EQ(s.scale()[1], 3.2);
  // After the transform the median of column 0 (the row holding 3) is exactly 0.
  EXPECT_EQ(s.Transform(x)(4, 0), 0.0);
}

TEST(ScalerRobust, MatchesStandardDeviationOnNormalData) {
  // For a normal distribution the IQR is 2 * 0.6745 sd = 1.349 sd (common practice; quantile of the
  // standard normal from memory). On 20000 draws of N(0, 1) the robust scale is within 3% of 1
  // (the sample IQR's relative standard error is ~0.8% here) and the median within 0.05 of 0.
  const Scaler s = Scaler::Fit(ScalerType::kRobust, RandomGaussian(20000, 2, 8));
  for (int j = 0; j < 2; ++j) {
    EXPECT_NEAR(s.scale()[j], 1.0, 0.03) << "column " << j;
    EXPECT_NEAR(s.center()[j], 0.0, 0.05) << "column " << j;
  }
}

TEST(ScalerNone, IsTheIdentity) {
  const MatrixD x = RandomGaussian(10, 3, 9);
  const Scaler s = Scaler::Fit(ScalerType::kNone, x);
  EXPECT_EQ(s.type(), ScalerType::kNone);
  EXPECT_EQ(s.center(), VectorD::Zero(3));
  EXPECT_EQ(s.scale(), VectorD::Ones(3));
  EXPECT_EQ(s.Transform(x), x);
}

TEST(ScalerFit, SingleRowIsCentredWithScaleOne) {
  MatrixD x(1, 3);
  x << 1.5, -2, 7;
  for (ScalerType type : {ScalerType::kStandard, ScalerType::kRobust}) {
    const Scaler s = Scaler::Fit(type, x);
    EXPECT_EQ(s.scale(), VectorD::Ones(3)) << ScalerName(type);
    EXPECT_EQ(s.Transform(x), MatrixD::Zero(1, 3)) << ScalerName(type);
  }
}

TEST(ScalerFit, RejectsEmptyAndNonFiniteInput) {
  try {
    Scaler::Fit(ScalerType::kStandard, MatrixD(0, 3));
    FAIL() << "expected PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("Scaler::Fit"));
  }
  MatrixD x = RandomGaussian(4, 2, 10);
  x(2, 1) = std::numeric_limits<double>::quiet_NaN();
  try {
    Scaler::Fit(ScalerType::kRobust, x);
    FAIL() << "expected PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("Scaler::Fit"));
    EXPECT_THAT(e.what(), HasSubstr("non-finite"));
  }
  x(2, 1) = std::numeric_limits<double>::infinity();
  EXPECT_THROW(Scaler::Fit(ScalerType::kStandard, x), PreconditionError);
}

TEST(ScalerFromParameters, RejectsNonPositiveOrNonFiniteScaleAndSizeMismatch) {
  const double nan = std::numeric_limits<double>::quiet_NaN();
  for (double bad : {0.0, -1.0, nan, std::numeric_limits<double>::infinity()}) {
    VectorD center = VectorD::Zero(3), scale = VectorD::Ones(3);
    scale[1] = bad;
    try {
      Scaler::FromParameters(ScalerType::kStandard, center, scale);
      FAIL() << "expected PreconditionError for scale " << bad;
    } catch (const PreconditionError& e) {
      EXPECT_THAT(e.what(), HasSubstr("Scaler::FromParameters"));
      EXPECT_THAT(e.what(), HasSubstr("feature 1"));
    }
  }
  VectorD center = VectorD::Zero(3);
  center[0] = nan;
  EXPECT_THROW(Scaler::FromParameters(ScalerType::kStandard, center, VectorD::Ones(3)),
               PreconditionError);
  try {
    Scaler::FromParameters(ScalerType::kStandard, VectorD::Zero(2), VectorD::Ones(3));
    FAIL() << "expected PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("Scaler::FromParameters"));
  }
}

TEST(ScalerFromParameters, KeepsTheGivenParameters) {
  VectorD center(2), scale(2);
  center << 1, -1;
  scale << 2, 0.5;
  const Scaler s = Scaler::FromParameters(ScalerType::kRobust, center, scale);
  EXPECT_EQ(s.center(), center);
  EXPECT_EQ(s.scale(), scale);
  MatrixD x(1, 2);
  x << 5, 0;
  // (5 - 1) / 2 = 2, (0 + 1) / 0.5 = 2.
  const MatrixD z = s.Transform(x);
  EXPECT_DOUBLE_EQ(z(0, 0), 2.0);
  EXPECT_DOUBLE_EQ(z(0, 1), 2.0);
}

TEST(ScalerTransform, WrongColumnCountThrows) {
  const Scaler s = Scaler::Fit(ScalerType::kStandard, RandomGaussian(5, 3, 11));
  try {
    s.Transform(RandomGaussian(2, 4, 12));
    FAIL() << "expected PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("Scaler::Transform"));
  }
}

TEST(ScalerTransformRow, EqualsTransformInDoubleAndFloat) {
  const MatrixD train = RandomGaussian(50, 5, 13) * 3.0;
  const MatrixD x = RandomGaussian(20, 5, 14) * 4.0;
  for (ScalerType type : {ScalerType::kNone, ScalerType::kStandard, ScalerType::kRobust}) {
    const Scaler s = Scaler::Fit(type, train);
    const MatrixD z = s.Transform(x);
    for (int64_t i = 0; i < x.rows(); ++i) {
      double out_d[5];
      float out_f[5];
      s.TransformRow(&x(i, 0), out_d);
      s.TransformRow(&x(i, 0), out_f);
      for (int j = 0; j < 5; ++j) {
        EXPECT_EQ(out_d[j], z(i, j)) << ScalerName(type) << " row " << i << " feature " << j;
        EXPECT_EQ(out_f[j], static_cast<float>(z(i, j)))
            << ScalerName(type) << " row " << i << " feature " << j;
      }
    }
  }
}

// Whitening: the transformed training data has the identity covariance (the definition of a
// whitening transform), and ||z||^2 is the Mahalanobis distance (x - mu)' S^-1 (x - mu) of the
// training covariance S, computed here independently by an LDLT solve (textbook identity).
TEST(ScalerWhiten, IdentityCovarianceAndMahalanobisDistance) {
  std::mt19937_64 rng(40);
  std::normal_distribution<double> normal(0.0, 1.0);
  const int n = 2000, d = 4;
  MatrixD x(n, d);
  for (int i = 0; i < n; ++i) {
    const double a = normal(rng), b = normal(rng), c = normal(rng), e = normal(rng);
    x.row(i) << 10 + 3 * a, -5 + 2 * a + b, 100 * c, 0.5 * c - 0.2 * b + 0.01 * e;
  }
  const Scaler scaler = Scaler::Fit(ScalerType::kWhiten, x);
  ASSERT_EQ(scaler.whitening().rows(), d);
  const MatrixD z = scaler.Transform(x);
  const MatrixD covariance =
      (z.rowwise() - z.colwise().mean()).transpose() * (z.rowwise() - z.colwise().mean()) / n;
  EXPECT_LT((covariance - MatrixD::Identity(d, d)).cwiseAbs().maxCoeff(), 1e-9);
  const Eigen::RowVectorXd mu = x.colwise().mean();
  const MatrixD centred = x.rowwise() - mu;
  const MatrixD s = centred.transpose() * centred / n;
  const Eigen::LDLT<MatrixD> ldlt(s);
  for (int i = 0; i < 10; ++i) {
    const VectorD v = centred.row(i).transpose();
    const double mahalanobis = v.dot(ldlt.solve(v));
    EXPECT_NEAR(z.row(i).squaredNorm(), mahalanobis, 1e-8 * mahalanobis) << i;
    double row_double[d];
    float row_float[d];
    scaler.TransformRow(&x(i, 0), row_double);
    scaler.TransformRow(&x(i, 0), row_float);
    for (int j = 0; j < d; ++j) {
      EXPECT_NEAR(row_double[j], z(i, j), 1e-12 * (1 + std::abs(z(i, j))));
      EXPECT_NEAR(row_float[j], z(i, j), 1e-5 * (1 + std::abs(z(i, j))));
    }
  }
  // A feature that never varied: its direction is floored, not infinite.
  MatrixD constant = x;
  constant.col(3).setConstant(7.0);
  const Scaler floored = Scaler::Fit(ScalerType::kWhiten, constant);
  EXPECT_TRUE(floored.whitening().allFinite());
  EXPECT_THROW(Scaler::FromParameters(ScalerType::kWhiten, scaler.center(), scaler.scale()),
               PreconditionError);
  EXPECT_THROW(Scaler::FromParameters(ScalerType::kStandard, scaler.center(), scaler.scale(),
                                      scaler.whitening()),
               PreconditionError);
}

TEST(ScalerNames, RoundTripAndUnknown) {
  for (ScalerType t : {ScalerType::kNone, ScalerType::kStandard, ScalerType::kRobust}) {
    auto parsed = ParseScalerType(ScalerName(t));
    ASSERT_TRUE(parsed.has_value());
    EXPECT_EQ(*parsed, t);
  }
  EXPECT_FALSE(ParseScalerType("minmax").has_value());
}

TEST(ScalerDefault, IsIdentityOnZeroFeatures) {
  const Scaler s;
  EXPECT_EQ(s.dims(), 0);
  EXPECT_EQ(s.type(), ScalerType::kNone);
}

}  // namespace
}  // namespace nuwatch
