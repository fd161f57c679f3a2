// Compression of a kernel expansion w = sum_i c_i phi(x_i) to a hard budget of support vectors, and
// the recalibration of rho afterwards (methods.md "Budget on support vectors"; Wang, Crammer,
// Vucetic, "Breaking the curse of kernelization", JMLR 13:3103-3131, 2012).
//
// Methods, chosen by kernel (BudgetMethod::kAuto):
//   rbf         merging: the smallest-coefficient vector m is merged with the partner n (all other
//               vectors are tried) that loses the least RKHS weight; z = h x_m + (1-h) x_n with the
//               globally optimal h in [0, 1] (SolveRbfMerge).
//   linear      exact collapse: sum_{i in S} c_i x_i = (sum_S c_i) * mean_S, so the smallest
//               rows - budget + 1 coefficients fold into one vector without changing w at all.
//   polynomial  removal of the smallest coefficient, its weight projected onto the remaining
//   vectors
//               (solve (K_rr + ridge I) beta = a_m k_rm, add beta). When that would make a
//               coefficient <= 0, the system is ill-conditioned, or the kernel matrix is not
//               positive definite (coef0 < 0), the step falls back to plain removal with a_m handed
//               to the others in proportion to their coefficients (the sum is kept).
// BudgetMethod::kRemoveAndProject forces the removal method for any kernel.
//
// The sum of the coefficients is not renormalised. Merging loses a little (a_z <= a_m + a_n),
// projection changes it by sum beta; the collapse and the proportional fallback keep it. The caller
// recalibrates rho on the window anyway (RecalibrateRho), which absorbs the shift of the scores,
// and rescaling would only add to the weight degradation.
//
// Thread safety: all functions are pure and reentrant.
#pragma once

#include <cstdint>

#include "nuwatch/kernel.h"
#include "nuwatch/types.h"

namespace nuwatch {

enum class BudgetMethod {
  kAuto,              // rbf: merging; linear: exact collapse; polynomial: removal with projection
  kRemoveAndProject,  // removal with projection for every kernel
};

struct BudgetResult {
  MatrixD support_vectors;  // rows <= budget, same columns as the input; the row order is not kept
  VectorD coefficients;     // > 0, one per row
  int64_t removed = 0;      // input rows - output rows: merges, removals, and dropped zero rows
  // ||w_before - w_after||^2 in the RKHS, computed exactly at the end from kernel matrices
  // (WeightDistanceSquared); 0 exactly when nothing was merged or removed.
  double weight_degradation = 0;
  // The sum of the per-step squared losses ||w_{t-1} - w_t||^2 that chose each step (Wang et al.'s
  // accounting). By the triangle and Cauchy-Schwarz inequalities,
  // weight_degradation <= removed * step_degradation_sum; equal to it after a single step.
  double step_degradation_sum = 0;
  int64_t projection_fallbacks = 0;  // removal steps that fell back to proportional redistribution
};

// Requires: sv.rows() == coef.size() >= 1, sv.cols() >= 1, all values finite, coef >= 0 with at
// least one coef > 0, budget >= 1, kernel.Validate passes. Throws PreconditionError naming the
// offending value otherwise.
// Ensures: rows <= budget; coefficients > 0 and finite; zero-coefficient rows are always dropped;
// when no coefficient is 0 and rows <= budget, the input is returned unchanged with degradation 0.
// Cost: rbf O((rows - budget) * rows * d) time, O(rows * d) memory (distances from m are recomputed
// each step, which costs the same as updating a stored matrix); linear O(rows * d); removal
// O(rows^3) once plus O(rows^2) per step, O(rows^2) memory (the kernel matrix and its Cholesky
// factor, downdated by a rank-one update per removal). The final exact degradation costs
// O((rows + budget)^2 * d) in blocks of bounded memory.
BudgetResult CompressToBudget(const MatrixD& sv, const VectorD& coef, const Kernel& kernel,
                              int64_t budget, BudgetMethod method = BudgetMethod::kAuto);

// One RBF merge of a_m phi(x_m) + a_n phi(x_n) into a_z phi(z), z = h x_m + (1-h) x_n, given
// D = gamma ||x_m - x_n||^2 (so k(x_m, x_n) = exp(-D)).
struct RbfMerge {
  double h = 0;            // in [0, 1]; 0 places z exactly on x_n, 1 exactly on x_m
  double coefficient = 0;  // a_z = a_m k^((1-h)^2) + a_n k^(h^2), the maximum over h
  double degradation = 0;  // a_m^2 + a_n^2 + 2 k a_m a_n - a_z^2 (computed without cancellation)
};
// The global maximiser over [0, 1]; the objective has two peaks when D > 2 (see budget.cc), and
// the global one is on the heavier vector's side (h <= 1/2 when a_n >= a_m). D = 0 gives h = 0;
// a peak that rounds to an end point resolves to the heavier vector's end point.
// Requires: a_m >= 0, a_n >= 0, a_m + a_n > 0, D >= 0 (D may be +inf), all not NaN.
RbfMerge SolveRbfMerge(double a_m, double a_n, double scaled_distance_squared);

// rho for the compressed model from its kernel sums s_i = sum_j c_j k(z_j, x_i) on the l window
// rows: with k = floor(nu l) (computed with a relative slack of 1e-12 so that e.g. nu = 0.29,
// l = 100 gives 29 although 0.29 * 100 rounds to 28.999...), rho = s_(min(k + 1, l)), the
// (k+1)-th smallest sum. Then #{s_i < rho} <= k, so the outlier fraction (f = s - rho < 0) is at
// most nu; and #{s_i <= rho} >= min(k + 1, l), so no larger rho keeps it within nu: this is the
// largest achievable fraction <= nu. Without a tie at the cut (s_(k) < s_(k+1)) the count is
// exactly k >= nu l - 1, i.e. within 1/l of nu; with ties it is the count below the tied value. nu
// = 1 gives rho = max s (l - 1 outliers without ties) rather than a rho that flags every row.
// Requires: window_kernel_sums non-empty and finite, 0 < nu <= 1 (PreconditionError otherwise).
double RecalibrateRho(const VectorD& window_kernel_sums, double nu);

// ||sum_i c_a,i phi(a_i) - sum_j c_b,j phi(b_j)||^2 via kernel matrices, clamped at 0 against
// rounding (and against a kernel that is not positive semi-definite, e.g. polynomial coef0 < 0).
// Requires: rows match coefficient sizes, sv_a.cols() == sv_b.cols(), kernel valid.
double WeightDistanceSquared(const MatrixD& sv_a, const VectorD& c_a, const MatrixD& sv_b,
                             const VectorD& c_b, const Kernel& kernel);

}  // namespace nuwatch
