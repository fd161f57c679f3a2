#include "cli/progress_line.h"

#include <unistd.h>

#include <utility>

namespace nuwatch::cli {

ProgressLine::ProgressLine(std::FILE* out, bool enabled, Clock::duration interval)
    : out_(out), enabled_(enabled && out != nullptr), interval_(interval) {}

ProgressLine ProgressLine::ForStderr() {
  return ProgressLine(stderr, ::isatty(STDERR_FILENO) == 1);
}

ProgressLine::~ProgressLine() { Clear(); }

ProgressLine::ProgressLine(ProgressLine&& other) noexcept
    : out_(other.out_),
      enabled_(other.enabled_),
      interval_(other.interval_),
      drawn_once_(other.drawn_once_),
      last_draw_(other.last_draw_),
      shown_width_(std::exchange(other.shown_width_, 0)),
      buffer_(std::move(other.buffer_)) {
  other.enabled_ = false;
}

bool ProgressLine::Due(Clock::time_point now) const {
  return enabled_ && (!drawn_once_ || now - last_draw_ >= interval_);
}

void ProgressLine::Draw(std::string_view text, Clock::time_point now) {
  if (!Due(now)) return;
  buffer_.clear();
  buffer_ += '\r';
  buffer_.append(text);
  // Blanks over the tail of a longer line drawn before.
  if (text.size() < shown_width_) buffer_.append(shown_width_ - text.size(), ' ');
  std::fwrite(buffer_.data(), 1, buffer_.size(), out_);
  std::fflush(out_);
  shown_width_ = text.size();
  drawn_once_ = true;
  last_draw_ = now;
}

void ProgressLine::Clear() {
  if (!enabled_ || shown_width_ == 0) return;
  buffer_.clear();
  buffer_ += '\r';
  buffer_.append(shown_width_, ' ');
  buffer_ += '\r';
  std::fwrite(buffer_.data(), 1, buffer_.size(), out_);
  std::fflush(out_);
  shown_width_ = 0;
  drawn_once_ = false;
}

}  // namespace nuwatch::cli
