// SMO for the nu one-class dual in LIBSVM's scaling (see solver.h). The structure follows Fan,
// Chen, Lin (JMLR 2005) and the LIBSVM implementation notes (Chang & Lin 2011) for the case where
// every label is +1: second-order working-set selection, a two-variable analytic step, shrinking
// with a final unshrink and re-check, and LIBSVM's rule for rho.
#include "solver.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <limits>
#include <memory>
#include <sstream>
#include <vector>

#include "vector_exp.h"

namespace nuwatch {
namespace {

constexpr double kTau = 1e-12;  // LIBSVM's TAU: the curvature used when a_ij <= 0

// Kernel columns over the whole training set, computed in double (GEMV) and stored as float in an
// LRU cache bounded in bytes, as LIBSVM stores Qfloat.
class ColumnCache {
 public:
  ColumnCache(const MatrixD& x, const Kernel& kernel, std::size_t cache_bytes)
      : x_(x), kernel_(kernel), rows_(x.rows()) {
    squared_norms_ = x.rowwise().squaredNorm();
    x_by_column_ = x;
    const std::size_t column_bytes = static_cast<std::size_t>(rows_) * sizeof(float);
    capacity_ = std::max<std::size_t>(2, cache_bytes / std::max<std::size_t>(1, column_bytes));
    capacity_ = std::min<std::size_t>(capacity_, static_cast<std::size_t>(rows_));
    slot_of_.assign(rows_, -1);
    diagonal_.resize(rows_);
    for (int64_t i = 0; i < rows_; ++i)
      diagonal_[i] = kernel.Evaluate(&x(i, 0), &x(i, 0), x.cols());
    scratch_.resize(rows_);
  }

  double Diagonal(int64_t i) const { return diagonal_[i]; }

  // The column k(x_., x_j). The pointer stays valid until the next call that misses twice
  // (the LRU never evicts the most recently returned column, and capacity >= 2).
  const float* Column(int64_t j) {
    int slot = slot_of_[j];
    if (slot >= 0) {
      Touch(slot);
      return slots_[slot].values.get();
    }
    slot = AcquireSlot(j);
    Compute(j, slots_[slot].values.get());
    return slots_[slot].values.get();
  }

  // Computes the missing columns among `columns` in blocks with one GEMM each, which is several
  // times faster than one GEMV per column (warm starts begin with every support vector's column).
  // Stops when the cache would start evicting what it just filled.
  void Prefetch(const std::vector<int64_t>& columns) {
    std::vector<int64_t> missing;
    for (int64_t j : columns)
      if (slot_of_[j] < 0) missing.push_back(j);
    const std::size_t room = capacity_ > 2 ? capacity_ - 2 : 0;
    if (missing.size() > room) missing.resize(room);
    constexpr std::size_t kBlock = 128;
    Eigen::MatrixXd rows, block;  // column-major: one kernel column is contiguous
    for (std::size_t start = 0; start < missing.size(); start += kBlock) {
      const std::size_t m = std::min(kBlock, missing.size() - start);
      rows.resize(x_.cols(), static_cast<int64_t>(m));
      Eigen::VectorXd norms(static_cast<int64_t>(m));
      for (std::size_t k = 0; k < m; ++k) {
        rows.col(k) = x_.row(missing[start + k]).transpose();
        norms[k] = squared_norms_[missing[start + k]];
      }
      block.noalias() = x_by_column_ * rows;  // rows_ x m dot products
      switch (kernel_.type) {
        case KernelType::kLinear:
          break;
        case KernelType::kRbf:
          // In steps: a broadcast inside the exp expression would keep Eigen from vectorising it.
          block *= -2.0;
          block.colwise() += squared_norms_;
          block.rowwise() += norms.transpose();
          block = (-kernel_.gamma * block.array().max(0.0)).matrix();  // the exponent
          break;
        case KernelType::kPolynomial:
          block = (kernel_.gamma * block.array() + kernel_.coef0)
                      .pow(static_cast<double>(kernel_.degree))
                      .matrix();
          break;
      }
      for (std::size_t k = 0; k < m; ++k) {
        float* out = slots_[AcquireSlot(missing[start + k])].values.get();
        Store(block.col(k), out);
      }
    }
  }

 private:
  struct Slot {
    std::unique_ptr<float[]> values;  // uninitialised: every entry is written before use
    int64_t owner;
    int prev, next;
  };

  // A slot for column j (not cached): a new one while there is room, else the least recently used.
  int AcquireSlot(int64_t j) {
    int slot;
    if (slots_.size() < capacity_) {
      slots_.push_back({std::unique_ptr<float[]>(new float[rows_]), j, -1, -1});
      slot = static_cast<int>(slots_.size()) - 1;
      LinkFront(slot);
    } else {
      slot = tail_;
      Unlink(slot);
      slot_of_[slots_[slot].owner] = -1;
      slots_[slot].owner = j;
      LinkFront(slot);
    }
    slot_of_[j] = slot;
    return slot;
  }

  void Compute(int64_t j, float* out) {
    // Column-major: the product is d axpy passes over contiguous columns of length l, which
    // vectorises far better than l dot products of length d when d is small.
    scratch_.noalias() = x_by_column_ * x_.row(j).transpose();
    switch (kernel_.type) {
      case KernelType::kLinear:
        break;
      case KernelType::kRbf:
        scratch_ = (-kernel_.gamma *
                    (squared_norms_.array() + squared_norms_[j] - 2.0 * scratch_.array()).max(0.0))
                       .matrix();  // the exponent
        break;
      case KernelType::kPolynomial:
        scratch_ = (kernel_.gamma * scratch_.array() + kernel_.coef0)
                       .pow(static_cast<double>(kernel_.degree))
                       .matrix();
        break;
    }
    Store(scratch_, out);
  }

  // Writes one column as float. For rbf the input is the exponent, computed in double so that the
  // distance keeps its accuracy; exp itself runs in float, which has twice the SIMD lanes and is
  // as accurate as the float the cache stores anyway (as LIBSVM stores its columns). Prefetch and
  // Compute both end here, so a column is the same whichever path filled it.
  template <typename Column>
  void Store(const Column& values, float* out) const {
    Eigen::Map<VectorF> column(out, rows_);
    column = values.template cast<float>();
    // A separate pass: exp over a mixed double-to-float expression would not be vectorised.
    if (kernel_.type == KernelType::kRbf) ExpInPlace(out, rows_);
  }

  void Unlink(int slot) {
    Slot& s = slots_[slot];
    if (s.prev >= 0)
      slots_[s.prev].next = s.next;
    else
      head_ = s.next;
    if (s.next >= 0)
      slots_[s.next].prev = s.prev;
    else
      tail_ = s.prev;
    s.prev = s.next = -1;
  }
  void LinkFront(int slot) {
    Slot& s = slots_[slot];
    s.prev = -1;
    s.next = head_;
    if (head_ >= 0) slots_[head_].prev = slot;
    head_ = slot;
    if (tail_ < 0) tail_ = slot;
  }
  void Touch(int slot) {
    if (head_ == slot) return;
    Unlink(slot);
    LinkFront(slot);
  }

  const MatrixD& x_;
  const Kernel& kernel_;
  const int64_t rows_;
  VectorD squared_norms_;
  VectorD scratch_;
  Eigen::MatrixXd x_by_column_;
  std::vector<double> diagonal_;
  std::vector<int> slot_of_;
  std::vector<Slot> slots_;
  std::size_t capacity_ = 2;
  int head_ = -1, tail_ = -1;
};

void ValidateInputs(const MatrixD& x, const Kernel& kernel, const SolverOptions& options) {
  if (x.rows() < 1 || x.cols() < 1) {
    throw PreconditionError("SolveOneClass: empty training matrix (" + std::to_string(x.rows()) +
                            " x " + std::to_string(x.cols()) + ")");
  }
  if (!(options.nu > 0 && options.nu <= 1)) {
    std::ostringstream m;
    m << "SolveOneClass: nu = " << options.nu << " is outside (0, 1]";
    throw PreconditionError(m.str());
  }
  if (!(options.tolerance > 0) || !std::isfinite(options.tolerance)) {
    std::ostringstream m;
    m << "SolveOneClass: tolerance = " << options.tolerance << " must be > 0";
    throw PreconditionError(m.str());
  }
  if (options.max_iterations < 0) {
    throw PreconditionError("SolveOneClass: max_iterations = " +
                            std::to_string(options.max_iterations) + " must be >= 0");
  }
  if (!x.allFinite()) throw PreconditionError("SolveOneClass: non-finite value in the input");
  kernel.Validate("SolveOneClass");
}

}  // namespace

VectorD ColdStartAlpha(int64_t rows, double nu) {
  const double total = nu * static_cast<double>(rows);  // in LIBSVM's scaling
  VectorD scaled = VectorD::Zero(rows);
  const int64_t full = std::min<int64_t>(rows, static_cast<int64_t>(std::floor(total)));
  for (int64_t i = 0; i < full; ++i) scaled[i] = 1.0;
  if (full < rows) scaled[full] = total - static_cast<double>(full);
  return scaled / total;
}

SolverResult SolveOneClass(const MatrixD& x, const Kernel& kernel, const SolverOptions& options,
                           const VectorD* initial_alpha) {
  const auto started = std::chrono::steady_clock::now();
  ValidateInputs(x, kernel, options);
  const int64_t l = x.rows();
  const double scale = options.nu * static_cast<double>(l);  // a' = scale * a
  const double upper = 1.0;
  const double eps_requested = options.tolerance * std::min(1.0, scale);
  const int64_t max_iterations =
      options.max_iterations > 0 ? options.max_iterations : std::max<int64_t>(10'000'000, 100 * l);

  std::vector<double> alpha(l);
  if (initial_alpha != nullptr) {
    const VectorD& seed = *initial_alpha;
    if (seed.size() != l) {
      throw PreconditionError("SolveOneClass: initial alpha has " + std::to_string(seed.size()) +
                              " entries for " + std::to_string(l) + " rows");
    }
    const double sum = seed.sum();
    if (!std::isfinite(sum) || std::abs(sum - 1.0) > 1e-9) {
      std::ostringstream m;
      m.precision(17);
      m << "SolveOneClass: initial alpha sums to " << sum << ", not 1";
      throw PreconditionError(m.str());
    }
    for (int64_t i = 0; i < l; ++i) {
      const double a = seed[i] * scale;
      if (!(a >= -1e-9) || !(a <= upper + 1e-9)) {
        std::ostringstream m;
        m.precision(17);
        m << "SolveOneClass: initial alpha[" << i << "] = " << seed[i] << " is outside [0, "
          << 1.0 / scale << "]";
        throw PreconditionError(m.str());
      }
      // Rounding in 1/(nu l) * nu l can leave a bounded alpha one ulp below the bound, where it
      // would count as free and cost a step: snap what is within 1e-9 of a bound onto it.
      alpha[i] = a > upper - 1e-9 ? upper : (a < 1e-9 * upper ? 0.0 : a);
    }
  } else {
    // LIBSVM's start fills the first rows; we fill the rows farthest from the mean instead (any
    // feasible point is a valid start, methods.md). Those are the likeliest to end at the bound as
    // outliers, and on Gaussian data it halves the iterations to the same optimum.
    const VectorD cold = ColdStartAlpha(l, options.nu);
    const Eigen::RowVectorXd mean = x.colwise().mean();  // evaluated once, not per row
    const VectorD distances = (x.rowwise() - mean).rowwise().squaredNorm();
    std::vector<int64_t> order(l);
    for (int64_t i = 0; i < l; ++i) order[i] = i;
    std::stable_sort(order.begin(), order.end(),
                     [&](int64_t p, int64_t q) { return distances[p] > distances[q]; });
    for (int64_t rank = 0; rank < l; ++rank)
      alpha[order[rank]] = std::min(upper, cold[rank] * scale);
  }

  ColumnCache cache(x, kernel, options.cache_bytes);
  // The gradient is built from float columns, so it is exact only to about float epsilon times its
  // largest possible magnitude, max k(x, x) (Cauchy-Schwarz) times sum a' = nu l. An absolute
  // tolerance below that cannot be reached: a polynomial kernel on a vector far from the scaler's
  // centre (k ~ 1e28) ran every refit to the iteration cap. The floor keeps the rule relative to
  // what the cache resolves; for rbf (k(x, x) = 1) it stays below LIBSVM's rule unless nu l > 8000.
  double largest_diagonal = 0;
  for (int64_t i = 0; i < l; ++i) largest_diagonal = std::max(largest_diagonal, cache.Diagonal(i));
  if (!(largest_diagonal <= static_cast<double>(std::numeric_limits<float>::max()))) {
    std::ostringstream m;
    m << "SolveOneClass: kernel values overflow the solver's float cache (largest k(x, x) = "
      << largest_diagonal << "); scale the features or use the rbf kernel";
    throw PreconditionError(m.str());
  }
  const double eps =
      std::max(eps_requested, static_cast<double>(std::numeric_limits<float>::epsilon()) *
                                  largest_diagonal * std::max(1.0, scale));
  std::vector<double> gradient(l, 0.0);
  auto reconstruct_gradient = [&](const std::vector<int64_t>& targets) {
    for (int64_t t : targets) gradient[t] = 0;
    std::vector<int64_t> nonzero;
    for (int64_t j = 0; j < l; ++j)
      if (alpha[j] > 0) nonzero.push_back(j);
    cache.Prefetch(nonzero);
    for (int64_t j = 0; j < l; ++j) {
      if (alpha[j] <= 0) continue;
      const float* column = cache.Column(j);
      for (int64_t t : targets) gradient[t] += alpha[j] * column[t];
    }
  };
  std::vector<int64_t> active(l);
  for (int64_t i = 0; i < l; ++i) active[i] = i;
  reconstruct_gradient(active);

  const int64_t shrink_interval = std::min<int64_t>(l, 1000);
  int64_t countdown = shrink_interval;
  bool unshrunk = false;
  int64_t iterations = 0;
  bool converged = false;
  std::vector<int64_t> inactive;

  auto restore_all = [&]() {
    inactive.clear();
    std::vector<char> is_active(l, 0);
    for (int64_t t : active) is_active[t] = 1;
    for (int64_t t = 0; t < l; ++t)
      if (!is_active[t]) inactive.push_back(t);
    reconstruct_gradient(inactive);
    active.resize(l);
    for (int64_t i = 0; i < l; ++i) active[i] = i;
  };

  // The active set was just restored: check optimality before shrinking again.
  bool just_restored = false;
  // The gradient update also finds the next iteration's i (argmin G over a < C), which saves a
  // pass over the active set; anything that changes the active set invalidates it.
  bool next_i_valid = false;
  int64_t next_i = -1;
  double next_g_min = 0;
  while (iterations < max_iterations) {
    if (options.shrinking && !just_restored && --countdown == 0) {
      countdown = shrink_interval;
      next_i_valid = false;
      double min_up = std::numeric_limits<double>::infinity();
      double max_low = -std::numeric_limits<double>::infinity();
      for (int64_t t : active) {
        if (alpha[t] < upper) min_up = std::min(min_up, gradient[t]);
        if (alpha[t] > 0) max_low = std::max(max_low, gradient[t]);
      }
      // With no candidate on one side the working-set selection below stops; nothing to shrink.
      const bool one_sided = std::isinf(min_up) || std::isinf(max_low);
      if (!one_sided && !unshrunk && max_low - min_up <= 10 * eps) {
        unshrunk = true;
        restore_all();
      }
      // A variable at a bound whose gradient says it would move further into that bound leaves
      // the active set (LIBSVM's be_shrunk for y = +1).
      std::size_t kept = 0;
      for (int64_t t : active) {
        if (one_sided) break;
        const bool stuck =
            (alpha[t] >= upper && gradient[t] < min_up) || (alpha[t] <= 0 && gradient[t] > max_low);
        if (!stuck) active[kept++] = t;
      }
      if (!one_sided) active.resize(kept);
    }

    // Working set: i = argmin G over a < C; j by the second-order gain among a > 0.
    int64_t i = -1;
    double g_min = std::numeric_limits<double>::infinity();
    if (next_i_valid) {
      i = next_i;
      g_min = next_g_min;
    } else {
      for (int64_t t : active) {
        if (alpha[t] < upper && gradient[t] <= g_min) {
          g_min = gradient[t];
          i = t;
        }
      }
    }
    next_i_valid = false;
    int64_t j = -1;
    double g_max = -std::numeric_limits<double>::infinity();
    if (i >= 0) {
      const float* column_i = cache.Column(i);
      const double diagonal_i = cache.Diagonal(i);
      double best = std::numeric_limits<double>::infinity();
      for (int64_t t : active) {
        if (alpha[t] <= 0) continue;
        const double g = gradient[t];
        g_max = std::max(g_max, g);
        const double difference = g - g_min;
        if (difference > 0) {
          double curvature = diagonal_i + cache.Diagonal(t) - 2.0 * column_i[t];
          if (curvature <= 0) curvature = kTau;
          const double gain = -(difference * difference) / curvature;
          if (gain <= best) {
            best = gain;
            j = t;
          }
        }
      }
    }
    if (i < 0 || j < 0 || g_max - g_min < eps) {
      if (static_cast<int64_t>(active.size()) < l) {
        restore_all();  // re-check optimality on the full set
        next_i_valid = false;
        unshrunk = true;
        countdown = shrink_interval;
        just_restored = true;
        continue;
      }
      converged = true;
      break;
    }
    ++iterations;
    just_restored = false;

    const float* column_i = cache.Column(i);
    const float* column_j = cache.Column(j);
    double curvature = cache.Diagonal(i) + cache.Diagonal(j) - 2.0 * column_i[j];
    if (curvature <= 0) curvature = kTau;
    const double old_i = alpha[i], old_j = alpha[j];
    const double sum = old_i + old_j;
    double delta = (gradient[i] - gradient[j]) / curvature;
    double new_i = old_i - delta, new_j = old_j + delta;
    // Clip to the box keeping a_i + a_j fixed (LIBSVM's same-label case with C_i = C_j = 1).
    if (sum > upper) {
      if (new_i > upper) {
        new_i = upper;
        new_j = sum - upper;
      }
      if (new_j > upper) {
        new_j = upper;
        new_i = sum - upper;
      }
    } else {
      if (new_j < 0) {
        new_j = 0;
        new_i = sum;
      }
      if (new_i < 0) {
        new_i = 0;
        new_j = sum;
      }
    }
    alpha[i] = new_i;
    alpha[j] = new_j;
    const double delta_i = new_i - old_i, delta_j = new_j - old_j;
    // column_i may have been evicted by fetching column_j only if capacity were 1; it is >= 2.
    next_g_min = std::numeric_limits<double>::infinity();
    next_i = -1;
    for (int64_t t : active) {
      const double g = gradient[t] + column_i[t] * delta_i + column_j[t] * delta_j;
      gradient[t] = g;
      if (alpha[t] < upper && g <= next_g_min) {
        next_g_min = g;
        next_i = t;
      }
    }
    next_i_valid = true;
  }
  if (static_cast<int64_t>(active.size()) < l) restore_all();

  // rho: the mean gradient over free variables; with none, the midpoint of the feasible interval
  // (LIBSVM). With every variable at the upper bound (nu = 1) that interval is [max G, inf): we
  // take its lower end, so the training point with the largest kernel sum sits on the boundary.
  double ub = std::numeric_limits<double>::infinity(), lb = -ub, free_sum = 0;
  int64_t free_count = 0, support = 0, bounded = 0;
  double objective = 0;
  for (int64_t t = 0; t < l; ++t) {
    objective += 0.5 * alpha[t] * gradient[t];
    if (alpha[t] > 0) ++support;
    if (alpha[t] >= upper) {
      ++bounded;
      lb = std::max(lb, gradient[t]);
    } else if (alpha[t] <= 0) {
      ub = std::min(ub, gradient[t]);
    } else {
      ++free_count;
      free_sum += gradient[t];
    }
  }
  double rho;
  if (free_count > 0)
    rho = free_sum / static_cast<double>(free_count);
  else if (std::isinf(ub))
    rho = lb;
  else if (std::isinf(lb))
    rho = ub;
  else
    rho = 0.5 * (ub + lb);

  SolverResult result;
  result.alpha = Eigen::Map<const VectorD>(alpha.data(), l) / scale;
  result.rho = rho / scale;
  result.objective = objective / (scale * scale);
  result.iterations = iterations;
  result.converged = converged;
  result.support_vectors = support;
  result.bounded_support_vectors = bounded;
  result.seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count();
  return result;
}

}  // namespace nuwatch
