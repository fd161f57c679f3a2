#include "budget.h"

#include <Eigen/Cholesky>
#include <Eigen/Core>
#include <algorithm>
#include <cmath>
#include <cstring>
#include <limits>
#include <numeric>
#include <sstream>
#include <string>
#include <vector>

namespace nuwatch {

namespace {

// ---------------------------------------------------------------------------------------------
// RBF merging (Wang, Crammer, Vucetic 2012), derived here for our kernel convention.
//
// With z = h x_m + (1-h) x_n: z - x_m = (1-h)(x_n - x_m) and z - x_n = h (x_m - x_n), so with
// D = gamma ||x_m - x_n||^2 and k = exp(-D):
//   k(z, x_m) = exp(-D (1-h)^2) = k^((1-h)^2),   k(z, x_n) = exp(-D h^2) = k^(h^2).
// ||phi(z)|| = 1 for rbf, so for a fixed z the best coefficient is the projection of
// a_m phi(x_m) + a_n phi(x_n) onto phi(z):  a_z(h) = a_m k^((1-h)^2) + a_n k^(h^2) =: f(h), and the
// loss is ||a_m phi_m + a_n phi_n - a_z phi_z||^2 = a_m^2 + a_n^2 + 2 k a_m a_n - f(h)^2, so the
// best h maximises f.
//
// Shape of f: f'(h) = 2D [a_m (1-h) e^{-D(1-h)^2} - a_n h e^{-D h^2}], and taking logs,
//   sign f'(h) = sign g(h),   g(h) = ln(a_m / a_n) + ln((1-h) / h) + D (2h - 1),
//   g'(h) = 2D - 1 / (h (1-h)).
// g runs from +inf (h -> 0) to -inf (h -> 1). Since 1/(h(1-h)) >= 4, g is decreasing when D <= 2:
// one root, f unimodal. When D > 2, g' > 0 exactly between h_-/+ = (1 -/+ sqrt(1 - 2/D)) / 2: g
// decreases on (0, h_-], increases on [h_-, h_+], decreases on [h_+, 1). A maximum of f is a root
// where g goes from + to -, so one can lie in (0, h_-] (iff g(h_-) <= 0) and one in [h_+, 1) (iff
// g(h_+) >= 0); a root in between is a minimum. The global peak always lies on the heavier
// vector's side (see BestMergePoint), so one safeguarded Newton solve on that monotone piece
// suffices. Equal weights: f''(1/2) = 2 a e^{-D/4} D (D - 2), so h = 1/2, a stationary point by
// symmetry, turns from the maximum into a local minimum at D = 2; a search for f' = 0 started at
// the weighted mean a_m / (a_m + a_n) = 1/2 would stop there. (A golden-section search from [0, 1]
// happens to pick the right side on its first step, since its probes are symmetric about 1/2, but
// it has no guarantee on a bimodal function and is not used.)
// ---------------------------------------------------------------------------------------------

struct MergePoint {
  double h;
  double degradation;
};

// a_m^2 + a_n^2 + 2 k a_m a_n - f(h)^2 rearranged so that no large terms cancel:
//   a_m^2 (1 - e1^2) + a_n^2 (1 - e2^2) - 2 a_m a_n (e1 e2 - k),
// e1 = e^{-D(1-h)^2}, e2 = e^{-D h^2}, e1 e2 = e^{-D q} with q = (1-h)^2 + h^2 = 1 - 2h(1-h), so
// e1 e2 - k = e^{-D q} (1 - e^{-2 D h (1-h)}). It is exactly 0 when D = 0.
double MergeDegradation(double a_m, double a_n, double d, double h) {
  const double u = 1 - h;
  const double q = u * u + h * h;
  const double value = -a_m * a_m * std::expm1(-2 * d * u * u) -
                       a_n * a_n * std::expm1(-2 * d * h * h) +
                       2 * a_m * a_n * std::exp(-d * q) * std::expm1(-2 * d * h * u);
  return std::max(0.0, value);
}

// g(h) = ln(a_m / a_n) + ln((1-h) / h) + D (2h - 1); sign g = sign f'.
double MergeSlopeSign(double log_ratio, double d, double h) {
  return log_ratio + std::log((1 - h) / h) + d * (2 * h - 1);
}

// The root of g on (lo, hi), where g is decreasing with g(lo) > 0 > g(hi) (lo = 0 and hi = 1 stand
// for the infinite limits). Newton steps, bisection whenever a step leaves the bracket.
double DecreasingRoot(double log_ratio, double d, double lo, double hi, double start) {
  double h = (start > lo && start < hi) ? start : 0.5 * (lo + hi);
  for (int iteration = 0; iteration < 200; ++iteration) {
    const double value = MergeSlopeSign(log_ratio, d, h);
    if (value == 0) return h;
    if (value > 0) {
      lo = h;
    } else {
      hi = h;
    }
    const double slope = 2 * d - 1 / (h * (1 - h));
    double next = h - value / slope;
    if (!(slope < 0) || !(next > lo && next < hi)) next = 0.5 * (lo + hi);
    // Newton converges quadratically, so a step of 1e-12 leaves an error far below it; and since
    // f' = 0 at the root, an error e in h costs only about f'' e^2 in f.
    if (std::abs(next - h) <= 1e-12 || hi - lo <= 1e-15) return next;
    h = next;
  }
  return h;
}

MergePoint BestMergePoint(double a_m, double a_n, double d) {
  // D = 0: f is constant (a_m + a_n) and the loss is 0 for every h; h = 0 keeps x_n bit for bit.
  if (a_m == 0 || d == 0) return {0.0, 0.0};
  if (a_n == 0) return {1.0, 0.0};
  if (std::isinf(d)) {
    // k = 0: the best is to keep the larger of the two and drop the other.
    return a_n >= a_m ? MergePoint{0.0, a_m * a_m} : MergePoint{1.0, a_n * a_n};
  }
  // The end points first (their losses are a_m^2 (1 - k^2) and a_n^2 (1 - k^2)), so that a peak
  // indistinguishable from an end point resolves to it. In exact arithmetic they never win, as
  // f'(0) = 2 D a_m k > 0 and f'(1) = -2 D a_n k < 0.
  const double one_minus_k2 = -std::expm1(-2 * d);
  MergePoint best = a_m <= a_n ? MergePoint{0.0, a_m * a_m * one_minus_k2}
                               : MergePoint{1.0, a_n * a_n * one_minus_k2};
  auto consider = [&](double h) {
    const double degradation = MergeDegradation(a_m, a_n, d, h);
    if (degradation < best.degradation) best = {h, degradation};
  };
  const double log_ratio = std::log(a_m / a_n);
  if (d <= 2) {
    // h = a_m / (a_m + a_n) zeroes the first two terms of g: the exact root as D -> 0.
    consider(DecreasingRoot(log_ratio, d, 0.0, 1.0, a_m / (a_m + a_n)));
    return best;
  }
  // h_- = (1 - sqrt(1 - 2/D)) / 2 written without the cancellation for large D.
  const double h_minus = 1 / (d * (1 + std::sqrt(1 - 2 / d)));
  const double h_plus = 1 - h_minus;
  // Starting points from g ~ ln(a_m/a_n) - ln h - D near h = 0 (and its mirror near h = 1).
  const double left_start = std::exp(log_ratio - d), right_start = 1 - std::exp(-log_ratio - d);
  const bool left_peak = MergeSlopeSign(log_ratio, d, h_minus) <= 0;
  const bool right_peak = MergeSlopeSign(log_ratio, d, h_plus) >= 0;
  // The global peak lies on the heavier side: for t in [0, 1/2],
  // f(1/2 - t) - f(1/2 + t) = (a_n - a_m) (e^{-D (1/2 - t)^2} - e^{-D (1/2 + t)^2}), which has the
  // sign of a_n - a_m. The lighter side is searched only when rounding leaves no peak on the other.
  const bool heavier_left = a_n >= a_m;
  if (left_peak && (heavier_left || !right_peak)) {
    consider(DecreasingRoot(log_ratio, d, 0.0, h_minus, left_start));
  }
  if (right_peak && (!heavier_left || !left_peak)) {
    consider(DecreasingRoot(log_ratio, d, h_plus, 1.0, right_start));
  }
  return best;
}

double MergedCoefficient(double a_m, double a_n, double d, double h) {
  if (std::isinf(d)) return h == 0 ? a_n : a_m;
  return a_m * std::exp(-d * (1 - h) * (1 - h)) + a_n * std::exp(-d * h * h);
}

// Rows are kept in one flat row-major buffer; removing row m moves the last row into its place.
struct FlatRows {
  std::vector<double> values;
  std::vector<double> coef;
  int64_t rows = 0;
  int64_t dims = 0;

  double* Row(int64_t i) { return values.data() + i * dims; }
  int64_t ArgMinCoefficient() const {
    return std::min_element(coef.begin(), coef.begin() + rows) - coef.begin();
  }
  void SwapRemove(int64_t i) {
    const int64_t last = rows - 1;
    if (i != last) {
      std::copy(Row(last), Row(last) + dims, Row(i));
      coef[i] = coef[last];
    }
    --rows;
  }
};

FlatRows DropZeroRows(const MatrixD& sv, const VectorD& coef) {
  FlatRows flat;
  flat.dims = sv.cols();
  flat.values.reserve(sv.size());
  flat.coef.reserve(coef.size());
  for (Eigen::Index i = 0; i < sv.rows(); ++i) {
    if (coef[i] == 0) continue;
    flat.values.insert(flat.values.end(), sv.row(i).data(), sv.row(i).data() + sv.cols());
    flat.coef.push_back(coef[i]);
    ++flat.rows;
  }
  return flat;
}

void MergeToBudget(FlatRows& set, double gamma, int64_t budget, BudgetResult& result) {
  const int64_t d = set.dims;
  while (set.rows > budget) {
    const int64_t m = set.ArgMinCoefficient();
    const double a_m = set.coef[m];
    const double* x_m = set.Row(m);
    int64_t partner = -1;
    MergePoint best{0.0, std::numeric_limits<double>::infinity()};
    double best_distance = 0;
    for (int64_t j = 0; j < set.rows; ++j) {
      if (j == m) continue;
      // The direct difference, not the GEMM form: close pairs are exactly the ones that matter.
      const double* x_j = set.Row(j);
      double distance2 = 0;
      for (int64_t c = 0; c < d; ++c) distance2 += (x_m[c] - x_j[c]) * (x_m[c] - x_j[c]);
      const double scaled = gamma * distance2;
      const MergePoint point = BestMergePoint(a_m, set.coef[j], scaled);
      if (point.degradation < best.degradation || partner < 0) {
        best = point;
        partner = j;
        best_distance = scaled;
      }
    }
    double* z = set.Row(partner);
    const double h = best.h;
    if (h == 1) {
      std::copy(x_m, x_m + d, z);
    } else if (h != 0) {
      for (int64_t c = 0; c < d; ++c) z[c] = h * x_m[c] + (1 - h) * z[c];
    }
    set.coef[partner] = MergedCoefficient(a_m, set.coef[partner], best_distance, h);
    result.step_degradation_sum += best.degradation;
    set.SwapRemove(m);
  }
}

void CollapseLinear(FlatRows& set, int64_t budget) {
  // Fold the rows - budget + 1 smallest coefficients into their weighted mean.
  std::vector<int64_t> order(set.rows);
  std::iota(order.begin(), order.end(), 0);
  const int64_t folded = set.rows - budget + 1;
  std::nth_element(order.begin(), order.begin() + (folded - 1), order.end(),
                   [&](int64_t a, int64_t b) {
                     return set.coef[a] != set.coef[b] ? set.coef[a] < set.coef[b] : a < b;
                   });
  std::vector<bool> in_fold(set.rows, false);
  for (int64_t i = 0; i < folded; ++i) in_fold[order[i]] = true;
  std::vector<double> weighted(set.dims, 0.0);
  double mass = 0;
  FlatRows kept;
  kept.dims = set.dims;
  for (int64_t i = 0; i < set.rows; ++i) {
    const double* row = set.Row(i);
    if (in_fold[i]) {
      for (int64_t c = 0; c < set.dims; ++c) weighted[c] += set.coef[i] * row[c];
      mass += set.coef[i];
    } else {
      kept.values.insert(kept.values.end(), row, row + set.dims);
      kept.coef.push_back(set.coef[i]);
      ++kept.rows;
    }
  }
  for (double& value : weighted) value /= mass;
  kept.values.insert(kept.values.end(), weighted.begin(), weighted.end());
  kept.coef.push_back(mass);
  ++kept.rows;
  set = std::move(kept);
}

// Removes row and column m from the leading n x n block of a (column-major).
void RemoveRowAndColumn(Eigen::MatrixXd& a, Eigen::Index n, Eigen::Index m) {
  for (Eigen::Index j = m; j + 1 < n; ++j) a.col(j).head(n) = a.col(j + 1).head(n);
  for (Eigen::Index j = 0; j + 1 < n; ++j) {
    double* column = &a(0, j);
    std::memmove(column + m, column + m + 1, sizeof(double) * static_cast<size_t>(n - 1 - m));
  }
}

// L L^T + v v^T for the lower-triangular p x p block of `l` starting at (start, start).
void CholeskyRankOneUpdate(Eigen::MatrixXd& l, Eigen::Index start, Eigen::Index p,
                           Eigen::VectorXd& v) {
  for (Eigen::Index k = 0; k < p; ++k) {
    double& diagonal = l(start + k, start + k);
    const double r = std::hypot(diagonal, v[k]);
    const double c = r / diagonal, s = v[k] / diagonal;
    diagonal = r;
    for (Eigen::Index i = k + 1; i < p; ++i) {
      double& entry = l(start + i, start + k);
      entry = (entry + s * v[i]) / c;
      v[i] = c * v[i] - s * entry;
    }
  }
}

void RemoveWithProjection(FlatRows& set, const Kernel& kernel, int64_t budget,
                          BudgetResult& result) {
  using Eigen::Index;
  Index n = set.rows;
  const Eigen::Map<const MatrixD> rows(set.values.data(), n, set.dims);
  Eigen::MatrixXd k = kernel.Matrix(MatrixD(rows), MatrixD(rows));
  Eigen::VectorXd c = Eigen::Map<const Eigen::VectorXd>(set.coef.data(), n);
  std::vector<Index> original(n);  // which input row each current index holds
  std::iota(original.begin(), original.end(), Index{0});

  // A ridge relative to the kernel's scale: negligible against the projection error, large enough
  // that a rank-deficient K_rr (linear kernel with rows > d) still factors.
  const double scale = k.diagonal().cwiseAbs().mean();
  const double ridge = 1e-10 * (scale > 0 ? scale : 1.0);
  Eigen::LLT<Eigen::MatrixXd> llt(k + ridge * Eigen::MatrixXd::Identity(n, n));
  bool projection_available = llt.info() == Eigen::Success;
  Eigen::MatrixXd l;
  if (projection_available) l = llt.matrixL();

  Eigen::VectorXd v, beta, k_beta;
  while (n > budget) {
    Index m;
    c.head(n).minCoeff(&m);
    const double a_m = c[m];
    const double k_mm = k(m, m);
    // The kernel column of m over the remaining indices, in their new order.
    Eigen::VectorXd k_rm(n - 1);
    k_rm.head(m) = k.col(m).head(m);
    k_rm.tail(n - 1 - m) = k.col(m).segment(m + 1, n - 1 - m);
    RemoveRowAndColumn(k, n, m);
    if (projection_available) {
      v = l.col(m).segment(m + 1, n - 1 - m);
      RemoveRowAndColumn(l, n, m);
      CholeskyRankOneUpdate(l, m, n - 1 - m, v);
    }
    for (Index i = m; i + 1 < n; ++i) {
      c[i] = c[i + 1];
      original[i] = original[i + 1];
    }
    --n;
    auto k_r = k.topLeftCorner(n, n);
    auto c_r = c.head(n);

    bool projected = false;
    double step = 0;
    if (projection_available) {
      const Eigen::VectorXd target = a_m * k_rm;
      beta = l.topLeftCorner(n, n).triangularView<Eigen::Lower>().solve(target);
      l.topLeftCorner(n, n).triangularView<Eigen::Lower>().transpose().solveInPlace(beta);
      k_beta = k_r * beta;
      const double residual = (k_beta + ridge * beta - target).norm();
      const bool well_conditioned = beta.allFinite() && residual <= 1e-6 * target.norm() + 1e-300;
      if (well_conditioned && ((c_r + beta).array() > 0).all()) {
        c_r += beta;
        // ||a_m phi_m - sum_r beta_r phi_r||^2
        step = a_m * a_m * k_mm - 2 * a_m * k_rm.dot(beta) + beta.dot(k_beta);
        projected = true;
      }
    }
    if (!projected) {
      ++result.projection_fallbacks;
      const Eigen::VectorXd added = c_r * (a_m / c_r.sum());
      step = a_m * a_m * k_mm - 2 * a_m * k_rm.dot(added) + added.dot(k_r * added);
      c_r += added;
    }
    result.step_degradation_sum += std::max(0.0, step);
  }

  FlatRows kept;
  kept.dims = set.dims;
  kept.rows = n;
  for (Index i = 0; i < n; ++i) {
    const double* row = set.Row(original[i]);
    kept.values.insert(kept.values.end(), row, row + set.dims);
    kept.coef.push_back(c[i]);
  }
  set = std::move(kept);
}

void ValidateCompressInput(const MatrixD& sv, const VectorD& coef, const Kernel& kernel,
                           int64_t budget) {
  kernel.Validate("CompressToBudget");
  std::ostringstream message;
  message << "CompressToBudget: ";
  if (sv.rows() != coef.size()) {
    message << "support_vectors has " << sv.rows() << " rows but coefficients has " << coef.size()
            << " entries";
    throw PreconditionError(message.str());
  }
  if (sv.rows() < 1 || sv.cols() < 1) {
    message << "support_vectors is " << sv.rows() << " x " << sv.cols()
            << ", needs at least one row and one column";
    throw PreconditionError(message.str());
  }
  if (budget < 1) {
    message << "budget = " << budget << " must be >= 1";
    throw PreconditionError(message.str());
  }
  bool any_positive = false;
  for (Eigen::Index i = 0; i < coef.size(); ++i) {
    if (!std::isfinite(coef[i]) || coef[i] < 0) {
      message << "coefficient " << i << " = " << coef[i] << " must be finite and >= 0";
      throw PreconditionError(message.str());
    }
    any_positive = any_positive || coef[i] > 0;
  }
  if (!any_positive) {
    message << "all " << coef.size() << " coefficients are 0";
    throw PreconditionError(message.str());
  }
  for (Eigen::Index i = 0; i < sv.rows(); ++i) {
    for (Eigen::Index j = 0; j < sv.cols(); ++j) {
      if (!std::isfinite(sv(i, j))) {
        message << "support vector " << i << " column " << j << " = " << sv(i, j)
                << " is not finite";
        throw PreconditionError(message.str());
      }
    }
  }
}

}  // namespace

RbfMerge SolveRbfMerge(double a_m, double a_n, double scaled_distance_squared) {
  const double d = scaled_distance_squared;
  if (!(a_m >= 0) || !(a_n >= 0) || !(a_m + a_n > 0) || !(d >= 0) || std::isinf(a_m) ||
      std::isinf(a_n)) {
    std::ostringstream message;
    message << "SolveRbfMerge: needs finite a_m, a_n >= 0 with a_m + a_n > 0 and D >= 0, got a_m = "
            << a_m << ", a_n = " << a_n << ", D = " << d;
    throw PreconditionError(message.str());
  }
  const MergePoint point = BestMergePoint(a_m, a_n, d);
  return {point.h, MergedCoefficient(a_m, a_n, d, point.h), point.degradation};
}

BudgetResult CompressToBudget(const MatrixD& sv, const VectorD& coef, const Kernel& kernel,
                              int64_t budget, BudgetMethod method) {
  ValidateCompressInput(sv, coef, kernel, budget);
  BudgetResult result;
  const bool has_zero = (coef.array() == 0).any();
  if (!has_zero && sv.rows() <= budget) {
    result.support_vectors = sv;
    result.coefficients = coef;
    return result;
  }
  FlatRows set = DropZeroRows(sv, coef);
  if (set.rows > budget) {
    if (method == BudgetMethod::kRemoveAndProject || kernel.type == KernelType::kPolynomial) {
      RemoveWithProjection(set, kernel, budget, result);
    } else if (kernel.type == KernelType::kRbf) {
      MergeToBudget(set, kernel.gamma, budget, result);
    } else {
      CollapseLinear(set, budget);
    }
  }
  result.support_vectors = Eigen::Map<const MatrixD>(set.values.data(), set.rows, set.dims);
  result.coefficients = Eigen::Map<const VectorD>(set.coef.data(), set.rows);
  result.removed = sv.rows() - set.rows;
  result.weight_degradation =
      WeightDistanceSquared(sv, coef, result.support_vectors, result.coefficients, kernel);
  return result;
}

double RecalibrateRho(const VectorD& window_kernel_sums, double nu) {
  const Eigen::Index l = window_kernel_sums.size();
  if (l < 1) throw PreconditionError("RecalibrateRho: no window kernel sums");
  if (!(nu > 0 && nu <= 1)) {
    std::ostringstream message;
    message << "RecalibrateRho: nu = " << nu << " is outside (0, 1]";
    throw PreconditionError(message.str());
  }
  for (Eigen::Index i = 0; i < l; ++i) {
    if (!std::isfinite(window_kernel_sums[i])) {
      std::ostringstream message;
      message << "RecalibrateRho: kernel sum " << i << " = " << window_kernel_sums[i]
              << " is not finite";
      throw PreconditionError(message.str());
    }
  }
  const double allowed = nu * static_cast<double>(l);
  const auto k = static_cast<Eigen::Index>(std::floor(allowed * (1 + 1e-12)));
  const Eigen::Index index = std::min(k, l - 1);  // 0-based: the (index + 1)-th smallest
  std::vector<double> sums(window_kernel_sums.data(), window_kernel_sums.data() + l);
  std::nth_element(sums.begin(), sums.begin() + index, sums.end());
  return sums[index];
}

double WeightDistanceSquared(const MatrixD& sv_a, const VectorD& c_a, const MatrixD& sv_b,
                             const VectorD& c_b, const Kernel& kernel) {
  kernel.Validate("WeightDistanceSquared");
  if (sv_a.rows() != c_a.size() || sv_b.rows() != c_b.size() || sv_a.cols() != sv_b.cols()) {
    std::ostringstream message;
    message << "WeightDistanceSquared: shapes do not match: a is " << sv_a.rows() << " x "
            << sv_a.cols() << " with " << c_a.size() << " coefficients, b is " << sv_b.rows()
            << " x " << sv_b.cols() << " with " << c_b.size() << " coefficients";
    throw PreconditionError(message.str());
  }
  // v' K v over the stacked rows [a; b] with v = [c_a; -c_b], one block of rows at a time so that
  // memory stays at block * (rows_a + rows_b).
  const Eigen::Index total = sv_a.rows() + sv_b.rows();
  MatrixD stacked(total, sv_a.cols());
  stacked << sv_a, sv_b;
  VectorD v(total);
  v << c_a, -c_b;
  constexpr Eigen::Index kBlock = 128;
  double sum = 0;
  for (Eigen::Index start = 0; start < total; start += kBlock) {
    const Eigen::Index length = std::min(kBlock, total - start);
    const MatrixD block = kernel.Matrix(MatrixD(stacked.middleRows(start, length)), stacked);
    sum += v.segment(start, length).dot(block * v);
  }
  return std::max(0.0, sum);
}

}  // namespace nuwatch
