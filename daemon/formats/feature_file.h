// The numeric features of a CSV file, read whole or block by block: every column except `time`
// and `stream`, and those two when present (times parsed as ISO-8601 or epoch seconds, and kept
// as written). Read record by record (CsvReader), so memory is that of the values read, not of
// the text; a block reader holds one block.
// Errors are CsvError with the file and line ("x.csv:12: column f3: 'abc' is not a finite
// number").
// Thread safety: a FeatureFileReader is used by one thread at a time (it may move between
// threads); FeatureFile is a plain value.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "formats/csv_reader.h"
#include "formats/stream_file.h"
#include "nuwatch/types.h"

namespace nuwatch {

struct FeatureFile {
  std::string path;
  std::vector<std::string> names;
  MatrixD values;
  bool has_time = false;
  bool has_stream = false;
  std::vector<double> times;  // one per row with a time column, else empty
  PackedStrings time_text;    // the time fields as written (with a time column)
  PackedStrings streams;      // the stream fields (with a stream column)
  int64_t rows() const { return values.rows(); }
};

class FeatureFileReader {
 public:
  // Opens `path` and reads its header. Throws CsvError (cannot open, a bad header, no feature
  // columns).
  explicit FeatureFileReader(const std::string& path);

  const std::string& path() const { return path_; }
  const std::vector<std::string>& names() const { return names_; }
  bool has_time() const { return time_column_ >= 0; }
  bool has_stream() const { return stream_column_ >= 0; }

  // The next rows of the file, at most `max_rows`, with this file's path, names and columns.
  // Requires: max_rows >= 1. Ensures: 0 rows only at the end of the file (and on every call
  // after). Throws CsvError for a field that is not a finite number or a time.
  FeatureFile Next(int64_t max_rows);

 private:
  std::string path_;
  CsvReader reader_;
  int time_column_ = -1;
  int stream_column_ = -1;
  std::vector<int> columns_;
  std::vector<std::string> names_;
  bool ended_ = false;
};

// The whole file. Throws CsvError as above, and "PATH: no data rows" for a file with none.
FeatureFile ReadFeatureFile(const std::string& path);

}  // namespace nuwatch
