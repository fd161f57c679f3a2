// Kernels: the GEMM fast paths against the textbook formula, the properties every Mercer kernel
// has, the gamma heuristics against independent computations, and the parsing and validation
// contracts.
#include "nuwatch/kernel.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <Eigen/Eigenvalues>
#include <algorithm>
#include <cmath>
#include <limits>
#include <random>
#include <string>
#include <vector>

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

MatrixD RandomGaussian(int64_t rows, int64_t cols, uint64_t seed, double sd = 1.0) {
  std::mt19937_64 generator(seed);
  std::normal_distribution<double> normal(0.0, sd);
  MatrixD m(rows, cols);
  for (int64_t i = 0; i < rows; ++i)
    for (int64_t j = 0; j < cols; ++j) m(i, j) = normal(generator);
  return m;
}

Kernel MakeKernel(KernelType type, double gamma, int degree = 3, double coef0 = 0.0) {
  Kernel k;
  k.type = type;
  k.gamma = gamma;
  k.degree = degree;
  k.coef0 = coef0;
  return k;
}

// The magnitude against which a kernel value's rounding error is measured: the size of the
// quantities the formula combines (|k| <= 1 for rbf; |gamma x.y + coef0| <= gamma |x||y| + |coef0|
// by Cauchy-Schwarz for the others).
double Magnitude(const Kernel& k, const double* x, const double* y, int d) {
  double nx = 0, ny = 0;
  for (int i = 0; i < d; ++i) {
    nx += x[i] * x[i];
    ny += y[i] * y[i];
  }
  const double product = std::sqrt(nx * ny);
  switch (k.type) {
    case KernelType::kRbf:
      return 1.0;
    case KernelType::kLinear:
      return std::max(product, 1e-300);
    case KernelType::kPolynomial:
      return std::max(std::pow(k.gamma * product + std::abs(k.coef0), k.degree), 1e-300);
  }
  return 1.0;
}

TEST(KernelEvaluate, HandWorkedValues) {
  // x = (1, 2), y = (3, 0): ||x - y||^2 = 4 + 4 = 8, x.y = 3.
  const double x[2] = {1, 2}, y[2] = {3, 0};
  EXPECT_DOUBLE_EQ(MakeKernel(KernelType::kRbf, 0.25).Evaluate(x, y, 2), std::exp(-2.0));
  EXPECT_DOUBLE_EQ(MakeKernel(KernelType::kLinear, 1.0).Evaluate(x, y, 2), 3.0);
  // (0.5 * 3 + 1)^2 = 6.25
  EXPECT_DOUBLE_EQ(MakeKernel(KernelType::kPolynomial, 0.5, 2, 1.0).Evaluate(x, y, 2), 6.25);
  // An odd degree keeps the sign of a negative base: (1 * (-3) + 0)^3 = -27.
  const double minus_y[2] = {-3, 0};
  EXPECT_DOUBLE_EQ(MakeKernel(KernelType::kPolynomial, 1.0, 3, 0.0).Evaluate(x, minus_y, 2), -27.0);
}

struct MatrixCase {
  KernelType type;
  double gamma;
  int degree;
  double coef0;
};

class KernelMatrixAgainstFormula : public ::testing::TestWithParam<MatrixCase> {};

// The GEMM form (||a||^2 + ||b||^2 - 2 a.b for rbf) must agree with the textbook formula of
// Kernel::Evaluate entry by entry: in double to rounding (1e-12 of the magnitude), in float to the
// float32 rounding of the inputs and of the cancellation in the GEMM form (1e-5 of the magnitude;
// float32 has a relative precision of 6e-8 and the entries combine ~10 terms of size ~d).
TEST_P(KernelMatrixAgainstFormula, DoubleAndFloatAgreeWithEvaluate) {
  const MatrixCase& c = GetParam();
  const Kernel kernel = MakeKernel(c.type, c.gamma, c.degree, c.coef0);
  const int d = 5;
  const MatrixD a = RandomGaussian(37, d, 11), b = RandomGaussian(23, d, 12);
  const MatrixD kd = kernel.Matrix(a, b);
  const MatrixF kf = kernel.Matrix(MatrixF(a.cast<float>()), MatrixF(b.cast<float>()));
  ASSERT_EQ(kd.rows(), a.rows());
  ASSERT_EQ(kd.cols(), b.rows());
  ASSERT_EQ(kf.rows(), a.rows());
  ASSERT_EQ(kf.cols(), b.rows());
  for (int64_t i = 0; i < a.rows(); ++i) {
    for (int64_t j = 0; j < b.rows(); ++j) {
      const double expected = kernel.Evaluate(&a(i, 0), &b(j, 0), d);
      const double magnitude = Magnitude(kernel, &a(i, 0), &b(j, 0), d);
      EXPECT_NEAR(kd(i, j), expected, 1e-12 * magnitude) << "double (" << i << ", " << j << ")";
      EXPECT_NEAR(kf(i, j), expected, 1e-5 * magnitude) << "float (" << i << ", " << j << ")";
    }
  }
}

INSTANTIATE_TEST_SUITE_P(AllKernels, KernelMatrixAgainstFormula,
                         ::testing::Values(MatrixCase{KernelType::kRbf, 0.2, 3, 0.0},
                                           MatrixCase{KernelType::kRbf, 3.0, 3, 0.0},
                                           MatrixCase{KernelType::kLinear, 1.0, 3, 0.0},
                                           MatrixCase{KernelType::kPolynomial, 0.2, 3, 1.0},
                                           MatrixCase{KernelType::kPolynomial, 0.5, 2, -0.5},
                                           MatrixCase{KernelType::kPolynomial, 1.0, 1, 0.0}));

TEST(KernelMatrix, MismatchedColumnsThrowNamingTheFunction) {
  const Kernel kernel = MakeKernel(KernelType::kRbf, 1.0);
  try {
    kernel.Matrix(RandomGaussian(3, 2, 1), RandomGaussian(3, 4, 2));
    FAIL() << "expected PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("Kernel::Matrix"));
    EXPECT_THAT(e.what(), HasSubstr("2"));
    EXPECT_THAT(e.what(), HasSubstr("4"));
  }
}

// Mercer's condition (Schölkopf & Smola, "Learning with Kernels", 2002, ch. 2): the Gram matrix of
// a positive definite kernel is symmetric positive semidefinite, and the Gaussian kernel has k(x,
// x) = exp(0) = 1.
TEST(KernelMatrix, RbfGramMatrixIsSymmetricPsdWithUnitDiagonal) {
  const MatrixD x = RandomGaussian(150, 4, 21);
  for (double gamma : {0.05, 0.5, 5.0}) {
    const Kernel kernel = MakeKernel(KernelType::kRbf, gamma);
    const MatrixD k = kernel.Matrix(x, x);
    EXPECT_LE((k - k.transpose()).cwiseAbs().maxCoeff(), 1e-15) << "gamma " << gamma;
    for (int64_t i = 0; i < x.rows(); ++i) {
      EXPECT_NEAR(k(i, i), 1.0, 1e-12) << "gamma " << gamma << " row " << i;
      EXPECT_EQ(kernel.Evaluate(&x(i, 0), &x(i, 0), 4), 1.0);
    }
    const Eigen::MatrixXd symmetric = 0.5 * (k + k.transpose());
    Eigen::SelfAdjointEigenSolver<Eigen::MatrixXd> eigen(symmetric, Eigen::EigenvaluesOnly);
    ASSERT_EQ(eigen.info(), Eigen::Success);
    EXPECT_GE(eigen.eigenvalues().minCoeff(), -1e-10) << "gamma " << gamma;
  }
}

// ||a - b||^2 computed as ||a||^2 + ||b||^2 - 2 a.b can come out slightly negative for a == b; the
// GEMM form clamps it, so k(x, x) never exceeds 1 even for large, nearly identical vectors.
TEST(KernelMatrix, RbfNeverExceedsOneForLargeNearlyEqualRows) {
  MatrixD x = MatrixD::Constant(3, 6, 1e4);
  x(1, 0) += 1e-9;
  x(2, 5) -= 1e-9;
  const MatrixD k = MakeKernel(KernelType::kRbf, 1.0).Matrix(x, x);
  const MatrixF kf =
      MakeKernel(KernelType::kRbf, 1.0).Matrix(MatrixF(x.cast<float>()), MatrixF(x.cast<float>()));
  EXPECT_LE(k.maxCoeff(), 1.0);
  EXPECT_LE(kf.maxCoeff(), 1.0f);
  EXPECT_TRUE(k.allFinite());
  EXPECT_TRUE(kf.allFinite());
}

// scikit-learn documents gamma="scale" as 1 / (n_features * X.var()), the (population) variance
// over all entries (sklearn.svm.OneClassSVM). Computed here independently with a two-pass sum.
TEST(ResolveGamma, ScaleIsOneOverDimensionsTimesVarianceOfAllEntries) {
  const MatrixD x = RandomGaussian(300, 3, 31, 2.5);
  double sum = 0;
  for (int64_t i = 0; i < x.rows(); ++i)
    for (int64_t j = 0; j < x.cols(); ++j) sum += x(i, j);
  const double n = static_cast<double>(x.size());
  const double mean = sum / n;
  double squares = 0;
  for (int64_t i = 0; i < x.rows(); ++i)
    for (int64_t j = 0; j < x.cols(); ++j) squares += (x(i, j) - mean) * (x(i, j) - mean);
  const double expected = 1.0 / (3.0 * squares / n);
  EXPECT_NEAR(ResolveGamma(GammaSpec{}, x), expected, 1e-12 * expected);
}

TEST(ResolveGamma, ScaleHandWorkedOnColumnsThatAreEachConstant) {
  // Entries {1, 1, 1, 5, 5, 5}: mean 3, population variance (3 * 4 + 3 * 4) / 6 = 4, d = 2, so
  // gamma = 1 / (2 * 4) = 0.125. The variance is over all entries, not per column (scikit-learn).
  MatrixD x(3, 2);
  x << 1, 5, 1, 5, 1, 5;
  EXPECT_DOUBLE_EQ(ResolveGamma(GammaSpec{}, x), 0.125);
}

TEST(ResolveGamma, ScaleWithZeroVarianceIsOne) {
  // Documented in kernel.h: 1.0 when the variance is 0 (scikit-learn does the same).
  EXPECT_EQ(ResolveGamma(GammaSpec{}, MatrixD::Constant(10, 4, 3.5)), 1.0);
  EXPECT_EQ(ResolveGamma(GammaSpec{}, MatrixD::Constant(1, 1, -2.0)), 1.0);
}

GammaSpec Median() {
  GammaSpec spec;
  spec.mode = GammaSpec::Mode::kMedian;
  return spec;
}

// All pairwise squared distances, sorted: the brute-force reference for the median heuristic.
std::vector<double> SortedPairDistances(const MatrixD& x) {
  std::vector<double> out;
  for (int64_t i = 0; i < x.rows(); ++i)
    for (int64_t j = i + 1; j < x.rows(); ++j) {
      double s = 0;
      for (int64_t c = 0; c < x.cols(); ++c) s += (x(i, c) - x(j, c)) * (x(i, c) - x(j, c));
      out.push_back(s);
    }
  std::sort(out.begin(), out.end());
  return out;
}

TEST(ResolveGamma, MedianHandWorked) {
  // Points 0, 1, 3 on a line: squared distances 1, 9, 4; median 4; gamma = 1/4.
  MatrixD x(3, 1);
  x << 0, 1, 3;
  EXPECT_DOUBLE_EQ(ResolveGamma(Median(), x), 0.25);
}

TEST(ResolveGamma, MedianMatchesBruteForceOnSmallSets) {
  // 6 points give 15 pairs (odd): the median is the 8th smallest, no convention needed.
  for (uint64_t seed : {41u, 42u, 43u}) {
    const MatrixD x = RandomGaussian(6, 3, seed);
    const std::vector<double> d2 = SortedPairDistances(x);
    ASSERT_EQ(d2.size(), 15u);
    EXPECT_NEAR(ResolveGamma(Median(), x), 1.0 / d2[7], 1e-12 / d2[7]) << "seed " << seed;
  }
  // 5 points give 10 pairs (even): kernel.h does not say which middle value is taken; accept the
  // lower or upper median or their mean (numpy's convention), nothing else.
  const MatrixD x = RandomGaussian(5, 2, 44);
  const std::vector<double> d2 = SortedPairDistances(x);
  const double gamma = ResolveGamma(Median(), x);
  const double low = d2[4], high = d2[5];
  EXPECT_GE(gamma, 1.0 / high * (1 - 1e-12));
  EXPECT_LE(gamma, 1.0 / low * (1 + 1e-12));
}

TEST(ResolveGamma, MedianOnLargeSetIsDeterministicAndNearTheFullMedian) {
  // 200 points give 19900 pairs, more than the 2000 sampled: the result is the same on every call
  // (fixed seed, kernel.h) and close to the median over all pairs. The sample median of 2000 draws
  // has a relative standard error of a few percent here, so 10% is a wide margin.
  const MatrixD x = RandomGaussian(200, 4, 45);
  const double first = ResolveGamma(Median(), x);
  EXPECT_EQ(ResolveGamma(Median(), x), first);
  const std::vector<double> d2 = SortedPairDistances(x);
  const double full = 0.5 * (d2[d2.size() / 2 - 1] + d2[d2.size() / 2]);
  EXPECT_NEAR(first, 1.0 / full, 0.1 / full);
}

TEST(ResolveGamma, MedianDegenerateCasesGiveOne) {
  // One row has no pair; identical rows have median distance 0: both fall back to 1 (kernel.h
  // ensures result > 0).
  EXPECT_EQ(ResolveGamma(Median(), RandomGaussian(1, 3, 46)), 1.0);
  EXPECT_EQ(ResolveGamma(Median(), MatrixD::Constant(7, 2, 4.0)), 1.0);
}

TEST(ResolveGamma, ValueIsReturnedAndEmptyMatrixThrows) {
  EXPECT_EQ(ResolveGamma(*GammaSpec::Parse("0.75"), RandomGaussian(4, 2, 47)), 0.75);
  try {
    ResolveGamma(GammaSpec{}, MatrixD(0, 3));
    FAIL() << "expected PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("ResolveGamma"));
  }
}

TEST(GammaSpecParse, AcceptsKeywordsAndPositiveNumbers) {
  auto scale = GammaSpec::Parse("scale");
  ASSERT_TRUE(scale.has_value());
  EXPECT_EQ(scale->mode, GammaSpec::Mode::kScale);
  auto median = GammaSpec::Parse("median");
  ASSERT_TRUE(median.has_value());
  EXPECT_EQ(median->mode, GammaSpec::Mode::kMedian);
  auto value = GammaSpec::Parse("0.5");
  ASSERT_TRUE(value.has_value());
  EXPECT_EQ(value->mode, GammaSpec::Mode::kValue);
  EXPECT_EQ(value->value, 0.5);
  auto exponent = GammaSpec::Parse("2e-3");
  ASSERT_TRUE(exponent.has_value());
  EXPECT_EQ(exponent->value, 2e-3);
}

TEST(GammaSpecParse, RejectsNonPositiveNonFiniteAndGarbage) {
  for (const char* text :
       {"0", "-1", "abc", "nan", "inf", "-inf", "", "0.5x", " 0.5", "Scale", "1e999"}) {
    EXPECT_FALSE(GammaSpec::Parse(text).has_value()) << "'" << text << "'";
  }
}

TEST(GammaSpecParse, ToStringRoundTrips) {
  for (const char* text : {"scale", "median", "0.5", "0.1", "123.456"}) {
    const GammaSpec spec = *GammaSpec::Parse(text);
    const auto again = GammaSpec::Parse(spec.ToString());
    ASSERT_TRUE(again.has_value()) << spec.ToString();
    EXPECT_EQ(again->mode, spec.mode);
    EXPECT_EQ(again->value, spec.value);  // 17 significant digits reproduce a double exactly
  }
}

TEST(KernelNames, RoundTripAndUnknown) {
  for (KernelType t : {KernelType::kRbf, KernelType::kLinear, KernelType::kPolynomial}) {
    auto parsed = ParseKernelType(KernelName(t));
    ASSERT_TRUE(parsed.has_value());
    EXPECT_EQ(*parsed, t);
  }
  EXPECT_FALSE(ParseKernelType("gaussian").has_value());
  EXPECT_FALSE(ParseKernelType("").has_value());
}

TEST(KernelValidate, RejectsBadGammaAndDegreeNamingTheCaller) {
  const double nan = std::numeric_limits<double>::quiet_NaN();
  for (KernelType type : {KernelType::kRbf, KernelType::kPolynomial}) {
    for (double gamma : {0.0, -1.0, nan, std::numeric_limits<double>::infinity()}) {
      try {
        MakeKernel(type, gamma).Validate("SomeCaller");
        FAIL() << "expected PreconditionError for gamma " << gamma;
      } catch (const PreconditionError& e) {
        EXPECT_THAT(e.what(), HasSubstr("SomeCaller"));
        EXPECT_THAT(e.what(), HasSubstr("gamma"));
      }
    }
  }
  try {
    MakeKernel(KernelType::kRbf, -1.0).Validate("SomeCaller");
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("gamma = -1"));
  }
  for (int degree : {0, -2}) {
    try {
      MakeKernel(KernelType::kPolynomial, 1.0, degree).Validate("OtherCaller");
      FAIL() << "expected PreconditionError for degree " << degree;
    } catch (const PreconditionError& e) {
      EXPECT_THAT(e.what(), HasSubstr("OtherCaller"));
      EXPECT_THAT(e.what(), HasSubstr("degree = " + std::to_string(degree)));
    }
  }
  EXPECT_THROW(MakeKernel(KernelType::kPolynomial, 1.0, 2, nan).Validate("X"), PreconditionError);
}

TEST(KernelValidate, AcceptsValidKernelsAndIgnoresUnusedParameters) {
  EXPECT_NO_THROW(MakeKernel(KernelType::kRbf, 0.1).Validate("X"));
  EXPECT_NO_THROW(MakeKernel(KernelType::kPolynomial, 2.0, 1, -3.0).Validate("X"));
  // gamma and degree play no part in the linear kernel.
  EXPECT_NO_THROW(MakeKernel(KernelType::kLinear, 0.0, 0).Validate("X"));
  // degree plays no part in rbf.
  EXPECT_NO_THROW(MakeKernel(KernelType::kRbf, 1.0, 0).Validate("X"));
}

}  // namespace
}  // namespace nuwatch
