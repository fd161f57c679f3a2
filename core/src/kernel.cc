#include "nuwatch/kernel.h"

#include <algorithm>
#include <charconv>
#include <cmath>
#include <random>
#include <sstream>
#include <vector>

namespace nuwatch {

std::string_view KernelName(KernelType type) {
  switch (type) {
    case KernelType::kRbf:
      return "rbf";
    case KernelType::kLinear:
      return "linear";
    case KernelType::kPolynomial:
      return "poly";
  }
  return "unknown";
}

std::optional<KernelType> ParseKernelType(std::string_view name) {
  if (name == "rbf") return KernelType::kRbf;
  if (name == "linear") return KernelType::kLinear;
  if (name == "poly" || name == "polynomial") return KernelType::kPolynomial;
  return std::nullopt;
}

void Kernel::Validate(std::string_view caller) const {
  if (type != KernelType::kLinear && !(gamma > 0 && std::isfinite(gamma))) {
    std::ostringstream message;
    message << caller << ": gamma = " << gamma << " must be a finite number > 0";
    throw PreconditionError(message.str());
  }
  if (type == KernelType::kPolynomial && degree < 1) {
    throw PreconditionError(std::string(caller) + ": degree = " + std::to_string(degree) +
                            " must be >= 1");
  }
  if (type == KernelType::kPolynomial && !std::isfinite(coef0)) {
    throw PreconditionError(std::string(caller) + ": coef0 must be finite");
  }
}

double Kernel::Evaluate(const double* x, const double* y, int d) const {
  double dot = 0, dist2 = 0;
  for (int i = 0; i < d; ++i) {
    dot += x[i] * y[i];
    dist2 += (x[i] - y[i]) * (x[i] - y[i]);
  }
  switch (type) {
    case KernelType::kRbf:
      return std::exp(-gamma * dist2);
    case KernelType::kLinear:
      return dot;
    case KernelType::kPolynomial:
      return std::pow(gamma * dot + coef0, degree);
  }
  return 0;
}

namespace {

template <typename MatrixType>
MatrixType KernelMatrixImpl(const Kernel& kernel, const MatrixType& a, const MatrixType& b) {
  if (a.cols() != b.cols()) {
    throw PreconditionError("Kernel::Matrix: a has " + std::to_string(a.cols()) +
                            " columns, b has " + std::to_string(b.cols()));
  }
  using Scalar = typename MatrixType::Scalar;
  MatrixType out = a * b.transpose();
  switch (kernel.type) {
    case KernelType::kLinear:
      break;
    case KernelType::kRbf: {
      auto a_norms = a.rowwise().squaredNorm().eval();
      auto b_norms = b.rowwise().squaredNorm().eval();
      const Scalar g = static_cast<Scalar>(kernel.gamma);
      // ||a-b||^2 = ||a||^2 + ||b||^2 - 2 a.b, clamped at 0 against rounding.
      out = ((-2 * out).colwise() + a_norms).rowwise() + b_norms.transpose();
      out = (-g * out.array().max(Scalar(0))).exp().matrix();
      break;
    }
    case KernelType::kPolynomial: {
      const Scalar g = static_cast<Scalar>(kernel.gamma), c = static_cast<Scalar>(kernel.coef0);
      out = (g * out.array() + c).pow(static_cast<Scalar>(kernel.degree)).matrix();
      break;
    }
  }
  return out;
}

}  // namespace

MatrixD Kernel::Matrix(const MatrixD& a, const MatrixD& b) const {
  return KernelMatrixImpl(*this, a, b);
}
MatrixF Kernel::Matrix(const MatrixF& a, const MatrixF& b) const {
  return KernelMatrixImpl(*this, a, b);
}

std::optional<GammaSpec> GammaSpec::Parse(std::string_view text) {
  GammaSpec spec;
  if (text == "scale") return spec;
  if (text == "median") {
    spec.mode = Mode::kMedian;
    return spec;
  }
  if (text == "min_volume") {
    spec.mode = Mode::kMinVolume;
    return spec;
  }
  double value = 0;
  auto [ptr, ec] = std::from_chars(text.data(), text.data() + text.size(), value);
  if (ec != std::errc() || ptr != text.data() + text.size() || !(value > 0) ||
      !std::isfinite(value))
    return std::nullopt;
  spec.mode = Mode::kValue;
  spec.value = value;
  return spec;
}

std::string GammaSpec::ToString() const {
  switch (mode) {
    case Mode::kScale:
      return "scale";
    case Mode::kMedian:
      return "median";
    case Mode::kMinVolume:
      return "min_volume";
    case Mode::kValue: {
      std::ostringstream out;
      out.precision(17);
      out << value;
      return out.str();
    }
  }
  return "scale";
}

double ResolveGamma(const GammaSpec& spec, const MatrixD& x) {
  if (x.rows() < 1 || x.cols() < 1) {
    throw PreconditionError("ResolveGamma: empty training matrix (" + std::to_string(x.rows()) +
                            " x " + std::to_string(x.cols()) + ")");
  }
  switch (spec.mode) {
    case GammaSpec::Mode::kValue:
      if (!(spec.value > 0)) throw PreconditionError("ResolveGamma: gamma must be > 0");
      return spec.value;
    case GammaSpec::Mode::kScale: {
      const double mean = x.mean();
      const double variance = (x.array() - mean).square().mean();
      return variance > 0 ? 1.0 / (static_cast<double>(x.cols()) * variance) : 1.0;
    }
    case GammaSpec::Mode::kMedian: {
      const int64_t n = x.rows();
      std::vector<double> distances;
      if (n * (n - 1) / 2 <= 2000) {
        for (int64_t i = 0; i < n; ++i)
          for (int64_t j = i + 1; j < n; ++j)
            distances.push_back((x.row(i) - x.row(j)).squaredNorm());
      } else {
        std::mt19937_64 generator(0x6e75776174636821ULL);  // fixed: same data, same gamma
        for (int k = 0; k < 2000; ++k) {
          int64_t i = static_cast<int64_t>(generator() % n),
                  j = static_cast<int64_t>(generator() % n);
          if (i == j) j = (j + 1) % n;
          distances.push_back((x.row(i) - x.row(j)).squaredNorm());
        }
      }
      if (distances.empty()) return 1.0;
      auto middle = distances.begin() + distances.size() / 2;
      std::nth_element(distances.begin(), middle, distances.end());
      return *middle > 0 ? 1.0 / *middle : 1.0;
    }
    case GammaSpec::Mode::kMinVolume:
      throw PreconditionError(
          "ResolveGamma: gamma = min_volume is chosen by comparing calibrated fits (FitWindow); "
          "it has no value on the training matrix alone");
  }
  return 1.0;
}

}  // namespace nuwatch
