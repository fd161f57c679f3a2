// Tests of the support-vector budget (core/src/budget.cc) against hand-worked values, published
// properties (Wang, Crammer, Vucetic, JMLR 13:3103-3131, 2012; methods.md "Budget on support
// vectors") and brute-force references computed here from the textbook kernel formula.
#include "budget.h"

#include <gtest/gtest.h>

#include <cmath>
#include <limits>
#include <random>
#include <vector>

namespace nuwatch {
namespace {

// f(h) = a_m k^((1-h)^2) + a_n k^(h^2) with k = exp(-D): the merge objective of Wang et al. 2012.
double MergeObjective(double a_m, double a_n, double d, double h) {
  return a_m * std::exp(-d * (1 - h) * (1 - h)) + a_n * std::exp(-d * h * h);
}

// The reference: ||sum c_a phi(a) - sum c_b phi(b)||^2 by a double loop over Kernel::Evaluate, the
// textbook formula (not the GEMM path that WeightDistanceSquared uses).
double NaiveWeightDistance(const MatrixD& a, const VectorD& c_a, const MatrixD& b,
                           const VectorD& c_b, const Kernel& kernel) {
  const int d = static_cast<int>(a.cols());
  auto dot = [&](const MatrixD& x, const VectorD& cx, const MatrixD& y, const VectorD& cy) {
    double sum = 0;
    for (Eigen::Index i = 0; i < x.rows(); ++i)
      for (Eigen::Index j = 0; j < y.rows(); ++j)
        sum += cx[i] * cy[j] * kernel.Evaluate(x.row(i).data(), y.row(j).data(), d);
    return sum;
  };
  return dot(a, c_a, a, c_a) + dot(b, c_b, b, c_b) - 2 * dot(a, c_a, b, c_b);
}

// ||w_a||^2 + ||w_b||^2: the scale of the rounding error of a distance computed by expansion.
double NormScale(const MatrixD& a, const VectorD& c_a, const MatrixD& b, const VectorD& c_b,
                 const Kernel& kernel) {
  return NaiveWeightDistance(a, c_a, MatrixD::Zero(0, a.cols()), VectorD(0), kernel) +
         NaiveWeightDistance(b, c_b, MatrixD::Zero(0, b.cols()), VectorD(0), kernel);
}

// sum_i c_i k(s_i, x) for each row x of `points`, by the textbook formula.
VectorD KernelSums(const MatrixD& sv, const VectorD& c, const MatrixD& points,
                   const Kernel& kernel) {
  VectorD sums = VectorD::Zero(points.rows());
  for (Eigen::Index p = 0; p < points.rows(); ++p)
    for (Eigen::Index i = 0; i < sv.rows(); ++i)
      sums[p] += c[i] * kernel.Evaluate(sv.row(i).data(), points.row(p).data(),
                                        static_cast<int>(sv.cols()));
  return sums;
}

MatrixD RandomNormal(std::mt19937_64& rng, Eigen::Index rows, Eigen::Index cols) {
  std::normal_distribution<double> normal;
  MatrixD m(rows, cols);
  for (Eigen::Index i = 0; i < rows; ++i)
    for (Eigen::Index j = 0; j < cols; ++j) m(i, j) = normal(rng);
  return m;
}

// Positive weights summing to 1, as the nu-SVM dual produces (methods.md: sum a_i = 1).
VectorD RandomWeights(std::mt19937_64& rng, Eigen::Index n) {
  std::uniform_real_distribution<double> uniform(0.05, 1.0);
  VectorD c(n);
  for (Eigen::Index i = 0; i < n; ++i) c[i] = uniform(rng);
  return c / c.sum();
}

Kernel Rbf(double gamma) {
  Kernel kernel;
  kernel.type = KernelType::kRbf;
  kernel.gamma = gamma;
  return kernel;
}

Kernel Linear() {
  Kernel kernel;
  kernel.type = KernelType::kLinear;
  return kernel;
}

// ---------------------------------------------------------------------------------------------
// SolveRbfMerge
// ---------------------------------------------------------------------------------------------

TEST(SolveRbfMerge, EqualWeightsBelowTwoMergeAtTheMidpoint) {
  // Hand-worked: a_m = a_n = 0.5, D = gamma ||x_m - x_n||^2 = 1. f is symmetric about h = 1/2 and
  // unimodal for D <= 2 (budget.cc: g' = 2D - 1/(h(1-h)) <= 0), so h = 1/2,
  // a_z = 2 * 0.5 * e^{-D/4} = e^{-1/4}, and the loss of Wang et al. 2012,
  // a_m^2 + a_n^2 + 2 k a_m a_n - a_z^2 = 0.5 + 0.5 e^{-1} - e^{-1/2}.
  const RbfMerge merge = SolveRbfMerge(0.5, 0.5, 1.0);
  EXPECT_NEAR(merge.h, 0.5, 1e-12);
  EXPECT_NEAR(merge.coefficient, std::exp(-0.25), 1e-14);
  EXPECT_NEAR(merge.degradation, 0.5 + 0.5 * std::exp(-1.0) - std::exp(-0.5), 1e-14);
}

TEST(SolveRbfMerge, EqualWeightsAboveTwoFindTheOuterPeak) {
  // methods.md / Wang et al. 2012: for equal weights the objective stops being unimodal once
  // gamma ||x_m - x_n||^2 >= 2. Analytically f''(1/2) = 2 a e^{-D/4} D (D - 2) > 0 for D = 4:
  // h = 1/2 is a stationary point (f'(1/2) = 0 by symmetry) but a local MINIMUM, so a
  // stationary-point search started at the weighted mean a_m / (a_m + a_n) = 1/2 stops there.
  const double d = 4.0;
  const double at_half = MergeObjective(1, 1, d, 0.5);
  EXPECT_GT(MergeObjective(1, 1, d, 0.49), at_half);  // the minimum, seen numerically
  EXPECT_GT(MergeObjective(1, 1, d, 0.51), at_half);

  const RbfMerge merge = SolveRbfMerge(1.0, 1.0, d);
  double grid_max = 0;
  for (int i = 0; i <= 1'000'000; ++i)
    grid_max = std::max(grid_max, MergeObjective(1, 1, d, i * 1e-6));
  EXPECT_GT(std::abs(merge.h - 0.5), 0.4);  // one of the two symmetric outer peaks
  EXPECT_GT(merge.coefficient, at_half + 0.25);
  EXPECT_GE(merge.coefficient, grid_max - 1e-13);
  EXPECT_NEAR(merge.coefficient, MergeObjective(1, 1, d, merge.h), 1e-15);
  // The peak is a root of f': a_m (1-h) e^{-D(1-h)^2} = a_n h e^{-D h^2}.
  const double h = merge.h;
  EXPECT_NEAR((1 - h) * std::exp(-d * (1 - h) * (1 - h)), h * std::exp(-d * h * h), 1e-14);
}

TEST(SolveRbfMerge, MatchesBruteForceGridOverRandomCases) {
  // Reference: the global maximum of f on a 20001-point grid over [0, 1]. Also the property that
  // the best h lies on the side of the heavier vector: for h > 1/2 and h' = 1 - h,
  // f(h') - f(h) = (a_n - a_m) (e^{-D(1-h)^2} - e^{-D h^2}) >= 0 when a_n >= a_m (derived here from
  // f's definition), so a_n > a_m implies a maximiser with h <= 1/2.
  std::mt19937_64 rng(20240611);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  for (int trial = 0; trial < 300; ++trial) {
    const double a_m = std::exp(6 * (uniform(rng) - 0.5));
    const double a_n = std::exp(6 * (uniform(rng) - 0.5));
    // Half the cases in the two-peak band 2 < D < 8, the rest spread up to 30.
    const double d = trial % 2 == 0 ? 2 + 6 * uniform(rng) : 30 * uniform(rng) * uniform(rng);
    SCOPED_TRACE(::testing::Message() << "a_m = " << a_m << ", a_n = " << a_n << ", D = " << d);
    const RbfMerge merge = SolveRbfMerge(a_m, a_n, d);
    double grid_max = 0;
    for (int i = 0; i <= 20000; ++i)
      grid_max = std::max(grid_max, MergeObjective(a_m, a_n, d, i / 2e4));
    ASSERT_GE(merge.h, 0.0);
    ASSERT_LE(merge.h, 1.0);
    EXPECT_NEAR(merge.coefficient, MergeObjective(a_m, a_n, d, merge.h), 1e-14 * (a_m + a_n));
    EXPECT_GE(merge.coefficient, grid_max * (1 - 1e-13));
    const double k = std::exp(-d);
    const double textbook =
        a_m * a_m + a_n * a_n + 2 * k * a_m * a_n - merge.coefficient * merge.coefficient;
    EXPECT_NEAR(merge.degradation, std::max(0.0, textbook), 1e-12 * (a_m + a_n) * (a_m + a_n));
    if (a_n > a_m) {
      EXPECT_LE(merge.h, 0.5);
    }
    if (a_m > a_n) {
      EXPECT_GE(merge.h, 0.5);
    }
  }
}

TEST(SolveRbfMerge, LimitCases) {
  // D = 0 (identical vectors): f = a_m + a_n for every h; the loss is 0 (analytic).
  RbfMerge same = SolveRbfMerge(0.3, 0.2, 0.0);
  EXPECT_EQ(same.h, 0.0);
  EXPECT_EQ(same.coefficient, 0.3 + 0.2);
  EXPECT_EQ(same.degradation, 0.0);
  // k = 0 (infinitely far): f(0) = a_n, f(1) = a_m, interior values vanish; keep the larger and
  // lose the smaller one's full weight a_m^2.
  RbfMerge far = SolveRbfMerge(0.2, 0.7, std::numeric_limits<double>::infinity());
  EXPECT_EQ(far.h, 0.0);
  EXPECT_EQ(far.coefficient, 0.7);
  EXPECT_DOUBLE_EQ(far.degradation, 0.04);
  // A zero weight merges into the other at no loss.
  RbfMerge empty = SolveRbfMerge(0.0, 0.4, 3.0);
  EXPECT_EQ(empty.h, 0.0);
  EXPECT_EQ(empty.coefficient, 0.4);
  EXPECT_EQ(empty.degradation, 0.0);
  EXPECT_THROW(SolveRbfMerge(-0.1, 0.4, 1.0), PreconditionError);
  EXPECT_THROW(SolveRbfMerge(0.0, 0.0, 1.0), PreconditionError);
  EXPECT_THROW(SolveRbfMerge(0.1, 0.4, std::nan("")), PreconditionError);
}

// ---------------------------------------------------------------------------------------------
// CompressToBudget
// ---------------------------------------------------------------------------------------------

TEST(CompressToBudget, BudgetAtLeastRowsLeavesTheSetUnchanged) {
  std::mt19937_64 rng(7);
  const MatrixD sv = RandomNormal(rng, 12, 3);
  const VectorD c = RandomWeights(rng, 12);
  for (const Kernel& kernel : {Rbf(0.5), Linear()}) {
    for (int64_t budget : {12, 13, 1000}) {
      const BudgetResult result = CompressToBudget(sv, c, kernel, budget);
      EXPECT_EQ(result.support_vectors, sv);
      EXPECT_EQ(result.coefficients, c);
      EXPECT_EQ(result.removed, 0);
      EXPECT_EQ(result.weight_degradation, 0.0);
      EXPECT_EQ(result.step_degradation_sum, 0.0);
    }
  }
}

TEST(CompressToBudget, IdenticalVectorsMergeIntoOneWithTheSummedCoefficient) {
  // Analytic: x_m = x_n gives D = 0, so phi(x_m) = phi(x_n) and a_m phi + a_n phi = (a_m + a_n)
  // phi: the merge is exact. The far vector (D = 0.5 * (9.75^2 + 11.5^2 + 8^2) ~ 146) would cost
  // ~a_m^2.
  MatrixD sv(3, 3);
  sv << 10.0, 10.0, 10.0,  // listed first so that the first partner tried is the wrong one
      0.25, -1.5, 2.0,     //
      0.25, -1.5, 2.0;
  VectorD c(3);
  c << 0.5, 0.3, 0.2;
  const Kernel kernel = Rbf(0.5);
  const BudgetResult result = CompressToBudget(sv, c, kernel, 2);
  ASSERT_EQ(result.support_vectors.rows(), 2);
  EXPECT_EQ(result.removed, 1);
  EXPECT_EQ(result.step_degradation_sum, 0.0);
  EXPECT_LT(result.weight_degradation, 1e-14);
  // Row order is not kept: find the merged row.
  const Eigen::Index merged = result.support_vectors(0, 0) == 0.25 ? 0 : 1;
  EXPECT_EQ(result.support_vectors.row(merged), sv.row(1));
  EXPECT_EQ(result.coefficients[merged], 0.3 + 0.2);
  EXPECT_EQ(result.support_vectors.row(1 - merged), sv.row(0));
  EXPECT_EQ(result.coefficients[1 - merged], 0.5);
}

TEST(CompressToBudget, ZeroCoefficientRowsAreDroppedAtNoCost) {
  MatrixD sv(4, 2);
  sv << 0, 0, 1, 1, 2, 2, 3, 3;
  VectorD c(4);
  c << 0.5, 0.0, 0.5, 0.0;
  const BudgetResult result = CompressToBudget(sv, c, Rbf(1.0), 10);
  ASSERT_EQ(result.support_vectors.rows(), 2);
  EXPECT_EQ(result.removed, 2);
  EXPECT_EQ(result.support_vectors.row(0), sv.row(0));
  EXPECT_EQ(result.support_vectors.row(1), sv.row(2));
  EXPECT_LT(result.weight_degradation, 1e-14);
}

TEST(CompressToBudget, SingleMergeLossMatchesKernelMatrices) {
  // One merge changes w by exactly a_m phi_m + a_n phi_n - a_z phi_z, so Wang et al.'s per-step
  // loss a_m^2 + a_n^2 + 2 k a_m a_n - a_z^2 must equal ||w_before - w_after||^2 computed from
  // kernel matrices (reference: the textbook double loop).
  std::mt19937_64 rng(11);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  for (int trial = 0; trial < 40; ++trial) {
    const Eigen::Index n = 2 + trial % 9, dims = 1 + trial % 6;
    const MatrixD sv = RandomNormal(rng, n, dims);
    const VectorD c = RandomWeights(rng, n);
    const Kernel kernel = Rbf(0.05 + 2 * uniform(rng));
    const BudgetResult result = CompressToBudget(sv, c, kernel, n - 1);
    ASSERT_EQ(result.removed, 1);
    const double naive =
        NaiveWeightDistance(sv, c, result.support_vectors, result.coefficients, kernel);
    const double tolerance =
        1e-12 * NormScale(sv, c, result.support_vectors, result.coefficients, kernel);
    EXPECT_NEAR(result.step_degradation_sum, naive, tolerance + 1e-15);
    EXPECT_NEAR(result.weight_degradation, naive, tolerance + 1e-15);
  }
}

TEST(CompressToBudget, SingleMergeTakesTheLeastLossPartner) {
  // Wang et al. 2012: merge the smallest-coefficient vector m with the partner n of least loss.
  // Reference: the minimum over all n of the loss of SolveRbfMerge at D = gamma ||x_m - x_n||^2
  // (distances by the textbook sum of squared differences).
  std::mt19937_64 rng(23);
  for (int trial = 0; trial < 40; ++trial) {
    const Eigen::Index n = 3 + trial % 12, dims = 1 + trial % 5;
    const MatrixD sv = RandomNormal(rng, n, dims);
    const VectorD c = RandomWeights(rng, n);
    const Kernel kernel = Rbf(0.2 + 0.1 * (trial % 10));
    Eigen::Index m;
    c.minCoeff(&m);
    double least = std::numeric_limits<double>::infinity();
    for (Eigen::Index j = 0; j < n; ++j) {
      if (j == m) continue;
      const double d = kernel.gamma * (sv.row(m) - sv.row(j)).squaredNorm();
      least = std::min(least, SolveRbfMerge(c[m], c[j], d).degradation);
    }
    const BudgetResult result = CompressToBudget(sv, c, kernel, n - 1);
    EXPECT_NEAR(result.step_degradation_sum, least, 1e-14) << "trial " << trial;
  }
}

TEST(CompressToBudget, RandomSetsKeepTheContract) {
  // Property test over dims 1..20, sizes, budgets, gammas and kernels. Checks: rows = min(n,
  // budget); coefficients positive and finite; the reported exact degradation equals the textbook
  // double loop; the per-step losses bound it (||w_0 - w_T|| <= sum_t ||w_{t-1} - w_t|| by the
  // triangle inequality, then Cauchy-Schwarz). Per kernel: rbf merges are convex combinations, so
  // every row stays inside the input's bounding box, and a_z <= a_m + a_n, so the coefficient sum
  // does not grow; the linear collapse keeps the decision function and the sum exactly.
  std::mt19937_64 rng(424242);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  for (int trial = 0; trial < 200; ++trial) {
    const Eigen::Index dims = 1 + static_cast<Eigen::Index>(uniform(rng) * 20);
    const Eigen::Index n = 1 + static_cast<Eigen::Index>(uniform(rng) * 60);
    const int64_t budget = 1 + static_cast<int64_t>(uniform(rng) * 1.2 * static_cast<double>(n));
    Kernel kernel;
    const int kind = trial % 5;  // 3 of 5 rbf
    if (kind < 3) {
      kernel = Rbf(std::exp(std::log(1e-3) + uniform(rng) * std::log(1e4)) / dims);
    } else if (kind == 3) {
      kernel = Linear();
    } else {
      kernel.type = KernelType::kPolynomial;
      kernel.gamma = 1.0 / dims;
      kernel.degree = 1 + trial % 3;
      kernel.coef0 = uniform(rng);
    }
    SCOPED_TRACE(::testing::Message()
                 << "trial " << trial << ": " << KernelName(kernel.type) << " n = " << n
                 << " d = " << dims << " budget = " << budget << " gamma = " << kernel.gamma);
    const MatrixD sv = RandomNormal(rng, n, dims);
    const VectorD c = RandomWeights(rng, n);
    const BudgetResult result = CompressToBudget(sv, c, kernel, budget);
    const Eigen::Index rows = result.support_vectors.rows();
    ASSERT_EQ(rows, std::min<Eigen::Index>(n, budget));
    ASSERT_EQ(result.coefficients.size(), rows);
    ASSERT_EQ(result.support_vectors.cols(), dims);
    EXPECT_EQ(result.removed, n - rows);
    EXPECT_TRUE(result.support_vectors.allFinite());
    EXPECT_TRUE(result.coefficients.allFinite());
    EXPECT_GT(result.coefficients.minCoeff(), 0.0);

    const double naive =
        NaiveWeightDistance(sv, c, result.support_vectors, result.coefficients, kernel);
    const double scale = NormScale(sv, c, result.support_vectors, result.coefficients, kernel);
    EXPECT_NEAR(result.weight_degradation, std::max(0.0, naive), 1e-11 * scale + 1e-15);
    EXPECT_LE(result.weight_degradation,
              static_cast<double>(result.removed) * result.step_degradation_sum * (1 + 1e-9) +
                  1e-11 * scale + 1e-15);

    if (kernel.type == KernelType::kRbf) {
      const Eigen::RowVectorXd lo = sv.colwise().minCoeff(), hi = sv.colwise().maxCoeff();
      for (Eigen::Index i = 0; i < rows; ++i) {
        EXPECT_TRUE((result.support_vectors.row(i).array() >= lo.array() - 1e-12).all());
        EXPECT_TRUE((result.support_vectors.row(i).array() <= hi.array() + 1e-12).all());
      }
      EXPECT_LE(result.coefficients.sum(), c.sum() * (1 + 1e-12));
    }
    if (kernel.type == KernelType::kLinear) {
      const MatrixD probes = RandomNormal(rng, 10, dims);
      const VectorD before = KernelSums(sv, c, probes, kernel);
      const VectorD after = KernelSums(result.support_vectors, result.coefficients, probes, kernel);
      EXPECT_LT((before - after).cwiseAbs().maxCoeff(), 1e-12 * (1 + before.cwiseAbs().maxCoeff()));
      EXPECT_NEAR(result.coefficients.sum(), c.sum(), 1e-12);
    }
  }
}

TEST(CompressToBudget, ProjectionOfALinearCombinationIsExact) {
  // Linear kernel, removal with projection. x_m = sum_i w_i x_i over 4 linearly independent x_i in
  // R^5, so phi(x_m) lies in their span and the projection is exact (analytic): beta = a_m w
  // uniquely, the coefficients become c_i + a_m w_i, and the decision function is unchanged. The
  // ridge of 1e-10 (relative) bounds the deviation far below the tolerances used here.
  std::mt19937_64 rng(5);
  const MatrixD others = RandomNormal(rng, 4, 5);
  Eigen::Vector4d w(0.3, 0.8, 0.5, 1.1);
  MatrixD sv(5, 5);
  sv.topRows(4) = others;
  sv.row(4) = w.transpose() * others;
  VectorD c(5);
  c << 0.6, 0.9, 0.7, 0.8, 0.1;  // m = 4 holds the smallest coefficient
  const Kernel kernel = Linear();
  const BudgetResult result = CompressToBudget(sv, c, kernel, 4, BudgetMethod::kRemoveAndProject);
  ASSERT_EQ(result.support_vectors.rows(), 4);
  EXPECT_EQ(result.projection_fallbacks, 0);
  EXPECT_EQ(result.support_vectors, others);
  for (int i = 0; i < 4; ++i) EXPECT_NEAR(result.coefficients[i], c[i] + 0.1 * w[i], 1e-8);
  const MatrixD probes = RandomNormal(rng, 20, 5);
  const VectorD before = KernelSums(sv, c, probes, kernel);
  const VectorD after = KernelSums(result.support_vectors, result.coefficients, probes, kernel);
  EXPECT_LT((before - after).cwiseAbs().maxCoeff(), 1e-8);
  EXPECT_LT(result.weight_degradation, 1e-14);
}

TEST(CompressToBudget, ProjectionFallsBackWhenACoefficientWouldTurnNegative) {
  // x_m = 2 x_0 - 3 x_1: the exact projection is beta = a_m (2, -3, 0), which would take
  // c_1 = 0.2 to 0.2 - 3 * 0.1 < 0. The documented fallback removes m and hands a_m to the others
  // in proportion: c_i (1 + a_m / sum_r c_r), keeping the sum (analytic).
  std::mt19937_64 rng(9);
  const MatrixD others = RandomNormal(rng, 3, 4);
  MatrixD sv(4, 4);
  sv.topRows(3) = others;
  sv.row(3) = 2 * others.row(0) - 3 * others.row(1);
  VectorD c(4);
  c << 0.5, 0.2, 0.2, 0.1;
  const BudgetResult result = CompressToBudget(sv, c, Linear(), 3, BudgetMethod::kRemoveAndProject);
  ASSERT_EQ(result.support_vectors.rows(), 3);
  EXPECT_EQ(result.projection_fallbacks, 1);
  EXPECT_EQ(result.support_vectors, others);
  const double factor = 1 + 0.1 / 0.9;
  EXPECT_NEAR(result.coefficients[0], 0.5 * factor, 1e-15);
  EXPECT_NEAR(result.coefficients[1], 0.2 * factor, 1e-15);
  EXPECT_NEAR(result.coefficients[2], 0.2 * factor, 1e-15);
  EXPECT_NEAR(result.coefficients.sum(), 1.0, 1e-15);
  const double naive =
      NaiveWeightDistance(sv, c, result.support_vectors, result.coefficients, Linear());
  EXPECT_NEAR(result.step_degradation_sum, naive, 1e-12);
  EXPECT_NEAR(result.weight_degradation, naive, 1e-12);
}

TEST(CompressToBudget, PolynomialRemovalOverManyStepsStaysExact) {
  // Many removals exercise the Cholesky downdate (a rank-one update of the trailing block). A
  // degree-2 kernel in 6 dimensions has a C(6 + 2, 2) = 28-dimensional feature space, so while
  // more than 28 generic vectors remain, every removed phi(x_m) lies in the span of the rest and
  // an accepted projection loses nothing (analytic). Down to 40 of 80, this data set needs no
  // fallback (checked), so the total loss must vanish; down to 10 it cannot, and the reported
  // exact loss must match the textbook double loop.
  std::mt19937_64 rng(17);
  const MatrixD sv = RandomNormal(rng, 80, 6);
  const VectorD c = RandomWeights(rng, 80);
  Kernel kernel;
  kernel.type = KernelType::kPolynomial;
  kernel.gamma = 1.0 / 6;
  kernel.degree = 2;
  kernel.coef0 = 1;
  const double scale = NaiveWeightDistance(sv, c, MatrixD(0, 6), VectorD(0), kernel);

  const BudgetResult within_span = CompressToBudget(sv, c, kernel, 40);
  ASSERT_EQ(within_span.support_vectors.rows(), 40);
  ASSERT_EQ(within_span.projection_fallbacks, 0);
  EXPECT_GT(within_span.coefficients.minCoeff(), 0.0);
  EXPECT_LT(
      NaiveWeightDistance(sv, c, within_span.support_vectors, within_span.coefficients, kernel),
      1e-12 * scale);
  EXPECT_LT(within_span.weight_degradation, 1e-12 * scale);

  const BudgetResult below_span = CompressToBudget(sv, c, kernel, 10);
  ASSERT_EQ(below_span.support_vectors.rows(), 10);
  EXPECT_GT(below_span.coefficients.minCoeff(), 0.0);
  const double naive =
      NaiveWeightDistance(sv, c, below_span.support_vectors, below_span.coefficients, kernel);
  EXPECT_GT(naive, 1e-6 * scale);
  EXPECT_NEAR(below_span.weight_degradation, naive, 1e-10 * scale);
}

TEST(CompressToBudget, RejectsBadInput) {
  const MatrixD sv = MatrixD::Ones(3, 2);
  const VectorD c = VectorD::Constant(3, 1.0 / 3);
  EXPECT_THROW(CompressToBudget(sv, VectorD::Ones(2), Rbf(1), 2), PreconditionError);
  EXPECT_THROW(CompressToBudget(sv, c, Rbf(1), 0), PreconditionError);
  EXPECT_THROW(CompressToBudget(sv, c, Rbf(-1), 2), PreconditionError);
  EXPECT_THROW(CompressToBudget(sv, VectorD::Zero(3), Rbf(1), 2), PreconditionError);
  VectorD negative = c;
  negative[1] = -0.1;
  EXPECT_THROW(CompressToBudget(sv, negative, Rbf(1), 2), PreconditionError);
  MatrixD nan_sv = sv;
  nan_sv(2, 1) = std::nan("");
  try {
    CompressToBudget(nan_sv, c, Rbf(1), 2);
    ADD_FAILURE() << "no exception";
  } catch (const PreconditionError& error) {
    EXPECT_NE(std::string(error.what()).find("support vector 2 column 1"), std::string::npos)
        << error.what();
  }
  EXPECT_THROW(CompressToBudget(MatrixD(0, 2), VectorD(0), Rbf(1), 2), PreconditionError);
}

// ---------------------------------------------------------------------------------------------
// RecalibrateRho
// ---------------------------------------------------------------------------------------------

int64_t CountBelow(const VectorD& s, double rho) { return (s.array() < rho).count(); }
int64_t CountAtOrBelow(const VectorD& s, double rho) { return (s.array() <= rho).count(); }

TEST(RecalibrateRho, DistinctSumsGiveNuWithinOneOverL) {
  // methods.md: after recalibration the window's outlier fraction (f = s - rho < 0) is nu to within
  // 1/l, from below (nu bounds the outlier fraction: Schölkopf et al. 2001, Prop. 4).
  std::mt19937_64 rng(3);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  for (int trial = 0; trial < 300; ++trial) {
    const Eigen::Index l = 1 + static_cast<Eigen::Index>(uniform(rng) * 400);
    const double nu = 0.001 + 0.999 * uniform(rng);
    VectorD s(l);
    for (Eigen::Index i = 0; i < l; ++i) s[i] = uniform(rng);
    const double rho = RecalibrateRho(s, nu);
    const double fraction = static_cast<double>(CountBelow(s, rho)) / static_cast<double>(l);
    EXPECT_LE(fraction, nu) << "l = " << l << " nu = " << nu;
    EXPECT_GE(fraction, nu - 1.0 / static_cast<double>(l)) << "l = " << l << " nu = " << nu;
  }
}

TEST(RecalibrateRho, TiesGiveTheLargestAchievableFractionWithinNu) {
  // With ties no threshold may split a tied group, so the best achievable is the largest count
  // #{s < t} <= floor(nu l). rho = s_(k+1) attains it: #{s < rho} <= k < #{s <= rho}, i.e. any
  // larger rho would flag more than nu l rows.
  VectorD s(10);
  s << 2, 1, 2, 1, 2, 1, 2, 1, 2, 2;  // four 1s, six 2s
  // nu = 0.3: k = 3 falls inside the four tied 1s: the only counts available are 0, 4, 10.
  double rho = RecalibrateRho(s, 0.3);
  EXPECT_EQ(rho, 1.0);
  EXPECT_EQ(CountBelow(s, rho), 0);
  // nu = 0.45: k = 4, exactly the four 1s.
  rho = RecalibrateRho(s, 0.45);
  EXPECT_EQ(rho, 2.0);
  EXPECT_EQ(CountBelow(s, rho), 4);

  std::mt19937_64 rng(13);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  for (int trial = 0; trial < 300; ++trial) {
    const Eigen::Index l = 1 + static_cast<Eigen::Index>(uniform(rng) * 60);
    const double nu = 0.001 + 0.998 * uniform(rng);
    VectorD sums(l);
    for (Eigen::Index i = 0; i < l; ++i) sums[i] = std::floor(uniform(rng) * 5);  // many ties
    const double r = RecalibrateRho(sums, nu);
    const double allowed = std::floor(nu * static_cast<double>(l));
    EXPECT_LE(static_cast<double>(CountBelow(sums, r)), allowed);
    EXPECT_GT(static_cast<double>(CountAtOrBelow(sums, r)), allowed);
  }
}

TEST(RecalibrateRho, EdgesOfNu) {
  VectorD s(5);
  s << 0.5, 0.1, 0.4, 0.2, 0.3;
  // nu l < 1: no outlier allowed; rho = min keeps every f >= 0.
  EXPECT_EQ(RecalibrateRho(s, 0.1), 0.1);
  // nu = 1: rho = max, l - 1 outliers (documented; a rho above the max would flag everything).
  EXPECT_EQ(RecalibrateRho(s, 1.0), 0.5);
  // 0.29 * 100 rounds to 28.999999999999996 in binary; 29 outliers are within nu = 0.29.
  VectorD hundred(100);
  for (int i = 0; i < 100; ++i) hundred[i] = 99 - i;
  const double rho = RecalibrateRho(hundred, 0.29);
  EXPECT_EQ(CountBelow(hundred, rho), 29);
  EXPECT_LE(29.0 / 100.0, 0.29);

  EXPECT_THROW(RecalibrateRho(VectorD(0), 0.1), PreconditionError);
  EXPECT_THROW(RecalibrateRho(s, 0.0), PreconditionError);
  EXPECT_THROW(RecalibrateRho(s, 1.5), PreconditionError);
  VectorD bad = s;
  bad[2] = std::numeric_limits<double>::infinity();
  EXPECT_THROW(RecalibrateRho(bad, 0.1), PreconditionError);
}

TEST(RecalibrateRho, CompressedModelOnItsWindowKeepsTheOutlierFraction) {
  // methods.md: compress, recalibrate on the training window, and the window's outlier fraction is
  // nu to within 1/l. A random positive expansion over part of the window stands in for the SVM.
  std::mt19937_64 rng(99);
  const Eigen::Index l = 400, dims = 8;
  const MatrixD window = RandomNormal(rng, l, dims);
  const MatrixD sv = window.topRows(120);
  const VectorD c = RandomWeights(rng, 120);
  const Kernel kernel = Rbf(1.0 / dims);
  const BudgetResult compressed = CompressToBudget(sv, c, kernel, 30);
  const VectorD sums = kernel.Matrix(window, compressed.support_vectors) * compressed.coefficients;
  for (double nu : {0.01, 0.05, 0.1, 0.5}) {
    const double rho = RecalibrateRho(sums, nu);
    const double fraction = static_cast<double>(CountBelow(sums, rho)) / static_cast<double>(l);
    EXPECT_LE(fraction, nu);
    EXPECT_GE(fraction, nu - 1.0 / static_cast<double>(l));
  }
}

// ---------------------------------------------------------------------------------------------
// WeightDistanceSquared
// ---------------------------------------------------------------------------------------------

TEST(WeightDistanceSquared, HandWorkedValues) {
  // Linear kernel: w_a = 2 (1, 0), w_b = (0, 1): ||w_a - w_b||^2 = 4 + 1 = 5.
  MatrixD a(1, 2), b(1, 2);
  a << 1, 0;
  b << 0, 1;
  EXPECT_NEAR(WeightDistanceSquared(a, VectorD::Constant(1, 2.0), b, VectorD::Ones(1), Linear()),
              5.0, 1e-15);
  // rbf, gamma = 1, ||a - b||^2 = 2: ||phi(a) - phi(b)||^2 = 2 - 2 e^{-2}.
  EXPECT_NEAR(WeightDistanceSquared(a, VectorD::Ones(1), b, VectorD::Ones(1), Rbf(1.0)),
              2 - 2 * std::exp(-2.0), 1e-15);
  // The same expansion written twice: distance 0.
  MatrixD twice(2, 2);
  twice << 1, 0, 1, 0;
  EXPECT_NEAR(WeightDistanceSquared(a, VectorD::Ones(1), twice, VectorD::Constant(2, 0.5), Rbf(3)),
              0.0, 1e-15);
  EXPECT_THROW(WeightDistanceSquared(a, VectorD::Ones(2), b, VectorD::Ones(1), Linear()),
               PreconditionError);
}

TEST(WeightDistanceSquared, MatchesTheTextbookLoopAcrossBlocks) {
  // More than one 128-row block, to cover the blocked accumulation.
  std::mt19937_64 rng(21);
  const MatrixD a = RandomNormal(rng, 150, 4), b = RandomNormal(rng, 40, 4);
  const VectorD c_a = RandomWeights(rng, 150), c_b = RandomWeights(rng, 40);
  const Kernel kernel = Rbf(0.3);
  EXPECT_NEAR(WeightDistanceSquared(a, c_a, b, c_b, kernel),
              NaiveWeightDistance(a, c_a, b, c_b, kernel), 1e-12);
}

}  // namespace
}  // namespace nuwatch
