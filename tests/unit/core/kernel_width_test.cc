// gamma = "min_volume" (kernel_width.h, FitWindow in detector.h): the criterion on a case whose
// answer follows from its definition, the acceptance region it measures, warm refits, fallbacks
// and rejections.
//
// Source of the criterion: Scott & Nowak, "Learning minimum volume sets", JMLR 7:665-704, 2006
// (among sets of held-out mass >= 1 - alpha, the least volume). The reference for the volumes of
// the 2-D envelopes is the midpoint rule on a fine grid (a textbook quadrature, independent of the
// importance sampler under test).
#include "nuwatch/kernel_width.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <numbers>
#include <numeric>
#include <random>
#include <vector>

#include "nuwatch/detector.h"
#include "nuwatch/model.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

std::vector<uint64_t> Ids(int64_t n) {
  std::vector<uint64_t> ids(static_cast<std::size_t>(n));
  std::iota(ids.begin(), ids.end(), uint64_t{1});
  return ids;
}

// Points on the unit circle with radial noise of sd 0.05, in random order (invented here).
MatrixD Ring(int64_t n, uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> angle(0, 2 * std::numbers::pi);
  std::normal_distribution<double> noise(0, 0.05);
  MatrixD x(n, 2);
  for (int64_t i = 0; i < n; ++i) {
    const double t = angle(rng), r = 1 + noise(rng);
    x(i, 0) = r * std::cos(t);
    x(i, 1) = r * std::sin(t);
  }
  return x;
}

DetectorOptions RingOptions() {
  DetectorOptions o;
  o.gamma = *GammaSpec::Parse("min_volume");
  o.false_alarm_rate = 0.01;
  o.false_incidents_per_day = 0;
  o.window = 400;
  o.support_vector_budget = 1000;  // no compression: the envelope is the fitted one
  return o;
}

// The area of the model's acceptance region in the scaled plane by the midpoint rule on a
// 700 x 700 grid over [-3.5, 3.5]^2 (the whitened ring has radius about sqrt(2)).
double GridArea(const Model& model) {
  constexpr int kCells = 700;
  constexpr double kHalf = 3.5, kStep = 2 * kHalf / kCells;
  MatrixD grid(static_cast<int64_t>(kCells) * kCells, 2);
  for (int i = 0; i < kCells; ++i)
    for (int j = 0; j < kCells; ++j) {
      grid(static_cast<int64_t>(i) * kCells + j, 0) = -kHalf + (i + 0.5) * kStep;
      grid(static_cast<int64_t>(i) * kCells + j, 1) = -kHalf + (j + 0.5) * kStep;
    }
  const std::vector<uint8_t> inside = InsideAcceptanceRegion(model, grid);
  // The region must lie inside the grid's box, or the quadrature would miss part of it.
  for (int k = 0; k < kCells; ++k) {
    EXPECT_FALSE(inside[static_cast<std::size_t>(k)]);                        // i = 0
    EXPECT_FALSE(inside[static_cast<std::size_t>(k) * kCells]);               // j = 0
    EXPECT_FALSE(inside[static_cast<std::size_t>(k) * kCells + kCells - 1]);  // j = last
    EXPECT_FALSE(inside[static_cast<std::size_t>(kCells - 1) * kCells + k]);  // i = last
  }
  return std::count(inside.begin(), inside.end(), 1) * kStep * kStep;
}

TEST(MinVolumeWidth, RingPicksTheLeastAreaByQuadratureAndLeavesTheHoleOut) {
  const MatrixD x = Ring(400, 7);
  const DetectorOptions o = RingOptions();
  const WindowFitResult chosen = FitWindow(x, Ids(400), {}, o, nullptr, 1);
  const ModelParts& p = chosen.model->parts();
  ASSERT_EQ(p.gamma_spec.mode, GammaSpec::Mode::kMinVolume);
  ASSERT_EQ(p.gamma_candidates.size(), 5u);
  EXPECT_GT(chosen.report.width_selection_seconds, 0);

  // Each candidate refitted alone with its width as a number: the same code path, the same model.
  std::vector<double> areas;
  for (const GammaCandidate& c : p.gamma_candidates) {
    DetectorOptions fixed = o;
    fixed.gamma = GammaSpec{GammaSpec::Mode::kValue, c.gamma};
    const WindowFitResult fit = FitWindow(x, Ids(400), {}, fixed, nullptr, 1);
    const double area = GridArea(*fit.model);
    areas.push_back(area);
    std::printf(
        "gamma %.4f: log volume %.4f +- %.4f (importance sampling), log area %.4f "
        "(quadrature)%s\n",
        c.gamma, c.log_volume, c.standard_error, std::log(area),
        c.gamma == p.kernel.gamma ? "  <- kept" : "");
    // The importance-sampled volume agrees with the quadrature within 3 standard errors (plus
    // 2 % for the grid's staircase along the boundary).
    EXPECT_NEAR(c.log_volume, std::log(area), 3 * c.standard_error + 0.02)
        << "gamma " << c.gamma << ": quadrature area " << area;
    if (c.gamma == p.kernel.gamma) {
      EXPECT_EQ(fit.model->rho(), chosen.model->rho());  // the kept model is that candidate's
    }
  }
  // The definition: the kept width is the one of least area (ties within the estimate's error).
  const auto least = std::min_element(areas.begin(), areas.end()) - areas.begin();
  const auto kept =
      std::find_if(p.gamma_candidates.begin(), p.gamma_candidates.end(),
                   [&](const GammaCandidate& c) { return c.gamma == p.kernel.gamma; }) -
      p.gamma_candidates.begin();
  ASSERT_LT(kept, 5);
  EXPECT_LE(areas[static_cast<std::size_t>(kept)],
            areas[static_cast<std::size_t>(least)] *
                std::exp(3 * p.gamma_candidates[static_cast<std::size_t>(kept)].standard_error));
  // What the definition implies here: the widest kernel (scale / 4) fills the ring's hole, which
  // held-out data never needs, so its envelope is larger than the kept one, and the kept envelope
  // leaves the centre out.
  EXPECT_GT(areas[0], 1.5 * areas[static_cast<std::size_t>(kept)]);
  MatrixD centre = MatrixD::Zero(1, 2);
  centre = chosen.model->parts().scaler.Transform(centre);
  EXPECT_FALSE(InsideAcceptanceRegion(*chosen.model, centre)[0]);
}

TEST(MinVolumeWidth, AcceptanceRegionIsWhereTheModelDoesNotFlag) {
  // The region measured is exactly the complement of the alarm rule (model.h's Flagged), checked
  // away from the boundary where float and double scoring may differ.
  const MatrixD x = Ring(300, 3);
  DetectorOptions o = RingOptions();
  o.scaler = ScalerType::kNone;  // scaled points are the raw ones
  o.gamma = GammaSpec{GammaSpec::Mode::kValue, 2.0};
  const WindowFitResult fit = FitWindow(x, Ids(300), {}, o, nullptr, 1);
  const MatrixD probe = Ring(2000, 11) * 1.3 - MatrixD::Constant(2000, 2, 0.1);
  const std::vector<uint8_t> inside = InsideAcceptanceRegion(*fit.model, probe);
  VectorD nonconformity;
  fit.model->EvaluateBatch(probe, nullptr, &nonconformity);
  const double threshold = fit.model->parts().calibration.Threshold();
  int checked = 0, in = 0;
  for (int64_t i = 0; i < probe.rows(); ++i) {
    if (std::abs(nonconformity[i] - threshold) < 1e-3) continue;
    ++checked;
    in += inside[static_cast<std::size_t>(i)];
    const std::vector<double> row(probe.row(i).data(), probe.row(i).data() + 2);
    EXPECT_EQ(inside[static_cast<std::size_t>(i)] == 1,
              !fit.model->Flagged(fit.model->Evaluate(row)))
        << "row " << i;
  }
  EXPECT_GT(checked, 1900);
  EXPECT_GT(in, 100);  // both sides of the boundary are exercised
  EXPECT_LT(in, checked - 100);
}

TEST(MinVolumeWidth, WarmRefitsKeepTheWidthAndItsTableColdOnesChooseAgain) {
  const MatrixD x = Ring(400, 5);
  const DetectorOptions o = RingOptions();
  const WindowFitResult cold = FitWindow(x, Ids(400), {}, o, nullptr, 1);
  WarmStart warm;
  warm.base = cold.model;
  warm.ids = cold.solution_ids;
  warm.alpha = cold.solution_alpha;
  MatrixD slid = x;
  slid.topRows(40) = Ring(40, 99);
  std::vector<uint64_t> ids = Ids(400);
  for (int i = 0; i < 40; ++i) ids[static_cast<std::size_t>(i)] = 1000 + i;
  std::sort(ids.begin(), ids.end());
  const WindowFitResult refit = FitWindow(slid, ids, {}, o, &warm, 2);
  EXPECT_EQ(refit.model->kernel().gamma, cold.model->kernel().gamma);
  EXPECT_EQ(refit.model->parts().gamma_spec.mode, GammaSpec::Mode::kMinVolume);
  ASSERT_EQ(refit.model->parts().gamma_candidates.size(), 5u);
  EXPECT_EQ(refit.model->parts().gamma_candidates[2].log_volume,
            cold.model->parts().gamma_candidates[2].log_volume);
  EXPECT_EQ(refit.report.width_selection_seconds, 0);  // no candidates fitted
}

TEST(MinVolumeWidth, TooShortToCalibrateFallsBackToScaleAndSaysSo) {
  const MatrixD x = Ring(3, 1);  // 3 rows: fewer than 2 per fold for 2 folds
  const WindowFitResult fit = FitWindow(x, Ids(3), {}, RingOptions(), nullptr, 1);
  const MatrixD z = fit.model->parts().scaler.Transform(x);
  EXPECT_DOUBLE_EQ(fit.model->kernel().gamma, ResolveGamma(GammaSpec{}, z));
  EXPECT_TRUE(fit.model->parts().gamma_candidates.empty());
  EXPECT_THAT(fit.report.warnings,
              ::testing::Contains(::testing::StartsWith("gamma = min_volume used scale")));
}

TEST(MinVolumeWidth, RefusedWhereItHasNoMeaning) {
  DetectorOptions o = RingOptions();
  o.kernel = KernelType::kLinear;
  EXPECT_THAT([&] { CheckDetectorOptions(o, "t"); },
              ::testing::ThrowsMessage<PreconditionError>(
                  HasSubstr("gamma = \"min_volume\" needs kernel = \"rbf\"")));
  o = RingOptions();
  o.calibration_folds = 0;
  EXPECT_THAT([&] { CheckDetectorOptions(o, "t"); },
              ::testing::ThrowsMessage<PreconditionError>(
                  HasSubstr("gamma = \"min_volume\" needs calibration_folds >= 2")));
  EXPECT_THROW(ResolveGamma(*GammaSpec::Parse("min_volume"), MatrixD::Identity(3, 3)),
               PreconditionError);
  EXPECT_EQ(GammaSpec::Parse("min_volume")->ToString(), "min_volume");
  EXPECT_FALSE(GammaSpec::Parse("min-volume").has_value());
  EXPECT_THAT(MinVolumeGammaGrid(0.5), ::testing::ElementsAre(0.125, 0.25, 0.5, 1.0, 2.0));
  EXPECT_THROW(MinVolumeGammaGrid(0), PreconditionError);
}

}  // namespace
}  // namespace nuwatch
