#include "nuwatch/scaler.h"

#include <algorithm>
#include <cmath>
#include <vector>

namespace nuwatch {

std::string_view ScalerName(ScalerType type) {
  switch (type) {
    case ScalerType::kNone:
      return "none";
    case ScalerType::kStandard:
      return "standard";
    case ScalerType::kRobust:
      return "robust";
  }
  return "unknown";
}

std::optional<ScalerType> ParseScalerType(std::string_view name) {
  if (name == "none") return ScalerType::kNone;
  if (name == "standard") return ScalerType::kStandard;
  if (name == "robust") return ScalerType::kRobust;
  return std::nullopt;
}

namespace {

// Linear interpolation between order statistics (the default "type 7" quantile of R and numpy).
double Quantile(std::vector<double>& sorted, double q) {
  const double position = q * static_cast<double>(sorted.size() - 1);
  const std::size_t lower = static_cast<std::size_t>(std::floor(position));
  const std::size_t upper = std::min(lower + 1, sorted.size() - 1);
  return sorted[lower] + (position - static_cast<double>(lower)) * (sorted[upper] - sorted[lower]);
}

}  // namespace

Scaler Scaler::Fit(ScalerType type, const MatrixD& x) {
  if (x.rows() < 1 || x.cols() < 1) {
    throw PreconditionError("Scaler::Fit: empty matrix (" + std::to_string(x.rows()) + " x " +
                            std::to_string(x.cols()) + ")");
  }
  if (!x.allFinite()) throw PreconditionError("Scaler::Fit: non-finite value in the input");
  const int d = static_cast<int>(x.cols());
  VectorD center = VectorD::Zero(d), scale = VectorD::Ones(d);
  if (type == ScalerType::kNone) return FromParameters(type, center, scale);
  std::vector<double> column(x.rows());
  for (int j = 0; j < d; ++j) {
    const double mean = x.col(j).mean();
    const double sd = std::sqrt((x.col(j).array() - mean).square().mean());
    if (type == ScalerType::kStandard) {
      center[j] = mean;
      scale[j] = sd > 0 ? sd : 1.0;
    } else {
      for (int64_t i = 0; i < x.rows(); ++i) column[i] = x(i, j);
      std::sort(column.begin(), column.end());
      center[j] = Quantile(column, 0.5);
      // IQR / 1.349 estimates the standard deviation of a normal distribution (common practice).
      const double iqr_sd = (Quantile(column, 0.75) - Quantile(column, 0.25)) / 1.349;
      scale[j] = iqr_sd > 0 ? iqr_sd : (sd > 0 ? sd : 1.0);
    }
  }
  return FromParameters(type, center, scale);
}

Scaler Scaler::FromParameters(ScalerType type, VectorD center, VectorD scale) {
  if (center.size() != scale.size()) {
    throw PreconditionError("Scaler::FromParameters: center has " + std::to_string(center.size()) +
                            " entries, scale has " + std::to_string(scale.size()));
  }
  for (int j = 0; j < scale.size(); ++j) {
    if (!(scale[j] > 0) || !std::isfinite(scale[j]) || !std::isfinite(center[j])) {
      throw PreconditionError("Scaler::FromParameters: feature " + std::to_string(j) +
                              " has scale " + std::to_string(scale[j]) + ", center " +
                              std::to_string(center[j]));
    }
  }
  Scaler scaler;
  scaler.type_ = type;
  scaler.center_ = std::move(center);
  scaler.scale_ = std::move(scale);
  scaler.inverse_scale_ = scaler.scale_.cwiseInverse();
  return scaler;
}

MatrixD Scaler::Transform(const MatrixD& x) const {
  if (x.cols() != dims()) {
    throw PreconditionError("Scaler::Transform: input has " + std::to_string(x.cols()) +
                            " columns, the scaler " + std::to_string(dims()));
  }
  return ((x.rowwise() - center_.transpose()).array().rowwise() *
          inverse_scale_.transpose().array())
      .matrix();
}

void Scaler::TransformRow(const double* in, float* out) const {
  for (int j = 0; j < dims(); ++j)
    out[j] = static_cast<float>((in[j] - center_[j]) * inverse_scale_[j]);
}

void Scaler::TransformRow(const double* in, double* out) const {
  for (int j = 0; j < dims(); ++j) out[j] = (in[j] - center_[j]) * inverse_scale_[j];
}

}  // namespace nuwatch
