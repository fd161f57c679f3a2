#include "offline/replay.h"

#include <cstdio>
#include <fstream>
#include <map>
#include <memory>
#include <set>
#include <sstream>
#include <unordered_map>

#include "formats/timestamps.h"

namespace nuwatch {

StreamRecording ReadStreamRecording(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw CsvError(path + ": cannot open for reading");
  return ReadStreamRecording(in, path);
}

StreamRecording ReadStreamRecording(std::istream& in, const std::string& path) {
  // A dedicated reader rather than ReadCsv: recordings run to millions of rows, and a table of
  // strings would cost ten times the memory of the values.
  StreamRecording r;
  r.path = path;
  std::string line;
  int line_number = 0;
  std::vector<std::string_view> fields;
  auto split = [&](std::string_view text) {
    fields.clear();
    std::size_t start = 0;
    while (true) {
      std::size_t comma = text.find(',', start);
      fields.push_back(TrimField(text.substr(start, comma - start)));
      if (comma == std::string_view::npos) break;
      start = comma + 1;
    }
  };
  int time_column = -1, stream_column = -1;
  std::vector<int> feature_columns;
  std::size_t columns = 0;
  std::vector<double> values;
  std::unordered_map<std::string, int32_t> stream_index;
  auto where = [&] { return path + ":" + std::to_string(line_number) + ": "; };
  while (std::getline(in, line)) {
    ++line_number;
    if (TrimField(line).empty()) continue;
    split(line);
    if (columns == 0) {
      columns = fields.size();
      for (std::size_t i = 0; i < fields.size(); ++i) {
        if (fields[i] == "time")
          time_column = static_cast<int>(i);
        else if (fields[i] == "stream")
          stream_column = static_cast<int>(i);
        else if (fields[i].empty())
          throw CsvError(where() + "a header column has no name");
        else {
          feature_columns.push_back(static_cast<int>(i));
          r.feature_names.emplace_back(fields[i]);
        }
      }
      if (time_column < 0) throw CsvError(where() + "no column named time in the header");
      if (feature_columns.empty()) throw CsvError(where() + "no feature columns in the header");
      continue;
    }
    if (fields.size() != columns) {
      throw CsvError(where() + std::to_string(fields.size()) + " fields, the header has " +
                     std::to_string(columns));
    }
    auto time = ParseTimestamp(fields[time_column]);
    if (!time) {
      throw CsvError(where() + "time '" + std::string(fields[time_column]) +
                     "' is neither ISO-8601 nor seconds since the epoch");
    }
    r.times.push_back(*time);
    r.time_text.emplace_back(fields[time_column]);
    std::string key = stream_column >= 0 ? std::string(fields[stream_column]) : std::string();
    auto [it, inserted] = stream_index.emplace(key, static_cast<int32_t>(r.streams.size()));
    if (inserted) r.streams.push_back(key);
    r.stream_of_row.push_back(it->second);
    for (std::size_t c = 0; c < feature_columns.size(); ++c) {
      auto value = ParseFiniteNumber(fields[feature_columns[c]]);
      if (!value) {
        throw CsvError(where() + "column " + r.feature_names[c] + ": '" +
                       std::string(fields[feature_columns[c]]) + "' is not a finite number");
      }
      values.push_back(*value);
    }
  }
  if (in.bad()) throw CsvError(path + ": read error");
  if (columns == 0) throw CsvError(path + ": empty file (no header row)");
  if (r.times.empty()) throw CsvError(path + ": no data rows");
  r.values = Eigen::Map<const MatrixD>(values.data(), static_cast<int64_t>(r.times.size()),
                                       static_cast<int64_t>(feature_columns.size()));
  return r;
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
