// Charts for the tuning report, written as PNG or SVG:
//  - line figures: a grid of panels (e.g. precision, recall and false alarms per day against nu),
//    each with named series, marked points, an optional labelled horizontal reference line;
//  - timelines: stacked panels sharing one time axis, each with a decision-value line, the zero
//  line
//    (the envelope boundary), shaded intervals (incident windows) and alarm marks.
// Colours come from the Okabe-Ito palette (Okabe & Ito, "Color Universal Design", 2008), which
// stays distinguishable under the common colour-vision deficiencies; series also differ by marker
// shape. Every figure has a white background; sizes are in pixels (SVG: width="…px"). Thread
// safety: every function is reentrant; concurrent calls must not write the same path.
#pragma once

#include <cstddef>
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

namespace nuwatch::charts {

enum class Format { kPng, kSvg };

// Format from the path's extension (".png" or ".svg", any case); nullopt for anything else.
std::optional<Format> FormatFromPath(std::string_view path);

// ---- Line figures ---------------------------------------------------------------------------

// One line. x and y have the same length; a non-finite y or x (or x <= 0 on a log axis) breaks the
// line there. Points are marked while the panel is not crowded (about one point per 8 px or
// fewer); a point with no drawable neighbour is always marked.
struct Series {
  std::string name;
  std::vector<double> x, y;
};

struct LinePanel {
  std::string title, x_label, y_label;  // units belong in the labels, e.g. "false alarms (per day)"
  bool log_x = false;
  std::vector<Series> series;
  std::optional<double> reference_y;  // a dashed horizontal line, e.g. the false-alarm budget
  std::string reference_label;        // written at the line's right end when not empty
  std::optional<std::pair<double, double>> y_range;  // fixed (low, high); default: data +- 5%
};

// Panels fill the rows x cols grid row by row. When every panel (two or more) has the same series
// names in the same order, one legend under the figure title serves them all; otherwise each panel
// carries its own legend in the corner that hides the fewest points.
struct LineFigure {
  std::string title;
  int rows = 1, cols = 1;
  std::vector<LinePanel> panels;
  int width = 1200, height = 700;
};

// Requires: rows, cols >= 1 and panels.size() <= rows * cols; 200 <= width, height <= 10000; each
// series' x and y of equal length; reference_y finite; y_range finite with low < high (wider
// than 1e-12 of its magnitude).
// Ensures: the image is written to path (replacing any file there).
// Throws std::runtime_error naming the path (and the panel and series) when a requirement fails or
// the file cannot be written.
void DrawLineFigure(const LineFigure& figure, const std::string& path, Format format);

// ---- Timelines ------------------------------------------------------------------------------

struct Interval {
  double start, end;  // same unit as TimelinePanel::t
};

// t is in seconds (since the Unix epoch when labelled in UTC), non-decreasing over its finite
// entries; a non-finite t or value breaks the line. When there are more points than pixel columns
// the line is drawn from each column's first, minimum, maximum and last value, so no spike is lost.
// Alarm marks are drawn as a rug along the bottom of the panel and as dots on the line.
struct TimelinePanel {
  std::string title;  // e.g. the stream name
  std::vector<double> t, value;
  std::vector<Interval> shaded;
  std::vector<double> marks;
  std::string y_label;
  std::optional<std::pair<double, double>> y_range;  // default: data and 0, +- 5%
};

enum class TimeLabels {
  kUtc,      // calendar ticks (e.g. every 6 h) labelled "HH:MM" with the date under the first tick
             // of each day
  kElapsed,  // time since the earliest t, in seconds, minutes, hours or days by the span
};

struct TimelineFigure {
  std::string title;
  std::vector<TimelinePanel> panels;  // stacked top to bottom, sharing the time axis
  int width = 1200;
  int panel_height = 220;  // the figure is TimelineFigureHeight() tall
  TimeLabels time_labels = TimeLabels::kUtc;
  std::string value_label = "decision value", zero_label = "envelope boundary (0)";
  std::string shaded_label = "incident", marks_label = "alarm";
};

// The height in pixels DrawTimelineFigure gives this figure: title and legend, the panels, the
// time axis.
int TimelineFigureHeight(const TimelineFigure& figure);

// Requires: 200 <= width <= 10000; 80 <= panel_height; height at most 20000; each panel's t and
// value of equal length, t non-decreasing; intervals and marks finite; y_range finite, low < high.
// Ensures and throws as DrawLineFigure.
void DrawTimelineFigure(const TimelineFigure& figure, const std::string& path, Format format);

// ---- Colours and ticks (public so that callers and tests can rely on them) -------------------

namespace okabe_ito {  // 0xRRGGBB
inline constexpr std::uint32_t kBlack = 0x000000, kOrange = 0xE69F00, kSkyBlue = 0x56B4E9,
                               kBluishGreen = 0x009E73, kYellow = 0xF0E442, kBlue = 0x0072B2,
                               kVermillion = 0xD55E00, kReddishPurple = 0xCC79A7;
}  // namespace okabe_ito

// Series i of every line panel: blue, orange, bluish green, vermillion, reddish purple, sky blue,
// yellow, then again (with another marker shape). Reference and zero lines are black.
std::uint32_t SeriesColour(std::size_t index);

// Timeline colours: the value line is blue; shaded intervals are orange at kShadeAlpha over the
// white background; alarm marks are vermillion.
inline constexpr std::uint32_t kTimelineValueColour = okabe_ito::kBlue;
inline constexpr std::uint32_t kShadeColour = okabe_ito::kOrange;
inline constexpr double kShadeAlpha = 0.3;
inline constexpr std::uint32_t kMarkColour = okabe_ito::kVermillion;

// Heckbert's nice number ("Nice numbers for graph labels", Graphics Gems, 1990): 1, 2, 5 or 10
// times a power of ten; the closest to x when round, else the smallest not below x.
// Requires x > 0 and finite.
double NiceNumber(double x, bool round);

// Tick positions: every multiple of step = NiceNumber((high - low) / (target_count - 1), true)
// within [low, high]; fraction_digits is what a label needs to show step exactly.
// Requires finite low < high and target_count >= 2 (throws std::invalid_argument otherwise).
struct Ticks {
  double step = 0;
  int fraction_digits = 0;
  std::vector<double> values;
};
Ticks LinearTicks(double low, double high, int target_count);

// ---- Reading images back --------------------------------------------------------------------

// A PNG decoded to 0xRRGGBB per pixel, row by row from the top, composited over white.
struct RasterImage {
  int width = 0, height = 0;
  std::vector<std::uint32_t> pixels;
  std::uint32_t At(int x, int y) const {
    return pixels[static_cast<std::size_t>(y) * static_cast<std::size_t>(width) +
                  static_cast<std::size_t>(x)];
  }
};

// Throws std::runtime_error naming the path when it cannot be read as a PNG.
RasterImage ReadPng(const std::string& path);

}  // namespace nuwatch::charts
