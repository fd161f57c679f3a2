// Capacity planning: what one stream costs on this machine, measured on synthetic Gaussian data
// (`nuwatch bench`). Cold fit of a window, warm refit after a 10% slide (and a cold one on the same
// window for comparison), compression to the support-vector budget, a whole refit with and
// without calibration, batch and single-vector scoring at the budget, bytes per model and per
// stream.
//
// A measurement, not a test: the times depend on the machine and on what else runs on it; take
// the best of several runs. Batch scoring runs for about half a second.
// Thread safety: reentrant; it runs on the calling thread only.
#pragma once

#include <cstddef>
#include <cstdint>

namespace nuwatch {

struct CapacityOptions {
  int dims = 16;
  int64_t window = 5000;
  double nu = 0.05;
  int64_t support_vector_budget = 256;
  uint64_t seed = 1;  // of the synthetic data (std::mt19937_64, standard normal entries)
};

struct CapacityReport {
  double gamma = 0;  // the cold fit's gamma ("scale")
  double fit_seconds = 0;
  int64_t fit_iterations = 0;
  int support_vectors_fitted = 0;  // of the cold fit
  double refit_seconds = 0;        // warm, after the slide
  int64_t refit_iterations = 0;
  double cold_refit_seconds = 0;  // cold, on the same slid window
  double warm_objective = 0;
  double cold_objective = 0;
  double compress_seconds = 0;  // compression and rho recalibration
  // A whole refit as the detector runs it (FitWindow: standard scaler, compression, warm after the
  // slide), without calibration and with the default calibration (calibration_folds cross-fitted
  // models): what calibrated alarms cost. Best of three each.
  double window_refit_seconds = 0;
  double window_refit_calibrated_seconds = 0;
  double window_cold_fit_seconds = 0;
  double window_cold_fit_calibrated_seconds = 0;
  // The calibrated cold fit with gamma = "min_volume" (kernel_width.h): five candidate widths,
  // each fitted and calibrated, and their envelopes' volumes estimated. Best of three. Warm
  // refits keep the width, so they cost what window_refit_calibrated_seconds says.
  double window_cold_fit_min_volume_seconds = 0;
  int64_t compressed_from = 0;  // support vectors of the warm refit before compression
  int support_vectors = 0;      // after compression
  double score_vectors_per_second = 0;
  double score_p50_seconds = 0;  // one vector at a time
  double score_p99_seconds = 0;
  std::size_t model_bytes = 0;
  std::size_t stream_bytes = 0;   // Detector::MemoryBytes with a full window
  double stream_bytes_limit = 0;  // the design target 1.5 x (window d 8 + budget d 4)
  double checksum = 0;            // sum of the scores: keeps the timed loops from being elided
};

// Requires: dims >= 1, window >= 10, nu in (0, 1], support_vector_budget >= 1 (PreconditionError
// naming the value otherwise).
CapacityReport MeasureCapacity(const CapacityOptions& options);

}  // namespace nuwatch
