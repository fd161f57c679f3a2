#include "formats/stream_file.h"

#include "formats/timestamps.h"

namespace nuwatch {

StreamFileColumns::StreamFileColumns(const CsvReader& reader) {
  const std::vector<std::string>& header = reader.header();
  for (std::size_t i = 0; i < header.size(); ++i) {
    if (header[i] == "time") {
      time_column_ = static_cast<int>(i);
    } else if (header[i] == "stream") {
      stream_column_ = static_cast<int>(i);
    } else {
      feature_columns_.push_back(static_cast<int>(i));
      feature_names_.push_back(header[i]);
    }
  }
  const std::string where = reader.name() + ": ";
  if (time_column_ < 0) throw CsvError(where + "no column named time in the header");
  if (feature_columns_.empty()) throw CsvError(where + "no feature columns in the header");
}

double StreamFileColumns::Parse(const CsvReader& reader, std::span<double> values) const {
  const std::optional<double> time = ParseTimestamp(reader[time_column_]);
  if (!time) {
    throw CsvError(reader.Where() + "time '" + std::string(reader[time_column_]) +
                   "' is neither ISO-8601 nor seconds since the epoch");
  }
  for (std::size_t c = 0; c < feature_columns_.size(); ++c) {
    const std::optional<double> value = ParseFiniteNumber(reader[feature_columns_[c]]);
    if (!value) {
      throw CsvError(reader.Where() + "column " + feature_names_[c] + ": '" +
                     std::string(reader[feature_columns_[c]]) + "' is not a finite number");
    }
    values[c] = *value;
  }
  return *time;
}

}  // namespace nuwatch
