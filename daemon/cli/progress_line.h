// One line of progress on a terminal: redrawn in place with a carriage return, at most once per
// interval, and erased at the end, so that the summary that follows starts on a clean line.
// Drawn only when its output is a terminal (ProgressLine::ForStderr): a script or a test reading
// stderr sees no progress at all.
// Thread safety: a ProgressLine is used by one thread.
#pragma once

#include <chrono>
#include <cstddef>
#include <cstdio>
#include <string>
#include <string_view>

namespace nuwatch::cli {

class ProgressLine {
 public:
  using Clock = std::chrono::steady_clock;
  // A few redraws a second: fast enough to look alive, slow enough to cost nothing and to leave
  // the line readable.
  static constexpr Clock::duration kDefaultInterval = std::chrono::milliseconds(250);

  // Draws on `out` when `enabled`, else does nothing at all. The first Draw is due at once.
  ProgressLine(std::FILE* out, bool enabled, Clock::duration interval = kDefaultInterval);
  // On stderr, enabled only when stderr is a terminal (isatty).
  static ProgressLine ForStderr();
  // Erases a line still shown.
  ~ProgressLine();
  ProgressLine(ProgressLine&&) noexcept;
  ProgressLine& operator=(ProgressLine&&) = delete;
  ProgressLine(const ProgressLine&) = delete;
  ProgressLine& operator=(const ProgressLine&) = delete;

  bool enabled() const { return enabled_; }

  // Ensures: true when enabled and nothing was drawn yet or at least the interval passed since
  // the last draw at `now`. Cheap: callers build the text only when this holds.
  bool Due(Clock::time_point now) const;

  // Requires: `text` holds no line break. Ensures: when Due(now), `text` replaces the line shown
  // ("\r" + text, padded with blanks over what was longer before) and `now` is the last draw;
  // otherwise nothing is written.
  void Draw(std::string_view text, Clock::time_point now);

  // Ensures: a line shown is overwritten with blanks and the cursor is back at its start; the
  // next Draw is due at once. Nothing is written when no line is shown.
  void Clear();

 private:
  std::FILE* out_;
  bool enabled_;
  Clock::duration interval_;
  bool drawn_once_ = false;
  Clock::time_point last_draw_{};
  std::size_t shown_width_ = 0;  // bytes of the line on the terminal; 0: none shown
  std::string buffer_;           // reused: one write per draw
};

}  // namespace nuwatch::cli
