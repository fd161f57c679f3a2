// Helpers shared by the nuwatch subcommands: reading feature CSV files and formatting numbers.
#pragma once

#include <cstdio>
#include <string>
#include <vector>

#include "cli/commands.h"
#include "formats/stream_file.h"
#include "nuwatch/types.h"

namespace nuwatch::cli {

// The numeric features of a CSV file: every column except `time` and `stream`, and those two when
// present (times parsed as ISO-8601 or epoch seconds, and kept as written). Read row by row
// (CsvReader): memory is that of the values, not of the text. CSV errors become CommandError with
// the file and line.
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
FeatureFile ReadFeatureFile(const std::string& path);

// The rows of `file` whose stream is `stream` (all when empty) and whose time lies in
// [from, until] (seconds; infinite: no bound). Throws CommandError when the file holds several
// streams and none was chosen ("--stream: the file holds 3 streams (pump-01, ...); choose one"),
// when a time bound is given without a time column, or when nothing is left.
FeatureFile SelectRows(FeatureFile file, const std::string& stream, double from, double until);

// Shortest text that reads back as the same double ("0.125", "-3.5e-07").
std::string FormatNumber(double value);

// A FILE* that is stdout or a newly created file; closes on destruction.
class OutputFile {
 public:
  explicit OutputFile(const std::string& path);  // "" or "-": stdout
  ~OutputFile();
  OutputFile(const OutputFile&) = delete;
  OutputFile& operator=(const OutputFile&) = delete;
  std::FILE* get() const { return file_; }
  // Flushes and reports a write error (disk full, closed pipe) as CommandError.
  void Finish();

 private:
  std::string path_;
  std::FILE* file_ = nullptr;
  bool owned_ = false;
};

}  // namespace nuwatch::cli
