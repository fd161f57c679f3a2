// nuwatch's solver and model against scikit-learn's OneClassSVM (LIBSVM inside; Debian
// python3-sklearn 1.2, run with /usr/bin/python3). The conventions are in methods.md: LIBSVM solves
// the same problem scaled by nu l, so our decision f times nu l is scikit-learn's
// decision_function, our rho times nu l is its offset_, and our alpha times nu l is its dual_coef_.
#include <gtest/gtest.h>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "model_fit.h"
#include "nuwatch/model.h"
#include "solver.h"

namespace nuwatch {
namespace {

std::vector<std::vector<double>> ReadRows(const std::string& path) {
  std::ifstream in(path);
  EXPECT_TRUE(in.good()) << path;
  std::vector<std::vector<double>> rows;
  std::string line;
  while (std::getline(in, line)) {
    std::istringstream fields(line);
    std::vector<double> row;
    double v;
    while (fields >> v) row.push_back(v);
    if (!row.empty()) rows.push_back(row);
  }
  return rows;
}

MatrixD ToMatrix(const std::vector<std::vector<double>>& rows) {
  MatrixD m(rows.size(), rows.empty() ? 0 : rows[0].size());
  for (std::size_t i = 0; i < rows.size(); ++i)
    for (std::size_t j = 0; j < rows[i].size(); ++j) m(i, j) = rows[i][j];
  return m;
}

std::vector<double> ReadColumn(const std::string& path) {
  std::vector<double> out;
  for (const auto& row : ReadRows(path)) out.insert(out.end(), row.begin(), row.end());
  return out;
}

struct Reference {
  MatrixD train, test;
  std::vector<double> decision_train, decision_test, dual_coef;
  std::vector<int> support;
  double gamma = 0, offset = 0;
};

Reference RunScikitLearn(const std::string& dataset, double nu, const std::string& kernel,
                         const std::string& gamma, double tol = 1e-7) {
  const std::string dir = (std::filesystem::temp_directory_path() /
                           ("nuwatch_ref_" + dataset + "_" + kernel + "_" + std::to_string(nu) +
                            "_" + std::to_string(::getpid())))
                              .string();
  std::ostringstream tolerance;
  tolerance << tol;
  const std::string command = std::string(NUWATCH_PYTHON) + " " + NUWATCH_SOURCE_DIR +
                              "/tests/reference/sklearn_oneclass.py --dataset " + dataset +
                              " --nu " + std::to_string(nu) + " --kernel " + kernel + " --gamma " +
                              gamma + " --tol " + tolerance.str() + " --out " + dir;
  EXPECT_EQ(std::system(command.c_str()), 0) << command;
  Reference r;
  r.train = ToMatrix(ReadRows(dir + "/train.txt"));
  r.test = ToMatrix(ReadRows(dir + "/test.txt"));
  r.decision_train = ReadColumn(dir + "/decision_train.txt");
  r.decision_test = ReadColumn(dir + "/decision_test.txt");
  r.dual_coef = ReadColumn(dir + "/dual_coef.txt");
  for (double s : ReadColumn(dir + "/support.txt")) r.support.push_back(static_cast<int>(s));
  auto params = ReadColumn(dir + "/params.txt");
  r.gamma = params.at(0);
  r.offset = params.at(1);
  std::filesystem::remove_all(dir);
  return r;
}

struct Case {
  std::string dataset;
  double nu;
  std::string kernel;
  std::string gamma;
};

void PrintTo(const Case& c, std::ostream* os) {
  *os << c.dataset << " nu=" << c.nu << " " << c.kernel << " gamma=" << c.gamma;
}

class ScikitLearnAgreement : public ::testing::TestWithParam<Case> {};

TEST_P(ScikitLearnAgreement, DecisionValuesRhoAndSupportVectorsMatch) {
  const Case& c = GetParam();
  Reference ref = RunScikitLearn(c.dataset, c.nu, c.kernel, c.gamma);
  ASSERT_GT(ref.train.rows(), 0);

  // scikit-learn's gamma="scale" is 1 / (d Var X) over all entries (sklearn.svm.OneClassSVM docs).
  Kernel kernel;
  kernel.type = *ParseKernelType(c.kernel);
  kernel.gamma = c.kernel == "linear" ? 1.0 : ResolveGamma(*GammaSpec::Parse(c.gamma), ref.train);
  if (c.kernel != "linear") {
    EXPECT_NEAR(kernel.gamma, ref.gamma, 1e-12 * ref.gamma);
  }
  SolverOptions options;
  options.nu = c.nu;
  options.tolerance = 1e-7;
  const Scaler identity = Scaler::FromParameters(ScalerType::kNone, VectorD::Zero(ref.train.cols()),
                                                 VectorD::Ones(ref.train.cols()));
  WindowFit fit =
      FitScaled(ref.train, identity, kernel, *GammaSpec::Parse(c.gamma), options, nullptr, 1);
  ASSERT_TRUE(fit.solution.converged);
  const double nu_l = c.nu * static_cast<double>(ref.train.rows());

  // rho' = nu l rho = offset_ (methods.md, LIBSVM convention).
  EXPECT_NEAR(fit.solution.rho * nu_l, ref.offset, 1e-5 * std::max(1.0, std::abs(ref.offset)));

  // Decision values on the training and held-out rows, from the double-precision formula and from
  // the float32 scoring path (looser: float32 has 24 bits of mantissa).
  const Model& model = *fit.model;
  double max_error = 0, max_error_fast = 0, scale_of_values = 1e-12;
  auto compare = [&](const MatrixD& rows, const std::vector<double>& expected) {
    ASSERT_EQ(static_cast<std::size_t>(rows.rows()), expected.size());
    VectorD fast = model.DecisionBatch(rows);
    for (int64_t i = 0; i < rows.rows(); ++i) {
      std::vector<double> x(rows.row(i).data(), rows.row(i).data() + rows.cols());
      max_error = std::max(max_error, std::abs(model.DecisionExact(x) * nu_l - expected[i]));
      max_error_fast = std::max(max_error_fast, std::abs(fast[i] * nu_l - expected[i]));
      scale_of_values = std::max(scale_of_values, std::abs(expected[i]));
    }
  };
  compare(ref.train, ref.decision_train);
  compare(ref.test, ref.decision_test);
  EXPECT_LT(max_error, 1e-5 * scale_of_values) << "exact path";
  EXPECT_LT(max_error_fast, 1e-4 * scale_of_values) << "float32 path";

  // The support-vector set: identical, except that a coefficient within 1e-6 of zero on one side
  // may be exactly zero on the other (both solvers stop at a tolerance).
  std::set<int> ours, theirs(ref.support.begin(), ref.support.end());
  for (int64_t i = 0; i < ref.train.rows(); ++i)
    if (fit.solution.alpha[i] > 0) ours.insert(static_cast<int>(i));
  for (int i : ours) {
    if (!theirs.count(i)) {
      EXPECT_LT(fit.solution.alpha[i] * nu_l, 1e-6) << "support vector " << i << " only in ours";
    }
  }
  for (std::size_t k = 0; k < ref.support.size(); ++k) {
    int i = ref.support[k];
    if (!ours.count(i)) {
      EXPECT_LT(ref.dual_coef[k], 1e-6) << "support vector " << i << " only in scikit-learn's";
    } else {
      EXPECT_NEAR(fit.solution.alpha[i] * nu_l, ref.dual_coef[k], 1e-4) << "alpha of " << i;
    }
  }
}

INSTANTIATE_TEST_SUITE_P(
    DataSets, ScikitLearnAgreement,
    ::testing::Values(
        Case{"blobs", 0.05, "rbf", "scale"}, Case{"blobs", 0.3, "rbf", "0.5"},
        Case{"cube16", 0.1, "rbf", "scale"}, Case{"cube16", 0.02, "rbf", "scale"},
        // Real data bundled with scikit-learn (Fisher's iris; Wisconsin breast cancer).
        Case{"iris", 0.1, "rbf", "scale"}, Case{"breast_cancer", 0.05, "rbf", "scale"},
        // For linear and polynomial kernels nu l is kept non-integer: with an integer nu l the
        // solution can have no free coefficient, and then rho is any point of an
        // interval (methods.md); LIBSVM's choice there depends on rounding.
        Case{"blobs", 0.1925, "linear", "scale"}, Case{"blobs", 0.1325, "poly", "scale"},
        Case{"cube16", 0.5, "rbf", "scale"}),
    [](const ::testing::TestParamInfo<Case>& info) {
      std::string name = info.param.dataset + "_" + info.param.kernel + "_nu" +
                         std::to_string(static_cast<int>(info.param.nu * 1000)) + "_" +
                         info.param.gamma;
      for (char& ch : name)
        if (!std::isalnum(static_cast<unsigned char>(ch))) ch = '_';
      return name;
    });

// Duplicated rows make alpha non-unique (methods.md): compare the objective and the decision
// values, not the alphas.
TEST(ScikitLearnAgreementDuplicates, ObjectiveAndDecisionMatchWhenAlphaIsNotUnique) {
  Reference ref = RunScikitLearn("duplicates", 0.1, "rbf", "scale");
  Kernel kernel;
  kernel.gamma = ResolveGamma(GammaSpec{}, ref.train);
  SolverOptions options;
  options.nu = 0.1;
  options.tolerance = 1e-7;
  const Scaler identity = Scaler::FromParameters(ScalerType::kNone, VectorD::Zero(ref.train.cols()),
                                                 VectorD::Ones(ref.train.cols()));
  WindowFit fit = FitScaled(ref.train, identity, kernel, GammaSpec{}, options, nullptr, 1);
  const double nu_l = 0.1 * static_cast<double>(ref.train.rows());
  // scikit-learn's objective from its dual coefficients: 1/2 a'^T K a' in LIBSVM's scaling.
  MatrixD sv(ref.support.size(), ref.train.cols());
  VectorD coef(ref.support.size());
  for (std::size_t k = 0; k < ref.support.size(); ++k) {
    sv.row(k) = ref.train.row(ref.support[k]);
    coef[k] = ref.dual_coef[k];
  }
  const double their_objective = 0.5 * coef.dot(kernel.Matrix(sv, sv) * coef);
  EXPECT_NEAR(fit.solution.objective * nu_l * nu_l, their_objective, 1e-6 * their_objective);
  for (int64_t i = 0; i < ref.train.rows(); ++i) {
    std::vector<double> x(ref.train.row(i).data(), ref.train.row(i).data() + ref.train.cols());
    EXPECT_NEAR(fit.model->DecisionExact(x) * nu_l, ref.decision_train[i], 1e-4);
  }
}

}  // namespace
}  // namespace nuwatch
