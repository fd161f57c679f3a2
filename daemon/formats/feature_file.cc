#include "formats/feature_file.h"

#include <algorithm>
#include <optional>

#include "formats/timestamps.h"

namespace nuwatch {

FeatureFileReader::FeatureFileReader(const std::string& path)
    : path_(path), reader_(CsvReader::Open(path)) {
  time_column_ = reader_.Column("time");
  stream_column_ = reader_.Column("stream");
  for (std::size_t i = 0; i < reader_.header().size(); ++i) {
    if (static_cast<int>(i) == time_column_ || static_cast<int>(i) == stream_column_) continue;
    columns_.push_back(static_cast<int>(i));
    names_.push_back(reader_.header()[i]);
  }
  if (columns_.empty()) throw CsvError(path + ": no feature columns");
}

FeatureFile FeatureFileReader::Next(int64_t max_rows) {
  FeatureFile block;
  block.path = path_;
  block.names = names_;
  block.has_time = has_time();
  block.has_stream = has_stream();
  const auto columns = static_cast<int64_t>(columns_.size());
  int64_t rows = 0;
  // The matrix grows in place: a row-major matrix gaining rows is one realloc, which for a large
  // block moves pages instead of copying them (and never touches memory twice).
  block.values.resize(std::min<int64_t>(1024, std::max<int64_t>(max_rows, 1)), columns);
  while (rows < max_rows && !ended_) {
    if (reader_.Next() != CsvReader::Status::kRow) {
      ended_ = true;
      break;
    }
    if (rows == block.values.rows()) {
      block.values.conservativeResize(std::min(2 * rows, max_rows), Eigen::NoChange);
    }
    double* row = block.values.row(rows).data();
    for (int64_t c = 0; c < columns; ++c) {
      const std::string_view field = reader_[columns_[c]];
      const std::optional<double> value = ParseFiniteNumber(field);
      if (!value) {
        throw CsvError(reader_.Where() + "column " + names_[c] + ": '" + std::string(field) +
                       "' is not a finite number");
      }
      row[c] = *value;
    }
    ++rows;
    if (time_column_ >= 0) {
      const std::string_view field = reader_[time_column_];
      const std::optional<double> t = ParseTimestamp(field);
      if (!t) {
        throw CsvError(reader_.Where() + "column time: '" + std::string(field) +
                       "' is not an ISO-8601 time or epoch seconds");
      }
      block.times.push_back(*t);
      block.time_text.push_back(field);
    }
    if (stream_column_ >= 0) block.streams.push_back(reader_[stream_column_]);
  }
  block.values.conservativeResize(rows, Eigen::NoChange);
  return block;
}

FeatureFile ReadFeatureFile(const std::string& path) {
  FeatureFileReader reader(path);
  FeatureFile file = reader.Next(INT64_MAX);
  if (file.rows() == 0) throw CsvError(path + ": no data rows");
  return file;
}

}  // namespace nuwatch
