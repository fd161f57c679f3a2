// Per-feature scaling, fitted on the training window and frozen with the model.
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
};

std::string_view ScalerName(ScalerType type);  // "none", "standard", "robust"
std::optional<ScalerType> ParseScalerType(std::string_view name);

class Scaler {
 public:
  Scaler() = default;  // identity on 0 features

  // Requires: x.rows() >= 1, all values finite. A feature whose spread is 0 (or, for robust, whose
  // IQR is 0 and standard deviation is 0) gets scale 1, so it is centred but not blown up.
  static Scaler Fit(ScalerType type, const MatrixD& x);
  // Requires: center.size() == scale.size(), every scale > 0.
  static Scaler FromParameters(ScalerType type, VectorD center, VectorD scale);

  ScalerType type() const { return type_; }
  int dims() const { return static_cast<int>(center_.size()); }
  const VectorD& center() const { return center_; }
  const VectorD& scale() const { return scale_; }

  // Requires: x.cols() == dims().
  MatrixD Transform(const MatrixD& x) const;
  // out[j] = (in[j] - center[j]) / scale[j] for j < dims(); no allocation.
  void TransformRow(const double* in, float* out) const;
  void TransformRow(const double* in, double* out) const;

 private:
  ScalerType type_ = ScalerType::kNone;
  VectorD center_;
  VectorD scale_;
  VectorD inverse_scale_;
};

}  // namespace nuwatch
