#include "nuwatch/kernel_width.h"

#include <Eigen/Eigenvalues>
#include <algorithm>
#include <cmath>
#include <numbers>
#include <random>
#include <sstream>

#include "nuwatch/model.h"

namespace nuwatch {
namespace {

// A uniform double in (0, 1) from the top 53 bits (never 0, so the logarithm below is finite).
double OpenUniform(std::mt19937_64& generator) {
  return (static_cast<double>(generator() >> 11) + 0.5) * 0x1.0p-53;
}

// Standard normal deviates by the Box-Muller transform (a pair per two uniforms); written out
// because std::normal_distribution's algorithm differs between standard libraries.
class NormalDeviates {
 public:
  explicit NormalDeviates(uint64_t seed) : generator_(seed) {}
  double Next() {
    if (has_spare_) {
      has_spare_ = false;
      return spare_;
    }
    const double radius = std::sqrt(-2.0 * std::log(OpenUniform(generator_)));
    const double angle = 2.0 * std::numbers::pi * OpenUniform(generator_);
    spare_ = radius * std::sin(angle);
    has_spare_ = true;
    return radius * std::cos(angle);
  }

 private:
  std::mt19937_64 generator_;
  double spare_ = 0;
  bool has_spare_ = false;
};

double LogSumExp(std::span<const double> values) {
  double top = -std::numeric_limits<double>::infinity();
  for (const double v : values) top = std::max(top, v);
  if (!std::isfinite(top)) return top;
  double total = 0;
  for (const double v : values) total += std::exp(v - top);
  return top + std::log(total);
}

}  // namespace

ImportanceSample DrawImportanceSample(const VectorD& center, const MatrixD& covariance,
                                      const VolumeSampling& sampling) {
  const int64_t d = center.size();
  const int64_t k = static_cast<int64_t>(sampling.spreads.size());
  if (d < 1 || covariance.rows() != d || covariance.cols() != d) {
    throw PreconditionError("DrawImportanceSample: a center of " + std::to_string(d) +
                            " values and a " + std::to_string(covariance.rows()) + " x " +
                            std::to_string(covariance.cols()) + " covariance");
  }
  if (!center.allFinite() || !covariance.allFinite() ||
      !covariance.isApprox(covariance.transpose())) {
    throw PreconditionError(
        "DrawImportanceSample: non-finite center or covariance, or an "
        "asymmetric covariance");
  }
  if (k < 1 || sampling.samples < k) {
    throw PreconditionError("DrawImportanceSample: " + std::to_string(sampling.samples) +
                            " samples over " + std::to_string(k) +
                            " spreads (need at least one spread and a sample for each)");
  }
  for (const double s : sampling.spreads) {
    if (!(s > 0) || !std::isfinite(s)) {
      std::ostringstream m;
      m << "DrawImportanceSample: spread " << s << " must be a finite number > 0";
      throw PreconditionError(m.str());
    }
  }
  if (!(sampling.eigenvalue_floor > 0 && sampling.eigenvalue_floor <= 1)) {
    std::ostringstream m;
    m << "DrawImportanceSample: eigenvalue_floor = " << sampling.eigenvalue_floor
      << " must be in (0, 1]";
    throw PreconditionError(m.str());
  }
  // C = V diag(lambda) V^T; a sample of spread s is m + s V diag(sqrt(lambda)) e, e ~ N(0, I),
  // whose density at a point with Mahalanobis radius r (r^2 = |diag(lambda)^-1/2 V^T (x - m)|^2)
  // is (2 pi)^(-d/2) s^-d det(C)^(-1/2) exp(-r^2 / (2 s^2)).
  const Eigen::MatrixXd dense = covariance;
  Eigen::SelfAdjointEigenSolver<Eigen::MatrixXd> eigen(dense);
  VectorD lambda = eigen.eigenvalues();
  const double floor = std::max(lambda.mean(), 1e-300) * sampling.eigenvalue_floor;
  lambda = lambda.cwiseMax(floor);
  const Eigen::MatrixXd map = eigen.eigenvectors() * lambda.cwiseSqrt().asDiagonal();
  const double log_det = lambda.array().log().sum();
  const double dd = static_cast<double>(d);
  const double log_norm = -0.5 * dd * std::log(2 * std::numbers::pi) - 0.5 * log_det;

  ImportanceSample out;
  out.points.resize(sampling.samples, d);
  out.log_density.resize(sampling.samples);
  NormalDeviates normal(sampling.seed);
  Eigen::VectorXd e(d);
  std::vector<double> terms(static_cast<std::size_t>(k));
  const double log_share = -std::log(static_cast<double>(k));
  for (int64_t i = 0; i < sampling.samples; ++i) {
    // Even allocation: sample i comes from component i mod k (deterministic stratification; the
    // mixture density below is what weights it).
    const double spread = sampling.spreads[static_cast<std::size_t>(i % k)];
    for (int64_t j = 0; j < d; ++j) e[j] = normal.Next();
    out.points.row(i) = (center + spread * (map * e)).transpose();
    const double r2 = spread * spread * e.squaredNorm();
    for (int64_t c = 0; c < k; ++c) {
      const double s = sampling.spreads[static_cast<std::size_t>(c)];
      terms[static_cast<std::size_t>(c)] =
          log_share + log_norm - dd * std::log(s) - r2 / (2 * s * s);
    }
    out.log_density[i] = LogSumExp(terms);
  }
  return out;
}

VolumeEstimate EstimateVolume(const ImportanceSample& sample, std::span<const uint8_t> inside) {
  const int64_t n = sample.points.rows();
  if (static_cast<int64_t>(inside.size()) != n || sample.log_density.size() != n) {
    throw PreconditionError("EstimateVolume: " + std::to_string(inside.size()) + " flags for " +
                            std::to_string(n) + " samples");
  }
  VolumeEstimate out;
  out.samples = n;
  // Weights w_i = 1{inside} / q_i, handled relative to the largest so nothing overflows.
  double top = -std::numeric_limits<double>::infinity();
  for (int64_t i = 0; i < n; ++i) {
    if (inside[static_cast<std::size_t>(i)]) {
      ++out.inside;
      top = std::max(top, -sample.log_density[i]);
    }
  }
  if (out.inside == 0 || n < 2) return out;
  double sum = 0, sum2 = 0;
  for (int64_t i = 0; i < n; ++i) {
    if (!inside[static_cast<std::size_t>(i)]) continue;
    const double w = std::exp(-sample.log_density[i] - top);
    sum += w;
    sum2 += w * w;
  }
  const double nn = static_cast<double>(n);
  const double mean = sum / nn;
  out.log_volume = top + std::log(mean);
  // Sample variance of the weights (zeros included), over n for the mean's variance.
  const double variance = std::max(0.0, (sum2 - nn * mean * mean) / (nn - 1));
  out.standard_error =
      out.inside >= 2 ? std::sqrt(variance / nn) / mean : std::numeric_limits<double>::infinity();
  out.effective_samples = sum * sum / sum2;
  return out;
}

std::vector<uint8_t> InsideAcceptanceRegion(const Model& model, const MatrixD& points) {
  const ModelParts& p = model.parts();
  if (p.kernel.type != KernelType::kRbf || !model.calibrated()) {
    throw PreconditionError("InsideAcceptanceRegion: needs a calibrated rbf model");
  }
  if (points.cols() != model.dims()) {
    throw PreconditionError("InsideAcceptanceRegion: points have " + std::to_string(points.cols()) +
                            " columns, the model " + std::to_string(model.dims()));
  }
  const double threshold = p.calibration.Threshold();
  std::vector<uint8_t> inside(static_cast<std::size_t>(points.rows()), 0);
  if (std::isnan(threshold)) return inside;
  const MatrixD& s = p.support_vectors;
  const VectorD s_norms = s.rowwise().squaredNorm();
  const VectorD log_a = p.coefficients.array().log();
  const double gamma = p.kernel.gamma;
  constexpr int64_t kRows = 512;  // bounds the temporary block of exponents
  for (int64_t start = 0; start < points.rows(); start += kRows) {
    const int64_t m = std::min(kRows, points.rows() - start);
    const auto z = points.middleRows(start, m);
    MatrixD e = z * s.transpose();
    const VectorD z_norms = z.rowwise().squaredNorm();
    e = ((-2 * e).colwise() + z_norms).rowwise() + s_norms.transpose();
    // log(a_j) - gamma |z - s_j|^2, then log-sum-exp per row: -nonconformity.
    e = ((-gamma * e.array().max(0.0)).rowwise() + log_a.transpose().array()).matrix();
    for (int64_t i = 0; i < m; ++i) {
      const double top = e.row(i).maxCoeff();
      const double log_sum = top + std::log((e.row(i).array() - top).exp().sum());
      inside[static_cast<std::size_t>(start + i)] = -log_sum <= threshold ? 1 : 0;
    }
  }
  return inside;
}

std::vector<double> MinVolumeGammaGrid(double scale_gamma) {
  if (!(scale_gamma > 0) || !std::isfinite(scale_gamma)) {
    std::ostringstream m;
    m << "MinVolumeGammaGrid: scale_gamma = " << scale_gamma << " must be a finite number > 0";
    throw PreconditionError(m.str());
  }
  return {scale_gamma / 4, scale_gamma / 2, scale_gamma, scale_gamma * 2, scale_gamma * 4};
}

}  // namespace nuwatch
