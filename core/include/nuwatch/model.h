// A fitted one-class model: support vectors (scaled), coefficients, rho, the frozen scaler and the
// kernel. Immutable once built: refits and compression build a new Model.
//
// Decision convention (methods.md): f(x) = sum_i coef_i k(s_i, scale(x)) - rho, unscaled
// (coefficients sum to 1), so thresholds do not depend on the window size. f(x) < 0: outside the
// envelope. scikit-learn's decision_function equals f times nu l on the same data and parameters.
// Thread safety: all const methods are thread-safe; a Model can be shared between threads.
#pragma once

#include <cstdint>
#include <limits>
#include <memory>
#include <span>
#include <string>
#include <vector>

#include "nuwatch/calibration.h"
#include "nuwatch/feature_transform.h"
#include "nuwatch/kernel.h"
#include "nuwatch/kernel_width.h"
#include "nuwatch/scaler.h"
#include "nuwatch/types.h"

namespace nuwatch {

struct TrainingStats {
  int64_t n_train = 0;
  int64_t n_support = 0;  // before any compression
  int64_t n_bounded = 0;
  int64_t iterations = 0;
  bool converged = true;
  double objective = 0;
  double seconds = 0;
};

// Filled when a model was compressed to a support-vector budget (see budget.h).
struct CompressionStats {
  int64_t support_vectors_before = 0;  // 0: not compressed
  int64_t support_vectors_after = 0;
  double weight_degradation = 0;  // squared RKHS norm of the removed part of the weight vector
  double rho_before = 0;          // rho before recalibration
  double seconds = 0;
};

struct FeatureShare {
  int feature = 0;      // column index
  double share = 0;     // |d f / d s_j| / sum_k |d f / d s_k| with s the standardised features
                        // (so shares do not depend on the features' units), in [0, 1]
  double gradient = 0;  // d f / d x_feature in raw units (positive: increasing x moves inward)
};

// What scoring one vector gives. The nonconformity orders vectors as the decision does (larger:
// stranger) but does not saturate: for rbf it is -log(sum_i coef_i k(s_i, x)), computed stably
// (log-sum-exp), which keeps growing with the distance from the support vectors where the decision
// has flattened out at -rho; for the other kernels it is -decision. Calibration works on it
// (conformal p-values do not change under a monotone transform of the score, except that the
// saturated region stays resolved).
struct Score {
  double decision = 0;
  double nonconformity = 0;
};

struct ModelParts {
  Kernel kernel;
  GammaSpec gamma_spec;  // how kernel.gamma was chosen (for display)
  // gamma = min_volume: the criterion's table (kernel_width.h), one row per candidate width, as
  // measured by the cold fit that chose kernel.gamma (warm refits keep the width and the table).
  // Empty otherwise.
  std::vector<GammaCandidate> gamma_candidates;
  Scaler scaler;
  double nu = 0.05;
  MatrixD support_vectors;  // scaled, one row each
  VectorD coefficients;     // unscaled, > 0
  double rho = 0;
  TrainingStats training;
  CompressionStats compression;
  uint64_t version = 1;
  std::vector<std::string> feature_names;  // empty or dims() names
  // Out-of-sample calibration of the decision values (calibration.h); invalid (the default) for
  // an uncalibrated model, which flags decision < 0.
  Calibration calibration;
  // The temporal context the model's features come from (identity: the raw features). The model
  // scores transformed vectors; whoever feeds it raw rows applies this transform first (the
  // detector, `nuwatch score`). The raw feature names are the first input_dims() names.
  FeatureTransformOptions transform;
};

class Model {
 public:
  // Requires: consistent sizes (support_vectors.rows() == coefficients.size() >= 1,
  // support_vectors.cols() == scaler.dims()), a valid kernel, 0 < nu <= 1.
  explicit Model(ModelParts parts);

  int dims() const { return static_cast<int>(parts_.support_vectors.cols()); }
  int num_support() const { return static_cast<int>(parts_.support_vectors.rows()); }
  const ModelParts& parts() const { return parts_; }
  const Kernel& kernel() const { return parts_.kernel; }
  double rho() const { return parts_.rho; }
  double nu() const { return parts_.nu; }
  uint64_t version() const { return parts_.version; }
  bool calibrated() const { return parts_.calibration.valid(); }
  // The raw dimension before the transform: dims() / (1 + lags + windows x statistics).
  int input_dims() const;

  // The p-value of a score: NaN for an uncalibrated model.
  double PValue(const struct Score& score) const;
  // The alarm rule: p <= the calibrated level, or decision < 0 for an uncalibrated model.
  bool Flagged(const struct Score& score) const;
  // The same rule, given p_value = PValue(score): saves the per-vector path a second lookup.
  bool Flagged(const struct Score& score, double p_value) const;

  // f(x) and the nonconformity for one raw vector of dims() values, on the float32 path.
  // Allocates nothing. Requires: x.size() == dims() (PreconditionError otherwise), finite values.
  Score Evaluate(std::span<const double> x) const;
  double Decision(std::span<const double> x) const { return Evaluate(x).decision; }
  // The same for every row of raw x; batched GEMM on the float32 path. Either output may be null.
  void EvaluateBatch(const MatrixD& x, VectorD* decisions, VectorD* nonconformity) const;
  VectorD DecisionBatch(const MatrixD& x) const;
  // f(x) in double precision from the textbook formula: the reference for the fast paths.
  double DecisionExact(std::span<const double> x) const;
  // sum_i coef_i k(s_i, z) for already scaled rows z (double). Used for rho recalibration.
  VectorD KernelSumsScaled(const MatrixD& z) const;

  // Per-feature attribution of f at x: the analytic gradient of f with respect to the standardised
  // features, its components' magnitudes normalised to shares (`gradient` is in raw units).
  // Ensures: at most top_k entries, sorted by decreasing share. For rbf far from every support
  // vector the gradient is computed with the kernel values renormalised by the largest one, so it
  // does not underflow to zero.
  std::vector<FeatureShare> Explain(std::span<const double> x, int top_k) const;

  // Approximate heap bytes held by the model.
  std::size_t MemoryBytes() const;

 private:
  ModelParts parts_;
  // Column-major, unlike MatrixF: the single-vector path is then a column-major matrix-vector
  // product, which needs no horizontal sum per support vector. One vector at 181 support vectors,
  // d = 16, portable build: 383 ns against 489 ns row-major (tests/bench/model_bench.cc).
  Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::ColMajor> support_vectors_f_;
  VectorF coefficients_f_;
  VectorF sv_squared_norms_f_;
};

struct FitOptions {
  double nu = 0.05;
  KernelType kernel = KernelType::kRbf;
  GammaSpec gamma;
  int degree = 3;
  double coef0 = 0;
  ScalerType scaler = ScalerType::kStandard;
  double tolerance = 1e-3;
  std::size_t cache_bytes = 100u << 20;
  int64_t max_iterations = 0;
};

// Cold fit on raw rows: fits the scaler, resolves gamma, solves, keeps the support vectors.
// Requires: x.rows() >= 1, finite values; options valid (PreconditionError names the value).
Model FitModel(const MatrixD& x, const FitOptions& options,
               std::vector<std::string> feature_names = {});

}  // namespace nuwatch
