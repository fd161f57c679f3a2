// Helpers shared by the nuwatch subcommands: reading feature CSV files and formatting numbers.
#pragma once

#include <cstdio>
#include <string>
#include <vector>

#include "cli/commands.h"
#include "formats/csv_table.h"
#include "nuwatch/types.h"

namespace nuwatch::cli {

// The numeric features of a CSV file: every column except `time` and `stream`. CSV errors become
// CommandError with the file and line.
struct FeatureFile {
  CsvTable table;
  std::vector<std::string> names;
  MatrixD values;
};
FeatureFile ReadFeatureFile(const std::string& path);

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
