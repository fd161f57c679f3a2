// The detector's fit of a window: an already scaled window, a given scaler and kernel, optionally
// warm-started. Internal to core (the detector's refits and the capacity measurement); FitModel in
// nuwatch/model.h is the public cold fit.
// Thread safety: reentrant.
#pragma once

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include "nuwatch/model.h"
#include "solver.h"

namespace nuwatch {

// Returns the model and the full alpha over the rows (for the next warm start).
struct WindowFit {
  std::shared_ptr<const Model> model;
  SolverResult solution;
};
WindowFit FitScaled(const MatrixD& z, const Scaler& scaler, const Kernel& kernel,
                    const GammaSpec& gamma_spec, const SolverOptions& solver,
                    const VectorD* initial_alpha, uint64_t version,
                    std::vector<std::string> feature_names = {});

}  // namespace nuwatch
