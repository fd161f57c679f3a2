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
// A row is in the file whole or not at all: rows are buffered whole and written with pwrite at the
// end of the last whole row; when a write fails part-way (a full disk), the file is cut back to
// its last whole row, the rows that did not fit are dropped and counted in the error, and the
// same file goes on once writes succeed again. A new file (at start-up or rotation) counts only
// once its header is written; only then are old files deleted, so failures never make retention
// delete a recording early (a file that could not be started is removed and its number reused).
// Thread safety: not thread-safe; one recorder per stream, used by the stream's owner thread.
// Append allocates nothing in the steady state (a fixed buffer).
#pragma once

#include <cstdint>
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
  // Writes what is buffered (an error is lost: call Flush first to see it) and closes the file.
  ~StreamRecorder();
  StreamRecorder(const StreamRecorder&) = delete;
  StreamRecorder& operator=(const StreamRecorder&) = delete;

  // Appends one row (buffered). Requires: x.size() == dims. Returns "" or, when the buffer had to
  // be written and that failed, or a file could not be started, an error message naming the file
  // and how many rows were dropped (this one included when it could not be kept).
  std::string Append(double time, std::span<const double> x);
  // Writes the buffered rows to the kernel (not an fsync). Returns "" or an error message naming
  // the file and the rows dropped; the file then ends at its last whole row.
  std::string Flush();

  void set_rotation(std::size_t rotate_bytes, int keep_files);
  const std::string& current_path() const { return path_; }

 private:
  std::string OpenNext();
  void Close();
  // Writes buffer_[0, buffered_) at written_; on failure cuts the file back to its last whole
  // row and returns the error.
  std::string WriteBuffer();
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
  int fd_ = -1;
  std::string path_;
  std::size_t written_ = 0;   // bytes of the current file that are whole rows (and the header)
  std::size_t buffered_ = 0;  // bytes of whole rows in buffer_, not yet written
  int64_t next_number_ = 0;   // 0: not yet scanned
  std::vector<char> line_;
  std::vector<char> buffer_;
};

}  // namespace nuwatch
