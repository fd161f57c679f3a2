// Optional recording of the vectors a stream receives, to CSV files that `nuwatch replay` and
// `nuwatch tune` read back (daemon/offline/replay.h): header `time,stream,<features>`, one row per
// vector, the time in seconds since the Unix epoch and every number in its shortest round-trip
// form.
//
// Files: `<dir>/<escaped key>-<n>.csv` (the key escaped as for state files, state_store.h), n =
// 1, 2, 3, ... per stream. Each daemon start opens the next n; a file is closed and the next one
// opened once it reaches rotate_bytes; then the oldest files beyond keep_files (0: keep all) are
// deleted. Feature columns are the stream's feature_names, with `,` `"` CR LF replaced by `_`;
// without names, or when a name would clash with another column, x1..xd.
// A write error closes the recording of that stream (reported once by Append's result) and a
// later Append tries a fresh file.
// Thread safety: not thread-safe; one recorder per stream, used by the stream's owner thread.
// Append allocates nothing in the steady state (a fixed buffer, written through stdio).
#pragma once

#include <cstdint>
#include <cstdio>
#include <span>
#include <string>
#include <string_view>
#include <vector>

namespace nuwatch {

class StreamRecorder {
 public:
  // Requires: dims >= 1; rotate_bytes >= 1; keep_files >= 0. No file is opened yet.
  StreamRecorder(std::string dir, std::string stream_key, int dims,
                 std::vector<std::string> feature_names, std::size_t rotate_bytes, int keep_files);
  ~StreamRecorder();
  StreamRecorder(const StreamRecorder&) = delete;
  StreamRecorder& operator=(const StreamRecorder&) = delete;

  // Appends one row. Requires: x.size() == dims. Returns "" or, when a write fails, an error
  // message naming the file (the file is closed; the next Append starts a new one).
  std::string Append(double time, std::span<const double> x);
  // Pushes buffered rows to the kernel (not an fsync). Returns "" or an error message.
  std::string Flush();

  void set_rotation(std::size_t rotate_bytes, int keep_files);
  const std::string& current_path() const { return path_; }

 private:
  std::string OpenNext();
  void DeleteOldFiles();
  std::vector<int64_t> ExistingNumbers() const;
  std::string PathOf(int64_t n) const;

  std::string dir_;
  std::string key_;
  std::string escaped_key_;
  int dims_;
  std::string header_;
  std::size_t rotate_bytes_;
  int keep_files_;
  std::FILE* file_ = nullptr;
  std::string path_;
  std::size_t bytes_ = 0;    // in the current file
  int64_t next_number_ = 0;  // 0: not yet scanned
  std::vector<char> line_;
};

}  // namespace nuwatch
