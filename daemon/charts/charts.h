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
// the line is drawn from each column's minimum and maximum (DecimateToColumns), so no spike is
// lost and the drawing holds O(width) vertices. Alarm marks are drawn as a rug
// along the bottom of the panel and as dots on the line, every one of them (never decimated).
// Without y_range the value axis is RobustValueRange(values, 0): a rare deep dip or spike does
// not squash the rest; values beyond the axis are drawn at its edge and marked there with a
// triangle pointing the way they go (the legend says so).
struct TimelinePanel {
  std::string title;  // e.g. the stream name
  std::vector<double> t, value;
  std::vector<Interval> shaded;
  std::vector<double> marks;
  // Spans in which the detector was still learning (no decision value yet): a grey band labelled
  // with TimelineFigure::learning_label, so that the gap in the line is explained.
  std::vector<Interval> learning;
  std::string y_label;
  std::optional<std::pair<double, double>> y_range;  // default: RobustValueRange(value, 0)
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
  std::string learning_label = "learning";  // the protocol's name for the state before scoring
  std::string clipped_label = "beyond the axis (drawn at its edge)";
};

// The height in pixels DrawTimelineFigure gives this figure: title and legend, the panels, the
// time axis.
int TimelineFigureHeight(const TimelineFigure& figure);

// Requires: 200 <= width <= 10000; 80 <= panel_height; height at most 20000; each panel's t and
// value of equal length, t non-decreasing; intervals (shaded and learning) and marks finite;
// y_range finite, low < high.
// Ensures as DrawLineFigure; every axis has at least 3 tick labels; an SVG's <desc> holds the
// panel titles and the key ("...; key: decision value, ..."), since cairo writes words as glyph
// outlines. Throws as DrawLineFigure.
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
// Learning spans: a neutral grey (neither data nor incident) at kLearningAlpha over white; the
// triangles marking values beyond the y axis are black.
inline constexpr std::uint32_t kLearningColour = 0x999999;
inline constexpr double kLearningAlpha = 0.5;
inline constexpr std::uint32_t kClippedColour = okabe_ito::kBlack;

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

// LinearTicks, with the step then lowered through the 1-2-5 sequence (5 -> 2 -> 1 -> 0.5 ...)
// until at least min_count ticks fall within [low, high], so that no axis shows a single label.
// Requires as LinearTicks, and 1 <= min_count <= 100. Ensures values.size() >= min_count.
Ticks LinearTicksAtLeast(double low, double high, int target_count, int min_count);

// A time axis over [low, high] seconds: values (seconds) and labels, plus second_labels (the
// date under the first tick of each day; empty when unused).
//  - kUtc: steps of 1, 2, 5, 10, 15, 30 s, 1, 2, 5, 10, 15, 30 min, 1, 2, 3, 6, 12 h, 1, 2, 7,
//    14 days (then nice multiples of a day), the largest giving about target_count ticks, ticks
//    on whole multiples of the step since the epoch (so on UTC midnights, whole hours, ...);
//  - kElapsed: LinearTicksAtLeast over the span in seconds, minutes, hours or days.
// Requires finite low < high and target_count >= 3 (std::invalid_argument otherwise).
// Ensures at least 3 ticks (a span under 2 s falls back to sub-second ticks).
struct TimeTicks {
  std::vector<double> values;
  std::vector<std::string> labels, second_labels;
};
TimeTicks TimeAxisTicks(double low, double high, int target_count, TimeLabels style);

// The y range of a ratio panel (precision, recall, F1; all in [0, 1]): from 0 up to Heckbert's
// loose upper label for [0, max] with 5 ticks (step d = NiceNumber(NiceNumber(max, false) / 4,
// true); top = the first multiple of d at or above max), widened by 3% of top at both ends so
// that markers at 0 and at the top stay whole. Non-finite values are ignored; with no positive
// value the range is that of [0, 1]. So small ratios fill the panel and 0 always shows.
std::pair<double, double> RatioAxisRange(const std::vector<double>& values);

// A value range that rare extremes do not dictate. The 0.5% and 99.5% quantiles of the finite
// values (linear interpolation between order statistics, Hyndman & Fan's type 7), together with
// always_shown, padded by 5% of their span; but when every value lies within half that span of
// it, the full range (all values and always_shown, +- 5%) instead, so that nothing is cut for
// little gain. clipped says whether some value lies outside [low, high]. With no finite value:
// (-1, 1), not clipped.
struct ValueRange {
  double low = -1, high = 1;
  bool clipped = false;
};
ValueRange RobustValueRange(const std::vector<double>& values, double always_shown);

// Min/max decimation per pixel column (Jugel et al., "M4: a visualization-oriented time series
// data aggregation", VLDB 2014, call it MinMax; their M4 also keeps each column's first and last
// point, which makes the joins between columns exact but doubles the output). The points (x, y),
// x non-decreasing over finite entries, are grouped by the column floor(x); each column keeps its
// lowest and highest point, in the order they came (one point when they are the same). A
// non-finite x or y ends a run: the result holds a NaN point there (a break in the line).
// Ensures: at most 2 points per column and run, so O(columns) points; every column's vertical
// extent survives, so a line through the result covers each column from its minimum to its
// maximum, as a line through every point does (only the short joins between neighbouring
// columns may differ).
struct Point {
  double x = 0, y = 0;
};
std::vector<Point> DecimateToColumns(const std::vector<Point>& points);

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
