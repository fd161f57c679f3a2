// Model: the float32 scoring paths against the double-precision textbook formula, the attribution
// (Explain) against finite differences, FitModel's plumbing, and the precondition checks; and the
// vector exp the rbf paths use (core/src/vector_exp.h) against std::exp in double.
#include "nuwatch/model.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <random>
#include <string>
#include <vector>

#include "common/random_data.h"
#include "vector_exp.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

using testing_data::RandomGaussian;

// ExpInPlace against std::exp in double over the exponents rbf scoring produces (-gamma d^2 <= 0,
// shifted so that the largest is 0), for every variant this machine can run: within 4 ulp of
// float where the result is a normal float (the bound glibc's manual gives libmvec's functions,
// from memory), and a value too small to matter where it underflows (the tail of a kernel sum,
// next to terms of at least 1e-38).
TEST(VectorExpTest, EveryVariantMatchesStdExpInDoubleWithinFourUlp) {
  std::vector<float> x;
  for (int i = 0; i <= 200000; ++i) x.push_back(-120.0f * static_cast<float>(i) / 200000.0f);
  x.push_back(0.5f);  // a little above 0, as float rounding of the shift may leave
  for (const ExpVariant variant : AvailableExpVariants()) {
    std::vector<float> y = x;
    ExpInPlace(variant, y.data(), static_cast<int64_t>(y.size()));
    int wrong = 0;
    for (std::size_t i = 0; i < x.size() && wrong < 5; ++i) {
      const double exact = std::exp(static_cast<double>(x[i]));
      const bool ok =
          exact >= std::numeric_limits<float>::min()
              ? std::abs(y[i] - exact) <= 4 * std::numeric_limits<float>::epsilon() * exact
              : y[i] >= 0.0f && y[i] < 1e-37f;
      if (!ok) ++wrong;
      EXPECT_TRUE(ok) << ExpVariantName(variant) << ": exp(" << x[i] << ") = " << y[i]
                      << ", exactly " << exact;
    }
  }
}

// A value's exp must not depend on where it sits (vector body or padded tail), or the single and
// batch scoring paths would round one vector differently.
TEST(VectorExpTest, AValuesExpDoesNotDependOnItsPositionOrTheLength) {
  const std::vector<float> probes = {-0.3f, -1.7f, -12.25f, -80.0f};
  for (const ExpVariant variant : AvailableExpVariants()) {
    for (const float probe : probes) {
      float first = probe;
      ExpInPlace(variant, &first, 1);
      for (int64_t n = 1; n <= 37; ++n) {
        std::vector<float> y(static_cast<std::size_t>(n), probe);
        ExpInPlace(variant, y.data(), n);
        for (int64_t i = 0; i < n; ++i)
          EXPECT_EQ(y[static_cast<std::size_t>(i)], first)
              << ExpVariantName(variant) << ", n = " << n << ", position " << i;
      }
    }
    ExpInPlace(variant, nullptr, 0);  // nothing to do, nothing touched
  }
  EXPECT_EQ(AvailableExpVariants().front(), ChosenExpVariant());
}

// Raw data with per-feature location and spread, so that scaling matters.
MatrixD RawData(int64_t rows, int64_t cols, uint64_t seed) {
  MatrixD x = RandomGaussian(rows, cols, seed);
  for (int64_t j = 0; j < cols; ++j)
    x.col(j) =
        (x.col(j).array() * (0.5 + 2.0 * static_cast<double>(j)) + 10.0 * static_cast<double>(j))
            .matrix();
  return x;
}

std::vector<double> Row(const MatrixD& x, int64_t i) {
  return std::vector<double>(x.row(i).data(), x.row(i).data() + x.cols());
}

FitOptions Fit(KernelType kernel, double nu) {
  FitOptions o;
  o.kernel = kernel;
  o.nu = nu;
  o.degree = 3;
  o.coef0 = 1.0;
  return o;
}

// The magnitude of the terms f sums, sum_i coef_i |k(s_i, z)| + |rho|, in double: the scale for a
// relative comparison that stays meaningful where f itself crosses 0.
double TermMagnitude(const Model& model, const std::vector<double>& x) {
  const ModelParts& p = model.parts();
  std::vector<double> z(x.size());
  p.scaler.TransformRow(x.data(), z.data());
  double total = std::abs(p.rho);
  for (int i = 0; i < model.num_support(); ++i)
    total += p.coefficients[i] *
             std::abs(p.kernel.Evaluate(&p.support_vectors(i, 0), z.data(), model.dims()));
  return total;
}

// Decision (one vector, float32), DecisionBatch (GEMM, float32) and DecisionExact (double formula)
// agree to 1e-4 of the magnitude of the summed terms (float32 carries ~7 digits; the GEMM form of
// the rbf distance loses a few more to cancellation).
void ExpectPathsAgree(const Model& model, const MatrixD& x, const std::string& what) {
  const VectorD batch = model.DecisionBatch(x);
  ASSERT_EQ(batch.size(), x.rows());
  int failures = 0;
  for (int64_t i = 0; i < x.rows(); ++i) {
    const std::vector<double> row = Row(x, i);
    const double exact = model.DecisionExact(row);
    const double tolerance = 1e-4 * TermMagnitude(model, row);
    const double single = model.Decision(row);
    if ((std::abs(single - exact) > tolerance || std::abs(batch[i] - exact) > tolerance) &&
        ++failures <= 5) {
      ADD_FAILURE() << what << " row " << i << ": exact " << exact << ", Decision " << single
                    << ", DecisionBatch " << batch[i] << ", tolerance " << tolerance;
    }
  }
  EXPECT_EQ(failures, 0) << what;
}

class ScoringPaths : public ::testing::TestWithParam<KernelType> {};

TEST_P(ScoringPaths, SingleBatchAndExactAgree) {
  const MatrixD train = RawData(400, 5, 1);
  const Model model = FitModel(train, Fit(GetParam(), 0.1));
  // Training rows, fresh rows from the same distribution and rows far outside.
  ExpectPathsAgree(model, train, "train");
  ExpectPathsAgree(model, RawData(200, 5, 2), "fresh");
  ExpectPathsAgree(model, RawData(50, 5, 3) * 3.0, "far");
  // A batch of one row.
  ExpectPathsAgree(model, train.topRows(1), "batch of 1");
}

INSTANTIATE_TEST_SUITE_P(Kernels, ScoringPaths,
                         ::testing::Values(KernelType::kRbf, KernelType::kLinear,
                                           KernelType::kPolynomial),
                         [](const ::testing::TestParamInfo<KernelType>& info) {
                           return std::string(KernelName(info.param));
                         });

TEST(ScoringPaths, LargeBatchAndManySupportVectorsCrossTheBlockBoundaries) {
  // > 256 support vectors crosses the single-vector block (model.cc); 3000 rows crosses the
  // 1024-row block of DecisionBatch twice.
  const Model model = FitModel(RawData(700, 4, 4), Fit(KernelType::kRbf, 0.5));
  ASSERT_GT(model.num_support(), 256);
  ExpectPathsAgree(model, RawData(3000, 4, 5), "3000 rows");
  // Rows keep their order across blocks: row 2500 of the batch is DecisionExact of row 2500.
  const MatrixD x = RawData(3000, 4, 5);
  const VectorD batch = model.DecisionBatch(x);
  EXPECT_NEAR(batch[2500], model.DecisionExact(Row(x, 2500)), 1e-4);
  EXPECT_NEAR(batch[1024], model.DecisionExact(Row(x, 1024)), 1e-4);
  EXPECT_NEAR(batch[1023], model.DecisionExact(Row(x, 1023)), 1e-4);
  EXPECT_EQ(model.DecisionBatch(MatrixD(0, 4)).size(), 0);
}

// A model built by hand, scored by hand: one support vector at the origin, coefficient 1, rho 0.5,
// rbf with gamma 1, identity scaler. f(x) = exp(-||x||^2) - 0.5: f(0) = 0.5, f((1, 0)) =
// e^-1 - 0.5 = -0.132121, and the boundary is ||x||^2 = ln 2.
ModelParts HandParts() {
  ModelParts p;
  p.kernel.type = KernelType::kRbf;
  p.kernel.gamma = 1.0;
  p.scaler = Scaler::FromParameters(ScalerType::kNone, VectorD::Zero(2), VectorD::Ones(2));
  p.nu = 0.5;
  p.support_vectors = MatrixD::Zero(1, 2);
  p.coefficients = VectorD::Ones(1);
  p.rho = 0.5;
  return p;
}

TEST(ModelDecision, HandWorkedSingleSupportVector) {
  const Model model(HandParts());
  EXPECT_NEAR(model.DecisionExact(std::vector<double>{0, 0}), 0.5, 1e-15);
  EXPECT_NEAR(model.DecisionExact(std::vector<double>{1, 0}), std::exp(-1.0) - 0.5, 1e-15);
  EXPECT_NEAR(model.Decision(std::vector<double>{1, 0}), std::exp(-1.0) - 0.5, 1e-7);
  const double r = std::sqrt(std::log(2.0));
  EXPECT_NEAR(model.DecisionExact(std::vector<double>{0, r}), 0.0, 1e-15);
  // KernelSumsScaled is the sum without rho.
  MatrixD z(1, 2);
  z << 1, 0;
  EXPECT_NEAR(model.KernelSumsScaled(z)[0], std::exp(-1.0), 1e-15);
}

// The rbf nonconformity is -log(sum_i coef_i k(s_i, z)) (model.h): where the kernel sum is
// representable it equals -log(DecisionExact + rho) (the definition); far from every support
// vector, where exp underflows and the decision has flattened out at -rho, it stays finite and
// keeps growing like gamma times the squared distance to the nearest support vector (log-sum-exp,
// common practice). Single and batch paths agree.
TEST(ModelScore, RbfNonconformityIsMinusLogKernelSumAndDoesNotSaturate) {
  const Model model = FitModel(RawData(200, 3, 30), Fit(KernelType::kRbf, 0.1));
  const MatrixD near = RawData(20, 3, 31);
  VectorD batch_decision, batch_nonconformity;
  model.EvaluateBatch(near, &batch_decision, &batch_nonconformity);
  for (int64_t i = 0; i < near.rows(); ++i) {
    const std::vector<double> x = Row(near, i);
    const Score score = model.Evaluate(x);
    const double exact = -std::log(model.DecisionExact(x) + model.rho());
    EXPECT_NEAR(score.nonconformity, exact, 1e-4 * std::max(1.0, std::abs(exact))) << i;
    EXPECT_NEAR(batch_nonconformity[i], score.nonconformity, 1e-4 * std::max(1.0, std::abs(exact)))
        << i;
    EXPECT_NEAR(batch_decision[i], score.decision, 1e-5) << i;
  }
  // Walk away along feature 0, in raw units of 100 standard deviations per step.
  std::vector<double> x = Row(near, 0);
  double last = model.Evaluate(x).nonconformity;
  for (int step = 1; step <= 20; ++step) {
    x[0] += 100.0;
    const Score score = model.Evaluate(x);
    EXPECT_TRUE(std::isfinite(score.nonconformity)) << step;
    EXPECT_GT(score.nonconformity, last) << step;
    EXPECT_NEAR(score.decision, -model.rho(), 1e-12) << step;  // the decision has flattened out
    VectorD batch;
    model.EvaluateBatch(Eigen::Map<const MatrixD>(x.data(), 1, 3), nullptr, &batch);
    EXPECT_NEAR(batch[0], score.nonconformity, 1e-4 * score.nonconformity) << step;
    last = score.nonconformity;
  }
}

TEST(ModelDecision, HandWorkedScalerIsApplied) {
  // Standard scaler with centre (10, 0) and scale (2, 1): raw (12, 0) is z = (1, 0).
  ModelParts p = HandParts();
  VectorD center(2), scale(2);
  center << 10, 0;
  scale << 2, 1;
  p.scaler = Scaler::FromParameters(ScalerType::kStandard, center, scale);
  const Model model(std::move(p));
  EXPECT_NEAR(model.DecisionExact(std::vector<double>{12, 0}), std::exp(-1.0) - 0.5, 1e-15);
  EXPECT_NEAR(model.Decision(std::vector<double>{12, 0}), std::exp(-1.0) - 0.5, 1e-7);
}

// ---------------------------------------------------------------------------------------------
// Explain.

double ShareSum(const std::vector<FeatureShare>& shares) {
  double s = 0;
  for (const auto& share : shares) s += share.share;
  return s;
}

class ExplainGradient : public ::testing::TestWithParam<KernelType> {};

// The gradient Explain reports, in raw units, against a central finite difference of DecisionExact
// (common practice: a gradient check). The step is 1e-4 of each feature's scale, so the truncation
// error (~h^2 f''') stays below 1e-6 of the largest component; the rounding error of the
// difference quotient, ~1e-16 (sum of |terms|) / h, is allowed on top. The linear model is fitted
// without scaling: standardised (centred) data put the origin inside the data, where the linear
// one-class solution degenerates to w = 0.
TEST_P(ExplainGradient, MatchesCentralFiniteDifferences) {
  const MatrixD train = RawData(300, 4, 10);
  FitOptions options = Fit(GetParam(), 0.2);
  if (GetParam() == KernelType::kLinear) options.scaler = ScalerType::kNone;
  const Model model = FitModel(train, options);
  const MatrixD probes = RawData(8, 4, 11) * 1.3;
  for (int64_t p = 0; p < probes.rows(); ++p) {
    const std::vector<double> x = Row(probes, p);
    const std::vector<FeatureShare> shares = model.Explain(x, model.dims());
    ASSERT_EQ(static_cast<int>(shares.size()), model.dims());
    std::vector<double> analytic(model.dims());
    for (const auto& s : shares) analytic[s.feature] = s.gradient;
    double largest = 0, rounding = 0;
    std::vector<double> numeric(model.dims());
    for (int j = 0; j < model.dims(); ++j) {
      const double h = 1e-4 * model.parts().scaler.scale()[j];
      rounding = std::max(rounding, 1e-14 * TermMagnitude(model, x) / h);
      std::vector<double> plus = x, minus = x;
      plus[j] += h;
      minus[j] -= h;
      numeric[j] = (model.DecisionExact(plus) - model.DecisionExact(minus)) / (2 * h);
      largest = std::max(largest, std::abs(numeric[j]));
    }
    ASSERT_GT(largest, 0.0);
    for (int j = 0; j < model.dims(); ++j) {
      EXPECT_NEAR(analytic[j], numeric[j], 1e-6 * largest + rounding)
          << "probe " << p << " feature " << j;
    }
    // Shares: in [0, 1], summing to 1, sorted by decreasing share (model.h). They are the
    // magnitudes of the gradient with respect to the standardised features, |d f / d x_j| scale_j
    // (chain rule), normalised; see SharesDoNotDependOnTheUnitsOfAFeature for why.
    EXPECT_NEAR(ShareSum(shares), 1.0, 1e-12);
    double scaled_total = 0;
    for (const auto& s : shares)
      scaled_total += std::abs(s.gradient * model.parts().scaler.scale()[s.feature]);
    for (const auto& s : shares) {
      EXPECT_NEAR(s.share,
                  std::abs(s.gradient * model.parts().scaler.scale()[s.feature]) / scaled_total,
                  1e-12)
          << "probe " << p << " feature " << s.feature;
    }
    for (std::size_t k = 0; k < shares.size(); ++k) {
      EXPECT_GE(shares[k].share, 0.0);
      EXPECT_LE(shares[k].share, 1.0);
      if (k > 0) {
        EXPECT_GE(shares[k - 1].share, shares[k].share);
      }
    }
  }
}

// The whiten scaler routes the gradient back through the rotation (z = x_std W): the same finite
// difference check, for an rbf model on correlated features.
TEST(ExplainGradient, MatchesCentralFiniteDifferencesThroughTheWhitening) {
  MatrixD train = RawData(300, 3, 12);
  train.col(2) = train.col(0) * 0.8 + train.col(2) * 0.1;  // strongly correlated features
  FitOptions options = Fit(KernelType::kRbf, 0.2);
  options.scaler = ScalerType::kWhiten;
  const Model model = FitModel(train, options);
  ASSERT_EQ(model.parts().scaler.type(), ScalerType::kWhiten);
  // Probes near the data in the whitened space: training rows nudged by a fraction of a standard
  // deviation (random raw vectors ignore the correlation and lie where every kernel underflows).
  const MatrixD probes =
      train.topRows(6) + RandomGaussian(6, 3, 13) * 0.3 * model.parts().scaler.scale().asDiagonal();
  for (int64_t p = 0; p < probes.rows(); ++p) {
    const std::vector<double> x = Row(probes, p);
    const std::vector<FeatureShare> shares = model.Explain(x, model.dims());
    std::vector<double> analytic(model.dims());
    for (const auto& s : shares) analytic[s.feature] = s.gradient;
    double largest = 0, rounding = 0;
    std::vector<double> numeric(model.dims());
    for (int j = 0; j < model.dims(); ++j) {
      const double h = 1e-4 * model.parts().scaler.scale()[j];
      rounding = std::max(rounding, 1e-14 * TermMagnitude(model, x) / h);
      std::vector<double> plus = x, minus = x;
      plus[j] += h;
      minus[j] -= h;
      numeric[j] = (model.DecisionExact(plus) - model.DecisionExact(minus)) / (2 * h);
      largest = std::max(largest, std::abs(numeric[j]));
    }
    ASSERT_GT(largest, 0.0);
    for (int j = 0; j < model.dims(); ++j) {
      EXPECT_NEAR(analytic[j], numeric[j], 1e-5 * largest + rounding)
          << "probe " << p << " feature " << j;
    }
    EXPECT_NEAR(ShareSum(shares), 1.0, 1e-12);
  }
}

INSTANTIATE_TEST_SUITE_P(Kernels, ExplainGradient,
                         ::testing::Values(KernelType::kRbf, KernelType::kLinear,
                                           KernelType::kPolynomial),
                         [](const ::testing::TestParamInfo<KernelType>& info) {
                           return std::string(KernelName(info.param));
                         });

TEST(Explain, HandWorkedGradient) {
  // f(x) = exp(-||x||^2) - 0.5 (HandParts): grad f = -2 x exp(-||x||^2). At x = (0.5, -0.25):
  // ||x||^2 = 0.3125, grad = (-1, 0.5) exp(-0.3125); shares |.|/sum = 2/3, 1/3.
  const Model model(HandParts());
  const auto shares = model.Explain(std::vector<double>{0.5, -0.25}, 2);
  ASSERT_EQ(shares.size(), 2u);
  EXPECT_EQ(shares[0].feature, 0);
  EXPECT_NEAR(shares[0].share, 2.0 / 3.0, 1e-15);
  EXPECT_NEAR(shares[0].gradient, -std::exp(-0.3125), 1e-15);
  EXPECT_EQ(shares[1].feature, 1);
  EXPECT_NEAR(shares[1].share, 1.0 / 3.0, 1e-15);
  EXPECT_NEAR(shares[1].gradient, 0.5 * std::exp(-0.3125), 1e-15);
}

TEST(Explain, TopKIsRespected) {
  const Model model = FitModel(RawData(200, 6, 20), Fit(KernelType::kRbf, 0.1));
  const std::vector<double> x = Row(RawData(1, 6, 21), 0);
  const auto all = model.Explain(x, 6);
  ASSERT_EQ(all.size(), 6u);
  const auto top2 = model.Explain(x, 2);
  ASSERT_EQ(top2.size(), 2u);
  EXPECT_EQ(top2[0].feature, all[0].feature);
  EXPECT_EQ(top2[1].feature, all[1].feature);
  EXPECT_EQ(model.Explain(x, 100).size(), 6u);
  EXPECT_TRUE(model.Explain(x, 0).empty());
  try {
    model.Explain(x, -1);
    FAIL() << "expected PreconditionError";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("Model::Explain"));
    EXPECT_THAT(e.what(), HasSubstr("-1"));
  }
}

TEST(Explain, FarOutsideOnOneFeatureBlamesThatFeature) {
  // 50 and 1000 standard deviations out on feature 3, the others at their means. Far from the data
  // every rbf kernel value underflows (exp(-gamma 1000^2) = 0); model.h promises the direction
  // survives, so the shares stay finite and feature 3 leads. Moving along feature 3 is what changes
  // f there: the gradient points back along it.
  const MatrixD train = RawData(300, 5, 30);
  const Model model = FitModel(train, Fit(KernelType::kRbf, 0.05));
  const Scaler& scaler = model.parts().scaler;
  for (double sds : {50.0, 1000.0}) {
    std::vector<double> x(5);
    for (int j = 0; j < 5; ++j) x[j] = scaler.center()[j];
    x[3] += sds * scaler.scale()[3];
    const auto shares = model.Explain(x, 5);
    ASSERT_EQ(shares.size(), 5u);
    EXPECT_EQ(shares[0].feature, 3) << sds << " sd";
    EXPECT_GT(shares[0].share, 0.5) << sds << " sd";
    for (const auto& s : shares) {
      EXPECT_TRUE(std::isfinite(s.share)) << sds << " sd, feature " << s.feature;
      EXPECT_TRUE(std::isfinite(s.gradient)) << sds << " sd, feature " << s.feature;
    }
    EXPECT_NEAR(ShareSum(shares), 1.0, 1e-12);
    // f increases when moving back towards the data: d f / d x_3 <= 0 (0 once it underflows).
    EXPECT_LE(shares[0].gradient, 0.0);
    EXPECT_LT(model.DecisionExact(x), 0.0);
  }
}

TEST(Explain, SharesDoNotDependOnTheUnitsOfAFeature) {
  // Measuring feature 1 in units 1000 times smaller (x1 -> 1000 x1) changes nothing after
  // standardisation, so an attribution meant to say "mostly because of these features" must not
  // change either (common practice: attributions on standardised features). The raw gradient of
  // that feature does scale by 1/1000 (chain rule).
  const MatrixD train = RawData(250, 3, 40);
  MatrixD train_milli = train;
  train_milli.col(1) *= 1000.0;
  const Model model = FitModel(train, Fit(KernelType::kRbf, 0.1));
  const Model model_milli = FitModel(train_milli, Fit(KernelType::kRbf, 0.1));
  const MatrixD probes = RawData(5, 3, 41) * 1.5;
  for (int64_t p = 0; p < probes.rows(); ++p) {
    std::vector<double> x = Row(probes, p), x_milli = x;
    x_milli[1] *= 1000.0;
    auto a = model.Explain(x, 3), b = model_milli.Explain(x_milli, 3);
    auto by_feature = [](std::vector<FeatureShare> s) {
      std::sort(s.begin(), s.end(),
                [](const FeatureShare& u, const FeatureShare& v) { return u.feature < v.feature; });
      return s;
    };
    a = by_feature(a);
    b = by_feature(b);
    for (int j = 0; j < 3; ++j) {
      EXPECT_NEAR(a[j].share, b[j].share, 1e-6) << "probe " << p << " feature " << j;
      const double unit = j == 1 ? 1000.0 : 1.0;
      EXPECT_NEAR(a[j].gradient, b[j].gradient * unit, 1e-6 * std::abs(a[j].gradient) + 1e-12)
          << "probe " << p << " feature " << j;
    }
  }
}

// ---------------------------------------------------------------------------------------------
// FitModel.

TEST(FitModel, KeepsFeatureNamesScalerAndStatistics) {
  const MatrixD train = RawData(300, 3, 50);
  for (ScalerType scaler : {ScalerType::kNone, ScalerType::kStandard, ScalerType::kRobust}) {
    FitOptions options = Fit(KernelType::kRbf, 0.1);
    options.scaler = scaler;
    const Model model = FitModel(train, options, {"pressure", "flow", "current"});
    const ModelParts& p = model.parts();
    EXPECT_EQ(p.scaler.type(), scaler);
    EXPECT_EQ(p.feature_names, (std::vector<std::string>{"pressure", "flow", "current"}));
    EXPECT_EQ(model.dims(), 3);
    EXPECT_EQ(p.nu, 0.1);
    EXPECT_EQ(p.training.n_train, 300);
    EXPECT_EQ(p.training.n_support, model.num_support());
    EXPECT_TRUE(p.training.converged);
    // nu-property (Schölkopf et al. 2001, Prop. 4; exact at any feasible point): >= nu l support
    // vectors, <= nu l at the bound.
    EXPECT_GE(model.num_support(), 30);
    EXPECT_LE(p.training.n_bounded, 30);
    EXPECT_NEAR(p.coefficients.sum(), 1.0, 1e-10);
    // The scaler is the one Scaler::Fit gives on the same data, frozen with the model.
    const Scaler expected = Scaler::Fit(scaler, train);
    EXPECT_EQ(p.scaler.center(), expected.center());
    EXPECT_EQ(p.scaler.scale(), expected.scale());
    // gamma = "scale" resolved on the scaled data (kernel.h).
    EXPECT_DOUBLE_EQ(p.kernel.gamma, ResolveGamma(GammaSpec{}, expected.Transform(train)));
    // Training outliers: at most nu l clearly outside plus the free SVs on the boundary (see
    // solver_test for the derivation); here at most 0.1 + 0.05 of the rows.
    const VectorD f = model.DecisionBatch(train);
    EXPECT_LE((f.array() < 0).count(), 45) << ScalerName(scaler);
  }
}

TEST(FitModel, GammaValueAndMedianAreUsed) {
  const MatrixD train = RawData(100, 2, 51);
  FitOptions options = Fit(KernelType::kRbf, 0.2);
  options.gamma = *GammaSpec::Parse("0.75");
  EXPECT_EQ(FitModel(train, options).kernel().gamma, 0.75);
  options.gamma = *GammaSpec::Parse("median");
  const Model median = FitModel(train, options);
  EXPECT_EQ(median.parts().gamma_spec.mode, GammaSpec::Mode::kMedian);
  EXPECT_DOUBLE_EQ(
      median.kernel().gamma,
      ResolveGamma(options.gamma, Scaler::Fit(ScalerType::kStandard, train).Transform(train)));
}

TEST(FitModel, BadOptionsAndDataThrowNamingFitModel) {
  const MatrixD train = RawData(50, 2, 52);
  auto expect_error = [](const MatrixD& x, const FitOptions& o, const std::string& fragment) {
    try {
      FitModel(x, o);
      ADD_FAILURE() << "expected PreconditionError containing '" << fragment << "'";
    } catch (const PreconditionError& e) {
      EXPECT_THAT(e.what(), HasSubstr("FitModel"));
      EXPECT_THAT(e.what(), HasSubstr(fragment));
    }
  };
  expect_error(train, Fit(KernelType::kRbf, 0.0), "nu = 0");
  expect_error(train, Fit(KernelType::kRbf, 2.0), "nu = 2");
  FitOptions tol = Fit(KernelType::kRbf, 0.1);
  tol.tolerance = 0;
  expect_error(train, tol, "tolerance = 0");
  FitOptions gamma = Fit(KernelType::kRbf, 0.1);
  gamma.gamma.mode = GammaSpec::Mode::kValue;
  gamma.gamma.value = -2;
  expect_error(train, gamma, "gamma = -2");
  FitOptions degree = Fit(KernelType::kPolynomial, 0.1);
  degree.degree = 0;
  expect_error(train, degree, "degree = 0");
  expect_error(MatrixD(0, 2), Fit(KernelType::kRbf, 0.1), "0 x 2");
  MatrixD with_nan = train;
  with_nan(10, 1) = std::numeric_limits<double>::quiet_NaN();
  expect_error(with_nan, Fit(KernelType::kRbf, 0.1), "non-finite");
  // Feature names must match the dimension.
  EXPECT_THROW(FitModel(train, Fit(KernelType::kRbf, 0.1), {"only one"}), PreconditionError);
}

// ---------------------------------------------------------------------------------------------
// Preconditions and memory.

TEST(ModelPreconditions, WrongDimensionsThrowNamingTheFunction) {
  const Model model = FitModel(RawData(100, 3, 60), Fit(KernelType::kRbf, 0.1));
  const std::vector<double> short_row{1, 2}, long_row{1, 2, 3, 4};
  auto expect = [](auto&& call, const std::string& name) {
    try {
      call();
      ADD_FAILURE() << "expected PreconditionError from " << name;
    } catch (const PreconditionError& e) {
      EXPECT_THAT(e.what(), HasSubstr(name));
    }
  };
  expect([&] { model.Decision(short_row); }, "Model::Evaluate");
  expect([&] { model.Evaluate(long_row); }, "Model::Evaluate");
  expect([&] { model.DecisionExact(short_row); }, "Model::DecisionExact");
  expect([&] { model.Explain(long_row, 2); }, "Model::Explain");
  expect([&] { model.DecisionBatch(RawData(4, 2, 61)); }, "Model::EvaluateBatch");
  expect([&] { model.KernelSumsScaled(RawData(4, 4, 62)); }, "Model::KernelSumsScaled");
}

TEST(ModelPreconditions, InconsistentPartsAreRejected) {
  {
    ModelParts p = HandParts();
    p.coefficients = VectorD::Ones(2);
    EXPECT_THROW(Model{std::move(p)}, PreconditionError);
  }
  {
    ModelParts p = HandParts();
    p.support_vectors = MatrixD::Zero(1, 3);
    EXPECT_THROW(Model{std::move(p)}, PreconditionError);
  }
  {
    ModelParts p = HandParts();
    p.support_vectors = MatrixD::Zero(0, 2);
    p.coefficients = VectorD::Zero(0);
    EXPECT_THROW(Model{std::move(p)}, PreconditionError);
  }
  {
    ModelParts p = HandParts();
    p.nu = 0;
    try {
      Model{std::move(p)};
      FAIL() << "expected PreconditionError";
    } catch (const PreconditionError& e) {
      EXPECT_THAT(e.what(), HasSubstr("Model: nu = 0"));
    }
  }
  {
    ModelParts p = HandParts();
    p.rho = std::numeric_limits<double>::quiet_NaN();
    EXPECT_THROW(Model{std::move(p)}, PreconditionError);
  }
  {
    ModelParts p = HandParts();
    p.kernel.gamma = 0;
    EXPECT_THROW(Model{std::move(p)}, PreconditionError);
  }
  {
    ModelParts p = HandParts();
    p.feature_names = {"a", "b", "c"};
    EXPECT_THROW(Model{std::move(p)}, PreconditionError);
  }
}

TEST(ModelMemory, GrowsWithSupportVectors) {
  const MatrixD train = RawData(400, 4, 70);
  const Model small = FitModel(train, Fit(KernelType::kRbf, 0.05));
  const Model large = FitModel(train, Fit(KernelType::kRbf, 0.5));
  ASSERT_GT(large.num_support(), small.num_support());
  EXPECT_GT(large.MemoryBytes(), small.MemoryBytes());
  // At least the double and float copies of the support vectors: n d (8 + 4) bytes.
  EXPECT_GE(large.MemoryBytes(),
            static_cast<std::size_t>(large.num_support()) * large.dims() * 12u);
  // Hand-built: 1 vs 100 support vectors of the same dimension.
  ModelParts p = HandParts();
  const Model one(p);
  p.support_vectors = RandomGaussian(100, 2, 71);
  p.coefficients = VectorD::Constant(100, 0.01);
  const Model hundred(std::move(p));
  EXPECT_GE(hundred.MemoryBytes() - one.MemoryBytes(), 99u * 2u * 12u);
}

}  // namespace
}  // namespace nuwatch
