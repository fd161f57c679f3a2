#include "formats/csv_table.h"

namespace nuwatch {
namespace {

CsvTable ReadAll(CsvReader reader) {
  CsvTable table;
  table.path = reader.name();
  table.header = reader.header();
  while (reader.Next() == CsvReader::Status::kRow) {
    table.rows.emplace_back(reader.fields().begin(), reader.fields().end());
    table.line_numbers.push_back(reader.line());
  }
  return table;
}

}  // namespace

int CsvTable::Column(std::string_view name) const {
  for (std::size_t i = 0; i < header.size(); ++i)
    if (header[i] == name) return static_cast<int>(i);
  return -1;
}

int CsvTable::RequireColumn(std::string_view name) const {
  const int column = Column(name);
  if (column < 0) throw CsvError(path + ": no column named " + std::string(name));
  return column;
}

std::string CsvTable::Where(std::size_t row) const {
  return path + ":" + std::to_string(line_numbers.at(row)) + ": ";
}

CsvTable ReadCsv(const std::string& path) { return ReadAll(CsvReader::Open(path)); }

CsvTable ParseCsv(std::string_view text, const std::string& path_for_messages) {
  return ReadAll(CsvReader::FromText(text, path_for_messages));
}

}  // namespace nuwatch
