// Choosing the rbf kernel width from the data: the minimum-volume criterion (gamma = "min_volume").
//
// The criterion. Scott & Nowak, "Learning minimum volume sets", JMLR 7:665-704, 2006: among
// candidate sets whose mass under the data distribution is at least 1 - alpha, prefer the one of
// least volume (the set that accepts the least of everything else at the same coverage of normal
// data). nuwatch's candidates are the calibrated acceptance regions of rbf models fitted with
// different widths, in the scaled feature space,
//   S_gamma = {z : nonconformity_gamma(z) <= threshold_gamma}   (model.h, calibration.h).
// Each threshold is set on cross-fitted, held-out scores at the alarm level, so every candidate
// already keeps 1 - alpha of held-out normal data; the criterion reduces to: the gamma whose
// region has the smallest volume. The candidates are "scale" times 1/4, 1/2, 1, 2 and 4.
//
// The volume. Uniform artificial outliers in a box or a sphere around the data (Tax & Duin,
// "Uniform object generation for optimizing one-class classifiers", JMLR 2:155-173, 2001) almost
// never land inside such a region in many dimensions: its share of any box that holds it shrinks
// exponentially with the dimension, as Tax & Duin point out. Instead, importance sampling:
//   vol(S) = E_q[1{z in S} / q(z)]
// with q a defensive mixture (Hesterberg, "Weighted average importance sampling and defensive
// mixture distributions", Technometrics 37(2):185-194, 1995) of Gaussians N(m, s^2 C) around the
// window's mean m and covariance C (the identity after whitening) at several spreads s, the same
// number of samples from each and every sample weighted by the whole mixture's density (the
// balance heuristic; Owen & Zhou, "Safe and effective importance sampling", JASA 95:135-143,
// 2000, bound its variance by that of the best single component over its share, from memory).
// The spreads run from narrower to wider than the data, so a region tighter or looser than the
// window is still sampled near its boundary, where in many dimensions nearly all of its volume is.
// The same samples serve every candidate (common random numbers), so the comparison is sharper
// than each estimate; the seed is fixed, so a window always gives the same choice.
//
// Thread safety: pure functions of their arguments; reentrant.
#pragma once

#include <cstdint>
#include <limits>
#include <span>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {

class Model;

// What an estimate of a region's volume says (in the units of the scaled feature space).
struct VolumeEstimate {
  // log vol(S); -inf when no sample landed inside (the region is too small for the sampler).
  double log_volume = -std::numeric_limits<double>::infinity();
  // Standard error of log_volume by the delta method (SE of the volume over the volume); +inf
  // with fewer than two samples inside.
  double standard_error = std::numeric_limits<double>::infinity();
  int64_t samples = 0;
  int64_t inside = 0;            // samples that landed inside S
  double effective_samples = 0;  // (sum w)^2 / sum w^2: how many samples the estimate is worth
};

struct VolumeSampling {
  int64_t samples = 8192;  // in total, split evenly over the spreads; memory: samples x d doubles
  std::vector<double> spreads = {0.75, 1.0, 1.25, 1.5, 2.0};
  // Eigenvalues of the covariance below this share of their mean are raised to it, so that a
  // direction in which the window does not vary is still sampled (the rbf region has a width
  // there too).
  double eigenvalue_floor = 1e-2;
  uint64_t seed = 0x6d696e2d766f6cULL;  // fixed: the same window gives the same estimate
};

// Points drawn from the mixture and the log of the mixture density at each.
struct ImportanceSample {
  MatrixD points;       // one row per sample
  VectorD log_density;  // log q(point)
};

// Draws the sample. Gaussian deviates come from a 64-bit Mersenne Twister through the Box-Muller
// transform (both fully specified), so the sample is the same on every platform.
// Requires: center.size() == covariance.rows() == covariance.cols() >= 1; a finite symmetric
// covariance; samples >= spreads.size() >= 1; spreads finite and > 0; eigenvalue_floor in
// (0, 1]. Throws PreconditionError otherwise. Ensures: points is samples x d.
ImportanceSample DrawImportanceSample(const VectorD& center, const MatrixD& covariance,
                                      const VolumeSampling& sampling);

// The estimate from the sample and which of its points lie inside the region (1: inside).
// Requires: inside.size() == sample.points.rows().
VolumeEstimate EstimateVolume(const ImportanceSample& sample, std::span<const uint8_t> inside);

// Which scaled points a calibrated rbf model accepts (1) at its alarm level: nonconformity at or
// below the calibration's threshold. Computed in double precision with a log-sum-exp, so points
// far outside are rejected rather than lost to underflow.
// Requires: an rbf model with a calibration, points.cols() == model.dims().
std::vector<uint8_t> InsideAcceptanceRegion(const Model& model, const MatrixD& scaled_points);

// The candidate widths: scale_gamma times 1/4, 1/2, 1, 2, 4 (ascending). Requires scale_gamma > 0.
std::vector<double> MinVolumeGammaGrid(double scale_gamma);

// One row of the criterion's table, kept in the model (inspect shows it).
struct GammaCandidate {
  double gamma = 0;
  double log_volume = 0;      // +inf: no finite threshold (the region is unbounded)
  double standard_error = 0;  // of log_volume
  double effective_samples = 0;
};

}  // namespace nuwatch
