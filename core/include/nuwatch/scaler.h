// Feature scaling, fitted on the training window and frozen with the model: per feature
// (standard, robust) or, for whiten, standardisation followed by a rotation onto the principal axes
// of the training data scaled to unit variance, so that the kernel sees Mahalanobis distances
// (a Mahalanobis kernel: Abe, "Training of support vector machines with Mahalanobis kernels",
// ICANN 2005, from memory). Faults that break the correlations between features (what the Q
// statistic of PCA monitoring catches) then move a vector far, even when each feature stays in
// its usual range.
// Thread safety: immutable after construction; const methods are thread-safe.
#pragma once

#include <optional>
#include <string_view>

#include "nuwatch/types.h"

namespace nuwatch {

enum class ScalerType {
  kNone = 0,      // identity
  kStandard = 1,  // (x - mean) / standard deviation (population)
  kRobust = 2,    // (x - median) / (IQR / 1.349): consistent with the standard deviation for
                  // normal data, insensitive to heavy tails
  kWhiten = 3,    // standard, then z = x_std V diag(1 / sqrt(max(lambda, kWhitenFloor lambda_max)))
                  // with lambda, V the eigenpairs of the standardised data's covariance
};

// Eigenvalues below this fraction of the largest are raised to it: directions in which the
// training data did not vary at all (exact collinearity) are amplified 1000-fold, not infinitely.
inline constexpr double kWhitenFloor = 1e-6;

std::string_view ScalerName(ScalerType type);  // "none", "standard", "robust", "whiten"
std::optional<ScalerType> ParseScalerType(std::string_view name);

class Scaler {
 public:
  Scaler() = default;  // identity on 0 features

  // Requires: x.rows() >= 1, all values finite. A feature whose spread is 0 (or, for robust, whose
  // IQR is 0 and standard deviation is 0) gets scale 1, so it is centred but not blown up.
  static Scaler Fit(ScalerType type, const MatrixD& x);
  // Requires: center.size() == scale.size(), every scale > 0; for kWhiten a finite square
  // rotation of that size (empty for the other types).
  static Scaler FromParameters(ScalerType type, VectorD center, VectorD scale,
                               MatrixD whitening = {});

  ScalerType type() const { return type_; }
  int dims() const { return static_cast<int>(center_.size()); }
  const VectorD& center() const { return center_; }
  // For whiten: the standardisation's scale (per-feature standard deviation), which explanations
  // use to express gradients in standardised units of each raw feature.
  const VectorD& scale() const { return scale_; }
  const MatrixD& whitening() const { return whitening_; }  // d x d for kWhiten, else empty

  // Requires: x.cols() == dims().
  MatrixD Transform(const MatrixD& x) const;
  // out[j] = (in[j] - center[j]) / scale[j] for j < dims(), then the whitening rotation for
  // kWhiten; no allocation for dims() <= 1024.
  void TransformRow(const double* in, float* out) const;
  void TransformRow(const double* in, double* out) const;

 private:
  ScalerType type_ = ScalerType::kNone;
  VectorD center_;
  VectorD scale_;
  VectorD inverse_scale_;
  MatrixD whitening_;
};

}  // namespace nuwatch
