#include "nuwatch/model.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <numeric>
#include <sstream>

#include "model_fit.h"
#include "vector_exp.h"

namespace nuwatch {
namespace {

// Support vectors are processed in blocks of this many so that the single-vector path keeps its
// kernel values on the stack and allocates nothing.
constexpr int kBlock = 256;
// Largest dimension scored without touching the heap.
constexpr int kMaxDimsScoredOnStack = 1024;

using BlockVectorF = Eigen::Matrix<float, Eigen::Dynamic, 1, Eigen::ColMajor, kBlock, 1>;

// The polynomial kernel's values (gamma x.y + coef0)^degree from the dot products x.y, in place.
template <typename Dots>
void PolynomialOfDots(const Kernel& kernel, Dots&& dots) {
  dots = (static_cast<float>(kernel.gamma) * dots + static_cast<float>(kernel.coef0))
             .pow(static_cast<float>(kernel.degree));
}

void ValidateParts(const ModelParts& p) {
  const auto n = p.support_vectors.rows();
  if (n < 1 || p.coefficients.size() != n) {
    throw PreconditionError("Model: " + std::to_string(n) + " support vectors and " +
                            std::to_string(p.coefficients.size()) + " coefficients");
  }
  if (p.support_vectors.cols() != p.scaler.dims()) {
    throw PreconditionError("Model: support vectors have " +
                            std::to_string(p.support_vectors.cols()) + " columns, the scaler " +
                            std::to_string(p.scaler.dims()));
  }
  if (!(p.nu > 0 && p.nu <= 1)) {
    std::ostringstream m;
    m << "Model: nu = " << p.nu << " is outside (0, 1]";
    throw PreconditionError(m.str());
  }
  if (!p.feature_names.empty() &&
      static_cast<int64_t>(p.feature_names.size()) != p.support_vectors.cols()) {
    throw PreconditionError("Model: " + std::to_string(p.feature_names.size()) +
                            " feature names for " + std::to_string(p.support_vectors.cols()) +
                            " features");
  }
  if (!p.support_vectors.allFinite() || !p.coefficients.allFinite() || !std::isfinite(p.rho)) {
    throw PreconditionError("Model: non-finite support vectors, coefficients or rho");
  }
  p.kernel.Validate("Model");
  CheckFeatureTransformOptions(p.transform, "Model");
  const FeatureTransformOptions& t = p.transform;
  const int64_t per_feature =
      1 + t.lags + static_cast<int64_t>(t.rolling_windows.size() * t.rolling_statistics.size());
  if (p.support_vectors.cols() % per_feature != 0) {
    throw PreconditionError("Model: " + std::to_string(p.support_vectors.cols()) +
                            " features are not a multiple of the transform's " +
                            std::to_string(per_feature) + " columns per raw feature");
  }
}

}  // namespace

Model::Model(ModelParts parts) : parts_(std::move(parts)) {
  ValidateParts(parts_);
  support_vectors_f_ = parts_.support_vectors.cast<float>();
  coefficients_f_ = parts_.coefficients.cast<float>();
  sv_squared_norms_f_ = support_vectors_f_.rowwise().squaredNorm();
}

Score Model::Evaluate(std::span<const double> x) const {
  const int d = dims();
  if (static_cast<int>(x.size()) != d) {
    throw PreconditionError("Model::Evaluate: vector has " + std::to_string(x.size()) +
                            " values, the model " + std::to_string(d));
  }
  float stack_buffer[kMaxDimsScoredOnStack];
  std::vector<float> heap_buffer;
  float* z = stack_buffer;
  if (d > kMaxDimsScoredOnStack) {
    heap_buffer.resize(d);
    z = heap_buffer.data();
  }
  parts_.scaler.TransformRow(x.data(), z);
  Eigen::Map<const VectorF> zf(z, d);
  const float zz = zf.squaredNorm();
  const float gamma = static_cast<float>(parts_.kernel.gamma);
  const int n = num_support();
  BlockVectorF k;
  if (parts_.kernel.type == KernelType::kRbf) {
    // Streaming log-sum-exp over the blocks: sum = total * exp(shift), with shift the largest
    // exponent so far, so that the kernel sum keeps its magnitude far from every support vector.
    float shift = -std::numeric_limits<float>::infinity();
    double total = 0;
    for (int start = 0; start < n; start += kBlock) {
      const int m = std::min(kBlock, n - start);
      k.resize(m);
      k.noalias() = support_vectors_f_.middleRows(start, m) * zf;
      k = (-gamma *
           (sv_squared_norms_f_.segment(start, m).array() + zz - 2.0f * k.array()).max(0.0f))
              .matrix();
      const float block_max = k.maxCoeff();
      if (block_max > shift) {
        total *= std::exp(static_cast<double>(shift) - block_max);
        shift = block_max;
      }
      k.array() -= shift;
      ExpInPlace(k.data(), m);
      total += k.dot(coefficients_f_.segment(start, m));
    }
    const double log_sum = shift + std::log(total);
    return {std::exp(log_sum) - parts_.rho, -log_sum};
  }
  double total = 0;
  for (int start = 0; start < n; start += kBlock) {
    const int m = std::min(kBlock, n - start);
    k.resize(m);
    k.noalias() = support_vectors_f_.middleRows(start, m) * zf;
    if (parts_.kernel.type == KernelType::kPolynomial) PolynomialOfDots(parts_.kernel, k.array());
    total += k.dot(coefficients_f_.segment(start, m));
  }
  const double decision = total - parts_.rho;
  return {decision, -decision};
}

void Model::EvaluateBatch(const MatrixD& x, VectorD* decisions, VectorD* nonconformity) const {
  if (x.cols() != dims()) {
    throw PreconditionError("Model::EvaluateBatch: input has " + std::to_string(x.cols()) +
                            " columns, the model " + std::to_string(dims()));
  }
  if (decisions != nullptr) decisions->resize(x.rows());
  if (nonconformity != nullptr) nonconformity->resize(x.rows());
  constexpr int64_t kRows = 1024;  // bounds the temporary kernel block
  const float gamma = static_cast<float>(parts_.kernel.gamma);
  for (int64_t start = 0; start < x.rows(); start += kRows) {
    const int64_t m = std::min(kRows, x.rows() - start);
    MatrixF z = parts_.scaler.Transform(x.middleRows(start, m)).cast<float>();
    if (parts_.kernel.type != KernelType::kRbf) {
      // Not Kernel::Matrix: it takes row-major matrices and would copy the support vectors.
      MatrixF k(m, support_vectors_f_.rows());
      k.noalias() = z * support_vectors_f_.transpose();
      if (parts_.kernel.type == KernelType::kPolynomial) PolynomialOfDots(parts_.kernel, k.array());
      const VectorD f = (k * coefficients_f_).cast<double>().array() - parts_.rho;
      if (decisions != nullptr) decisions->segment(start, m) = f;
      if (nonconformity != nullptr) nonconformity->segment(start, m) = -f;
      continue;
    }
    // Exponents -gamma ||z - s||^2 in GEMM form, then a log-sum-exp per row (as Evaluate). Row by
    // row, and exp over the whole block at once: Eigen does not vectorise a broadcast (colwise)
    // expression, and exp over one was libm's scalar expf, a fifth of nuwatchd's CPU under
    // 64-vector messages (perf).
    MatrixF e(m, support_vectors_f_.rows());
    e.noalias() = z * support_vectors_f_.transpose();
    VectorF shift(m);
    for (int64_t i = 0; i < m; ++i) {
      auto row = e.row(i).array();
      row =
          -gamma *
          (sv_squared_norms_f_.transpose().array() + z.row(i).squaredNorm() - 2.0f * row).max(0.0f);
      shift[i] = row.maxCoeff();
      row -= shift[i];
    }
    ExpInPlace(e.data(), e.size());
    const VectorF totals = e * coefficients_f_;
    for (int64_t i = 0; i < m; ++i) {
      const double log_sum =
          static_cast<double>(shift[i]) + std::log(static_cast<double>(totals[i]));
      if (decisions != nullptr) (*decisions)[start + i] = std::exp(log_sum) - parts_.rho;
      if (nonconformity != nullptr) (*nonconformity)[start + i] = -log_sum;
    }
  }
}

VectorD Model::DecisionBatch(const MatrixD& x) const {
  VectorD out;
  EvaluateBatch(x, &out, nullptr);
  return out;
}

int Model::input_dims() const {
  const FeatureTransformOptions& t = parts_.transform;
  const int per_feature =
      1 + t.lags + static_cast<int>(t.rolling_windows.size() * t.rolling_statistics.size());
  return dims() / per_feature;
}

double Model::PValue(const Score& score) const {
  return calibrated() ? parts_.calibration.PValue(score.nonconformity)
                      : std::numeric_limits<double>::quiet_NaN();
}

bool Model::Flagged(const Score& score) const {
  return calibrated() ? parts_.calibration.Flagged(score.nonconformity) : score.decision < 0;
}

bool Model::Flagged(const Score& score, double p_value) const {
  return calibrated() ? parts_.calibration.FlaggedByPValue(p_value) : score.decision < 0;
}

double Model::DecisionExact(std::span<const double> x) const {
  if (static_cast<int>(x.size()) != dims()) {
    throw PreconditionError("Model::DecisionExact: vector has " + std::to_string(x.size()) +
                            " values, the model " + std::to_string(dims()));
  }
  std::vector<double> z(dims());
  parts_.scaler.TransformRow(x.data(), z.data());
  double total = 0;
  for (int i = 0; i < num_support(); ++i)
    total += parts_.coefficients[i] *
             parts_.kernel.Evaluate(&parts_.support_vectors(i, 0), z.data(), dims());
  return total - parts_.rho;
}

VectorD Model::KernelSumsScaled(const MatrixD& z) const {
  if (z.cols() != dims()) {
    throw PreconditionError("Model::KernelSumsScaled: input has " + std::to_string(z.cols()) +
                            " columns, the model " + std::to_string(dims()));
  }
  VectorD out(z.rows());
  constexpr int64_t kRows = 1024;
  for (int64_t start = 0; start < z.rows(); start += kRows) {
    const int64_t m = std::min(kRows, z.rows() - start);
    out.segment(start, m) =
        parts_.kernel.Matrix(MatrixD(z.middleRows(start, m)), parts_.support_vectors) *
        parts_.coefficients;
  }
  return out;
}

std::vector<FeatureShare> Model::Explain(std::span<const double> x, int top_k) const {
  const int d = dims();
  if (static_cast<int>(x.size()) != d) {
    throw PreconditionError("Model::Explain: vector has " + std::to_string(x.size()) +
                            " values, the model " + std::to_string(d));
  }
  if (top_k < 0) throw PreconditionError("Model::Explain: top_k = " + std::to_string(top_k));
  VectorD z(d);
  parts_.scaler.TransformRow(x.data(), z.data());
  const MatrixD& s = parts_.support_vectors;
  const VectorD& a = parts_.coefficients;
  const Kernel& kernel = parts_.kernel;
  // gradient_z: d f / d z, where z are the scaled features.
  VectorD gradient_z = VectorD::Zero(d);
  double true_scale = 1.0;  // gradient_z * true_scale is the exact gradient
  switch (kernel.type) {
    case KernelType::kRbf: {
      VectorD distances = (s.rowwise() - z.transpose()).rowwise().squaredNorm();
      const double nearest = distances.minCoeff();
      // Renormalised by the nearest support vector's kernel value so that the direction survives
      // far outside the envelope, where every kernel value underflows.
      VectorD weights =
          (a.array() * (-kernel.gamma * (distances.array() - nearest)).exp()).matrix();
      gradient_z = -2.0 * kernel.gamma * ((weights.sum() * z) - s.transpose() * weights);
      true_scale = std::exp(-kernel.gamma * nearest);
      break;
    }
    case KernelType::kLinear:
      gradient_z = s.transpose() * a;
      break;
    case KernelType::kPolynomial: {
      VectorD inner = (kernel.gamma * (s * z)).array() + kernel.coef0;
      VectorD weights =
          (a.array() * kernel.degree * kernel.gamma * inner.array().pow(kernel.degree - 1))
              .matrix();
      gradient_z = s.transpose() * weights;
      break;
    }
  }
  // Shares are taken in standardised units of each raw feature, so they do not depend on the
  // features' units; for whiten the gradient is carried back through the rotation first
  // (z = x_std W, so d f / d x_std = W d f / d z).
  if (parts_.scaler.type() == ScalerType::kWhiten) {
    gradient_z = parts_.scaler.whitening() * gradient_z;
  }
  const double magnitude = gradient_z.cwiseAbs().sum();
  std::vector<FeatureShare> shares(d);
  for (int j = 0; j < d; ++j) {
    shares[j].feature = j;
    shares[j].share = magnitude > 0 ? std::abs(gradient_z[j]) / magnitude : 1.0 / d;
    shares[j].gradient = gradient_z[j] * true_scale / parts_.scaler.scale()[j];
  }
  std::stable_sort(shares.begin(), shares.end(),
                   [](const FeatureShare& p, const FeatureShare& q) { return p.share > q.share; });
  if (static_cast<int>(shares.size()) > top_k) shares.resize(top_k);
  return shares;
}

std::size_t Model::MemoryBytes() const {
  const std::size_t n = num_support(), d = dims();
  std::size_t names = 0;
  for (const auto& name : parts_.feature_names) names += name.capacity() + sizeof(std::string);
  return sizeof(Model) + n * d * (sizeof(double) + sizeof(float)) +
         n * (sizeof(double) + 2 * sizeof(float)) + 4 * d * sizeof(double) +
         static_cast<std::size_t>(parts_.scaler.whitening().size()) * sizeof(double) + names;
}

namespace {

void ValidateFitOptions(const FitOptions& o, const MatrixD& x) {
  if (x.rows() < 1 || x.cols() < 1) {
    throw PreconditionError("FitModel: empty training matrix (" + std::to_string(x.rows()) + " x " +
                            std::to_string(x.cols()) + ")");
  }
  std::ostringstream m;
  if (!(o.nu > 0 && o.nu <= 1))
    m << "FitModel: nu = " << o.nu << " is outside (0, 1]";
  else if (!(o.tolerance > 0))
    m << "FitModel: tolerance = " << o.tolerance << " must be > 0";
  else if (o.gamma.mode == GammaSpec::Mode::kValue && !(o.gamma.value > 0))
    m << "FitModel: gamma = " << o.gamma.value << " must be > 0";
  else if (!x.allFinite())
    m << "FitModel: non-finite value in the training data";
  if (!m.str().empty()) throw PreconditionError(m.str());
}

}  // namespace

WindowFit FitScaled(const MatrixD& z, const Scaler& scaler, const Kernel& kernel,
                    const GammaSpec& gamma_spec, const SolverOptions& solver,
                    const VectorD* initial_alpha, uint64_t version,
                    std::vector<std::string> feature_names) {
  WindowFit fit;
  fit.solution = SolveOneClass(z, kernel, solver, initial_alpha);
  const VectorD& alpha = fit.solution.alpha;
  ModelParts parts;
  parts.kernel = kernel;
  parts.gamma_spec = gamma_spec;
  parts.scaler = scaler;
  parts.nu = solver.nu;
  const int64_t n_support = (alpha.array() > 0).count();
  parts.support_vectors.resize(n_support, z.cols());
  parts.coefficients.resize(n_support);
  for (int64_t i = 0, k = 0; i < z.rows(); ++i) {
    if (alpha[i] > 0) {
      parts.support_vectors.row(k) = z.row(i);
      parts.coefficients[k++] = alpha[i];
    }
  }
  parts.rho = fit.solution.rho;
  parts.training = {z.rows(),
                    n_support,
                    fit.solution.bounded_support_vectors,
                    fit.solution.iterations,
                    fit.solution.converged,
                    fit.solution.objective,
                    fit.solution.seconds};
  parts.version = version;
  parts.feature_names = std::move(feature_names);
  fit.model = std::make_shared<const Model>(std::move(parts));
  return fit;
}

Model FitModel(const MatrixD& x, const FitOptions& options,
               std::vector<std::string> feature_names) {
  ValidateFitOptions(options, x);
  Scaler scaler = Scaler::Fit(options.scaler, x);
  MatrixD z = scaler.Transform(x);
  Kernel kernel;
  kernel.type = options.kernel;
  kernel.gamma = options.kernel == KernelType::kLinear ? 1.0 : ResolveGamma(options.gamma, z);
  kernel.degree = options.degree;
  kernel.coef0 = options.coef0;
  kernel.Validate("FitModel");
  SolverOptions solver;
  solver.nu = options.nu;
  solver.tolerance = options.tolerance;
  solver.cache_bytes = options.cache_bytes;
  solver.max_iterations = options.max_iterations;
  WindowFit fit =
      FitScaled(z, scaler, kernel, options.gamma, solver, nullptr, 1, std::move(feature_names));
  return *fit.model;
}

}  // namespace nuwatch
