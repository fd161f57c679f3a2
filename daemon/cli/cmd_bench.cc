// nuwatch bench: capacity planning on synthetic data (nuwatch/capacity.h): cold fit, warm refit
// after a 10% slide, compression to the budget, batch and single-vector scoring, bytes per model
// and per stream.
#include <iostream>
#include <limits>
#include <memory>
#include <nlohmann/json.hpp>

#include "cli/cli_util.h"
#include "nuwatch/capacity.h"

namespace nuwatch::cli {
namespace {

struct BenchArgs {
  std::string dims, window, nu, support_vector_budget, seed;
  bool json = false;
};

CapacityOptions ToOptions(const BenchArgs& args) {
  constexpr int64_t kMax = std::numeric_limits<int64_t>::max();
  CapacityOptions c;
  c.dims = static_cast<int>(WholeNumberFlagIn("--dims", args.dims, 1, 65535));
  c.window = WholeNumberFlagIn("--window", args.window, 10, kMax);
  c.nu = NumberFlagIn("--nu", args.nu, 0, 1, LowBound::kExclusive);
  c.support_vector_budget =
      WholeNumberFlagIn("--support-vector-budget", args.support_vector_budget, 1, kMax);
  c.seed = static_cast<uint64_t>(WholeNumberFlagIn("--seed", args.seed, 0, kMax));
  return c;
}

void RunBench(const BenchArgs& args) {
  const CapacityOptions a = ToOptions(args);
  const CapacityReport r = MeasureCapacity(a);

  nlohmann::ordered_json j;
  j["dims"] = a.dims;
  j["window"] = a.window;
  j["nu"] = a.nu;
  j["budget"] = a.support_vector_budget;
  j["gamma"] = r.gamma;
  j["fit_seconds"] = r.fit_seconds;
  j["fit_iterations"] = r.fit_iterations;
  j["support_vectors_fitted"] = r.support_vectors_fitted;
  j["refit_seconds"] = r.refit_seconds;
  j["refit_iterations"] = r.refit_iterations;
  j["cold_refit_seconds"] = r.cold_refit_seconds;
  j["warm_objective"] = r.warm_objective;
  j["cold_objective"] = r.cold_objective;
  j["compress_seconds"] = r.compress_seconds;
  j["window_cold_fit_seconds"] = r.window_cold_fit_seconds;
  j["window_cold_fit_calibrated_seconds"] = r.window_cold_fit_calibrated_seconds;
  j["window_cold_fit_min_volume_seconds"] = r.window_cold_fit_min_volume_seconds;
  j["window_refit_seconds"] = r.window_refit_seconds;
  j["window_refit_calibrated_seconds"] = r.window_refit_calibrated_seconds;
  j["compressed_from"] = r.compressed_from;
  j["support_vectors"] = r.support_vectors;
  j["score_vectors_per_second"] = r.score_vectors_per_second;
  j["score_p50_seconds"] = r.score_p50_seconds;
  j["score_p99_seconds"] = r.score_p99_seconds;
  j["model_bytes"] = r.model_bytes;
  j["stream_bytes"] = r.stream_bytes;
  j["stream_bytes_limit"] = r.stream_bytes_limit;
  j["checksum"] = r.checksum;
  if (args.json) {
    std::cout << j.dump(2) << "\n";
    return;
  }
  std::printf("nuwatch bench: d = %d, window = %lld, nu = %g, budget = %lld (gamma %.4g)\n", a.dims,
              static_cast<long long>(a.window), a.nu,
              static_cast<long long>(a.support_vector_budget), r.gamma);
  std::printf("  cold fit            %10.4f s  (%lld iterations, %d support vectors)\n",
              r.fit_seconds, static_cast<long long>(r.fit_iterations), r.support_vectors_fitted);
  std::printf(
      "  warm refit (10%%)    %10.4f s  (%lld iterations; cold on the same window %.4f s)\n",
      r.refit_seconds, static_cast<long long>(r.refit_iterations), r.cold_refit_seconds);
  std::printf("  compress %lld -> %d %8.4f s\n", static_cast<long long>(r.compressed_from),
              r.support_vectors, r.compress_seconds);
  std::printf("  whole cold fit      %10.4f s uncalibrated, %.4f s calibrated (%.1fx)\n",
              r.window_cold_fit_seconds, r.window_cold_fit_calibrated_seconds,
              r.window_cold_fit_calibrated_seconds / r.window_cold_fit_seconds);
  std::printf("  cold, gamma min_volume %7.4f s calibrated (%.1fx the calibrated cold fit)\n",
              r.window_cold_fit_min_volume_seconds,
              r.window_cold_fit_min_volume_seconds / r.window_cold_fit_calibrated_seconds);
  std::printf("  whole warm refit    %10.4f s uncalibrated, %.4f s calibrated (%.1fx)\n",
              r.window_refit_seconds, r.window_refit_calibrated_seconds,
              r.window_refit_calibrated_seconds / r.window_refit_seconds);
  std::printf("  batch scoring       %10.0f vectors/s\n", r.score_vectors_per_second);
  std::printf("  single vector       p50 %.2f us, p99 %.2f us\n", r.score_p50_seconds * 1e6,
              r.score_p99_seconds * 1e6);
  std::printf("  model bytes         %10zu\n", r.model_bytes);
  std::printf("  stream bytes        %10zu  (1.5 x (window x d x 8 + budget x d x 4) = %.0f)\n",
              r.stream_bytes, r.stream_bytes_limit);
}

void AddBenchCommand(CLI::App& app) {
  auto args = std::make_shared<BenchArgs>();
  const CapacityOptions c;
  args->dims = std::to_string(c.dims);
  args->window = std::to_string(c.window);
  args->nu = FormatNumber(c.nu);
  args->support_vector_budget = std::to_string(c.support_vector_budget);
  args->seed = std::to_string(c.seed);
  CLI::App* sub = app.add_subcommand("bench", "Capacity planning on synthetic Gaussian data");
  sub->add_option("--dims", args->dims, "Features per vector")
      ->type_name("INTEGER")
      ->capture_default_str();
  sub->add_option("--window", args->window, "Training window (vectors, at least 10)")
      ->type_name("INTEGER")
      ->capture_default_str();
  sub->add_option("--nu", args->nu, "nu, in (0, 1]")->type_name("NUMBER")->capture_default_str();
  sub->add_option("--support-vector-budget", args->support_vector_budget, "Support-vector budget")
      ->type_name("INTEGER")
      ->capture_default_str();
  sub->add_option("--seed", args->seed, "Seed of the synthetic data")
      ->type_name("INTEGER")
      ->capture_default_str();
  sub->add_flag("--json", args->json, "Print one JSON object");
  sub->callback([args] { RunBench(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(40, AddBenchCommand);
}  // namespace nuwatch::cli
