#include "service/recorder.h"

#include <algorithm>
#include <cerrno>
#include <charconv>
#include <cstring>
#include <filesystem>
#include <set>
#include <system_error>

#include "service/state_store.h"

namespace nuwatch {
namespace {

namespace fs = std::filesystem;

// The longest shortest-round-trip double ("-2.2250738585072014e-308") has 24 characters.
constexpr std::size_t kNumberChars = 32;

std::string SafeColumnName(std::string name) {
  for (char& c : name)
    if (c == ',' || c == '"' || c == '\r' || c == '\n') c = '_';
  return name;
}

std::string Header(int dims, const std::vector<std::string>& names) {
  std::vector<std::string> columns;
  if (static_cast<int>(names.size()) == dims) {
    std::set<std::string> seen = {"time", "stream"};
    for (const auto& name : names) {
      std::string safe = SafeColumnName(name);
      std::string trimmed = safe;
      trimmed.erase(0, trimmed.find_first_not_of(" \t"));
      trimmed.erase(trimmed.find_last_not_of(" \t") + 1);
      if (trimmed.empty() || !seen.insert(trimmed).second) {
        columns.clear();  // the reader trims names and needs them distinct: fall back
        break;
      }
      columns.push_back(trimmed);
    }
  }
  if (columns.empty()) {
    for (int j = 1; j <= dims; ++j) {
      std::string name = "x";  // (not "x" + to_string: GCC 12 warns falsely on that)
      name += std::to_string(j);
      columns.push_back(std::move(name));
    }
  }
  std::string header = "time,stream";
  for (const auto& c : columns) header += "," + c;
  header += "\n";
  return header;
}

}  // namespace

StreamRecorder::StreamRecorder(std::string dir, std::string stream_key, int dims,
                               std::vector<std::string> feature_names, std::size_t rotate_bytes,
                               int keep_files)
    : dir_(std::move(dir)),
      key_(std::move(stream_key)),
      escaped_key_(EscapeStreamKey(key_)),
      dims_(dims),
      header_(Header(dims, feature_names)),
      rotate_bytes_(std::max<std::size_t>(rotate_bytes, 1)),
      keep_files_(std::max(keep_files, 0)),
      line_(key_.size() + (static_cast<std::size_t>(dims) + 1) * (kNumberChars + 1) + 2) {}

StreamRecorder::~StreamRecorder() {
  if (file_) std::fclose(file_);
}

void StreamRecorder::set_rotation(std::size_t rotate_bytes, int keep_files) {
  rotate_bytes_ = std::max<std::size_t>(rotate_bytes, 1);
  keep_files_ = std::max(keep_files, 0);
}

std::string StreamRecorder::PathOf(int64_t n) const {
  return (fs::path(dir_) / (escaped_key_ + "-" + std::to_string(n) + ".csv")).string();
}

std::vector<int64_t> StreamRecorder::ExistingNumbers() const {
  std::vector<int64_t> numbers;
  const std::string prefix = escaped_key_ + "-";
  std::error_code error;
  for (fs::directory_iterator it(dir_, error), end; !error && it != end; it.increment(error)) {
    const std::string name = it->path().filename().string();
    if (!name.starts_with(prefix) || !name.ends_with(".csv")) continue;
    const std::string_view digits =
        std::string_view(name).substr(prefix.size(), name.size() - prefix.size() - 4);
    if (digits.empty() || digits.size() > 18 || digits.front() == '0') continue;
    int64_t n = 0;
    const auto [end_ptr, ec] = std::from_chars(digits.data(), digits.data() + digits.size(), n);
    if (ec != std::errc() || end_ptr != digits.data() + digits.size()) continue;
    numbers.push_back(n);
  }
  std::sort(numbers.begin(), numbers.end());
  return numbers;
}

void StreamRecorder::DeleteOldFiles() {
  if (keep_files_ == 0) return;
  std::vector<int64_t> numbers = ExistingNumbers();
  const std::size_t keep = static_cast<std::size_t>(keep_files_);
  for (std::size_t i = 0; i + keep < numbers.size(); ++i) {
    std::error_code error;
    fs::remove(PathOf(numbers[i]), error);
  }
}

std::string StreamRecorder::OpenNext() {
  std::error_code error;
  fs::create_directories(dir_, error);
  if (error) return dir_ + ": cannot create the recording directory: " + error.message();
  if (next_number_ == 0) {
    const std::vector<int64_t> numbers = ExistingNumbers();
    next_number_ = numbers.empty() ? 1 : numbers.back() + 1;
  }
  path_ = PathOf(next_number_++);
  file_ = std::fopen(path_.c_str(), "wxe");  // x: never overwrite a recording
  if (!file_) return path_ + ": cannot create: " + std::strerror(errno);
  std::setvbuf(file_, nullptr, _IOFBF, 64 << 10);
  bytes_ = 0;
  if (std::fwrite(header_.data(), 1, header_.size(), file_) != header_.size()) {
    const std::string message = path_ + ": write failed: " + std::strerror(errno);
    std::fclose(file_);
    file_ = nullptr;
    return message;
  }
  bytes_ = header_.size();
  DeleteOldFiles();
  return "";
}

std::string StreamRecorder::Append(double time, std::span<const double> x) {
  if (file_ && bytes_ >= rotate_bytes_) {
    const bool closed = std::fclose(file_) == 0;
    file_ = nullptr;
    if (!closed) return path_ + ": close failed: " + std::strerror(errno);
  }
  if (!file_) {
    if (std::string error = OpenNext(); !error.empty()) return error;
  }
  char* p = line_.data();
  char* const end = line_.data() + line_.size();
  p = std::to_chars(p, end, time).ptr;
  *p++ = ',';
  std::memcpy(p, key_.data(), key_.size());
  p += key_.size();
  for (std::size_t j = 0; j < x.size() && j < static_cast<std::size_t>(dims_); ++j) {
    *p++ = ',';
    p = std::to_chars(p, end, x[j]).ptr;
  }
  *p++ = '\n';
  const std::size_t n = static_cast<std::size_t>(p - line_.data());
  if (std::fwrite(line_.data(), 1, n, file_) != n) {
    const std::string message = path_ + ": write failed: " + std::strerror(errno);
    std::fclose(file_);
    file_ = nullptr;
    return message;
  }
  bytes_ += n;
  return "";
}

std::string StreamRecorder::Flush() {
  if (file_ && std::fflush(file_) != 0) {
    const std::string message = path_ + ": write failed: " + std::strerror(errno);
    std::fclose(file_);
    file_ = nullptr;
    return message;
  }
  return "";
}

}  // namespace nuwatch
