// Reading the CSV files nuwatch takes as input: a header row, then one row per record; fields
// separated by commas (no quoting: feature files are numeric, names are plain). Blank lines and a
// trailing '\r' are ignored. Every error names the file and the 1-based line.
// Thread safety: value types, reentrant functions.
#pragma once

#include <optional>
#include <stdexcept>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {

class CsvError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

struct CsvTable {
  std::string path;                            // for messages
  std::vector<std::string> header;             // column names, trimmed
  std::vector<std::vector<std::string>> rows;  // each of header.size() fields
  std::vector<int> line_numbers;               // 1-based file line of each row

  // Index of the column named `name`, or -1.
  int Column(std::string_view name) const;
  // Throws CsvError "PATH: no column named NAME".
  int RequireColumn(std::string_view name) const;
  // "PATH:LINE: " prefix for messages about row r.
  std::string Where(std::size_t row) const;
};

// Throws CsvError for a missing/unreadable file, an empty file, an empty or duplicated column name,
// a ragged row ("PATH:LINE: 3 fields, the header has 4"). A header-only file is valid here (zero
// rows); callers that need rows say so.
CsvTable ReadCsv(const std::string& path);
CsvTable ParseCsv(std::string_view text, const std::string& path_for_messages);

// The field without surrounding blanks, tabs and a trailing '\r'.
std::string_view TrimField(std::string_view field);

// A strict finite number; nullopt for text, empty, NaN, Inf.
std::optional<double> ParseFiniteNumber(std::string_view text);

// The numeric feature matrix of a table: every column except those named in `skip`. Throws
// CsvError "PATH:LINE: column NAME: 'abc' is not a finite number" on the first bad value, and
// "PATH: no data rows" when there are none. Ensures: names.size() == result.cols().
MatrixD FeatureMatrix(const CsvTable& table, const std::vector<std::string>& skip,
                      std::vector<std::string>* names);

}  // namespace nuwatch
