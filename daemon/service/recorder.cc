#include "service/recorder.h"

#include <fcntl.h>
#include <unistd.h>

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
// Rows are gathered whole in a buffer this large, written when it is full or at Flush.
constexpr std::size_t kBufferBytes = 64 << 10;

// Writes `n` bytes at `offset` (pwrite, resumed after a short write). Returns 0, or the errno of
// the call that failed; `done` is the number of bytes written either way.
int WriteAt(int fd, const char* data, std::size_t n, std::size_t offset, std::size_t* done) {
  *done = 0;
  while (*done < n) {
    const ssize_t w = ::pwrite(fd, data + *done, n - *done, static_cast<off_t>(offset + *done));
    if (w < 0) {
      if (errno == EINTR) continue;
      return errno;
    }
    if (w == 0) return EIO;  // no progress on a regular file: report rather than spin
    *done += static_cast<std::size_t>(w);
  }
  return 0;
}

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
      line_(key_.size() + (static_cast<std::size_t>(dims) + 1) * (kNumberChars + 1) + 2),
      buffer_(std::max(kBufferBytes, line_.size())) {}

StreamRecorder::~StreamRecorder() {
  if (fd_ >= 0) (void)WriteBuffer();
  Close();
}

void StreamRecorder::Close() {
  if (fd_ >= 0) ::close(fd_);
  fd_ = -1;
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
  path_ = PathOf(next_number_);
  fd_ = ::open(path_.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0644);  // never overwrite
  if (fd_ < 0) {
    const int open_error = errno;
    if (open_error == EEXIST) ++next_number_;  // made by someone else meanwhile: skip it
    return path_ + ": cannot create: " + std::strerror(open_error);
  }
  std::size_t done = 0;
  if (const int write_error = WriteAt(fd_, header_.data(), header_.size(), 0, &done)) {
    // A file without its header is no recording: remove it and reuse its number, so that a disk
    // that stays full does not leave empty files behind that would push real ones out.
    Close();
    ::unlink(path_.c_str());
    return path_ + ": cannot start the file: write failed: " + std::strerror(write_error);
  }
  ++next_number_;
  written_ = header_.size();
  buffered_ = 0;
  DeleteOldFiles();  // only now that the new file holds its header
  return "";
}

std::string StreamRecorder::WriteBuffer() {
  std::size_t done = 0;
  const int error = WriteAt(fd_, buffer_.data(), buffered_, written_, &done);
  if (error == 0) {
    written_ += buffered_;
    buffered_ = 0;
    return "";
  }
  // Keep the whole rows that reached the file; cut off the part of a row after them.
  std::size_t keep = done;
  while (keep > 0 && buffer_[keep - 1] != '\n') --keep;
  const auto dropped = std::count(buffer_.begin() + static_cast<std::ptrdiff_t>(keep),
                                  buffer_.begin() + static_cast<std::ptrdiff_t>(buffered_), '\n');
  written_ += keep;
  buffered_ = 0;
  std::string message = path_ + ": write failed: " + std::strerror(error) + "; " +
                        std::to_string(dropped) + " rows not recorded";
  if (::ftruncate(fd_, static_cast<off_t>(written_)) != 0) {
    // Shrinking needs no space, so this is rare; the file may end in a cut row (which replay
    // skips with a warning), and nothing more is appended after it.
    message +=
        "; cannot cut the file back to its last whole row: " + std::string(std::strerror(errno)) +
        "; the next rows go to a new file";
    Close();
  }
  return message;
}

std::string StreamRecorder::Append(double time, std::span<const double> x) {
  std::string error;
  if (fd_ >= 0 && written_ + buffered_ >= rotate_bytes_) {
    error = Flush();
    Close();
  }
  if (fd_ < 0) {
    if (std::string open_error = OpenNext(); !open_error.empty()) {
      return (error.empty() ? "" : error + "; ") + open_error + "; 1 row not recorded";
    }
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
  if (buffered_ + n > buffer_.size()) {
    if (std::string write_error = WriteBuffer(); !write_error.empty()) {
      error += (error.empty() ? "" : "; ") + write_error;
      if (fd_ < 0) return error + "; 1 row not recorded";
    }
  }
  std::memcpy(buffer_.data() + buffered_, line_.data(), n);
  buffered_ += n;
  return error;
}

std::string StreamRecorder::Flush() {
  if (fd_ < 0 || buffered_ == 0) return "";
  return WriteBuffer();
}

}  // namespace nuwatch
