// The SMO solver for the nu one-class dual, checked against the mathematics of the problem rather
// than against itself: the nu-property, the KKT conditions recomputed from the textbook kernel,
// feasibility, bounds on the objective gap derived from the stopping rule, warm starts, and the
// edge cases methods.md lists.
//
// Notation (unscaled, as SolverResult reports): l rows, bound U = 1 / (nu l), G = K alpha with K
// from Kernel::Evaluate, f_i = G_i - rho.
//
// Tolerances derived from the stopping rule in solver.h. The solver stops when, in LIBSVM's scaling
// (a' = nu l a, G' = nu l G), max{G'_i : a'_i > 0} - min{G'_i : a'_i < 1} < eps with
// eps = tolerance * min(1, nu l). Unscaled, with M = max{G_i : alpha_i > 0} and
// m = min{G_i : alpha_i < U}:  M - m < eps_u = tolerance * min(1, nu l) / (nu l).
//  - KKT: rho (the mean G over free alphas) lies in [m, M]; hence alpha_i = 0 => G_i >= m > rho -
//    eps_u; free => |G_i - rho| < eps_u; alpha_i = U => G_i <= M < rho + eps_u.
//  - Objective gap: for any feasible b, with c = alpha - b, P(b) >= P(alpha) + G.(b - alpha) by
//    convexity, and G.c <= M sum c+ - m sum c- = (M - m) sum c+ <= eps_u (c+ lives where alpha > 0,
//    c- where alpha < U, sum c = 0, sum c+ <= sum alpha = 1). So 0 <= P(alpha) - P* <= eps_u.
//  - Decision values: P = 1/2 ||w||^2 over a convex set of w, so ||w - w*||^2 <= 2 (P - P*) <=
//    2 eps_u, and two solutions' kernel sums differ by at most 2 sqrt(2 eps_u) sqrt(k(x, x)). For a
//    non-integer nu l, rho is within eps_u of the ceil(nu l)-th smallest G_i (at most floor(nu l)
//    values lie below m, at least ceil(nu l) at or below M), and order statistics move at most as
//    much as G does; so two solutions' f differ by at most 4 sqrt(2 eps_u) + 2 eps_u (rbf, k(x,x) =
//    1).
// The solver keeps its kernel columns in float32 (solver.cc), so each bound gets a slack for float
// rounding: 2^-24 ~ 6e-8 relative per kernel entry, taken as 1e-6 of max |K| throughout.
#include "solver.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <unistd.h>

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <limits>
#include <numeric>
#include <random>
#include <string>
#include <vector>

#include "common/random_data.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

using testing_data::RandomGaussian;

Kernel Rbf(double gamma) {
  Kernel k;
  k.type = KernelType::kRbf;
  k.gamma = gamma;
  return k;
}

Kernel RbfScale(const MatrixD& x) { return Rbf(ResolveGamma(GammaSpec{}, x)); }

// The Gram matrix from the textbook formula, independent of the solver's GEMM columns.
Eigen::MatrixXd Gram(const MatrixD& x, const Kernel& kernel) {
  const int64_t l = x.rows();
  Eigen::MatrixXd k(l, l);
  for (int64_t i = 0; i < l; ++i)
    for (int64_t j = 0; j <= i; ++j)
      k(i, j) = k(j, i) = kernel.Evaluate(&x(i, 0), &x(j, 0), static_cast<int>(x.cols()));
  return k;
}

SolverOptions Options(double nu, double tolerance = 1e-3) {
  SolverOptions o;
  o.nu = nu;
  o.tolerance = tolerance;
  return o;
}

double NuL(const MatrixD& x, double nu) { return nu * static_cast<double>(x.rows()); }

// eps_u from the header comment.
double UnscaledTolerance(double tolerance, double nu_l) {
  return tolerance * std::min(1.0, nu_l) / nu_l;
}

double FloatSlack(const Eigen::MatrixXd& k) { return 1e-6 * k.cwiseAbs().maxCoeff(); }

// The bound between two solutions' decision values (header comment), plus float slack.
double DecisionBound(double eps_u) { return 4 * std::sqrt(2 * eps_u) + 2 * eps_u + 1e-5; }

void ExpectFeasible(const SolverResult& r, int64_t l, double nu) {
  ASSERT_EQ(r.alpha.size(), l);
  const double bound = 1.0 / (nu * static_cast<double>(l));
  EXPECT_NEAR(r.alpha.sum(), 1.0, 1e-10);
  EXPECT_GE(r.alpha.minCoeff(), 0.0);
  EXPECT_LE(r.alpha.maxCoeff(), bound * (1 + 1e-12));
  EXPECT_TRUE(std::isfinite(r.rho));
}

bool AtBound(double alpha, double bound) { return alpha >= bound * (1 - 1e-12); }

// KKT conditions at the solution (methods.md; derivation of eps_u in the header comment), the
// objective 1/2 alpha' K alpha and rho as the mean G over free alphas (methods.md), all recomputed
// with the double-precision textbook kernel.
void ExpectKkt(const MatrixD& x, const Kernel& kernel, double nu, double tolerance,
               const SolverResult& r) {
  const int64_t l = x.rows();
  const double nu_l = NuL(x, nu), bound = 1.0 / nu_l;
  const Eigen::MatrixXd k = Gram(x, kernel);
  const double slack = FloatSlack(k);
  const double tol = UnscaledTolerance(tolerance, nu_l) + slack;
  const VectorD g = k * r.alpha;
  int violations = 0;
  double free_sum = 0;
  int64_t free_count = 0, support = 0, bounded = 0;
  for (int64_t i = 0; i < l; ++i) {
    const double a = r.alpha[i];
    bool ok;
    if (a == 0) {
      ok = g[i] >= r.rho - tol;
    } else if (AtBound(a, bound)) {
      ok = g[i] <= r.rho + tol;
      ++bounded;
    } else {
      ok = std::abs(g[i] - r.rho) <= tol;
      free_sum += g[i];
      ++free_count;
    }
    if (a > 0) ++support;
    if (!ok && ++violations <= 5) {
      ADD_FAILURE() << "KKT violated at row " << i << ": alpha = " << a << " (bound " << bound
                    << "), G = " << g[i] << ", rho = " << r.rho << ", tolerance " << tol;
    }
  }
  EXPECT_EQ(violations, 0);
  EXPECT_NEAR(r.objective, 0.5 * r.alpha.dot(g), slack);
  if (free_count > 0) {
    EXPECT_NEAR(r.rho, free_sum / static_cast<double>(free_count), slack);
  }
  EXPECT_EQ(r.support_vectors, support);
  EXPECT_EQ(r.bounded_support_vectors, bounded);
}

// ---------------------------------------------------------------------------------------------
// The nu-property.

struct NuCase {
  double nu;
  int64_t rows;
  int64_t dims;
};

void PrintTo(const NuCase& c, std::ostream* os) {
  *os << "nu=" << c.nu << " l=" << c.rows << " d=" << c.dims;
}

class NuProperty : public ::testing::TestWithParam<NuCase> {};

// Schölkopf et al. 2001, Proposition 4: nu is an upper bound on the fraction of outliers and a
// lower bound on the fraction of support vectors. What holds exactly is stronger and simpler: at
// any feasible alpha, bounded SVs / l <= nu <= SVs / l, because #bounded * U <= sum alpha = 1 <=
// #SV * U with U = 1 / (nu l). Outliers (f < 0) are bounded SVs at the exact optimum; at the
// solver's tolerance a point with f < -eps_u must be bounded (KKT), so #{f < -eps_u} <= nu l
// exactly. #{f < 0} also counts points within eps_u of the boundary, above all the free SVs, which
// sit on it to within the tolerance, about half of them on the negative side; at small nu l there
// are several times nu l free SVs, so 4% of l is allowed for those. Both fractions tend to nu for
// i.i.d. data from a continuous distribution (Prop. 4 again), but slowly for small nu l: the
// support-vector fraction is allowed 6% of l above nu (the free SVs again).
TEST_P(NuProperty, OutlierAndSupportVectorFractionsBracketNu) {
  const NuCase& c = GetParam();
  const MatrixD x = RandomGaussian(c.rows, c.dims, 100 + c.rows + c.dims);
  const Kernel kernel = RbfScale(x);
  const SolverResult r = SolveOneClass(x, kernel, Options(c.nu));
  ASSERT_TRUE(r.converged);
  ExpectFeasible(r, c.rows, c.nu);
  ExpectKkt(x, kernel, c.nu, 1e-3, r);

  const double l = static_cast<double>(c.rows), nu_l = c.nu * l;
  const double eps_u = UnscaledTolerance(1e-3, nu_l);
  const VectorD f = (Gram(x, kernel) * r.alpha).array() - r.rho;
  const int64_t outliers = (f.array() < 0).count();
  const int64_t clear_outliers = (f.array() < -eps_u - 1e-6).count();
  const int64_t support = (r.alpha.array() > 0).count();
  int64_t bounded = 0;
  for (int64_t i = 0; i < c.rows; ++i) bounded += AtBound(r.alpha[i], 1.0 / nu_l);

  // Exact (any feasible point): bounded / l <= nu <= support / l.
  EXPECT_LE(static_cast<double>(bounded), nu_l * (1 + 1e-12));
  EXPECT_GE(static_cast<double>(support), nu_l * (1 - 1e-12));
  // Exact at the tolerance: points clearly outside are bounded.
  EXPECT_LE(clear_outliers, bounded);
  // Proposition 4 with the slacks explained above.
  EXPECT_LE(static_cast<double>(outliers) / l, c.nu + 0.04);
  EXPECT_LE(static_cast<double>(support) / l, c.nu + 0.06);
  EXPECT_GE(static_cast<double>(outliers) / l, c.nu - 0.05);
}

INSTANTIATE_TEST_SUITE_P(Grid, NuProperty,
                         ::testing::Values(NuCase{0.01, 1000, 2}, NuCase{0.05, 800, 4},
                                           NuCase{0.1, 600, 8}, NuCase{0.2, 500, 3},
                                           NuCase{0.5, 400, 2}, NuCase{0.9, 400, 5}),
                         [](const ::testing::TestParamInfo<NuCase>& info) {
                           return "nu" + std::to_string(static_cast<int>(info.param.nu * 100)) +
                                  "_l" + std::to_string(info.param.rows) + "_d" +
                                  std::to_string(info.param.dims);
                         });

// ---------------------------------------------------------------------------------------------
// KKT for every kernel.

struct KernelCase {
  KernelType type;
  double nu;
};

class KktAllKernels : public ::testing::TestWithParam<KernelCase> {};

// The linear case uses data away from the origin: for centred data the origin lies in the convex
// hull, w* = 0 and the objective is flat at 0, so the problem is degenerate (every kernel sum is
// 0).
TEST_P(KktAllKernels, HoldsAtTheReportedTolerance) {
  const KernelCase& c = GetParam();
  MatrixD x = RandomGaussian(300, 3, 200);
  if (c.type == KernelType::kLinear) x.array() += 2.0;
  Kernel kernel;
  kernel.type = c.type;
  kernel.gamma = c.type == KernelType::kLinear ? 1.0 : ResolveGamma(GammaSpec{}, x);
  kernel.degree = 2;
  kernel.coef0 = 1.0;
  for (double tolerance : {1e-3, 1e-6}) {
    const SolverResult r = SolveOneClass(x, kernel, Options(c.nu, tolerance));
    ASSERT_TRUE(r.converged);
    ExpectFeasible(r, x.rows(), c.nu);
    ExpectKkt(x, kernel, c.nu, tolerance, r);
  }
}

INSTANTIATE_TEST_SUITE_P(Kernels, KktAllKernels,
                         ::testing::Values(KernelCase{KernelType::kRbf, 0.1},
                                           KernelCase{KernelType::kRbf, 0.37},
                                           KernelCase{KernelType::kLinear, 0.2},
                                           KernelCase{KernelType::kPolynomial, 0.15}));

// ---------------------------------------------------------------------------------------------
// Cold start.

TEST(ColdStartAlpha, FillsTheFirstFloorNuLAtTheBoundAndTheRemainderNext) {
  // l = 10, nu = 0.35: nu l = 3.5, U = 1 / 3.5. Rows 0..2 at U, row 3 gets 0.5 U, the rest 0
  // (LIBSVM's initial point, methods.md).
  const VectorD a = ColdStartAlpha(10, 0.35);
  ASSERT_EQ(a.size(), 10);
  const double bound = 1.0 / 3.5;
  for (int i = 0; i < 3; ++i) EXPECT_NEAR(a[i], bound, 1e-15) << i;
  EXPECT_NEAR(a[3], 0.5 * bound, 1e-15);
  for (int i = 4; i < 10; ++i) EXPECT_EQ(a[i], 0.0) << i;
  EXPECT_NEAR(a.sum(), 1.0, 1e-15);
  // nu = 1: every row at 1/l.
  EXPECT_TRUE(ColdStartAlpha(4, 1.0).isApprox(VectorD::Constant(4, 0.25)));
  // nu l < 1: all mass on the first row.
  const VectorD tiny = ColdStartAlpha(20, 0.01);
  EXPECT_NEAR(tiny[0], 1.0, 1e-15);
  EXPECT_EQ(tiny.tail(19).cwiseAbs().sum(), 0.0);
}

// ---------------------------------------------------------------------------------------------
// Warm starts (DeCoste & Wagstaff 2000: any feasible start is valid for SMO).

// A random feasible point: exponential weights normalised to sum 1 (a Dirichlet(1, ..., 1) draw),
// then water-filling: entries above U are clipped to U and the excess is shared proportionally
// among the others, until none exceeds U. Requires nu l > 1 so that the box holds the mass.
VectorD RandomFeasible(int64_t l, double nu, uint64_t seed) {
  std::mt19937_64 generator(seed);
  std::exponential_distribution<double> exponential(1.0);
  VectorD a(l);
  for (int64_t i = 0; i < l; ++i) a[i] = exponential(generator);
  a /= a.sum();
  const double bound = 1.0 / (nu * static_cast<double>(l));
  for (int round = 0; round < 100; ++round) {
    double excess = 0, free_mass = 0;
    for (int64_t i = 0; i < l; ++i) {
      if (a[i] >= bound) {
        excess += a[i] - bound;
        a[i] = bound;
      } else {
        free_mass += a[i];
      }
    }
    if (excess <= 0) break;
    for (int64_t i = 0; i < l; ++i)
      if (a[i] < bound) a[i] += excess * a[i] / free_mass;
  }
  for (int64_t i = 0; i < l; ++i) a[i] = std::min(a[i], bound);
  return a;
}

TEST(WarmStart, FromPerturbedFeasiblePointsReachesTheColdObjective) {
  const MatrixD x = RandomGaussian(400, 3, 300);
  const Kernel kernel = RbfScale(x);
  const double nu = 0.1525;  // nu l = 61: not an integer, so that rho is unique
  const double tolerance = 1e-4;
  const SolverResult cold = SolveOneClass(x, kernel, Options(nu, tolerance));
  ASSERT_TRUE(cold.converged);
  const double gap = UnscaledTolerance(tolerance, NuL(x, nu)) + 1e-9;

  // The optimum mixed with LIBSVM's initial point: a convex combination of feasible points.
  const VectorD mixed = 0.5 * cold.alpha + 0.5 * ColdStartAlpha(x.rows(), nu);
  const VectorD random = RandomFeasible(x.rows(), nu, 301);
  ASSERT_NEAR(random.sum(), 1.0, 1e-12);
  ASSERT_GE(random.minCoeff(), 0.0);
  ASSERT_LE(random.maxCoeff(), 1.0 / NuL(x, nu));
  for (const VectorD* seed : {&mixed, &random}) {
    const SolverResult warm = SolveOneClass(x, kernel, Options(nu, tolerance), seed);
    ASSERT_TRUE(warm.converged);
    ExpectFeasible(warm, x.rows(), nu);
    ExpectKkt(x, kernel, nu, tolerance, warm);
    // Both objectives are within eps_u above the optimum (header comment).
    EXPECT_NEAR(warm.objective, cold.objective, gap);
    EXPECT_NEAR(warm.rho, cold.rho, DecisionBound(UnscaledTolerance(tolerance, NuL(x, nu))));
  }
}

// Regression test (was a bug): the round trip through the unscaled alpha (a = a' / (nu l) in the
// result, a' = a nu l on the warm start) can turn an alpha at its bound into 1 - 1 ulp, which the
// solver then treats as free (it is below the bound) with a gradient far below the others, so SMO
// spends one step per bounded SV pushing it back. Here l = 500, nu = 0.098: nu l = 49 and (1 / 49)
// * 49 = 1 - 2^-53, so all 39 bounded SVs come back 1 ulp low and the warm start from the optimum
// takes 39 iterations instead of 0 (nu = 0.1525 and 0.3 round-trip exactly and take 0). Snapping
// seed values within 1e-9 of the bound onto it would fix it.
TEST(WarmStart, FromTheOptimumTakesAlmostNoIterations) {
  const MatrixD x = RandomGaussian(500, 4, 310);
  const Kernel kernel = RbfScale(x);
  for (double nu : {0.098, 0.1525, 0.3}) {
    const SolverResult cold = SolveOneClass(x, kernel, Options(nu));
    ASSERT_TRUE(cold.converged);
    const SolverResult warm = SolveOneClass(x, kernel, Options(nu), &cold.alpha);
    EXPECT_TRUE(warm.converged);
    // The optimum already meets the stopping rule; the gradient recomputed from scratch differs
    // from the solver's running one only by rounding, so at most a couple of steps are allowed.
    EXPECT_LE(warm.iterations, 2) << "nu " << nu << ", cold start took " << cold.iterations;
    EXPECT_EQ(warm.bounded_support_vectors, cold.bounded_support_vectors) << "nu " << nu;
    EXPECT_NEAR(warm.objective, cold.objective, 1e-9) << "nu " << nu;
  }
}

TEST(WarmStart, InfeasibleSeedsAreRejected) {
  const MatrixD x = RandomGaussian(50, 2, 320);
  const Kernel kernel = RbfScale(x);
  const double nu = 0.2, bound = 1.0 / 10.0;
  auto expect_rejected = [&](const VectorD& seed, const std::string& fragment) {
    try {
      SolveOneClass(x, kernel, Options(nu), &seed);
      ADD_FAILURE() << "expected PreconditionError containing '" << fragment << "'";
    } catch (const PreconditionError& e) {
      EXPECT_THAT(e.what(), HasSubstr("SolveOneClass"));
      EXPECT_THAT(e.what(), HasSubstr(fragment));
    }
  };
  const VectorD good = ColdStartAlpha(50, nu);
  expect_rejected(VectorD::Constant(49, 1.0 / 49), "49 entries");
  expect_rejected(VectorD::Constant(51, 1.0 / 51), "51 entries");
  expect_rejected(good * 1.01, "sums to");
  expect_rejected(good * 0.99, "sums to");
  VectorD negative = VectorD::Constant(50, 1.0 / 50);  // 1/50 < U = 1/10
  negative[7] = -1e-3;
  negative[8] += 1.0 / 50 + 1e-3;  // keeps the sum at 1 and stays below U
  ASSERT_NEAR(negative.sum(), 1.0, 1e-15);
  expect_rejected(negative, "alpha[7]");
  VectorD above = VectorD::Constant(50, 1.0 / 50);
  above[3] = 1.05 * bound;
  above[4] -= 1.05 * bound - 1.0 / 50;
  ASSERT_NEAR(above.sum(), 1.0, 1e-15);
  expect_rejected(above, "alpha[3]");
  VectorD with_nan = good;
  with_nan[0] = std::numeric_limits<double>::quiet_NaN();
  expect_rejected(with_nan, "sums to");
  // A seed that is feasible to within 1e-12 is accepted (solver.h allows 1e-9 relative).
  VectorD nearly = good;
  nearly[0] += 1e-12;
  EXPECT_NO_THROW(SolveOneClass(x, kernel, Options(nu), &nearly));
}

// ---------------------------------------------------------------------------------------------
// Shrinking, cache and the iteration cap.

TEST(Shrinking, OnAndOffGiveTheSameObjectiveAndDecisions) {
  // l > 1000 so that shrinking (every min(l, 1000) iterations) actually runs.
  const MatrixD x = RandomGaussian(1500, 3, 400);
  const Kernel kernel = RbfScale(x);
  const double nu = 0.0513, tolerance = 1e-5;  // nu l = 76.95
  SolverOptions on = Options(nu, tolerance), off = on;
  off.shrinking = false;
  const SolverResult a = SolveOneClass(x, kernel, on), b = SolveOneClass(x, kernel, off);
  ASSERT_TRUE(a.converged);
  ASSERT_TRUE(b.converged);
  ExpectFeasible(a, x.rows(), nu);
  ExpectKkt(x, kernel, nu, tolerance, a);
  const double eps_u = UnscaledTolerance(tolerance, NuL(x, nu));
  EXPECT_NEAR(a.objective, b.objective, eps_u + 1e-9);
  // Decision values on the training rows: f = K alpha - rho with the textbook kernel.
  const Eigen::MatrixXd k = Gram(x, kernel);
  const VectorD fa = (k * a.alpha).array() - a.rho, fb = (k * b.alpha).array() - b.rho;
  EXPECT_LE((fa - fb).cwiseAbs().maxCoeff(), DecisionBound(eps_u));
}

TEST(Cache, TwoColumnCacheGivesTheSameResultAsAFullOne) {
  // The cache only memoises kernel columns, which are computed the same way on every miss, so a
  // cache of the 2-column minimum must reproduce the full-cache run step for step.
  const MatrixD x = RandomGaussian(700, 4, 410);
  const Kernel kernel = RbfScale(x);
  SolverOptions big = Options(0.0713), small = big;
  small.cache_bytes = 1;
  for (bool shrinking : {true, false}) {
    big.shrinking = small.shrinking = shrinking;
    const SolverResult a = SolveOneClass(x, kernel, big), b = SolveOneClass(x, kernel, small);
    ASSERT_TRUE(a.converged);
    ASSERT_TRUE(b.converged);
    EXPECT_EQ(a.iterations, b.iterations);
    EXPECT_LE((a.alpha - b.alpha).cwiseAbs().maxCoeff(), 1e-15);
    EXPECT_DOUBLE_EQ(a.rho, b.rho);
    EXPECT_DOUBLE_EQ(a.objective, b.objective);
    ExpectKkt(x, kernel, 0.0713, 1e-3, b);
  }
}

TEST(IterationCap, ReportsNotConvergedWithAFeasibleAlpha) {
  const MatrixD x = RandomGaussian(3000, 4, 420);
  const Kernel kernel = RbfScale(x);
  SolverOptions options = Options(0.3);
  options.max_iterations = 5;
  const SolverResult r = SolveOneClass(x, kernel, options);
  EXPECT_FALSE(r.converged);
  EXPECT_EQ(r.iterations, 5);
  ExpectFeasible(r, x.rows(), 0.3);
  // Five pairwise steps from the cold start move at most ten alphas. The cold start (solver.h):
  // ColdStartAlpha's values on the rows sorted by decreasing distance from the mean.
  const VectorD libsvm_order = ColdStartAlpha(x.rows(), 0.3);
  const Eigen::RowVectorXd mean = x.colwise().mean();
  const VectorD distances = (x.rowwise() - mean).rowwise().squaredNorm();
  std::vector<int64_t> order(x.rows());
  for (int64_t i = 0; i < x.rows(); ++i) order[i] = i;
  std::stable_sort(order.begin(), order.end(),
                   [&](int64_t p, int64_t q) { return distances[p] > distances[q]; });
  VectorD cold(x.rows());
  for (int64_t rank = 0; rank < x.rows(); ++rank) cold[order[rank]] = libsvm_order[rank];
  EXPECT_LE(((r.alpha - cold).array().abs() > 1e-15).count(), 10);
  // Every SMO step minimises the objective exactly along its pair direction (Fan, Chen, Lin 2005),
  // so five steps end strictly below the cold start's objective. Computed on the cold start's
  // support rows only (the others have alpha = 0).
  std::vector<int64_t> used;
  for (int64_t i = 0; i < x.rows(); ++i)
    if (cold[i] > 0 || r.alpha[i] > 0) used.push_back(i);
  MatrixD rows(used.size(), x.cols());
  VectorD a_cold(used.size()), a_capped(used.size());
  for (std::size_t t = 0; t < used.size(); ++t) {
    rows.row(t) = x.row(used[t]);
    a_cold[t] = cold[used[t]];
    a_capped[t] = r.alpha[used[t]];
  }
  const Eigen::MatrixXd k = Gram(rows, kernel);
  EXPECT_LT(0.5 * a_capped.dot(k * a_capped), 0.5 * a_cold.dot(k * a_cold));
  EXPECT_NEAR(r.objective, 0.5 * a_capped.dot(k * a_capped), FloatSlack(k));
}

// A polynomial kernel on a vector far from the rest: k(x, x) ~ 1e28 for the far row, so the float
// columns resolve the gradient only to about 1e21 and LIBSVM's absolute rule (gap < 1e-3) cannot be
// met; the solver ran to the cap of 10^7 iterations on every refit (a state file found by the
// state_fuzz target: 56 rows, 1.6 s a refit in Release, 36 s under ASan). With the floor in
// solver.h it stops where the cache's precision does, and the KKT conditions recomputed in double
// hold to that precision.
TEST(StoppingRule, AFarVectorUnderAPolynomialKernelConvergesInsteadOfRunningToTheCap) {
  MatrixD x(51, 2);
  x.topRows(50) = RandomGaussian(50, 2, 4242);
  x.row(50) << 0.2, 6.0e4;
  Kernel kernel;
  kernel.type = KernelType::kPolynomial;
  kernel.gamma = 0.5;
  kernel.degree = 3;
  SolverOptions options = Options(0.05);
  options.max_iterations = 100'000;  // ample for 51 rows; a regression fails here, not by time
  const SolverResult r = SolveOneClass(x, kernel, options);
  EXPECT_TRUE(r.converged) << r.iterations << " iterations";
  ExpectFeasible(r, x.rows(), 0.05);
  // ExpectKkt's float slack (1e-6 max |K|) exceeds the floor (float epsilon max k(x, x) nu l).
  ExpectKkt(x, kernel, 0.05, 1e-3, r);
}

TEST(StoppingRule, KernelValuesBeyondTheFloatCacheAreRefusedByName) {
  MatrixD x = RandomGaussian(20, 2, 4243);
  x(19, 1) = 1.0e7;  // (0.5 * 1e14)^3 ~ 1e41 > FLT_MAX ~ 3.4e38: the float column would be inf
  Kernel kernel;
  kernel.type = KernelType::kPolynomial;
  kernel.gamma = 0.5;
  kernel.degree = 3;
  try {
    (void)SolveOneClass(x, kernel, Options(0.1));
    ADD_FAILURE() << "no PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("overflow"));
  }
}

// ---------------------------------------------------------------------------------------------
// Edge cases from methods.md.

TEST(EdgeCases, NuOneSetsEveryAlphaToItsBoundAndRhoToTheLargestKernelSum) {
  // nu = 1: U = 1/l and sum alpha = 1 force alpha_i = 1/l. No alpha is free, so rho comes from the
  // bounds; solver.cc takes the lower end of [max G, inf), the largest kernel sum: the training
  // point with the largest kernel sum lies on the boundary, every other one outside (f < 0).
  const MatrixD x = RandomGaussian(60, 3, 500);
  const Kernel kernel = RbfScale(x);
  const SolverResult r = SolveOneClass(x, kernel, Options(1.0));
  ASSERT_TRUE(r.converged);
  EXPECT_LE((r.alpha.array() - 1.0 / 60).abs().maxCoeff(), 1e-15);
  EXPECT_EQ(r.bounded_support_vectors, 60);
  EXPECT_EQ(r.support_vectors, 60);
  const Eigen::MatrixXd k = Gram(x, kernel);
  const VectorD sums = k.rowwise().sum() / 60.0;
  EXPECT_NEAR(r.rho, sums.maxCoeff(), 1e-6);
  EXPECT_NEAR(r.objective, 0.5 * k.sum() / 3600.0, 1e-6);
  // Every training point has f <= 0 (to float rounding), and the argmax has f = 0.
  EXPECT_LE((sums.array() - r.rho).maxCoeff(), 1e-6);
}

TEST(EdgeCases, UniformDuplicationGivesTheDeduplicatedSolution) {
  // Every point repeated r times with the same nu: U_dup = U / r, and the objective depends only on
  // the group sums A_g, which range over [0, r U_dup] = [0, U] with sum 1: exactly the deduplicated
  // problem. So the optimal objectives and the decision functions coincide (derivation here; the
  // bounds are those of the header comment). nu m = 6.15 and nu r m = 18.45 are non-integers.
  const MatrixD base = RandomGaussian(150, 3, 510);
  const int r = 3;
  MatrixD dup(base.rows() * r, base.cols());
  for (int64_t i = 0; i < base.rows(); ++i)
    for (int c = 0; c < r; ++c) dup.row(c * base.rows() + i) = base.row(i);
  const Kernel kernel = RbfScale(base);
  const double nu = 0.041, tolerance = 1e-6;
  const SolverResult a = SolveOneClass(base, kernel, Options(nu, tolerance));
  const SolverResult b = SolveOneClass(dup, kernel, Options(nu, tolerance));
  ASSERT_TRUE(a.converged);
  ASSERT_TRUE(b.converged);
  ExpectKkt(dup, kernel, nu, tolerance, b);
  const double eps = std::max(UnscaledTolerance(tolerance, NuL(base, nu)),
                              UnscaledTolerance(tolerance, NuL(dup, nu)));
  EXPECT_NEAR(a.objective, b.objective, eps + 1e-9);
  const Eigen::MatrixXd k = Gram(base, kernel);
  const VectorD fa = (k * a.alpha).array() - a.rho;
  VectorD group(base.rows());
  for (int64_t i = 0; i < base.rows(); ++i)
    group[i] = b.alpha[i] + b.alpha[base.rows() + i] + b.alpha[2 * base.rows() + i];
  const VectorD fb = (k * group).array() - b.rho;
  EXPECT_LE((fa - fb).cwiseAbs().maxCoeff(), DecisionBound(eps));
}

TEST(EdgeCases, UnevenDuplicatesObjectiveAndDecisionsDoNotDependOnRowOrder) {
  // Some points once, some twice, some five times: alpha is not unique (methods.md), so compare the
  // objective and the decision values of two row orders, not the alphas.
  const MatrixD base = RandomGaussian(120, 2, 520);
  std::vector<int64_t> rows;
  for (int64_t i = 0; i < base.rows(); ++i) {
    const int copies = i % 7 == 0 ? 5 : (i % 3 == 0 ? 2 : 1);
    for (int c = 0; c < copies; ++c) rows.push_back(i);
  }
  std::vector<int64_t> shuffled = rows;
  std::shuffle(shuffled.begin(), shuffled.end(), std::mt19937_64(521));
  MatrixD x1(rows.size(), 2), x2(rows.size(), 2);
  for (std::size_t i = 0; i < rows.size(); ++i) {
    x1.row(i) = base.row(rows[i]);
    x2.row(i) = base.row(shuffled[i]);
  }
  const Kernel kernel = RbfScale(x1);
  const double nu = 0.1037, tolerance = 1e-6;
  const SolverResult a = SolveOneClass(x1, kernel, Options(nu, tolerance));
  const SolverResult b = SolveOneClass(x2, kernel, Options(nu, tolerance));
  ASSERT_TRUE(a.converged);
  ASSERT_TRUE(b.converged);
  ExpectKkt(x1, kernel, nu, tolerance, a);
  ExpectKkt(x2, kernel, nu, tolerance, b);
  const double eps = UnscaledTolerance(tolerance, NuL(x1, nu));
  EXPECT_NEAR(a.objective, b.objective, eps + 1e-9);
  // f at every distinct point, from each solution.
  double worst = 0;
  for (int64_t p = 0; p < base.rows(); ++p) {
    double sa = 0, sb = 0;
    for (int64_t i = 0; i < x1.rows(); ++i) {
      sa += a.alpha[i] * kernel.Evaluate(&x1(i, 0), &base(p, 0), 2);
      sb += b.alpha[i] * kernel.Evaluate(&x2(i, 0), &base(p, 0), 2);
    }
    worst = std::max(worst, std::abs((sa - a.rho) - (sb - b.rho)));
  }
  EXPECT_LE(worst, DecisionBound(eps));
}

TEST(EdgeCases, SinglePointRepeatedIsOnTheBoundaryAndFarPointsOutside) {
  // K is all ones, so every feasible alpha is optimal with objective 1/2, G_i = 1 and rho = 1:
  // f = 0 at the point and exp(-gamma d^2) - 1 < 0 elsewhere.
  MatrixD x(30, 3);
  x.rowwise() = Eigen::RowVector3d(1.0, -2.0, 0.5);
  const Kernel kernel = Rbf(0.5);
  for (double nu : {0.1, 0.15, 1.0}) {  // nu l = 3 (integer), 4.5, 30
    const SolverResult r = SolveOneClass(x, kernel, Options(nu));
    ASSERT_TRUE(r.converged) << nu;
    ExpectFeasible(r, 30, nu);
    EXPECT_NEAR(r.rho, 1.0, 1e-6) << nu;
    EXPECT_NEAR(r.objective, 0.5, 1e-6) << nu;
    const double far[3] = {4.0, -2.0, 0.5};  // distance 3, k = exp(-4.5)
    double at = 0, away = 0;
    for (int i = 0; i < 30; ++i) {
      at += r.alpha[i] * kernel.Evaluate(&x(i, 0), &x(0, 0), 3);
      away += r.alpha[i] * kernel.Evaluate(&x(i, 0), far, 3);
    }
    EXPECT_NEAR(at - r.rho, 0.0, 1e-6) << nu;
    EXPECT_NEAR(away - r.rho, std::exp(-4.5) - 1.0, 1e-6) << nu;
  }
}

MatrixD SingleRowMatrix() {
  MatrixD x(1, 4);
  x << 0.3, -1, 2, 5;
  return x;
}

TEST(EdgeCases, SingleRow) {
  // l = 1: alpha = 1 is the only feasible point; rho = k(x, x) = 1 for rbf, so f(x) = 0.
  // (nu = 1 with shrinking is in the next test.)
  const MatrixD x = SingleRowMatrix();
  for (double nu : {0.05, 0.5, 1.0}) {
    SolverOptions options = Options(nu);
    options.shrinking = nu < 1.0;
    const SolverResult r = SolveOneClass(x, Rbf(0.7), options);
    ASSERT_TRUE(r.converged) << nu;
    ASSERT_EQ(r.alpha.size(), 1);
    EXPECT_NEAR(r.alpha[0], 1.0, 1e-15) << nu;
    EXPECT_NEAR(r.rho, 1.0, 1e-7) << nu;
    EXPECT_NEAR(r.objective, 0.5, 1e-7) << nu;
    EXPECT_EQ(r.support_vectors, 1) << nu;
    EXPECT_EQ(r.bounded_support_vectors, nu == 1.0 ? 1 : 0) << nu;  // U = 1/nu reached only at 1
  }
}

// Regression test (was a bug): SolveOneClass never returns for a single row with nu = 1 and
// shrinking on (the defaults otherwise). With l = 1 the shrink interval min(l, 1000) is 1, so every
// pass of the main loop shrinks; the only alpha sits at its bound with G < min_up = inf, so it is
// shrunk, the working set is then empty, the full set is restored without counting an iteration,
// and the next pass shrinks it again: an endless loop that max_iterations does not bound. Expected:
// alpha = {1}, rho = k(x, x) = 1, converged. Run in a child process with a watchdog (alarm) so that
// the bug fails this test instead of hanging the suite; the solve itself takes microseconds.
TEST(EdgeCasesDeathTest, SingleRowWithNuOneAndShrinkingReturns) {
  const MatrixD x = SingleRowMatrix();
  SolverOptions options = Options(1.0);
  options.max_iterations = 5;
  EXPECT_EXIT(
      {
        ::alarm(5);
        const SolverResult r = SolveOneClass(x, Rbf(0.7), options);
        const bool ok = r.converged && r.alpha.size() == 1 && std::abs(r.alpha[0] - 1.0) < 1e-15 &&
                        std::abs(r.rho - 1.0) < 1e-7;
        std::exit(ok ? 0 : 1);
      },
      ::testing::ExitedWithCode(0), "");
}

TEST(EdgeCases, TinyNuLStillReachesTheOptimum) {
  // l = 20: nu = 0.01 gives nu l = 0.2, nu = 1e-4 gives 0.002, nu = 0.05 gives exactly 1. For
  // nu l <= 1 the box is inactive (alpha_i <= sum alpha = 1 <= U), so the problem, and its
  // solution, does not depend on nu: minimise 1/2 alpha' K alpha over the simplex. The relative
  // stopping rule (solver.h) still guarantees the unscaled KKT gap eps_u = tolerance; an absolute
  // rule on the scaled gradient would only guarantee tolerance / (nu l), 500 times weaker at nu l =
  // 0.002.
  const MatrixD x = RandomGaussian(20, 2, 530);
  const Kernel kernel = RbfScale(x);
  const SolverResult reference = SolveOneClass(x, kernel, Options(0.05, 1e-10));
  ASSERT_TRUE(reference.converged);
  ExpectKkt(x, kernel, 0.05, 1e-10, reference);
  for (double nu : {0.01, 1e-4}) {
    const SolverResult r = SolveOneClass(x, kernel, Options(nu, 1e-3));
    ASSERT_TRUE(r.converged) << nu;
    ExpectFeasible(r, 20, nu);
    ExpectKkt(x, kernel, nu, 1e-3, r);
    // Objective gap <= eps_u = 1e-3 above the tight reference.
    EXPECT_GE(r.objective, reference.objective - 1e-7) << nu;
    EXPECT_LE(r.objective, reference.objective + 1e-3 + 1e-7) << nu;
    const SolverResult tight = SolveOneClass(x, kernel, Options(nu, 1e-10));
    ASSERT_TRUE(tight.converged) << nu;
    EXPECT_NEAR(tight.objective, reference.objective, 1e-8) << nu;
    EXPECT_NEAR(tight.rho, reference.rho, 1e-5) << nu;
  }
}

// ---------------------------------------------------------------------------------------------
// Bad inputs: PreconditionError naming SolveOneClass and the value (solver.h).

void ExpectSolverError(const MatrixD& x, const Kernel& kernel, const SolverOptions& options,
                       const std::string& fragment) {
  try {
    SolveOneClass(x, kernel, options);
    ADD_FAILURE() << "expected PreconditionError containing '" << fragment << "'";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("SolveOneClass"));
    EXPECT_THAT(e.what(), HasSubstr(fragment));
  }
}

TEST(BadInputs, ThrowPreconditionErrorNamingTheValue) {
  const MatrixD x = RandomGaussian(10, 2, 600);
  const Kernel kernel = Rbf(1.0);
  ExpectSolverError(x, kernel, Options(0.0), "nu = 0");
  ExpectSolverError(x, kernel, Options(1.5), "nu = 1.5");
  ExpectSolverError(x, kernel, Options(-0.1), "nu = -0.1");
  ExpectSolverError(x, kernel, Options(std::numeric_limits<double>::quiet_NaN()), "nu = nan");
  ExpectSolverError(x, kernel, Options(0.1, 0.0), "tolerance = 0");
  ExpectSolverError(x, kernel, Options(0.1, -1e-3), "tolerance = -0.001");
  ExpectSolverError(x, kernel, Options(0.1, std::numeric_limits<double>::quiet_NaN()),
                    "tolerance = nan");
  SolverOptions negative_cap = Options(0.1);
  negative_cap.max_iterations = -1;
  ExpectSolverError(x, kernel, negative_cap, "max_iterations = -1");
  ExpectSolverError(MatrixD(0, 2), kernel, Options(0.1), "0 x 2");
  ExpectSolverError(MatrixD(5, 0), kernel, Options(0.1), "5 x 0");
  MatrixD with_nan = x;
  with_nan(3, 1) = std::numeric_limits<double>::quiet_NaN();
  ExpectSolverError(with_nan, kernel, Options(0.1), "non-finite");
  MatrixD with_inf = x;
  with_inf(0, 0) = -std::numeric_limits<double>::infinity();
  ExpectSolverError(with_inf, kernel, Options(0.1), "non-finite");
  ExpectSolverError(x, Rbf(0.0), Options(0.1), "gamma = 0");
}

}  // namespace
}  // namespace nuwatch
