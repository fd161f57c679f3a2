// nuwatch replay: a recorded stream file through the same detector code as the daemon, refits
// inline, so that two runs give byte-identical output.
#include <chrono>
#include <cmath>
#include <cstdio>
#include <iostream>
#include <memory>

#include "cli/cli_util.h"
#include "cli/detector_flags.h"
#include "cli/progress_line.h"
#include "offline/replay.h"

namespace nuwatch::cli {
namespace {

struct ReplayArgs {
  std::string input, output;
  DetectorFlags detector;
};

void RunReplay(const ReplayArgs& a) {
  Config config = a.detector.Resolve();
  StreamRecording recording;
  try {
    recording = ReadStreamRecording(a.input);
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  if (!recording.cut_last_line.empty()) std::cerr << "warning: " << recording.cut_last_line << "\n";
  // Rows replayed so far, on a terminal only (ProgressLine), erased before the summary.
  ProgressLine progress_line = ProgressLine::ForStderr();
  const auto started = std::chrono::steady_clock::now();
  auto progress = [&](int64_t done) {
    const auto now = std::chrono::steady_clock::now();
    if (!progress_line.Due(now)) return;
    const double elapsed = std::chrono::duration<double>(now - started).count();
    const double total = static_cast<double>(recording.rows());
    char text[160];
    std::snprintf(
        text, sizeof text, "replay: %lld / %lld rows (%.0f%%), %.0f s elapsed, ~%.0f s left",
        static_cast<long long>(done), static_cast<long long>(recording.rows()),
        100.0 * static_cast<double>(done) / total, elapsed,
        done > 0 ? elapsed * (total - static_cast<double>(done)) / static_cast<double>(done) : 0.0);
    progress_line.Draw(text, now);
  };
  std::vector<ReplayRow> rows;
  std::vector<std::string> warnings;
  try {
    rows = ReplayRecording(
        recording, [&](const std::string& stream) { return DetectorOptionsFor(config, stream); },
        progress, &warnings);
  } catch (const PreconditionError& e) {
    throw CommandError(std::string(e.what()));
  }
  progress_line.Clear();
  OutputFile out(a.output);
  std::FILE* f = out.get();
  std::fputs("time,stream,state,decision,p_value,anomaly,incident,support_vectors,model_version\n",
             f);
  int64_t flagged = 0, scored = 0;
  std::string line;
  for (int64_t i = 0; i < recording.rows(); ++i) {
    const ReplayRow& r = rows[i];
    line.clear();
    AppendCsvField(&line, recording.time_text[i]);
    line += ',';
    AppendCsvField(&line, recording.streams[recording.stream_of_row[i]]);
    const std::string incident = r.incident ? std::to_string(r.incident) : "";
    if (r.learning) {
      line += r.history ? ",history,,,0," : ",learning,,,0,";
      line += incident + ",0,0\n";
    } else {
      ++scored;
      flagged += r.anomaly;
      line += ",scoring," + FormatNumber(r.decision) + "," +
              (std::isnan(r.p_value) ? std::string() : FormatNumber(r.p_value)) +
              (r.anomaly ? ",1," : ",0,") + incident + "," + std::to_string(r.support_vectors) +
              "," + std::to_string(r.model_version) + "\n";
    }
    std::fwrite(line.data(), 1, line.size(), f);
  }
  out.Finish();
  std::cerr << "replayed " << recording.rows() << " vectors of " << recording.streams.size()
            << " stream(s): " << scored << " scored, " << flagged << " flagged ("
            << (scored ? 100.0 * flagged / scored : 0.0) << "%)"
            << (a.output.empty() ? "" : " -> " + a.output) << "\n";
  for (const auto& w : warnings) std::cerr << "warning: " << w << "\n";
  const std::string unusable = UnusableSettingNote(flagged, scored);
  if (!unusable.empty()) std::cerr << "warning: " << unusable << "\n";
}

void AddReplayCommand(CLI::App& app) {
  auto args = std::make_shared<ReplayArgs>();
  CLI::App* sub = app.add_subcommand(
      "replay",
      "Replay a recorded stream file through the detectors (refits inline, deterministic)");
  sub->add_option("--input", args->input,
                  "CSV: a time column (ISO-8601 or epoch seconds), optional stream, features")
      ->type_name("FILE")
      ->required();
  sub->add_option("--output", args->output,
                  "CSV to write: time,stream,state,decision,p_value,anomaly,incident,"
                  "support_vectors,model_version (default: standard output)")
      ->type_name("FILE");
  args->detector.AddTo(sub);
  sub->callback([args] { RunReplay(*args); });
}

}  // namespace
NUWATCH_REGISTER_COMMAND(50, AddReplayCommand);
}  // namespace nuwatch::cli
