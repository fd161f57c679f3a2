// Basic numeric types and the error type shared by the whole core.
#pragma once

#include <Eigen/Core>
#include <stdexcept>
#include <string>

namespace nuwatch {

// Row-major so that one row is one contiguous feature vector.
using MatrixD = Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
using MatrixF = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
using VectorD = Eigen::VectorXd;
using VectorF = Eigen::VectorXf;

// Thrown when a caller breaks a documented precondition. The message names the function and the
// offending values, e.g. "FitModel: nu = 1.5 is outside (0, 1]".
class PreconditionError : public std::invalid_argument {
 public:
  using std::invalid_argument::invalid_argument;
};

// Thrown when a model file cannot be read: truncated, corrupted, or of a newer format version.
class ModelFileError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

}  // namespace nuwatch
