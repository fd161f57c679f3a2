// Kernels k(x, y) and their batch evaluation in GEMM form.
//
// Conventions (the same as LIBSVM and scikit-learn, so that parameters carry over):
//   rbf         k(x, y) = exp(-gamma ||x - y||^2)
//   linear      k(x, y) = x . y
//   polynomial  k(x, y) = (gamma x . y + coef0)^degree
// Thread safety: Kernel is a value type; all functions here are pure and thread-safe.
#pragma once

#include <optional>
#include <string>
#include <string_view>

#include "nuwatch/types.h"

namespace nuwatch {

enum class KernelType { kRbf = 0, kLinear = 1, kPolynomial = 2 };

// "rbf", "linear", "poly".
std::string_view KernelName(KernelType type);
std::optional<KernelType> ParseKernelType(std::string_view name);

struct Kernel {
  KernelType type = KernelType::kRbf;
  double gamma = 1.0;  // rbf and polynomial; > 0
  int degree = 3;      // polynomial; >= 1
  double coef0 = 0.0;  // polynomial

  // Requires: gamma > 0 (rbf, polynomial), degree >= 1 (polynomial). Throws PreconditionError
  // naming `caller` and the offending value otherwise.
  void Validate(std::string_view caller) const;

  // The textbook formula on two vectors of length d; the reference the fast paths are tested
  // against.
  double Evaluate(const double* x, const double* y, int d) const;

  // K(i, j) = k(a_i, b_j) in GEMM form (||a||^2 + ||b||^2 - 2 a.b for rbf).
  // Requires: a.cols() == b.cols(). Ensures: out is a.rows() x b.rows().
  MatrixD Matrix(const MatrixD& a, const MatrixD& b) const;
  MatrixF Matrix(const MatrixF& a, const MatrixF& b) const;
};

// How the kernel width is chosen for rbf (and the gamma of polynomial).
//   kMinVolume: chosen from the data by the minimum-volume criterion (nuwatch/kernel_width.h):
//   among a grid around "scale", the width whose calibrated acceptance region is smallest. It
//   needs calibrated fits, so only FitWindow (detector.h) resolves it, and only for rbf.
struct GammaSpec {
  enum class Mode { kValue = 0, kScale = 1, kMedian = 2, kMinVolume = 3 };
  Mode mode = Mode::kScale;
  double value = 0.0;  // used when mode == kValue

  // "scale", "median", "min_volume" or a positive number. Returns nullopt for anything else.
  static std::optional<GammaSpec> Parse(std::string_view text);
  std::string ToString() const;
};

// Resolves a GammaSpec on the (already scaled) training matrix.
//   scale:  1 / (d * Var(X)) over all entries of X, as scikit-learn defines gamma="scale";
//           1.0 when that variance is 0.
//   median: 1 / median ||x_i - x_j||^2 over up to 2000 pairs drawn with a fixed seed (so the same
//           data always gives the same gamma). This is the convention k = exp(-d^2 / (2 sigma^2))
//           with 2 sigma^2 = median d^2; others in the literature differ by a factor of 2.
// Requires: x.rows() >= 1 and spec.mode != kMinVolume (that one needs FitWindow's calibrated
// fits: PreconditionError). Ensures: result > 0.
double ResolveGamma(const GammaSpec& spec, const MatrixD& x);

}  // namespace nuwatch
