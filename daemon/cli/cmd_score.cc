// nuwatch score: a model's decision values, p-values and flags (and optionally explanations) on a
// CSV file. The model's feature transform (lags, rolling statistics) is applied to the rows in
// file order, as the detector applies it to a stream; rows whose history is not complete yet are
// written with empty scores.
#include <charconv>
#include <cmath>
#include <deque>
#include <exception>
#include <memory>
#include <numeric>
#include <optional>
#include <span>

#include "cli/cli_util.h"
#include "concurrency/thread_pool.h"
#include "formats/feature_file.h"
#include "nuwatch/model.h"
#include "nuwatch/model_file.h"
#include "nuwatch/mutex.h"

namespace nuwatch::cli {
namespace {

struct ScoreArgs {
  std::string model, input, output;
  std::string explain = "0";
};

// Without lags or rolling statistics, the file is scored block by block: a second thread reads
// and parses the next blocks while this one scores and writes the one before. Parsing the CSV
// takes about as long as scoring and writing it (perf, 200,000 x 16), so the two overlap, and
// memory is a few blocks instead of the whole file.
constexpr int64_t kBlockRows = 8192;
constexpr std::size_t kBlocksAhead = 2;

// Blocks of `reader` read ahead on a thread of its own, handed over in file order.
class BlocksAhead {
 public:
  explicit BlocksAhead(FeatureFileReader* reader) : reader_(reader), thread_(1) {
    thread_.Post([this] { Run(); });
  }
  // Stops the reading thread (after the block it is reading) and joins it.
  ~BlocksAhead() {
    {
      MutexLock lock(&mutex_);
      stopped_ = true;
    }
    changed_.SignalAll();
    thread_.Join();
  }

  // The next block; 0 rows at the end of the file. Rethrows the reader's error once the blocks
  // read before it have been taken.
  FeatureFile Take() EXCLUDES(mutex_) {
    MutexLock lock(&mutex_);
    while (blocks_.empty() && !error_ && !ended_) changed_.Wait();
    if (!blocks_.empty()) {
      FeatureFile block = std::move(blocks_.front());
      blocks_.pop_front();
      changed_.SignalAll();
      return block;
    }
    if (error_) std::rethrow_exception(error_);
    return FeatureFile{};
  }

 private:
  void Run() EXCLUDES(mutex_) {
    try {
      while (true) {
        FeatureFile block = reader_->Next(kBlockRows);
        MutexLock lock(&mutex_);
        if (block.rows() == 0) {
          ended_ = true;
          changed_.SignalAll();
          return;
        }
        while (blocks_.size() >= kBlocksAhead && !stopped_) changed_.Wait();
        if (stopped_) return;
        blocks_.push_back(std::move(block));
        changed_.SignalAll();
      }
    } catch (...) {
      MutexLock lock(&mutex_);
      error_ = std::current_exception();
      changed_.SignalAll();
    }
  }

  FeatureFileReader* reader_;  // used by the reading thread only, once constructed
  Mutex mutex_;
  CondVar changed_{&mutex_};
  std::deque<FeatureFile> blocks_ GUARDED_BY(mutex_);
  bool ended_ GUARDED_BY(mutex_) = false;
  bool stopped_ GUARDED_BY(mutex_) = false;
  std::exception_ptr error_ GUARDED_BY(mutex_);
  ThreadPool thread_;  // last: joined (by the destructor) before the members above go
};

// Writes the scores of `rows` (decisions and nonconformity per row) for the file rows of
// `block`: output_row[i] is the row of `rows` for the block's row i, or -1 while the transform's
// history is filling.
class ScoreWriter {
 public:
  ScoreWriter(const Model& model, const std::vector<std::string>& names, int top_k,
              const std::string& path)
      : model_(model), names_(names), top_k_(top_k), out_(path) {}

  void Header(bool has_time, bool has_stream) {
    if (has_time) text_ += "time,";
    if (has_stream) text_ += "stream,";
    text_ += "decision,p_value,anomaly";
    for (int k = 1; k <= top_k_; ++k)
      text_ += ",feature_" + std::to_string(k) + ",share_" + std::to_string(k);
    text_ += '\n';
  }

  void Rows(const FeatureFile& block, const MatrixD& rows, std::span<const int64_t> output_row,
            const VectorD& decisions, const VectorD& nonconformity) {
    for (std::size_t i = 0; i < output_row.size(); ++i) {
      if (block.has_time) {
        AppendCsvField(&text_, block.time_text[i]);
        text_ += ',';
      }
      if (block.has_stream) {
        AppendCsvField(&text_, block.streams[i]);
        text_ += ',';
      }
      const int64_t r = output_row[i];
      if (r < 0) {
        text_ += ",,0";  // the transform's history is still filling
        for (int k = 0; k < top_k_; ++k) text_ += ",,";
      } else {
        const Score score{decisions[r], nonconformity[r]};
        const double p = model_.PValue(score);
        AppendNumber(score.decision);
        text_ += ',';
        if (!std::isnan(p)) AppendNumber(p);
        text_ += model_.Flagged(score, p) ? ",1" : ",0";
        if (top_k_ > 0) {
          std::span<const double> x(rows.row(r).data(), rows.cols());
          for (const FeatureShare& s : model_.Explain(x, top_k_)) {
            char share[32];
            std::snprintf(share, sizeof share, "%.4f", s.share);
            text_ += ',';
            AppendCsvField(&text_, names_[s.feature]);
            text_ += ',';
            text_ += share;
          }
        }
      }
      text_ += '\n';
      if (text_.size() >= kBlockBytes) Flush();
    }
  }

  void Finish() {
    Flush();
    out_.Finish();
  }

 private:
  // Written in blocks of about a megabyte: one write per block, not per row.
  static constexpr std::size_t kBlockBytes = 1 << 20;

  void AppendNumber(double value) {
    char number[32];
    text_.append(number, std::to_chars(number, number + sizeof number, value).ptr);
  }
  void Flush() {
    std::fwrite(text_.data(), 1, text_.size(), out_.get());
    text_.clear();
  }

  const Model& model_;
  const std::vector<std::string>& names_;
  const int top_k_;
  OutputFile out_;
  std::string text_;
};

void RunScore(const ScoreArgs& a) {
  const int64_t explain = WholeNumberFlagIn("--explain", a.explain, 0, 1 << 20);
  Model model = LoadModel(a.model);
  std::optional<FeatureFileReader> reader;
  try {
    reader.emplace(a.input);
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  const int inputs = model.input_dims();
  const std::vector<std::string>& file_names = reader->names();
  if (static_cast<int>(file_names.size()) != inputs) {
    throw CommandError(a.input + ": " + std::to_string(file_names.size()) +
                       " feature columns, the model " + a.model + " has " + std::to_string(inputs));
  }
  const auto& model_names = model.parts().feature_names;
  if (!model_names.empty()) {
    for (int j = 0; j < inputs; ++j) {
      if (model_names[j] != file_names[j]) {
        throw CommandError(a.input + ": feature column " + std::to_string(j + 1) + " is '" +
                           file_names[j] + "', the model was fitted with '" + model_names[j] + "'");
      }
    }
  }
  const FeatureTransform transform(model.parts().transform, inputs);
  const std::vector<std::string> names = transform.OutputNames(file_names);
  const int top_k = static_cast<int>(std::min<int64_t>(explain, model.dims()));
  const bool identity = model.parts().transform.identity();
  const auto no_rows = [&] { return CommandError(a.input + ": no data rows"); };
  VectorD decisions, nonconformity;
  std::vector<int64_t> output_row;

  if (!identity) {
    // Lags and rolling statistics need the rows before: the whole file, in order.
    FeatureFile file;
    try {
      file = reader->Next(INT64_MAX);
    } catch (const CsvError& e) {
      throw CommandError(e.what());
    }
    if (file.rows() == 0) throw no_rows();
    const MatrixD transformed = transform.TransformAll(file.values, file.times, &output_row);
    model.EvaluateBatch(transformed, &decisions, &nonconformity);
    ScoreWriter writer(model, names, top_k, a.output);
    writer.Header(file.has_time, file.has_stream);
    writer.Rows(file, transformed, output_row, decisions, nonconformity);
    writer.Finish();
    return;
  }

  BlocksAhead blocks(&*reader);
  FeatureFile block;
  try {
    block = blocks.Take();
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  if (block.rows() == 0) throw no_rows();
  // Opened once the first block is read, so that a file with a bad first block or no rows leaves
  // no output behind. A bad row further on ends the command with its error (exit status 1) after
  // the rows before it have been written.
  ScoreWriter writer(model, names, top_k, a.output);
  writer.Header(block.has_time, block.has_stream);
  while (block.rows() > 0) {
    output_row.resize(static_cast<std::size_t>(block.rows()));
    std::iota(output_row.begin(), output_row.end(), int64_t{0});
    // Without lags or rolling statistics the rows are scored as read, without a copy.
    model.EvaluateBatch(block.values, &decisions, &nonconformity);
    writer.Rows(block, block.values, output_row, decisions, nonconformity);
    try {
      block = blocks.Take();
    } catch (const CsvError& e) {
      throw CommandError(e.what());
    }
  }
  writer.Finish();
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
