// The recorder when the file system refuses writes: rows stay whole (the file is cut back to its
// last whole row, the rest is counted as not recorded), the same file goes on once writes succeed,
// and a file that cannot be started never makes retention delete a recording.
//
// A refusing file system without root: RLIMIT_FSIZE (setrlimit(2), POSIX). A write that would
// pass the limit writes what fits and the next one fails with EFBIG ("File too large"), once
// SIGXFSZ is ignored, which is how a disk that fills up mid-write behaves with ENOSPC. The limit
// is the process's; each test restores it.
#include "service/recorder.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/resource.h>
#include <unistd.h>

#include <algorithm>
#include <csignal>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
namespace fs = std::filesystem;

class TempDir {
 public:
  TempDir() {
    path_ = fs::temp_directory_path() /
            ("nuwatch_recorder_test_" + std::to_string(::getpid()) + "_" + std::to_string(next_++));
    fs::remove_all(path_);
    fs::create_directories(path_);
  }
  ~TempDir() { fs::remove_all(path_); }
  std::string path() const { return path_.string(); }

 private:
  static inline int next_ = 0;
  fs::path path_;
};

// Files may grow to `bytes` while this lives.
class FileSizeLimit {
 public:
  explicit FileSizeLimit(std::size_t bytes) {
    ::getrlimit(RLIMIT_FSIZE, &saved_);
    previous_handler_ = std::signal(SIGXFSZ, SIG_IGN);
    rlimit limit = saved_;
    limit.rlim_cur = bytes;
    ok_ = ::setrlimit(RLIMIT_FSIZE, &limit) == 0;
  }
  ~FileSizeLimit() {
    ::setrlimit(RLIMIT_FSIZE, &saved_);
    std::signal(SIGXFSZ, previous_handler_);
  }
  bool ok() const { return ok_; }

 private:
  rlimit saved_{};
  void (*previous_handler_)(int) = SIG_DFL;
  bool ok_ = false;
};

std::string ReadText(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  std::ostringstream text;
  text << in.rdbuf();
  return text.str();
}

std::vector<std::string> Lines(const std::string& text) {
  std::vector<std::string> lines;
  std::istringstream in(text);
  for (std::string line; std::getline(in, line);) lines.push_back(line);
  return lines;
}

// Row i of the tests: time 1000 + i, features i + 0.125 and a longer number.
std::vector<double> Row(int i) { return {i + 0.125, 100.0 / 3.0 + i}; }

// Every data line is a whole row: "TIME,KEY,A,B" whose numbers strtod (the C library) reads
// back to row `first + k`'s values exactly (the recorder writes shortest round-trip numbers).
void ExpectWholeRows(const std::vector<std::string>& lines, int first) {
  for (std::size_t k = 1; k < lines.size(); ++k) {
    const int i = first + static_cast<int>(k) - 1;
    std::vector<std::string> fields;
    std::stringstream in(lines[k]);
    for (std::string field; std::getline(in, field, ',');) fields.push_back(field);
    ASSERT_EQ(fields.size(), 4u) << "line " << k << ": " << lines[k];
    EXPECT_EQ(std::strtod(fields[0].c_str(), nullptr), 1000.0 + i) << lines[k];
    EXPECT_EQ(fields[1], "pump-01");
    EXPECT_EQ(std::strtod(fields[2].c_str(), nullptr), Row(i)[0]) << lines[k];
    EXPECT_EQ(std::strtod(fields[3].c_str(), nullptr), Row(i)[1]) << lines[k];
  }
}

std::vector<std::string> RecordingFiles(const std::string& dir) {
  std::vector<std::string> names;
  for (const auto& entry : fs::directory_iterator(dir)) {
    names.push_back(entry.path().filename().string());
  }
  std::sort(names.begin(), names.end());
  return names;
}

TEST(StreamRecorder, ARowIsWrittenWholeOrNotAtAllAndTheSameFileGoesOn) {
  TempDir dir;
  StreamRecorder recorder(dir.path(), "pump-01", 2, {"pressure", "flow"}, 1 << 20, 0);
  int next = 0;
  for (; next < 3; ++next) ASSERT_EQ(recorder.Append(1000.0 + next, Row(next)), "");
  ASSERT_EQ(recorder.Flush(), "");
  const std::string path = recorder.current_path();
  const std::size_t before = fs::file_size(path);
  std::string error;
  {
    // Room for about two and a half more rows (each about 40 bytes).
    FileSizeLimit limit(before + 100);
    ASSERT_TRUE(limit.ok());
    for (; next < 13; ++next) ASSERT_EQ(recorder.Append(1000.0 + next, Row(next)), "");
    error = recorder.Flush();
  }
  EXPECT_THAT(error, HasSubstr(path + ": write failed: File too large"));
  const std::string text = ReadText(path);
  ASSERT_FALSE(text.empty());
  EXPECT_EQ(text.back(), '\n') << "the file ends inside a row";
  const std::vector<std::string> lines = Lines(text);
  const int kept = static_cast<int>(lines.size()) - 1 - 3;  // rows of the refused flush kept
  EXPECT_GE(kept, 1);
  EXPECT_LT(kept, 10);
  EXPECT_THAT(error, HasSubstr("; " + std::to_string(10 - kept) + " rows not recorded"));
  EXPECT_LE(text.size(), before + 100);
  // Space is back: the next rows follow the kept ones in the same file, each whole.
  for (int i = 0; i < 3; ++i) ASSERT_EQ(recorder.Append(2000.0 + i, Row(100 + i)), "");
  ASSERT_EQ(recorder.Flush(), "");
  EXPECT_EQ(recorder.current_path(), path);
  EXPECT_EQ(RecordingFiles(dir.path()), std::vector<std::string>{"pump-01-1.csv"});
  const std::vector<std::string> after = Lines(ReadText(path));
  ASSERT_EQ(after.size(), lines.size() + 3);
  EXPECT_EQ(after[0], "time,stream,pressure,flow");
  ExpectWholeRows(std::vector<std::string>(after.begin(), after.end() - 3), 0);
  std::vector<std::string> tail = {after[0]};
  tail.insert(tail.end(), after.end() - 3, after.end());
  for (int i = 0; i < 3; ++i) {
    EXPECT_THAT(tail[1 + i], HasSubstr(std::to_string(2000 + i) + ",pump-01,"));
  }
}

TEST(StreamRecorder, RetentionDeletesNothingWhileNoNewFileCanBeStarted) {
  TempDir dir;
  // Rotates after every row or two; keeps 2 files.
  StreamRecorder recorder(dir.path(), "pump-01", 2, {}, 60, 2);
  int next = 0;
  while (RecordingFiles(dir.path()).size() < 2 ||
         recorder.current_path().find("-2.csv") == std::string::npos) {
    ASSERT_EQ(recorder.Append(1000.0 + next, Row(next)), "");
    ++next;
    ASSERT_LT(next, 20);
  }
  ASSERT_EQ(recorder.Flush(), "");
  const std::vector<std::string> kept = {"pump-01-1.csv", "pump-01-2.csv"};
  ASSERT_EQ(RecordingFiles(dir.path()), kept);
  const std::string first = ReadText(dir.path() + "/pump-01-1.csv");
  {
    // Not even a header fits in a new file now (the header "time,stream,x1,x2\n" has 18 bytes).
    FileSizeLimit limit(10);
    ASSERT_TRUE(limit.ok());
    int failures = 0;
    for (int i = 0; i < 20; ++i, ++next) {
      failures += recorder.Append(1000.0 + next, Row(next)).empty() ? 0 : 1;
    }
    failures += recorder.Flush().empty() ? 0 : 1;
    EXPECT_GE(failures, 1);
    // The old code opened a new file at each attempt and deleted the oldest each time.
    EXPECT_EQ(RecordingFiles(dir.path()), kept) << "a recording was deleted, or an empty file left";
    EXPECT_EQ(ReadText(dir.path() + "/pump-01-1.csv"), first);
  }
  // Space is back: the next file starts (its number not skipped), and only then does the oldest go.
  ASSERT_EQ(recorder.Append(1000.0 + next, Row(next)), "");
  ASSERT_EQ(recorder.Flush(), "");
  const std::vector<std::string> now = RecordingFiles(dir.path());
  ASSERT_EQ(now.size(), 2u);
  EXPECT_EQ(now[0], "pump-01-2.csv");
  EXPECT_EQ(now[1], "pump-01-3.csv");
}

}  // namespace
}  // namespace nuwatch
