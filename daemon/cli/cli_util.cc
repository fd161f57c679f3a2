#include "cli/cli_util.h"

#include <algorithm>
#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstring>

#include "formats/timestamps.h"

namespace nuwatch::cli {

FeatureFile ReadFeatureFile(const std::string& path) {
  FeatureFile file;
  try {
    file.table = ReadCsv(path);
    file.values = FeatureMatrix(file.table, {"time", "stream"}, &file.names);
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  file.time_column = file.table.Column("time");
  file.stream_column = file.table.Column("stream");
  if (file.time_column >= 0) {
    file.times.reserve(file.table.rows.size());
    for (std::size_t r = 0; r < file.table.rows.size(); ++r) {
      const std::string& text = file.table.rows[r][file.time_column];
      const auto t = ParseTimestamp(TrimField(text));
      if (!t) {
        throw CommandError(file.table.Where(r) + "column time: '" + text +
                           "' is not an ISO-8601 time or epoch seconds");
      }
      file.times.push_back(*t);
    }
  }
  return file;
}

FeatureFile SelectRows(const FeatureFile& file, const std::string& stream, double from,
                       double until) {
  const bool bounded = std::isfinite(from) || std::isfinite(until);
  if (bounded && file.time_column < 0) {
    throw CommandError(file.table.path + ": --from/--until need a time column");
  }
  if (stream.empty() && file.stream_column >= 0) {
    std::vector<std::string> streams;
    for (const auto& row : file.table.rows) {
      const std::string name(TrimField(row[file.stream_column]));
      if (std::find(streams.begin(), streams.end(), name) == streams.end()) streams.push_back(name);
    }
    if (streams.size() > 1) {
      std::string list;
      for (std::size_t i = 0; i < streams.size() && i < 3; ++i)
        list += (i ? ", " : "") + streams[i];
      if (streams.size() > 3) list += ", ...";
      throw CommandError("--stream: " + file.table.path + " holds " +
                         std::to_string(streams.size()) + " streams (" + list +
                         "); choose one with --stream NAME");
    }
  }
  if (!stream.empty() && file.stream_column < 0) {
    throw CommandError("--stream " + stream + ": " + file.table.path + " has no stream column");
  }
  std::vector<int64_t> keep;
  for (std::size_t r = 0; r < file.table.rows.size(); ++r) {
    if (!stream.empty() && TrimField(file.table.rows[r][file.stream_column]) != stream) continue;
    if (bounded && (file.times[r] < from || file.times[r] > until)) continue;
    keep.push_back(static_cast<int64_t>(r));
  }
  if (keep.empty()) {
    throw CommandError(file.table.path + ": no rows" +
                       (stream.empty() ? std::string() : " of stream " + stream) +
                       (bounded ? " in the time range given" : ""));
  }
  if (keep.size() == file.table.rows.size()) return file;
  FeatureFile out;
  out.names = file.names;
  out.time_column = file.time_column;
  out.stream_column = file.stream_column;
  out.table.path = file.table.path;
  out.table.header = file.table.header;
  out.values.resize(static_cast<int64_t>(keep.size()), file.values.cols());
  for (std::size_t i = 0; i < keep.size(); ++i) {
    out.table.rows.push_back(file.table.rows[keep[i]]);
    out.table.line_numbers.push_back(file.table.line_numbers[keep[i]]);
    out.values.row(static_cast<int64_t>(i)) = file.values.row(keep[i]);
    if (!file.times.empty()) out.times.push_back(file.times[keep[i]]);
  }
  return out;
}

std::string FormatNumber(double value) {
  char buffer[32];
  auto result = std::to_chars(buffer, buffer + sizeof buffer, value);
  return std::string(buffer, result.ptr);
}

OutputFile::OutputFile(const std::string& path) : path_(path) {
  if (path.empty() || path == "-") {
    file_ = stdout;
    path_ = "standard output";
    return;
  }
  file_ = std::fopen(path.c_str(), "w");
  if (file_ == nullptr) throw CommandError(path + ": cannot create: " + std::strerror(errno));
  owned_ = true;
}

OutputFile::~OutputFile() {
  if (owned_ && file_ != nullptr) std::fclose(file_);
}

void OutputFile::Finish() {
  if (std::fflush(file_) != 0 || std::ferror(file_))
    throw CommandError(path_ + ": write failed: " + std::strerror(errno));
  if (owned_) {
    const int rc = std::fclose(file_);
    file_ = nullptr;
    if (rc != 0) throw CommandError(path_ + ": write failed: " + std::strerror(errno));
  }
}

}  // namespace nuwatch::cli
