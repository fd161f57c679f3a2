#include "nuwatch/scaler.h"

#include <Eigen/Eigenvalues>
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
    case ScalerType::kWhiten:
      return "whiten";
  }
  return "unknown";
}

std::optional<ScalerType> ParseScalerType(std::string_view name) {
  if (name == "none") return ScalerType::kNone;
  if (name == "standard") return ScalerType::kStandard;
  if (name == "robust") return ScalerType::kRobust;
  if (name == "whiten") return ScalerType::kWhiten;
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
    if (type == ScalerType::kStandard || type == ScalerType::kWhiten) {
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
  if (type != ScalerType::kWhiten) return FromParameters(type, center, scale);
  // Principal axes of the standardised data (population covariance, as the scale above).
  const MatrixD z =
      (x.rowwise() - center.transpose()).array().rowwise() / scale.transpose().array();
  const MatrixD covariance = (z.transpose() * z) / static_cast<double>(x.rows());
  Eigen::SelfAdjointEigenSolver<MatrixD> eigen(covariance);
  if (eigen.info() != Eigen::Success) {
    throw PreconditionError("Scaler::Fit: the eigendecomposition for whiten did not converge");
  }
  const VectorD& lambda = eigen.eigenvalues();
  const double floor = std::max(lambda.maxCoeff(), 1e-300) * kWhitenFloor;
  const VectorD inverse_root = lambda.cwiseMax(floor).cwiseSqrt().cwiseInverse();
  MatrixD whitening = eigen.eigenvectors() * inverse_root.asDiagonal();
  return FromParameters(type, center, scale, std::move(whitening));
}

Scaler Scaler::FromParameters(ScalerType type, VectorD center, VectorD scale, MatrixD whitening) {
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
  const bool whiten = type == ScalerType::kWhiten;
  if (whiten != (whitening.size() > 0) ||
      (whiten && (whitening.rows() != center.size() || whitening.cols() != center.size() ||
                  !whitening.allFinite()))) {
    throw PreconditionError("Scaler::FromParameters: a " + std::string(ScalerName(type)) +
                            " scaler of " + std::to_string(center.size()) + " features with a " +
                            std::to_string(whitening.rows()) + " x " +
                            std::to_string(whitening.cols()) + " whitening matrix");
  }
  Scaler scaler;
  scaler.type_ = type;
  scaler.whitening_ = std::move(whitening);
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
  MatrixD standardised =
      ((x.rowwise() - center_.transpose()).array().rowwise() * inverse_scale_.transpose().array())
          .matrix();
  if (type_ != ScalerType::kWhiten) return standardised;
  return standardised * whitening_;
}

namespace {

constexpr int kMaxDimsTransformedOnStack = 1024;

template <typename Out>
void StandardiseAndRotate(const double* in, Out* out, const VectorD& center,
                          const VectorD& inverse_scale, const MatrixD& whitening) {
  const int d = static_cast<int>(center.size());
  if (whitening.size() == 0) {
    for (int j = 0; j < d; ++j) out[j] = static_cast<Out>((in[j] - center[j]) * inverse_scale[j]);
    return;
  }
  double stack[kMaxDimsTransformedOnStack];
  std::vector<double> heap;
  double* standardised = stack;
  if (d > kMaxDimsTransformedOnStack) {
    heap.resize(d);
    standardised = heap.data();
  }
  for (int j = 0; j < d; ++j) standardised[j] = (in[j] - center[j]) * inverse_scale[j];
  // whitening is row-major: out = standardised^T W, accumulated row by row in double.
  double accumulated[kMaxDimsTransformedOnStack];
  std::vector<double> heap_accumulated;
  double* sum = accumulated;
  if (d > kMaxDimsTransformedOnStack) {
    heap_accumulated.resize(d);
    sum = heap_accumulated.data();
  }
  std::fill(sum, sum + d, 0.0);
  for (int j = 0; j < d; ++j) {
    const double v = standardised[j];
    const double* row = whitening.data() + static_cast<std::ptrdiff_t>(j) * d;
    for (int k = 0; k < d; ++k) sum[k] += v * row[k];
  }
  for (int k = 0; k < d; ++k) out[k] = static_cast<Out>(sum[k]);
}

}  // namespace

void Scaler::TransformRow(const double* in, float* out) const {
  StandardiseAndRotate(in, out, center_, inverse_scale_, whitening_);
}

void Scaler::TransformRow(const double* in, double* out) const {
  StandardiseAndRotate(in, out, center_, inverse_scale_, whitening_);
}

}  // namespace nuwatch
