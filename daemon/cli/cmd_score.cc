// nuwatch score: decision values (and optionally explanations) of a model on a CSV file.
#include <memory>

#include "cli/cli_util.h"
#include "nuwatch/model.h"
#include "nuwatch/model_file.h"

namespace nuwatch::cli {
namespace {

struct ScoreArgs {
  std::string model, input, output;
  int explain = 0;
};

void RunScore(const ScoreArgs& a) {
  if (a.explain < 0) throw CommandError("--explain must be >= 0");
  Model model = LoadModel(a.model);
  FeatureFile file = ReadFeatureFile(a.input);
  if (file.values.cols() != model.dims()) {
    throw CommandError(a.input + ": " + std::to_string(file.values.cols()) +
                       " feature columns, the model " + a.model + " has " +
                       std::to_string(model.dims()));
  }
  const auto& model_names = model.parts().feature_names;
  if (!model_names.empty()) {
    for (std::size_t j = 0; j < model_names.size(); ++j) {
      if (model_names[j] != file.names[j]) {
        throw CommandError(a.input + ": feature column " + std::to_string(j + 1) + " is '" +
                           file.names[j] + "', the model was fitted with '" + model_names[j] + "'");
      }
    }
  }
  const int top_k = std::min(a.explain, model.dims());
  VectorD decisions = model.DecisionBatch(file.values);
  OutputFile out(a.output);
  std::string line = "decision,outlier";
  for (int k = 1; k <= top_k; ++k)
    line += ",feature_" + std::to_string(k) + ",share_" + std::to_string(k);
  std::fprintf(out.get(), "%s\n", line.c_str());
  for (int64_t i = 0; i < file.values.rows(); ++i) {
    line = FormatNumber(decisions[i]) + (decisions[i] < 0 ? ",1" : ",0");
    if (top_k > 0) {
      std::span<const double> x(file.values.row(i).data(), file.values.cols());
      for (const FeatureShare& s : model.Explain(x, top_k)) {
        char share[32];
        std::snprintf(share, sizeof share, "%.4f", s.share);
        line += "," + file.names[s.feature] + "," + share;
      }
    }
    std::fprintf(out.get(), "%s\n", line.c_str());
  }
  out.Finish();
}

void AddScoreCommand(CLI::App& app) {
  auto args = std::make_shared<ScoreArgs>();
  CLI::App* sub = app.add_subcommand(
      "score", "Score the vectors of a CSV file: decision (< 0: outside the envelope), outlier");
  sub->add_option("--model", args->model, "Model file written by 'nuwatch fit'")->required();
  sub->add_option("--input", args->input, "CSV with the model's feature columns")->required();
  sub->add_option("--output", args->output, "CSV to write (default: standard output)");
  sub->add_option("--explain", args->explain,
                  "Add the K features that move the decision most (gradient shares)")
      ->capture_default_str();
  sub->callback([args] { RunScore(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(20, AddScoreCommand);
}  // namespace nuwatch::cli
