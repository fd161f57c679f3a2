// nuwatch score: a model's decision values, p-values and flags (and optionally explanations) on a
// CSV file. The model's feature transform (lags, rolling statistics) is applied to the rows in
// file order, as the detector applies it to a stream; rows whose history is not complete yet are
// written with empty scores.
#include <charconv>
#include <cmath>
#include <memory>
#include <numeric>

#include "cli/cli_util.h"
#include "nuwatch/model.h"
#include "nuwatch/model_file.h"

namespace nuwatch::cli {
namespace {

struct ScoreArgs {
  std::string model, input, output;
  std::string explain = "0";
};

void RunScore(const ScoreArgs& a) {
  const int64_t explain = WholeNumberFlagIn("--explain", a.explain, 0, 1 << 20);
  Model model = LoadModel(a.model);
  FeatureFile file = ReadFeatureFile(a.input);
  const int inputs = model.input_dims();
  if (file.values.cols() != inputs) {
    throw CommandError(a.input + ": " + std::to_string(file.values.cols()) +
                       " feature columns, the model " + a.model + " has " + std::to_string(inputs));
  }
  const auto& model_names = model.parts().feature_names;
  if (!model_names.empty()) {
    for (int j = 0; j < inputs; ++j) {
      if (model_names[j] != file.names[j]) {
        throw CommandError(a.input + ": feature column " + std::to_string(j + 1) + " is '" +
                           file.names[j] + "', the model was fitted with '" + model_names[j] + "'");
      }
    }
  }
  const FeatureTransform transform(model.parts().transform, inputs);
  std::vector<int64_t> output_row;
  MatrixD transformed;
  if (model.parts().transform.identity()) {
    output_row.resize(static_cast<std::size_t>(file.rows()));
    std::iota(output_row.begin(), output_row.end(), int64_t{0});
  } else {
    transformed = transform.TransformAll(file.values, file.times, &output_row);
  }
  // Without lags or rolling statistics the rows are scored as read, without a copy.
  const MatrixD& rows = model.parts().transform.identity() ? file.values : transformed;
  const std::vector<std::string> names = transform.OutputNames(file.names);
  const int top_k = static_cast<int>(std::min<int64_t>(explain, model.dims()));
  VectorD decisions, nonconformity;
  model.EvaluateBatch(rows, &decisions, &nonconformity);

  OutputFile out(a.output);
  std::string text;
  if (file.has_time) text += "time,";
  if (file.has_stream) text += "stream,";
  text += "decision,p_value,anomaly";
  for (int k = 1; k <= top_k; ++k)
    text += ",feature_" + std::to_string(k) + ",share_" + std::to_string(k);
  text += '\n';
  // Written in blocks of about a megabyte: one write per block, not per row.
  constexpr std::size_t kBlockBytes = 1 << 20;
  char number[32];
  const auto append_number = [&](double value) {
    text.append(number, std::to_chars(number, number + sizeof number, value).ptr);
  };
  for (std::size_t i = 0; i < output_row.size(); ++i) {
    if (file.has_time) {
      AppendCsvField(&text, file.time_text[i]);
      text += ',';
    }
    if (file.has_stream) {
      AppendCsvField(&text, file.streams[i]);
      text += ',';
    }
    const int64_t r = output_row[i];
    if (r < 0) {
      text += ",,0";  // the transform's history is still filling
      for (int k = 0; k < top_k; ++k) text += ",,";
    } else {
      const Score score{decisions[r], nonconformity[r]};
      const double p = model.PValue(score);
      append_number(score.decision);
      text += ',';
      if (!std::isnan(p)) append_number(p);
      text += model.Flagged(score, p) ? ",1" : ",0";
      if (top_k > 0) {
        std::span<const double> x(rows.row(r).data(), rows.cols());
        for (const FeatureShare& s : model.Explain(x, top_k)) {
          char share[32];
          std::snprintf(share, sizeof share, "%.4f", s.share);
          text += ',';
          AppendCsvField(&text, names[s.feature]);
          text += ',';
          text += share;
        }
      }
    }
    text += '\n';
    if (text.size() >= kBlockBytes) {
      std::fwrite(text.data(), 1, text.size(), out.get());
      text.clear();
    }
  }
  std::fwrite(text.data(), 1, text.size(), out.get());
  out.Finish();
}

void AddScoreCommand(CLI::App& app) {
  auto args = std::make_shared<ScoreArgs>();
  CLI::App* sub = app.add_subcommand(
      "score",
      "Score the vectors of a CSV file: decision, p-value and anomaly (1: flagged at the model's "
      "calibrated level; decision < 0 for an uncalibrated model)");
  sub->add_option("--model", args->model, "Model file written by 'nuwatch fit'")
      ->type_name("FILE")
      ->required();
  sub->add_option("--input", args->input,
                  "CSV with the model's feature columns (and optionally time and stream, which "
                  "are copied to the output)")
      ->type_name("FILE")
      ->required();
  sub->add_option("--output", args->output, "CSV to write (default: standard output)")
      ->type_name("FILE");
  sub->add_option("--explain", args->explain,
                  "Add this many features: those that move the decision most (gradient shares)")
      ->type_name("INTEGER")
      ->capture_default_str();
  sub->callback([args] { RunScore(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(20, AddScoreCommand);
}  // namespace nuwatch::cli
