#include "formats/csv_table.h"

#include <charconv>
#include <cmath>
#include <fstream>
#include <sstream>
#include <unordered_set>

namespace nuwatch {

std::string_view TrimField(std::string_view s) {
  while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
  while (!s.empty() && (s.back() == ' ' || s.back() == '\t' || s.back() == '\r'))
    s.remove_suffix(1);
  return s;
}

namespace {

void SplitFields(std::string_view line, std::vector<std::string>* fields) {
  fields->clear();
  std::size_t start = 0;
  while (true) {
    std::size_t comma = line.find(',', start);
    fields->emplace_back(TrimField(line.substr(start, comma - start)));
    if (comma == std::string_view::npos) break;
    start = comma + 1;
  }
}

}  // namespace

int CsvTable::Column(std::string_view name) const {
  for (std::size_t i = 0; i < header.size(); ++i)
    if (header[i] == name) return static_cast<int>(i);
  return -1;
}

int CsvTable::RequireColumn(std::string_view name) const {
  int column = Column(name);
  if (column < 0) throw CsvError(path + ": no column named " + std::string(name));
  return column;
}

std::string CsvTable::Where(std::size_t row) const {
  return path + ":" + std::to_string(line_numbers.at(row)) + ": ";
}

CsvTable ParseCsv(std::string_view text, const std::string& path_for_messages) {
  CsvTable table;
  table.path = path_for_messages;
  std::size_t pos = 0;
  int line_number = 0;
  bool have_header = false;
  std::vector<std::string> fields;
  while (pos < text.size()) {
    std::size_t newline = text.find('\n', pos);
    std::string_view line =
        text.substr(pos, newline == std::string_view::npos ? text.npos : newline - pos);
    pos = newline == std::string_view::npos ? text.size() : newline + 1;
    ++line_number;
    if (TrimField(line).empty()) continue;
    SplitFields(line, &fields);
    if (!have_header) {
      std::unordered_set<std::string> seen;
      for (std::size_t i = 0; i < fields.size(); ++i) {
        if (fields[i].empty())
          throw CsvError(path_for_messages + ":" + std::to_string(line_number) + ": column " +
                         std::to_string(i + 1) + " of the header has no name");
        if (!seen.insert(fields[i]).second)
          throw CsvError(path_for_messages + ":" + std::to_string(line_number) +
                         ": duplicated column name " + fields[i]);
      }
      table.header = fields;
      have_header = true;
      continue;
    }
    if (fields.size() != table.header.size())
      throw CsvError(path_for_messages + ":" + std::to_string(line_number) + ": " +
                     std::to_string(fields.size()) + " fields, the header has " +
                     std::to_string(table.header.size()));
    table.rows.push_back(fields);
    table.line_numbers.push_back(line_number);
  }
  if (!have_header) throw CsvError(path_for_messages + ": empty file (no header row)");
  return table;
}

CsvTable ReadCsv(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw CsvError(path + ": cannot open for reading");
  std::ostringstream buffer;
  buffer << in.rdbuf();
  if (in.bad()) throw CsvError(path + ": read error");
  return ParseCsv(buffer.str(), path);
}

std::optional<double> ParseFiniteNumber(std::string_view text) {
  text = TrimField(text);
  if (!text.empty() && text.front() == '+') text.remove_prefix(1);
  if (text.empty()) return std::nullopt;
  double value = 0;
  const char* end = text.data() + text.size();
  auto [ptr, ec] = std::from_chars(text.data(), end, value);
  if (ec != std::errc() || ptr != end || !std::isfinite(value)) return std::nullopt;
  return value;
}

MatrixD FeatureMatrix(const CsvTable& table, const std::vector<std::string>& skip,
                      std::vector<std::string>* names) {
  std::vector<int> columns;
  names->clear();
  for (std::size_t i = 0; i < table.header.size(); ++i) {
    bool skipped = false;
    for (const auto& s : skip) skipped = skipped || table.header[i] == s;
    if (!skipped) {
      columns.push_back(static_cast<int>(i));
      names->push_back(table.header[i]);
    }
  }
  if (columns.empty()) throw CsvError(table.path + ": no feature columns");
  if (table.rows.empty()) throw CsvError(table.path + ": no data rows");
  MatrixD x(table.rows.size(), columns.size());
  for (std::size_t r = 0; r < table.rows.size(); ++r) {
    for (std::size_t c = 0; c < columns.size(); ++c) {
      const std::string& field = table.rows[r][columns[c]];
      auto value = ParseFiniteNumber(field);
      if (!value)
        throw CsvError(table.Where(r) + "column " + (*names)[c] + ": '" + field +
                       "' is not a finite number");
      x(r, c) = *value;
    }
  }
  return x;
}

}  // namespace nuwatch
