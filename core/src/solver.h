// The nu one-class SVM dual (Schölkopf et al. 2001), solved by SMO with second-order working-set
// selection (Fan, Chen, Lin 2005), shrinking and a kernel-column cache bounded in bytes.
//
//   minimise 1/2 a' K a   subject to 0 <= a_i <= 1 / (nu l),  sum_i a_i = 1.
//
// Internally the problem is solved in LIBSVM's scaling (a' = nu l a, so 0 <= a' <= 1 and
// sum a' = nu l) so that, for nu l >= 1, the stopping rule is exactly LIBSVM's:
//   max{G_i : a'_i > 0} - min{G_i : a'_i < 1} < tolerance,   G = K a'.
// When nu l < 1 the gradient shrinks with nu l and that absolute rule would stop far too early, so
// the tolerance is scaled by nu l there: the rule is relative to the size of the gradient.
// The kernel columns are cached in float, so the gradient is resolved only to about float epsilon
// times its largest possible size (max k(x, x) nu l); the tolerance is never taken below that
// floor, or a kernel with large values (polynomial or linear on a vector far from the scaler's
// centre) could never meet the rule and would run to the iteration cap. For rbf (k(x, x) = 1) the
// floor lies below LIBSVM's rule unless nu l > 8000. Kernel values beyond float's range are
// refused. Thread safety: SolveOneClass is reentrant; it allocates its own cache.
#pragma once

#include <cstddef>
#include <cstdint>

#include "nuwatch/kernel.h"
#include "nuwatch/types.h"

namespace nuwatch {

struct SolverOptions {
  double nu = 0.05;                      // (0, 1]
  double tolerance = 1e-3;               // > 0; see the stopping rule above
  std::size_t cache_bytes = 100u << 20;  // kernel-column cache (float32 columns of length l)
  int64_t max_iterations = 0;            // 0: max(10'000'000, 100 l)
  bool shrinking = true;
};

struct SolverResult {
  VectorD alpha;         // per training row, unscaled: 0 <= alpha_i <= 1/(nu l), sum = 1
  double rho = 0.0;      // unscaled offset: f(x) = sum_i alpha_i k(x_i, x) - rho
  double objective = 0;  // 1/2 alpha' K alpha (unscaled)
  int64_t iterations = 0;
  bool converged =
      false;  // false: stopped at max_iterations; the alpha is feasible but not optimal
  int64_t support_vectors = 0;          // alpha_i > 0
  int64_t bounded_support_vectors = 0;  // alpha_i at the upper bound
  double seconds = 0;
};

// Solves the dual on the rows of x (already scaled).
// Requires: x.rows() >= 1, finite values; 0 < nu <= 1; tolerance > 0; a valid kernel whose
// values k(x_i, x_i) fit in a float. If
// initial_alpha is given it must be feasible (size l, 0 <= a_i <= 1/(nu l), sum = 1, each to 1e-9
// relative); it is the warm start. Violations throw PreconditionError naming the offending value.
// Ensures: result.alpha feasible; converged unless the iteration cap was hit.
SolverResult SolveOneClass(const MatrixD& x, const Kernel& kernel, const SolverOptions& options,
                           const VectorD* initial_alpha = nullptr);

// LIBSVM's cold start: the first floor(nu l) rows at the bound, the remainder on the next row.
// SolveOneClass without a seed uses these values on the rows sorted by decreasing distance from
// the mean (the likeliest outliers first), which reaches the same optimum in fewer iterations.
VectorD ColdStartAlpha(int64_t rows, double nu);

}  // namespace nuwatch
