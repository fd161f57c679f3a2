// The columns of a stream file, the format `nuwatch replay`, `tune` and `send` read and nuwatchd's
// recorder writes: a `time` column (ISO-8601 or seconds since the epoch), an optional `stream`
// column, and numeric feature columns (every other column). One row at a time, from a CsvReader,
// so that a file and rows piped in are read by the same rules with the same messages.
// Thread safety: a StreamFileColumns is immutable after construction; Parse is reentrant.
#pragma once

#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "formats/csv_reader.h"

namespace nuwatch {

class StreamFileColumns {
 public:
  // From the reader's header. Throws CsvError "NAME: no column named time in the header" or
  // "NAME: no feature columns in the header".
  explicit StreamFileColumns(const CsvReader& reader);

  const std::vector<std::string>& feature_names() const { return feature_names_; }
  int dims() const { return static_cast<int>(feature_columns_.size()); }
  bool has_stream() const { return stream_column_ >= 0; }

  // The current row of `reader`: its time in seconds and its features into `values`
  // (values.size() == dims()). Throws CsvError "NAME:LINE: time 'x' is neither ISO-8601 nor seconds
  // since the epoch" or "NAME:LINE: column NAME: 'abc' is not a finite number".
  double Parse(const CsvReader& reader, std::span<double> values) const;
  // The current row's time field as written, and its stream key ("" without a stream column).
  std::string_view TimeText(const CsvReader& reader) const { return reader[time_column_]; }
  std::string_view Stream(const CsvReader& reader) const {
    return stream_column_ >= 0 ? reader[stream_column_] : std::string_view();
  }

 private:
  int time_column_ = -1;
  int stream_column_ = -1;
  std::vector<int> feature_columns_;
  std::vector<std::string> feature_names_;
};

// Many short strings in one buffer (e.g. a recording's time fields as written): one allocation
// for all of them instead of one each.
class PackedStrings {
 public:
  void push_back(std::string_view text) {
    data_.append(text);
    ends_.push_back(data_.size());
  }
  std::string_view operator[](std::size_t i) const {
    const std::size_t begin = i == 0 ? 0 : ends_[i - 1];
    return std::string_view(data_).substr(begin, ends_[i] - begin);
  }
  std::size_t size() const { return ends_.size(); }
  bool empty() const { return ends_.empty(); }
  std::size_t MemoryBytes() const {
    return data_.capacity() + ends_.capacity() * sizeof(std::size_t);
  }

 private:
  std::string data_;
  std::vector<std::size_t> ends_;
};

}  // namespace nuwatch
