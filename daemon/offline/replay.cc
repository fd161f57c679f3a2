#include "offline/replay.h"

#include <cstdio>
#include <map>
#include <memory>
#include <set>
#include <sstream>
#include <unordered_map>

namespace nuwatch {

namespace {

StreamRecording ReadRecording(CsvReader reader, const std::string& path) {
  const StreamFileColumns columns(reader);
  StreamRecording r;
  r.path = path;
  r.feature_names = columns.feature_names();
  const std::size_t dims = r.feature_names.size();
  std::vector<double> values;
  std::unordered_map<std::string, int32_t> stream_index;
  std::string key;
  while (true) {
    values.resize(values.size() + dims);
    try {
      if (reader.Next() != CsvReader::Status::kRow) break;
      r.times.push_back(
          columns.Parse(reader, std::span<double>(values.data() + values.size() - dims, dims)));
    } catch (const CsvError& e) {
      // A last line without its line end that does not read is a row cut by a writer that
      // stopped (a crash, a full disk): the rows before it are good, so skip it and say so.
      if (!reader.record_is_unterminated()) throw;
      r.cut_last_line =
          std::string(e.what()) + " (the last line, cut: it has no line end; skipped)";
      break;
    }
    r.time_text.push_back(columns.TimeText(reader));
    key.assign(columns.Stream(reader));
    const auto [it, inserted] = stream_index.emplace(key, static_cast<int32_t>(r.streams.size()));
    if (inserted) r.streams.push_back(key);
    r.stream_of_row.push_back(it->second);
  }
  values.resize(r.times.size() * dims);
  if (r.times.empty()) {
    throw CsvError(
        path + ": no data rows" +
        (r.cut_last_line.empty() ? "" : " (besides a cut last line: " + r.cut_last_line + ")"));
  }
  r.values = Eigen::Map<const MatrixD>(values.data(), static_cast<int64_t>(r.times.size()),
                                       static_cast<int64_t>(dims));
  return r;
}

}  // namespace

StreamRecording ReadStreamRecording(const std::string& path) {
  return ReadRecording(CsvReader::Open(path), path);
}

StreamRecording ReadStreamRecording(std::istream& in, const std::string& path) {
  std::ostringstream text;
  text << in.rdbuf();
  return ReadRecording(CsvReader::FromText(text.str(), path), path);
}

std::string UnusableSettingNote(int64_t flagged, int64_t scored) {
  if (scored == 0 || 2 * flagged <= scored) return "";
  char percent[32];
  std::snprintf(percent, sizeof percent, "%.1f%%",
                100.0 * static_cast<double>(flagged) / static_cast<double>(scored));
  return std::string("this setting is not usable: it flags ") + percent +
         " of the scored vectors (more than half); an engineer would switch such an alarm off. "
         "Check that the window spans the process's normal cycle and the calibration warnings";
}

std::vector<ReplayRow> ReplayRecording(const StreamRecording& recording,
                                       const StreamOptions& options_for_stream,
                                       const std::function<void(int64_t)>& progress,
                                       std::vector<std::string>* warnings) {
  std::vector<std::unique_ptr<Detector>> detectors(recording.streams.size());
  std::set<std::string> seen_warnings;
  auto note = [&](const std::string& stream, const std::string& text) {
    if (warnings != nullptr && seen_warnings.insert(stream + ": " + text).second)
      warnings->push_back(stream + ": " + text);
  };
  std::vector<ReplayRow> rows(recording.rows());
  const int dims = static_cast<int>(recording.values.cols());
  for (int64_t i = 0; i < recording.rows(); ++i) {
    const int32_t s = recording.stream_of_row[i];
    if (!detectors[s]) {
      DetectorOptions options = options_for_stream(recording.streams[s]);
      if (options.feature_names.empty()) options.feature_names = recording.feature_names;
      detectors[s] = std::make_unique<Detector>(options, dims);
      // Refits run inline, on this thread, inside Observe.
      const std::string& stream = recording.streams[s];
      detectors[s]->set_refit_listener([&note, &stream](const RefitReport& report) {
        if (!report.ok) note(stream, "a refit failed: " + report.error);
        for (const auto& w : report.warnings) note(stream, w);
      });
    }
    Verdict v = detectors[s]->Observe(
        recording.times[i], std::span<const double>(recording.values.row(i).data(), dims));
    ReplayRow& row = rows[i];
    row.learning = v.state != StreamState::kScoring;
    row.history = v.state == StreamState::kHistory;
    row.decision = v.decision;
    row.p_value = v.p_value;
    row.anomaly = v.outlier;
    row.incident = v.incident_id;
    row.model_version = v.model_version;
    row.support_vectors = v.support_vectors;
    if (progress && (i + 1) % 4096 == 0) progress(i + 1);
  }
  if (progress) progress(recording.rows());
  return rows;
}

}  // namespace nuwatch
