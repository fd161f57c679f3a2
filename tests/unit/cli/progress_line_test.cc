// Tests of the terminal progress line (cli/progress_line.h): what reaches the terminal, byte for
// byte, under an injected clock. The conventions it is held to are those of a terminal (ECMA-48:
// carriage return moves to the start of the line, a blank overwrites a cell) and common practice
// for progress output: redrawn in place a few times a second, erased before the output that
// follows, and nothing at all when the output is not a terminal.
#include "cli/progress_line.h"

#include <gtest/gtest.h>

#include <chrono>
#include <cstdio>
#include <string>

namespace nuwatch::cli {
namespace {

using std::chrono::milliseconds;
using Clock = ProgressLine::Clock;

// What was written to a memory stream.
class Captured {
 public:
  Captured() : file_(open_memstream(&data_, &size_)) {}
  ~Captured() {
    std::fclose(file_);
    std::free(data_);
  }
  std::FILE* file() const { return file_; }
  std::string text() {
    std::fflush(file_);
    return std::string(data_, size_);
  }

 private:
  char* data_ = nullptr;
  std::size_t size_ = 0;
  std::FILE* file_;
};

// What a terminal shows on the line after `bytes`: each \r goes back to column 0, each other byte
// overwrites its cell (ECMA-48 carriage return; no line feed ever written).
std::string Screen(const std::string& bytes) {
  std::string line;
  std::size_t column = 0;
  for (const char c : bytes) {
    if (c == '\r') {
      column = 0;
      continue;
    }
    if (column < line.size()) {
      line[column] = c;
    } else {
      line += c;
    }
    ++column;
  }
  while (!line.empty() && line.back() == ' ') line.pop_back();
  return line;
}

TEST(ProgressLine, DrawsAtMostOncePerInterval) {
  Captured out;
  ProgressLine line(out.file(), true, milliseconds(250));
  const Clock::time_point t0{};
  EXPECT_TRUE(line.Due(t0));  // the first draw is due at once
  line.Draw("a 1", t0);
  EXPECT_FALSE(line.Due(t0 + milliseconds(249)));
  line.Draw("a 2", t0 + milliseconds(249));  // too soon: not written
  EXPECT_TRUE(line.Due(t0 + milliseconds(250)));
  line.Draw("a 3", t0 + milliseconds(250));
  EXPECT_EQ(out.text(), "\ra 1\ra 3");
  // Ten thousand updates in one second reach the terminal five times (t = 0, 250, ... 1000 ms).
  Captured many;
  ProgressLine busy(many.file(), true, milliseconds(250));
  int writes = 0;
  for (int i = 0; i <= 10000; ++i) {
    const auto now = t0 + std::chrono::microseconds(i * 100);
    if (busy.Due(now)) ++writes;
    busy.Draw("x", now);
  }
  EXPECT_EQ(writes, 5);
  EXPECT_EQ(many.text(), "\rx\rx\rx\rx\rx");
}

TEST(ProgressLine, AShorterLineCoversTheLongerOneBeforeIt) {
  Captured out;
  ProgressLine line(out.file(), true, milliseconds(0));
  line.Draw("12345 rows", Clock::time_point{});
  line.Draw("99 rows", Clock::time_point{} + milliseconds(1));
  EXPECT_EQ(Screen(out.text()), "99 rows");
}

TEST(ProgressLine, ClearLeavesABlankLineAndTheCursorAtItsStart) {
  Captured out;
  {
    ProgressLine line(out.file(), true, milliseconds(0));
    line.Draw("replay: 4096 / 8192 rows", Clock::time_point{});
    line.Clear();
    EXPECT_EQ(Screen(out.text()), "");
    EXPECT_EQ(out.text().back(), '\r');  // what follows starts at column 0
    line.Clear();                        // nothing shown: nothing written
    EXPECT_EQ(out.text(), "\rreplay: 4096 / 8192 rows\r" + std::string(24, ' ') + "\r");
    line.Draw("again", Clock::time_point{});  // due at once after a Clear
  }
  // The destructor erased the line still shown.
  EXPECT_EQ(Screen(out.text()), "");
}

TEST(ProgressLine, WritesNothingWhenNotATerminal) {
  Captured out;
  {
    ProgressLine line(out.file(), false);
    EXPECT_FALSE(line.enabled());
    EXPECT_FALSE(line.Due(Clock::time_point{}));
    line.Draw("anything", Clock::time_point{});
    line.Clear();
  }
  EXPECT_EQ(out.text(), "");
}

}  // namespace
}  // namespace nuwatch::cli
