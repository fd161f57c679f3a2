// Seeded random test data shared by the core's unit tests.
#pragma once

#include <cstdint>
#include <random>

#include "nuwatch/types.h"

namespace nuwatch::testing_data {

// rows x cols i.i.d. standard normal values; the same seed gives the same matrix.
inline MatrixD RandomGaussian(int64_t rows, int64_t cols, uint64_t seed) {
  std::mt19937_64 generator(seed);
  std::normal_distribution<double> normal(0.0, 1.0);
  MatrixD m(rows, cols);
  for (int64_t i = 0; i < rows; ++i)
    for (int64_t j = 0; j < cols; ++j) m(i, j) = normal(generator);
  return m;
}

}  // namespace nuwatch::testing_data
