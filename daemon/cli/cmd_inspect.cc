// nuwatch inspect: what a model file holds.
#include <cmath>
#include <iostream>
#include <memory>
#include <nlohmann/json.hpp>

#include "cli/cli_util.h"
#include "nuwatch/model.h"
#include "nuwatch/model_file.h"

namespace nuwatch::cli {
namespace {

struct InspectArgs {
  std::string model;
  bool json = false;
};

void RunInspect(const InspectArgs& a) {
  Model model = LoadModel(a.model);
  const ModelParts& p = model.parts();
  nlohmann::ordered_json j;
  j["format_version"] = kModelFormatVersion;
  j["model_version"] = p.version;
  j["kernel"] = std::string(KernelName(p.kernel.type));
  j["gamma"] = p.kernel.gamma;
  j["gamma_rule"] = p.gamma_spec.ToString();
  if (!p.gamma_candidates.empty()) {
    // The minimum-volume criterion's table: the width kept is the one of least log volume.
    nlohmann::ordered_json rows = nlohmann::ordered_json::array();
    for (const GammaCandidate& c : p.gamma_candidates) {
      nlohmann::ordered_json row;
      row["gamma"] = c.gamma;
      // JSON has no infinity: an unbounded envelope (or none sampled) is null.
      row["log_volume"] = std::isfinite(c.log_volume) ? nlohmann::ordered_json(c.log_volume)
                                                      : nlohmann::ordered_json();
      row["standard_error"] = std::isfinite(c.standard_error)
                                  ? nlohmann::ordered_json(c.standard_error)
                                  : nlohmann::ordered_json();
      row["effective_samples"] = c.effective_samples;
      rows.push_back(row);
    }
    j["gamma_candidates"] = rows;
  }
  if (p.kernel.type == KernelType::kPolynomial) {
    j["degree"] = p.kernel.degree;
    j["coef0"] = p.kernel.coef0;
  }
  j["nu"] = p.nu;
  j["dims"] = model.dims();
  j["scaler"] = std::string(ScalerName(p.scaler.type()));
  j["feature_names"] = p.feature_names;
  j["n_train"] = p.training.n_train;
  j["n_support"] = model.num_support();
  j["n_support_fitted"] = p.training.n_support;
  j["n_bounded"] = p.training.n_bounded;
  j["rho"] = p.rho;
  j["iterations"] = p.training.iterations;
  j["converged"] = p.training.converged;
  j["objective"] = p.training.objective;
  j["fit_seconds"] = p.training.seconds;
  // 0: not compressed.
  j["compressed_from"] = p.compression.support_vectors_before;
  j["weight_degradation"] = p.compression.weight_degradation;
  j["model_bytes"] = model.MemoryBytes();
  const FeatureTransformOptions& t = p.transform;
  j["input_dims"] = model.input_dims();
  j["lags"] = t.lags;
  std::vector<int> windows(t.rolling_windows.begin(), t.rolling_windows.end());
  j["rolling_windows"] = windows;
  if (!windows.empty()) {
    std::vector<std::string> statistics;
    for (const RollingStatistic s : t.rolling_statistics)
      statistics.emplace_back(RollingStatisticName(s));
    j["rolling_statistics"] = statistics;
  }
  j["max_gap_seconds"] = t.max_gap_seconds;
  j["calibrated"] = model.calibrated();
  if (model.calibrated()) {
    const Calibration& c = p.calibration;
    const CalibrationSummary& s = c.summary();
    j["calibration_method"] = std::string(c.Method());
    j["calibration_scores"] = s.scores;
    j["false_alarm_rate"] = s.false_alarm_rate;
    j["false_incidents_per_day"] = s.false_incidents_per_day;
    j["alarm_level"] = s.level;
    j["level_from_tail"] = s.level_from_tail;
    j["nonconformity_threshold"] = c.Threshold();
    if (c.parts().has_tail) {
      j["tail_threshold"] = c.parts().tail_threshold;
      j["tail_shape"] = c.parts().tail.shape;
      j["tail_scale"] = c.parts().tail.scale;
    }
    if (s.vectors_per_day > 0) {
      j["calibration_span_days"] = s.span_days;
      j["estimated_false_incidents_per_day"] = s.incidents_per_day;
      j["incidents_opened_at_reference"] = s.reference_opened;
      j["flagged_at_reference"] = s.reference_flagged;
      j["reference_level"] = s.reference_level;
    }
    j["calibration_warnings"] = s.warnings;
  }
  if (a.json) {
    std::cout << j.dump(2) << "\n";
    return;
  }
  for (const auto& [key, value] : j.items()) {
    std::cout << key << std::string(key.size() < 22 ? 22 - key.size() : 1, ' ')
              << (value.is_string() ? value.get<std::string>() : value.dump()) << "\n";
  }
}

void AddInspectCommand(CLI::App& app) {
  auto args = std::make_shared<InspectArgs>();
  CLI::App* sub = app.add_subcommand("inspect", "Show what a model file holds");
  sub->add_option("model", args->model, "Model file")->required();
  sub->add_flag("--json", args->json, "Print one JSON object");
  sub->callback([args] { RunInspect(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(30, AddInspectCommand);
}  // namespace nuwatch::cli
