// A whole CSV file in memory, for the small files the tools read as tables (alarm, incident and
// sample files of `nuwatch evaluate`). Read with the streaming CsvReader (csv_reader.h: RFC 4180
// quoting, blank lines skipped), so its rules and messages are those of every other CSV input.
// Large inputs (feature files, recordings) are read row by row with CsvReader instead.
// Thread safety: value types, reentrant functions.
#pragma once

#include <string>
#include <string_view>
#include <vector>

#include "formats/csv_reader.h"

namespace nuwatch {

struct CsvTable {
  std::string path;                            // for messages
  std::vector<std::string> header;             // column names, trimmed
  std::vector<std::vector<std::string>> rows;  // each of header.size() fields
  std::vector<int> line_numbers;               // 1-based file line where each row starts

  // Index of the column named `name`, or -1.
  int Column(std::string_view name) const;
  // Throws CsvError "PATH: no column named NAME".
  int RequireColumn(std::string_view name) const;
  // "PATH:LINE: " prefix for messages about row r.
  std::string Where(std::size_t row) const;
};

// Throws CsvError as CsvReader does (a missing or unreadable file, an empty file, an empty or
// duplicated column name, a ragged row: "PATH:LINE: 3 fields, the header has 4"). A header-only
// file is valid here (zero rows); callers that need rows say so.
CsvTable ReadCsv(const std::string& path);
CsvTable ParseCsv(std::string_view text, const std::string& path_for_messages);

}  // namespace nuwatch
