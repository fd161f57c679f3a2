#include "cli/cli_util.h"

#include <cerrno>
#include <charconv>
#include <cstring>

namespace nuwatch::cli {

FeatureFile ReadFeatureFile(const std::string& path) {
  FeatureFile file;
  try {
    file.table = ReadCsv(path);
    file.values = FeatureMatrix(file.table, {"time", "stream"}, &file.names);
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
  return file;
}

std::string FormatNumber(double value) {
  char buffer[32];
  auto result = std::to_chars(buffer, buffer + sizeof buffer, value);
  return std::string(buffer, result.ptr);
}

OutputFile::OutputFile(const std::string& path) : path_(path) {
  if (path.empty() || path == "-") {
    file_ = stdout;
    path_ = "standard output";
    return;
  }
  file_ = std::fopen(path.c_str(), "w");
  if (file_ == nullptr) throw CommandError(path + ": cannot create: " + std::strerror(errno));
  owned_ = true;
}

OutputFile::~OutputFile() {
  if (owned_ && file_ != nullptr) std::fclose(file_);
}

void OutputFile::Finish() {
  if (std::fflush(file_) != 0 || std::ferror(file_))
    throw CommandError(path_ + ": write failed: " + std::strerror(errno));
  if (owned_) {
    const int rc = std::fclose(file_);
    file_ = nullptr;
    if (rc != 0) throw CommandError(path_ + ": write failed: " + std::strerror(errno));
  }
}

}  // namespace nuwatch::cli
