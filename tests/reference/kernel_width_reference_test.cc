// The importance-sampling volume estimator of the minimum-volume criterion (kernel_width.h)
// against closed-form volumes. Reference: the volume of the d-dimensional ball of radius R,
// V_d(R) = pi^(d/2) R^d / Gamma(d/2 + 1) (NIST DLMF section 5.19(iii)), of an ellipsoid
// with semi-axes a_i, V_d(1) prod a_i (a linear map scales volume by its determinant), and of a
// spherical shell, V_d(R2) - V_d(R1). Each estimate must lie within 3 of its own standard errors
// of the formula, and over many seeds the standardised errors must scatter like a standard normal
// (so the standard error it reports is honest, not merely large).
#include <gtest/gtest.h>

#include <Eigen/QR>
#include <cmath>
#include <numbers>
#include <random>
#include <vector>

#include "nuwatch/kernel_width.h"

namespace nuwatch {
namespace {

double LogUnitBallVolume(int d) {
  return 0.5 * d * std::log(std::numbers::pi) - std::lgamma(0.5 * d + 1);
}

// Flags of the points whose Mahalanobis radius |A^-1 (x - c)| lies in [inner, outer].
std::vector<uint8_t> InShell(const MatrixD& points, const VectorD& c, const MatrixD& a_inverse,
                             double inner, double outer) {
  std::vector<uint8_t> inside(static_cast<std::size_t>(points.rows()));
  for (int64_t i = 0; i < points.rows(); ++i) {
    const double r = (a_inverse * (points.row(i).transpose() - c)).norm();
    inside[static_cast<std::size_t>(i)] = r >= inner && r <= outer ? 1 : 0;
  }
  return inside;
}

// A random rotation (QR of a Gaussian matrix; common practice).
MatrixD Rotation(int d, uint64_t seed) {
  std::mt19937_64 generator(seed);
  std::normal_distribution<double> normal;
  Eigen::MatrixXd g(d, d);
  for (int i = 0; i < d; ++i)
    for (int j = 0; j < d; ++j) g(i, j) = normal(generator);
  return MatrixD(Eigen::HouseholderQR<Eigen::MatrixXd>(g).householderQ());
}

TEST(ImportanceSampledVolume, BallOfTheDataScaleMatchesTheClosedFormInManyDimensions) {
  for (const int d : {2, 10, 52}) {
    SCOPED_TRACE("d = " + std::to_string(d));
    // A radius a little beyond the bulk of standard normal data (whose radius concentrates near
    // sqrt(d), common practice): the size of an envelope around whitened data.
    const double radius = std::sqrt(static_cast<double>(d)) + 2.2;
    const VectorD center = VectorD::Zero(d);
    const MatrixD identity = MatrixD::Identity(d, d);
    const ImportanceSample sample = DrawImportanceSample(center, identity, VolumeSampling{});
    const VolumeEstimate v =
        EstimateVolume(sample, InShell(sample.points, center, identity, 0, radius));
    const double expected = LogUnitBallVolume(d) + d * std::log(radius);
    EXPECT_LT(v.standard_error, 0.1);  // the estimator is usable at 52 dimensions
    EXPECT_NEAR(v.log_volume, expected, 3 * v.standard_error)
        << "expected " << expected << ", standard error " << v.standard_error;
    EXPECT_GT(v.effective_samples, 100);
  }
}

TEST(ImportanceSampledVolume, RotatedShiftedEllipsoidAndAShellWithAHole) {
  const int d = 8;
  const std::vector<double> axes = {0.3, 0.5, 0.8, 1.0, 1.0, 1.5, 2.0, 3.0};
  const MatrixD rotation = Rotation(d, 17);
  VectorD center(d);
  for (int j = 0; j < d; ++j) center[j] = 0.5 * j - 1;
  // The data's covariance: the ellipsoid's axes over 2.5 (so the ellipsoid is its 2.5-sigma set).
  VectorD a(d);
  for (int j = 0; j < d; ++j) a[j] = axes[static_cast<std::size_t>(j)];
  const MatrixD map = rotation * a.asDiagonal();  // unit ball -> ellipsoid
  const MatrixD map_inverse = a.cwiseInverse().asDiagonal() * rotation.transpose();
  const MatrixD covariance = map * map.transpose() / (2.5 * 2.5);
  const ImportanceSample sample = DrawImportanceSample(center, covariance, VolumeSampling{});
  const double log_det = a.array().log().sum();

  const VolumeEstimate ellipsoid =
      EstimateVolume(sample, InShell(sample.points, center, map_inverse, 0, 1));
  EXPECT_NEAR(ellipsoid.log_volume, LogUnitBallVolume(d) + log_det, 3 * ellipsoid.standard_error);

  // The shell 0.8 <= r <= 1 holds 1 - 0.8^8 = 83 % of the ellipsoid's volume, and none of the
  // centre, where the sampler is densest.
  const VolumeEstimate shell =
      EstimateVolume(sample, InShell(sample.points, center, map_inverse, 0.8, 1));
  const double expected = LogUnitBallVolume(d) + log_det + std::log(1 - std::pow(0.8, d));
  EXPECT_NEAR(shell.log_volume, expected, 3 * shell.standard_error);
  EXPECT_LT(shell.inside, ellipsoid.inside);
}

TEST(ImportanceSampledVolume, StandardErrorIsHonestOverSeeds) {
  // z = (estimate - truth) / standard error over 40 seeds: for an unbiased estimator with an
  // honest standard error, roughly standard normal. Checked loosely (40 draws): mean within
  // 3 / sqrt(40) of 0, standard deviation in [0.6, 1.5], none beyond 4.
  const int d = 20;
  const double radius = std::sqrt(static_cast<double>(d)) + 1.5;
  const VectorD center = VectorD::Zero(d);
  const MatrixD identity = MatrixD::Identity(d, d);
  const double expected = LogUnitBallVolume(d) + d * std::log(radius);
  std::vector<double> z;
  for (uint64_t seed = 1; seed <= 40; ++seed) {
    VolumeSampling sampling;
    sampling.samples = 2000;
    sampling.seed = seed;
    const ImportanceSample sample = DrawImportanceSample(center, identity, sampling);
    const VolumeEstimate v =
        EstimateVolume(sample, InShell(sample.points, center, identity, 0, radius));
    z.push_back((v.log_volume - expected) / v.standard_error);
  }
  double mean = 0, sq = 0, worst = 0;
  for (const double v : z) {
    mean += v / z.size();
    worst = std::max(worst, std::abs(v));
  }
  for (const double v : z) sq += (v - mean) * (v - mean) / (z.size() - 1);
  EXPECT_LT(std::abs(mean), 3 / std::sqrt(40.0));
  EXPECT_GT(std::sqrt(sq), 0.6);
  EXPECT_LT(std::sqrt(sq), 1.5);
  EXPECT_LT(worst, 4);
}

TEST(ImportanceSampledVolume, SameSeedSameSampleAndBadInputIsRefused) {
  const VectorD center = VectorD::Zero(3);
  const MatrixD identity = MatrixD::Identity(3, 3);
  const ImportanceSample a = DrawImportanceSample(center, identity, VolumeSampling{});
  const ImportanceSample b = DrawImportanceSample(center, identity, VolumeSampling{});
  EXPECT_EQ(a.points, b.points);
  EXPECT_EQ(a.log_density, b.log_density);
  VolumeSampling bad;
  bad.spreads = {1.0, -1.0};
  EXPECT_THROW(DrawImportanceSample(center, identity, bad), PreconditionError);
  bad = VolumeSampling{};
  bad.samples = 2;  // fewer than the 5 spreads
  EXPECT_THROW(DrawImportanceSample(center, identity, bad), PreconditionError);
  EXPECT_THROW(DrawImportanceSample(center, MatrixD::Identity(2, 2), VolumeSampling{}),
               PreconditionError);
  std::vector<uint8_t> too_few(3, 1);
  EXPECT_THROW(EstimateVolume(a, too_few), PreconditionError);
  // Nothing inside: -inf, not a number made up.
  const std::vector<uint8_t> none(static_cast<std::size_t>(a.points.rows()), 0);
  const VolumeEstimate empty = EstimateVolume(a, none);
  EXPECT_EQ(empty.inside, 0);
  EXPECT_TRUE(std::isinf(empty.log_volume) && empty.log_volume < 0);
}

}  // namespace
}  // namespace nuwatch
