#include "charts/charts.h"

#include <cairo-svg.h>
#include <cairo.h>

#include <algorithm>
#include <array>
#include <cctype>
#include <cerrno>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <ctime>
#include <fstream>
#include <limits>
#include <numbers>
#include <stdexcept>
#include <tuple>

namespace nuwatch::charts {
namespace {

// Beyond this a value is treated as missing: it could not be mapped to pixels meaningfully anyway.
constexpr double kLargestDrawable = 1e300;

constexpr std::uint32_t kWhite = 0xFFFFFF, kTextColour = 0x222222, kAxisColour = 0x555555,
                        kGridColour = 0xDEDEDE, kNoteColour = 0x777777;
constexpr std::uint32_t kReferenceColour = okabe_ito::kBlack;

struct Font {
  double size;
  bool bold = false;
};
constexpr Font kTitleFont{20, true}, kPanelTitleFont{15, true}, kTimelinePanelTitleFont{14, true},
    kAxisLabelFont{13}, kTickFont{12}, kLegendFont{13}, kPanelLegendFont{12}, kNoteFont{13};

constexpr double kMarkerRadius = 4.5;
constexpr double kSeriesLineWidth = 2.0;
constexpr double kTimelineLineWidth = 1.2;
constexpr double kTickLength = 5;
constexpr double kLegendRowHeight = 22;
constexpr double kLegendSampleWidth = 30;

std::string Quoted(const std::string& text) { return "\"" + text + "\""; }

[[noreturn]] void Fail(const std::string& path, const std::string& what) {
  throw std::runtime_error("chart '" + path + "': " + what);
}

// cairo rejects (and stops drawing after) text that is not valid UTF-8, and names come from user
// files, so anything invalid becomes '?'.
std::string SanitiseUtf8(const std::string& text) {
  std::string out;
  out.reserve(text.size());
  std::size_t i = 0;
  while (i < text.size()) {
    const auto lead = static_cast<unsigned char>(text[i]);
    int length = 0;
    std::uint32_t code = 0;
    if (lead < 0x80) {
      length = 1;
      code = lead;
    } else if ((lead & 0xE0) == 0xC0) {
      length = 2;
      code = lead & 0x1F;
    } else if ((lead & 0xF0) == 0xE0) {
      length = 3;
      code = lead & 0x0F;
    } else if ((lead & 0xF8) == 0xF0) {
      length = 4;
      code = lead & 0x07;
    }
    bool valid = length > 0 && i + static_cast<std::size_t>(length) <= text.size();
    for (int k = 1; valid && k < length; ++k) {
      const auto next = static_cast<unsigned char>(text[i + static_cast<std::size_t>(k)]);
      valid = (next & 0xC0) == 0x80;
      code = (code << 6) | (next & 0x3F);
    }
    static constexpr std::array<std::uint32_t, 5> kSmallest = {0, 0, 0x80, 0x800, 0x10000};
    if (valid) {
      valid = code >= kSmallest[static_cast<std::size_t>(length)] && code <= 0x10FFFF &&
              !(code >= 0xD800 && code <= 0xDFFF) && code != 0;
    }
    if (valid) {
      out.append(text, i, static_cast<std::size_t>(length));
      i += static_cast<std::size_t>(length);
    } else {
      out.push_back('?');
      ++i;
    }
  }
  return out;
}

std::string XmlEscape(const std::string& text) {
  std::string out;
  for (char c : SanitiseUtf8(text)) {
    switch (c) {
      case '&':
        out += "&amp;";
        break;
      case '<':
        out += "&lt;";
        break;
      case '>':
        out += "&gt;";
        break;
      case '"':
        out += "&quot;";
        break;
      default:
        // XML 1.0 allows no control characters besides tab, newline and carriage return.
        if (static_cast<unsigned char>(c) >= 0x20 || c == '\t' || c == '\n' || c == '\r') {
          out.push_back(c);
        }
    }
  }
  return out;
}

// ---- Drawing primitives ---------------------------------------------------------------------

void SetColour(cairo_t* cr, std::uint32_t rgb, double alpha = 1.0) {
  cairo_set_source_rgba(cr, ((rgb >> 16) & 0xFF) / 255.0, ((rgb >> 8) & 0xFF) / 255.0,
                        (rgb & 0xFF) / 255.0, alpha);
}

struct Rect {
  double x = 0, y = 0, w = 0, h = 0;
  double Right() const { return x + w; }
  double Bottom() const { return y + h; }
  bool Contains(double px, double py) const {
    return px >= x && px <= Right() && py >= y && py <= Bottom();
  }
};

void UseFont(cairo_t* cr, Font font) {
  cairo_select_font_face(cr, "sans-serif", CAIRO_FONT_SLANT_NORMAL,
                         font.bold ? CAIRO_FONT_WEIGHT_BOLD : CAIRO_FONT_WEIGHT_NORMAL);
  cairo_set_font_size(cr, font.size);
}

double TextWidth(cairo_t* cr, const std::string& text, Font font) {
  UseFont(cr, font);
  cairo_text_extents_t extents;
  cairo_text_extents(cr, SanitiseUtf8(text).c_str(), &extents);
  return extents.x_advance;
}

cairo_font_extents_t FontExtents(cairo_t* cr, Font font) {
  UseFont(cr, font);
  cairo_font_extents_t extents;
  cairo_font_extents(cr, &extents);
  return extents;
}

double LineHeight(cairo_t* cr, Font font) {
  const cairo_font_extents_t extents = FontExtents(cr, font);
  return extents.ascent + extents.descent;
}

// Shortens text with an ellipsis until it fits max_width.
std::string Fit(cairo_t* cr, const std::string& raw, Font font, double max_width) {
  std::string text = SanitiseUtf8(raw);
  if (TextWidth(cr, text, font) <= max_width) return text;
  static const std::string kEllipsis = "\u2026";
  while (!text.empty()) {
    do {
      text.pop_back();
    } while (!text.empty() && (static_cast<unsigned char>(text.back()) & 0xC0) == 0x80);
    if (!text.empty()) text.pop_back();  // the lead byte of the last code point
    if (TextWidth(cr, text + kEllipsis, font) <= max_width) return text + kEllipsis;
  }
  return "";
}

enum class HAlign { kLeft, kCentre, kRight };
enum class VAlign { kTop, kMiddle, kBottom };

// Draws text anchored at (x, y); vertical anchors use the font's ascent and descent so that labels
// of a row share a baseline. rotated turns the text to read bottom to top.
void DrawText(cairo_t* cr, const std::string& raw, double x, double y, Font font,
              std::uint32_t colour, HAlign h, VAlign v, bool rotated = false) {
  if (raw.empty()) return;
  const std::string text = SanitiseUtf8(raw);
  const cairo_font_extents_t font_extents = FontExtents(cr, font);
  cairo_text_extents_t extents;
  cairo_text_extents(cr, text.c_str(), &extents);
  const double dx = h == HAlign::kLeft     ? 0
                    : h == HAlign::kCentre ? -extents.x_advance / 2
                                           : -extents.x_advance;
  const double dy = v == VAlign::kTop      ? font_extents.ascent
                    : v == VAlign::kMiddle ? (font_extents.ascent - font_extents.descent) / 2
                                           : -font_extents.descent;
  cairo_save(cr);
  cairo_translate(cr, x, y);
  if (rotated) cairo_rotate(cr, -std::numbers::pi / 2);
  SetColour(cr, colour);
  cairo_move_to(cr, dx, dy);
  cairo_show_text(cr, text.c_str());
  cairo_new_path(cr);
  cairo_restore(cr);
}

// Text on a translucent white box, for labels that sit on top of data.
void DrawTextOnBox(cairo_t* cr, const std::string& text, double x, double y, Font font,
                   std::uint32_t colour, HAlign h, VAlign v) {
  if (text.empty()) return;
  const double width = TextWidth(cr, text, font);
  const double height = LineHeight(cr, font);
  const double left = h == HAlign::kLeft ? x : h == HAlign::kCentre ? x - width / 2 : x - width;
  const double top = v == VAlign::kTop ? y : v == VAlign::kMiddle ? y - height / 2 : y - height;
  SetColour(cr, kWhite, 0.85);
  cairo_rectangle(cr, left - 3, top - 1, width + 6, height + 2);
  cairo_fill(cr);
  DrawText(cr, text, x, y, font, colour, h, v);
}

// Device pixel centre for a 1 px line, pixel edge for a 2 px line: crisp, and of the exact colour.
double SnapOdd(double p) { return std::floor(p) + 0.5; }
double SnapEven(double p) { return std::round(p); }

void MarkerPath(cairo_t* cr, std::size_t shape, double x, double y, double r) {
  switch (shape % 5) {
    case 0:
      cairo_new_sub_path(cr);
      cairo_arc(cr, x, y, r, 0, 2 * std::numbers::pi);
      break;
    case 1:
      cairo_rectangle(cr, x - 0.85 * r, y - 0.85 * r, 1.7 * r, 1.7 * r);
      break;
    case 2:
      cairo_move_to(cr, x, y - 1.15 * r);
      cairo_line_to(cr, x + r, y + 0.6 * r);
      cairo_line_to(cr, x - r, y + 0.6 * r);
      cairo_close_path(cr);
      break;
    case 3:
      cairo_move_to(cr, x, y - 1.2 * r);
      cairo_line_to(cr, x + r, y);
      cairo_line_to(cr, x, y + 1.2 * r);
      cairo_line_to(cr, x - r, y);
      cairo_close_path(cr);
      break;
    default:
      cairo_move_to(cr, x, y + 1.15 * r);
      cairo_line_to(cr, x + r, y - 0.6 * r);
      cairo_line_to(cr, x - r, y - 0.6 * r);
      cairo_close_path(cr);
      break;
  }
}

void DrawMarker(cairo_t* cr, std::size_t shape, double x, double y, std::uint32_t colour,
                double r = kMarkerRadius) {
  MarkerPath(cr, shape, x, y, r);
  SetColour(cr, colour);
  cairo_fill_preserve(cr);
  SetColour(cr, kWhite);
  cairo_set_line_width(cr, 1);
  cairo_stroke(cr);
}

// ---- Output ---------------------------------------------------------------------------------

cairo_status_t AppendToString(void* closure, const unsigned char* data, unsigned int length) {
  static_cast<std::string*>(closure)->append(reinterpret_cast<const char*>(data), length);
  return CAIRO_STATUS_SUCCESS;
}

void WriteFile(const std::string& path, const std::string& bytes) {
  std::ofstream out(path, std::ios::binary | std::ios::trunc);
  if (!out) Fail(path, std::string("cannot open for writing: ") + std::strerror(errno));
  out.write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
  out.close();
  if (out.fail()) Fail(path, std::string("cannot write: ") + std::strerror(errno));
}

// cairo draws text as glyph outlines, so the SVG gets the figure's words in <title> and <desc>
// (the document's accessible name and description).
std::string AddSvgTitle(const std::string& svg, const std::string& title,
                        const std::string& description) {
  if (title.empty() && description.empty()) return svg;
  const std::size_t root = svg.find("<svg");
  const std::size_t root_end = root == std::string::npos ? root : svg.find('>', root);
  if (root_end == std::string::npos) return svg;
  std::string inserted = "\n";
  if (!title.empty()) inserted += "<title>" + XmlEscape(title) + "</title>\n";
  if (!description.empty()) inserted += "<desc>" + XmlEscape(description) + "</desc>\n";
  return svg.substr(0, root_end + 1) + inserted + svg.substr(root_end + 1);
}

// One figure being drawn: the surface, its context and where the result goes.
class Canvas {
 public:
  Canvas(int width, int height, Format format, std::string path)
      : format_(format), path_(std::move(path)) {
    if (format_ == Format::kPng) {
      surface_ = cairo_image_surface_create(CAIRO_FORMAT_RGB24, width, height);
    } else {
      surface_ = cairo_svg_surface_create_for_stream(&AppendToString, &svg_, width, height);
      cairo_svg_surface_set_document_unit(surface_, CAIRO_SVG_UNIT_PX);
    }
    cr_ = cairo_create(surface_);
    if (cairo_status(cr_) != CAIRO_STATUS_SUCCESS) {
      Fail(path_, std::string("cannot create the drawing surface: ") +
                      cairo_status_to_string(cairo_status(cr_)));
    }
    SetColour(cr_, kWhite);
    cairo_paint(cr_);
  }
  Canvas(const Canvas&) = delete;
  Canvas& operator=(const Canvas&) = delete;
  ~Canvas() {
    if (cr_ != nullptr) cairo_destroy(cr_);
    cairo_surface_destroy(surface_);
  }

  cairo_t* cr() const { return cr_; }

  void Save(const std::string& title, const std::string& description) {
    if (cairo_status(cr_) != CAIRO_STATUS_SUCCESS) {
      Fail(path_, std::string("drawing failed: ") + cairo_status_to_string(cairo_status(cr_)));
    }
    std::string bytes;
    cairo_status_t status;
    if (format_ == Format::kPng) {
      cairo_surface_flush(surface_);
      status = cairo_surface_write_to_png_stream(surface_, &AppendToString, &bytes);
    } else {
      cairo_destroy(cr_);
      cr_ = nullptr;
      cairo_surface_finish(surface_);  // completes the SVG stream
      status = cairo_surface_status(surface_);
      bytes = AddSvgTitle(svg_, title, description);
    }
    if (status != CAIRO_STATUS_SUCCESS) {
      Fail(path_, std::string("cannot encode the image: ") + cairo_status_to_string(status));
    }
    WriteFile(path_, bytes);
  }

 private:
  Format format_;
  std::string path_;
  std::string svg_;
  cairo_surface_t* surface_ = nullptr;
  cairo_t* cr_ = nullptr;
};

// A context for measuring text only, so that layouts do not depend on the output format.
class Measurer {
 public:
  Measurer() : surface_(cairo_image_surface_create(CAIRO_FORMAT_RGB24, 1, 1)) {
    cr_ = cairo_create(surface_);
  }
  Measurer(const Measurer&) = delete;
  Measurer& operator=(const Measurer&) = delete;
  ~Measurer() {
    cairo_destroy(cr_);
    cairo_surface_destroy(surface_);
  }
  cairo_t* cr() const { return cr_; }

 private:
  cairo_surface_t* surface_;
  cairo_t* cr_;
};

// ---- Scales and ticks -----------------------------------------------------------------------

struct Extent {
  double low = std::numeric_limits<double>::infinity();
  double high = -std::numeric_limits<double>::infinity();
  void Add(double v) {
    low = std::min(low, v);
    high = std::max(high, v);
  }
  bool Empty() const { return !(low <= high); }
};

bool Finite(double v) { return std::isfinite(v) && std::fabs(v) <= kLargestDrawable; }

struct Axis {
  double low = 0, high = 1;
  bool log = false;
  double pixel_low = 0, pixel_high = 1;  // where low and high land

  bool Drawable(double v) const { return Finite(v) && (!log || v > 0); }
  double Scaled(double v) const { return log ? std::log10(v) : v; }
  double Map(double v) const {
    const double a = Scaled(low), b = Scaled(high);
    const double p = pixel_low + (Scaled(v) - a) / (b - a) * (pixel_high - pixel_low);
    // cairo's fixed-point coordinates overflow far outside the image.
    return std::clamp(p, -1e5, 1e5);
  }
};

// The data range with 5% margins (so markers at the ends stay inside); a single value gets a
// range around it.
std::pair<double, double> PaddedRange(const Extent& extent, bool log) {
  if (extent.Empty()) return log ? std::pair{1.0, 10.0} : std::pair{0.0, 1.0};
  double a = log ? std::log10(extent.low) : extent.low;
  double b = log ? std::log10(extent.high) : extent.high;
  const double span = b - a;
  if (!(span > 1e-12 * std::max(std::fabs(a), std::fabs(b))) || !(span > 1e-200)) {
    const double half = log ? 0.3 : (std::fabs(a) < 1e-200 ? 1.0 : std::fabs(a) * 0.1);
    a -= half;
    b += half;
  } else {
    a -= 0.05 * span;
    b += 0.05 * span;
  }
  if (log) {
    // Within 10^-300 .. 10^300: a denormal low end would round to 0 on the way back.
    a = std::clamp(a, -300.0, 299.0);
    b = std::clamp(b, a + 1e-3, 300.0);
    return {std::pow(10.0, a), std::pow(10.0, b)};
  }
  return {a, b};
}

struct AxisTicks {
  std::vector<double> values;
  std::vector<std::string> labels;
  std::vector<std::string> second_labels;  // a second line under some labels (dates); or empty
};

std::string Printf(const char* format, double value, int precision) {
  char buffer[64];
  std::snprintf(buffer, sizeof buffer, format, precision, value);
  std::string text = buffer;
  // "-0", "-0.00": the sign of zero means nothing on an axis.
  if (text.front() == '-' && text.find_first_not_of("-0.") == std::string::npos) text.erase(0, 1);
  return text;
}

// "1.5e+06" -> "1.5e6", "2e-05" -> "2e-5".
std::string TidyExponent(std::string text) {
  const std::size_t e = text.find('e');
  if (e == std::string::npos) return text;
  std::string mantissa = text.substr(0, e), exponent = text.substr(e + 1);
  std::string sign;
  if (!exponent.empty() && (exponent[0] == '+' || exponent[0] == '-')) {
    if (exponent[0] == '-') sign = "-";
    exponent.erase(0, 1);
  }
  exponent.erase(0, std::min(exponent.find_first_not_of('0'), exponent.size() - 1));
  return mantissa + "e" + sign + exponent;
}

// At least three ticks: one or two labels leave the reader unable to tell the scale.
AxisTicks LinearAxisTicks(double low, double high, int target) {
  const Ticks ticks = LinearTicksAtLeast(low, high, target, 3);
  AxisTicks out;
  out.values = ticks.values;
  double largest = 0;
  for (double v : ticks.values) largest = std::max(largest, std::fabs(v));
  const bool scientific = largest >= 1e6 || ticks.step < 1e-4;
  const int mantissa_digits =
      scientific
          ? std::clamp(static_cast<int>(std::floor(std::log10(std::max(largest, ticks.step)) -
                                                   std::floor(std::log10(ticks.step) + 1e-9))),
                       0, 12)
          : 0;
  for (double v : ticks.values) {
    if (std::fabs(v) < ticks.step * 1e-9) {
      out.labels.push_back("0");
    } else if (scientific) {
      out.labels.push_back(TidyExponent(Printf("%.*e", v, mantissa_digits)));
    } else {
      out.labels.push_back(Printf("%.*f", v, ticks.fraction_digits));
    }
  }
  return out;
}

std::string LogTickLabel(double v) {
  if (v >= 1e-4 && v < 1e6) {
    const int digits = std::max(0, static_cast<int>(-std::floor(std::log10(v) + 1e-9)));
    return Printf("%.*f", v, digits);
  }
  return TidyExponent(Printf("%.*g", v, 1));
}

// Decades, with 2 and 5 in between when few decades show; linear ticks when less than a decade
// shows.
AxisTicks LogAxisTicks(double low, double high, int target) {
  if (!(low > 0) || !(high > low) || !std::isfinite(high))
    return LinearAxisTicks(low, high, target);
  const int first_decade = static_cast<int>(std::floor(std::log10(low)));
  const int last_decade = static_cast<int>(std::ceil(std::log10(high)));
  auto collect = [&](std::initializer_list<double> multipliers, int every) {
    std::vector<double> values;
    for (int d = first_decade; d <= last_decade; ++d) {
      if ((d - first_decade) % every != 0) continue;
      for (double m : multipliers) {
        const double v = d < 0 ? m / std::pow(10.0, -d) : m * std::pow(10.0, d);
        if (v >= low * (1 - 1e-12) && v <= high * (1 + 1e-12)) values.push_back(v);
      }
    }
    return values;
  };
  std::vector<double> values = collect({1, 2, 5}, 1);
  if (values.size() < 2) return LinearAxisTicks(low, high, target);
  if (static_cast<int>(values.size()) > target) {
    std::vector<double> decades = collect({1}, 1);
    if (decades.size() >= 2) {
      const int every = std::max(1, static_cast<int>((decades.size() + target - 1) / target));
      values = collect({1}, every);
    }
  }
  AxisTicks out;
  out.values = values;
  for (double v : values) out.labels.push_back(LogTickLabel(v));
  return out;
}

// Picks the densest ticks (from make(target), target decreasing) whose labels do not collide.
template <typename MakeTicks>
AxisTicks FitHorizontalTicks(cairo_t* cr, const Axis& axis, MakeTicks make) {
  const double length = std::fabs(axis.pixel_high - axis.pixel_low);
  auto collide = [&](const std::vector<double>& values, const std::vector<std::string>& labels) {
    double previous_right = -std::numeric_limits<double>::infinity();
    for (std::size_t i = 0; i < values.size(); ++i) {
      if (labels[i].empty()) continue;
      const double width = TextWidth(cr, labels[i], kTickFont);
      const double centre = axis.Map(values[i]);
      if (centre - width / 2 < previous_right + 12) return true;
      previous_right = centre + width / 2;
    }
    return false;
  };
  AxisTicks ticks;
  for (int target = std::max(2, static_cast<int>(length / 70)); target >= 2; --target) {
    ticks = make(target);
    if (!ticks.second_labels.empty()) {
      // The date under the first tick may give way to the next one rather than thin all ticks.
      std::vector<std::size_t> dated;
      for (std::size_t i = 0; i < ticks.second_labels.size(); ++i) {
        if (!ticks.second_labels[i].empty()) dated.push_back(i);
      }
      if (dated.size() >= 2) {
        const double gap = axis.Map(ticks.values[dated[1]]) - axis.Map(ticks.values[dated[0]]);
        if (gap < TextWidth(cr, ticks.second_labels[dated[0]], kTickFont) + 12) {
          ticks.second_labels[dated[0]].clear();
        }
      }
      if (collide(ticks.values, ticks.second_labels)) continue;
    }
    if (!collide(ticks.values, ticks.labels)) return ticks;
  }
  return ticks;
}

// ---- Legends --------------------------------------------------------------------------------

struct LegendEntry {
  enum class Kind { kLineWithMarker, kLine, kDashedLine, kBox, kRug, kTriangle };
  std::string label;
  Kind kind = Kind::kLine;
  std::uint32_t colour = 0;
  std::size_t marker = 0;
  double alpha = kShadeAlpha;  // of a box
};

void DrawLegendSample(cairo_t* cr, const LegendEntry& entry, double x, double y_middle) {
  using Kind = LegendEntry::Kind;
  switch (entry.kind) {
    case Kind::kLineWithMarker:
    case Kind::kLine:
    case Kind::kDashedLine:
      SetColour(cr, entry.colour);
      cairo_set_line_width(cr, entry.kind == Kind::kLineWithMarker ? kSeriesLineWidth : 1.6);
      if (entry.kind == Kind::kDashedLine) {
        const double dashes[] = {6, 4};
        cairo_set_dash(cr, dashes, 2, 0);
      }
      cairo_move_to(cr, x, y_middle);
      cairo_line_to(cr, x + kLegendSampleWidth, y_middle);
      cairo_stroke(cr);
      cairo_set_dash(cr, nullptr, 0, 0);
      if (entry.kind == Kind::kLineWithMarker) {
        DrawMarker(cr, entry.marker, x + kLegendSampleWidth / 2, y_middle, entry.colour);
      }
      break;
    case Kind::kBox:
      SetColour(cr, entry.colour, entry.alpha);
      cairo_rectangle(cr, x, y_middle - 7, kLegendSampleWidth, 14);
      cairo_fill(cr);
      break;
    case Kind::kTriangle:  // as on the bottom edge of a panel: pointing down to the edge line
      SetColour(cr, kAxisColour);
      cairo_set_line_width(cr, 1);
      cairo_move_to(cr, x, SnapOdd(y_middle + 4));
      cairo_line_to(cr, x + kLegendSampleWidth, SnapOdd(y_middle + 4));
      cairo_stroke(cr);
      SetColour(cr, entry.colour);
      cairo_move_to(cr, x + kLegendSampleWidth / 2, y_middle + 6);
      cairo_line_to(cr, x + kLegendSampleWidth / 2 - 4, y_middle - 1);
      cairo_line_to(cr, x + kLegendSampleWidth / 2 + 4, y_middle - 1);
      cairo_close_path(cr);
      cairo_fill(cr);
      break;
    case Kind::kRug:
      SetColour(cr, entry.colour);
      cairo_rectangle(cr, x + 5, y_middle - 7, 3, 14);
      cairo_fill(cr);
      DrawMarker(cr, 0, x + 20, y_middle, entry.colour, 3.5);
      break;
  }
}

double LegendEntryWidth(cairo_t* cr, const LegendEntry& entry, Font font) {
  return kLegendSampleWidth + 6 + TextWidth(cr, entry.label, font);
}

// Entries in centred rows no wider than max_width.
std::vector<std::vector<std::size_t>> LegendRows(cairo_t* cr,
                                                 const std::vector<LegendEntry>& entries,
                                                 double max_width) {
  constexpr double kSpacing = 24;
  std::vector<std::vector<std::size_t>> rows;
  double used = 0;
  for (std::size_t i = 0; i < entries.size(); ++i) {
    const double width = LegendEntryWidth(cr, entries[i], kLegendFont);
    if (rows.empty() || used + kSpacing + width > max_width) {
      rows.emplace_back();
      used = width;
    } else {
      used += kSpacing + width;
    }
    rows.back().push_back(i);
  }
  return rows;
}

void DrawLegendRows(cairo_t* cr, const std::vector<LegendEntry>& entries,
                    const std::vector<std::vector<std::size_t>>& rows, double centre_x, double top,
                    double max_width) {
  constexpr double kSpacing = 24;
  for (std::size_t r = 0; r < rows.size(); ++r) {
    double total = 0;
    for (std::size_t i : rows[r]) total += LegendEntryWidth(cr, entries[i], kLegendFont);
    total += kSpacing * static_cast<double>(rows[r].size() - 1);
    double x = centre_x - std::min(total, max_width) / 2;
    const double middle = top + kLegendRowHeight * (static_cast<double>(r) + 0.5);
    for (std::size_t i : rows[r]) {
      DrawLegendSample(cr, entries[i], x, middle);
      const double label_x = x + kLegendSampleWidth + 6;
      DrawText(cr, Fit(cr, entries[i].label, kLegendFont, max_width - kLegendSampleWidth - 6),
               label_x, middle, kLegendFont, kTextColour, HAlign::kLeft, VAlign::kMiddle);
      x += LegendEntryWidth(cr, entries[i], kLegendFont) + kSpacing;
    }
  }
}

// ---- Line figures ---------------------------------------------------------------------------

constexpr std::array<std::uint32_t, 7> kSeriesColours = {
    okabe_ito::kBlue,          okabe_ito::kOrange,  okabe_ito::kBluishGreen, okabe_ito::kVermillion,
    okabe_ito::kReddishPurple, okabe_ito::kSkyBlue, okabe_ito::kYellow};

std::string PanelName(std::size_t index, const std::string& title) {
  return "panel " + std::to_string(index + 1) + (title.empty() ? "" : " " + Quoted(title));
}

void ValidateRange(const std::string& path, const std::string& where,
                   const std::optional<std::pair<double, double>>& range) {
  if (!range) return;
  const double width = range->second - range->first;
  if (!Finite(range->first) || !Finite(range->second) || !(width > 1e-200) ||
      !(width > 1e-12 * std::max(std::fabs(range->first), std::fabs(range->second)))) {
    Fail(path, where +
                   ": y_range must be finite with low < high (and not vanishingly narrow), got (" +
                   Printf("%.*g", range->first, 6) + ", " + Printf("%.*g", range->second, 6) + ")");
  }
}

void ValidateLineFigure(const LineFigure& figure, const std::string& path) {
  if (path.empty()) throw std::runtime_error("chart: empty output path");
  if (figure.width < 200 || figure.width > 10000 || figure.height < 200 || figure.height > 10000) {
    Fail(path, "size " + std::to_string(figure.width) + "x" + std::to_string(figure.height) +
                   " is outside 200..10000 pixels");
  }
  if (figure.rows < 1 || figure.cols < 1 || figure.rows > 20 || figure.cols > 20) {
    Fail(path, "grid " + std::to_string(figure.rows) + "x" + std::to_string(figure.cols) +
                   " must have 1..20 rows and columns");
  }
  if (figure.panels.size() > static_cast<std::size_t>(figure.rows * figure.cols)) {
    Fail(path, std::to_string(figure.panels.size()) + " panels do not fit a " +
                   std::to_string(figure.rows) + "x" + std::to_string(figure.cols) + " grid");
  }
  for (std::size_t p = 0; p < figure.panels.size(); ++p) {
    const LinePanel& panel = figure.panels[p];
    const std::string where = PanelName(p, panel.title);
    for (const Series& series : panel.series) {
      if (series.x.size() != series.y.size()) {
        Fail(path, where + ", series " + Quoted(series.name) + ": x has " +
                       std::to_string(series.x.size()) + " values but y has " +
                       std::to_string(series.y.size()));
      }
    }
    if (panel.reference_y && !Finite(*panel.reference_y)) {
      Fail(path, where + ": reference_y is not finite");
    }
    ValidateRange(path, where, panel.y_range);
  }
}

bool SharedSeriesNames(const LineFigure& figure) {
  if (figure.panels.size() < 2 || figure.panels[0].series.empty()) return false;
  for (const LinePanel& panel : figure.panels) {
    if (panel.series.size() != figure.panels[0].series.size()) return false;
    for (std::size_t i = 0; i < panel.series.size(); ++i) {
      if (panel.series[i].name != figure.panels[0].series[i].name) return false;
    }
  }
  return true;
}

std::vector<LegendEntry> SeriesLegend(const LinePanel& panel) {
  std::vector<LegendEntry> entries;
  for (std::size_t i = 0; i < panel.series.size(); ++i) {
    if (panel.series[i].name.empty()) continue;
    entries.push_back(
        {panel.series[i].name, LegendEntry::Kind::kLineWithMarker, SeriesColour(i), i});
  }
  return entries;
}

void DrawGridAndAxes(cairo_t* cr, const Rect& plot, const Axis& x, const AxisTicks& x_ticks,
                     const Axis& y, const AxisTicks& y_ticks) {
  cairo_set_line_width(cr, 1);
  SetColour(cr, kGridColour);
  for (double v : x_ticks.values) {
    const double px = SnapOdd(x.Map(v));
    cairo_move_to(cr, px, plot.y);
    cairo_line_to(cr, px, plot.Bottom());
  }
  for (double v : y_ticks.values) {
    const double py = SnapOdd(y.Map(v));
    cairo_move_to(cr, plot.x, py);
    cairo_line_to(cr, plot.Right(), py);
  }
  cairo_stroke(cr);
  SetColour(cr, kAxisColour);
  const double left = SnapOdd(plot.x), bottom = SnapOdd(plot.Bottom());
  cairo_move_to(cr, left, plot.y);
  cairo_line_to(cr, left, bottom);
  cairo_line_to(cr, plot.Right(), bottom);
  for (double v : y_ticks.values) {
    const double py = SnapOdd(y.Map(v));
    cairo_move_to(cr, left - kTickLength, py);
    cairo_line_to(cr, left, py);
  }
  for (double v : x_ticks.values) {
    const double px = SnapOdd(x.Map(v));
    cairo_move_to(cr, px, bottom);
    cairo_line_to(cr, px, bottom + kTickLength);
  }
  cairo_stroke(cr);
}

void DrawYTickLabels(cairo_t* cr, const Rect& plot, const Axis& y, const AxisTicks& ticks) {
  for (std::size_t i = 0; i < ticks.values.size(); ++i) {
    DrawText(cr, ticks.labels[i], plot.x - kTickLength - 3, y.Map(ticks.values[i]), kTickFont,
             kTextColour, HAlign::kRight, VAlign::kMiddle);
  }
}

// Tick labels under the axis, kept inside [min_x, max_x]; returns the height they take.
double DrawXTickLabels(cairo_t* cr, const Rect& plot, const Axis& x, const AxisTicks& ticks,
                       double min_x, double max_x) {
  const double line = LineHeight(cr, kTickFont);
  const double top = plot.Bottom() + kTickLength + 3;
  auto draw_row = [&](const std::vector<std::string>& labels, double row_top) {
    for (std::size_t i = 0; i < ticks.values.size(); ++i) {
      if (labels[i].empty()) continue;
      const double half = TextWidth(cr, labels[i], kTickFont) / 2;
      const double centre = std::clamp(x.Map(ticks.values[i]), min_x + half, max_x - half);
      DrawText(cr, labels[i], centre, row_top, kTickFont, kTextColour, HAlign::kCentre,
               VAlign::kTop);
    }
  };
  draw_row(ticks.labels, top);
  if (ticks.second_labels.empty()) return kTickLength + 3 + line;
  draw_row(ticks.second_labels, top + line);
  return kTickLength + 3 + 2 * line;
}

void DrawNote(cairo_t* cr, const Rect& plot, const std::string& text) {
  DrawText(cr, text, plot.x + plot.w / 2, plot.y + plot.h / 2, kNoteFont, kNoteColour,
           HAlign::kCentre, VAlign::kMiddle);
}

bool Overlap(const Rect& a, const Rect& b) {
  return a.x < b.Right() && b.x < a.Right() && a.y < b.Bottom() && b.y < a.Bottom();
}

// The corner where a legend box hides the fewest data points (sampled along the lines) and no
// label in avoid.
Rect ChooseLegendCorner(const Rect& plot, double width, double height,
                        const std::vector<std::pair<double, double>>& points,
                        const std::vector<Rect>& avoid) {
  constexpr double kInset = 8;
  const std::array<Rect, 4> corners = {
      Rect{plot.Right() - kInset - width, plot.y + kInset, width, height},
      Rect{plot.x + kInset, plot.y + kInset, width, height},
      Rect{plot.Right() - kInset - width, plot.Bottom() - kInset - height, width, height},
      Rect{plot.x + kInset, plot.Bottom() - kInset - height, width, height}};
  std::size_t best = 0, best_hidden = std::numeric_limits<std::size_t>::max();
  for (std::size_t c = 0; c < corners.size(); ++c) {
    std::size_t hidden = 0;
    for (const auto& [px, py] : points) hidden += corners[c].Contains(px, py) ? 1 : 0;
    for (const Rect& label : avoid) hidden += Overlap(corners[c], label) ? points.size() + 1 : 0;
    if (hidden < best_hidden) {
      best = c;
      best_hidden = hidden;
    }
  }
  return corners[best];
}

// A boxed legend inside the plot, in as many columns as its height needs; none when the plot is
// too small to hold readable labels.
void DrawPanelLegend(cairo_t* cr, const std::vector<LegendEntry>& entries, const Rect& plot,
                     const std::vector<std::pair<double, double>>& points,
                     const std::vector<Rect>& avoid) {
  if (entries.empty()) return;
  constexpr double kRow = 19, kPadding = 7, kColumnGap = 14, kInsets = 16;
  const double rows_fitting = std::floor((plot.h - kInsets - 2 * kPadding) / kRow);
  if (rows_fitting < 1) return;
  const std::size_t rows = std::min(entries.size(), static_cast<std::size_t>(rows_fitting));
  const std::size_t columns = (entries.size() + rows - 1) / rows;
  double entry_width = 0;
  for (const LegendEntry& entry : entries) {
    entry_width = std::max(entry_width, LegendEntryWidth(cr, entry, kPanelLegendFont));
  }
  const double columns_d = static_cast<double>(columns);
  const double available =
      (plot.w - kInsets - 2 * kPadding - kColumnGap * (columns_d - 1)) / columns_d;
  const double wanted_label_width = entry_width - kLegendSampleWidth - 6;
  entry_width = std::min(entry_width, available);
  const double label_width = entry_width - kLegendSampleWidth - 6;
  if (label_width < std::min(30.0, wanted_label_width)) return;
  const Rect box = ChooseLegendCorner(
      plot, columns_d * entry_width + kColumnGap * (columns_d - 1) + 2 * kPadding,
      kRow * static_cast<double>(rows) + 2 * kPadding, points, avoid);
  SetColour(cr, kWhite, 0.88);
  cairo_rectangle(cr, box.x, box.y, box.w, box.h);
  cairo_fill_preserve(cr);
  SetColour(cr, 0xBBBBBB);
  cairo_set_line_width(cr, 1);
  cairo_stroke(cr);
  for (std::size_t i = 0; i < entries.size(); ++i) {
    const double x = box.x + kPadding + static_cast<double>(i / rows) * (entry_width + kColumnGap);
    const double middle = box.y + kPadding + kRow * (static_cast<double>(i % rows) + 0.5);
    DrawLegendSample(cr, entries[i], x, middle);
    DrawText(cr, Fit(cr, entries[i].label, kPanelLegendFont, label_width),
             x + kLegendSampleWidth + 6, middle, kPanelLegendFont, kTextColour, HAlign::kLeft,
             VAlign::kMiddle);
  }
}

void DrawLinePanel(cairo_t* cr, const LinePanel& panel, const Rect& cell, bool own_legend) {
  Axis x{.log = panel.log_x};
  Extent x_extent, y_extent;
  std::size_t drawable_points = 0;
  for (const Series& series : panel.series) {
    for (std::size_t i = 0; i < series.x.size(); ++i) {
      if (x.Drawable(series.x[i]) && Finite(series.y[i])) {
        x_extent.Add(series.x[i]);
        y_extent.Add(series.y[i]);
        ++drawable_points;
      }
    }
  }
  if (panel.reference_y && drawable_points > 0) y_extent.Add(*panel.reference_y);
  std::tie(x.low, x.high) = PaddedRange(x_extent, panel.log_x);
  Axis y;
  std::tie(y.low, y.high) = panel.y_range ? *panel.y_range : PaddedRange(y_extent, false);

  // Vertical layout: title, plot, tick labels, axis label.
  const double tick_line = LineHeight(cr, kTickFont);
  const double label_line = LineHeight(cr, kAxisLabelFont);
  double top = cell.y + 4;
  if (!panel.title.empty()) top += LineHeight(cr, kPanelTitleFont) + 8;
  double bottom = cell.Bottom() - 4 - (kTickLength + 3 + tick_line);
  if (!panel.x_label.empty()) bottom -= label_line + 4;
  bottom = std::max(bottom, top + 10);
  y.pixel_low = bottom;
  y.pixel_high = top;
  const AxisTicks y_ticks =
      LinearAxisTicks(y.low, y.high, std::clamp(static_cast<int>((bottom - top) / 40), 2, 10));

  // Horizontal layout: axis label, tick labels, plot.
  double widest_y_label = 0;
  for (const std::string& label : y_ticks.labels) {
    widest_y_label = std::max(widest_y_label, TextWidth(cr, label, kTickFont));
  }
  double left = cell.x + 4;
  if (!panel.y_label.empty()) left += label_line + 6;
  left += widest_y_label + kTickLength + 6;
  const double right = std::max(cell.Right() - 18, left + 10);
  x.pixel_low = left;
  x.pixel_high = right;
  const Rect plot{left, top, right - left, bottom - top};
  const AxisTicks x_ticks = FitHorizontalTicks(cr, x, [&](int target) {
    return panel.log_x ? LogAxisTicks(x.low, x.high, target)
                       : LinearAxisTicks(x.low, x.high, target);
  });

  DrawGridAndAxes(cr, plot, x, x_ticks, y, y_ticks);
  DrawYTickLabels(cr, plot, y, y_ticks);
  DrawXTickLabels(cr, plot, x, x_ticks, cell.x, cell.Right());

  // Data, clipped a marker's width outside the plot so that points on the edge stay whole.
  cairo_save(cr);
  const double slack = kMarkerRadius + 2;
  cairo_rectangle(cr, plot.x - slack, plot.y - slack, plot.w + 2 * slack, plot.h + 2 * slack);
  cairo_clip(cr);
  std::optional<double> reference_pixel;
  if (panel.reference_y && *panel.reference_y >= y.low && *panel.reference_y <= y.high) {
    reference_pixel = SnapEven(y.Map(*panel.reference_y));
    SetColour(cr, kReferenceColour);
    cairo_set_line_width(cr, 2);
    const double dashes[] = {9, 5};
    cairo_set_dash(cr, dashes, 2, 0);
    cairo_move_to(cr, plot.x, *reference_pixel);
    cairo_line_to(cr, plot.Right(), *reference_pixel);
    cairo_stroke(cr);
    cairo_set_dash(cr, nullptr, 0, 0);
  }
  std::vector<std::pair<double, double>> occupied;  // for placing the legend
  cairo_set_line_join(cr, CAIRO_LINE_JOIN_ROUND);
  cairo_set_line_cap(cr, CAIRO_LINE_CAP_ROUND);
  for (std::size_t s = 0; s < panel.series.size(); ++s) {
    const Series& series = panel.series[s];
    auto drawable = [&](std::size_t i) {
      return i < series.x.size() && x.Drawable(series.x[i]) && Finite(series.y[i]);
    };
    SetColour(cr, SeriesColour(s));
    cairo_set_line_width(cr, kSeriesLineWidth);
    bool pen_down = false;
    std::pair<double, double> previous;
    std::size_t count = 0;
    for (std::size_t i = 0; i < series.x.size(); ++i) {
      if (!drawable(i)) {
        pen_down = false;
        continue;
      }
      ++count;
      const std::pair<double, double> point{x.Map(series.x[i]), y.Map(series.y[i])};
      if (pen_down) {
        cairo_line_to(cr, point.first, point.second);
        for (double f : {0.2, 0.4, 0.6, 0.8}) {
          occupied.emplace_back(previous.first + f * (point.first - previous.first),
                                previous.second + f * (point.second - previous.second));
        }
      } else {
        cairo_move_to(cr, point.first, point.second);
      }
      occupied.push_back(point);
      previous = point;
      pen_down = true;
    }
    cairo_stroke(cr);
    const bool crowded = static_cast<double>(count) > plot.w / 8;
    for (std::size_t i = 0; i < series.x.size(); ++i) {
      if (!drawable(i)) continue;
      const bool isolated = (i == 0 || !drawable(i - 1)) && !drawable(i + 1);
      if (crowded && !isolated) continue;
      DrawMarker(cr, s, x.Map(series.x[i]), y.Map(series.y[i]), SeriesColour(s));
    }
  }
  cairo_restore(cr);

  std::vector<Rect> labels;
  if (reference_pixel && !panel.reference_label.empty()) {
    const std::string label = Fit(cr, panel.reference_label, kTickFont, plot.w - 12);
    const double label_height = LineHeight(cr, kTickFont);
    const bool above = *reference_pixel - label_height - 7 > plot.y;
    const double width = TextWidth(cr, label, kTickFont);
    const double anchor_y = above ? *reference_pixel - 4 : *reference_pixel + 4;
    DrawTextOnBox(cr, label, plot.Right() - 6, anchor_y, kTickFont, kReferenceColour,
                  HAlign::kRight, above ? VAlign::kBottom : VAlign::kTop);
    labels.push_back({plot.Right() - 6 - width - 3,
                      above ? anchor_y - label_height - 1 : anchor_y - 1, width + 6,
                      label_height + 2});
  }
  if (drawable_points == 0) {
    DrawNote(cr, plot, "no data");
    const double width = TextWidth(cr, "no data", kNoteFont);
    labels.push_back({plot.x + (plot.w - width) / 2, plot.y + plot.h / 2 - 10, width, 20});
  }
  if (own_legend) DrawPanelLegend(cr, SeriesLegend(panel), plot, occupied, labels);

  if (!panel.title.empty()) {
    DrawText(cr, Fit(cr, panel.title, kPanelTitleFont, cell.w - 8), plot.x + plot.w / 2, cell.y + 4,
             kPanelTitleFont, kTextColour, HAlign::kCentre, VAlign::kTop);
  }
  if (!panel.x_label.empty()) {
    DrawText(cr, Fit(cr, panel.x_label, kAxisLabelFont, cell.w - 8), plot.x + plot.w / 2,
             cell.Bottom() - 4, kAxisLabelFont, kTextColour, HAlign::kCentre, VAlign::kBottom);
  }
  if (!panel.y_label.empty()) {
    // Rotated: the text's top faces left, so "top" alignment puts it against the cell edge.
    DrawText(cr, Fit(cr, panel.y_label, kAxisLabelFont, cell.h - 8), cell.x + 4,
             plot.y + plot.h / 2, kAxisLabelFont, kTextColour, HAlign::kCentre, VAlign::kTop,
             /*rotated=*/true);
  }
}

std::string PanelTitles(const std::vector<std::string>& titles) {
  std::string joined;
  for (const std::string& title : titles) {
    if (title.empty()) continue;
    if (!joined.empty()) joined += "; ";
    joined += title;
  }
  return joined;
}

// ---- Timelines ------------------------------------------------------------------------------

struct TimelineLayout {
  double title_top = 12, legend_top = 0;
  std::vector<LegendEntry> legend;
  std::vector<std::vector<std::size_t>> legend_rows;
  double panels_top = 0;
  double panel_title_height = 0;
  double axis_height = 0;  // time tick labels and the axis label under the last panel
  int height = 0;
};

// The samples a timeline panel draws: finite t and value.
std::vector<double> DrawnValues(const TimelinePanel& panel) {
  std::vector<double> values;
  for (std::size_t i = 0; i < panel.t.size() && i < panel.value.size(); ++i) {
    if (Finite(panel.t[i]) && Finite(panel.value[i])) values.push_back(panel.value[i]);
  }
  return values;
}

// The panel's y range: its own, else RobustValueRange with the envelope boundary (0) in view.
ValueRange PanelValueRange(const TimelinePanel& panel) {
  const std::vector<double> values = DrawnValues(panel);
  if (!panel.y_range) return RobustValueRange(values, 0);
  ValueRange range{panel.y_range->first, panel.y_range->second, false};
  for (double v : values) range.clipped = range.clipped || v < range.low || v > range.high;
  return range;
}

std::vector<LegendEntry> TimelineLegend(const TimelineFigure& figure) {
  using Kind = LegendEntry::Kind;
  std::vector<LegendEntry> entries;
  bool any_shaded = false, any_marks = false, any_learning = false, any_clipped = false;
  for (const TimelinePanel& panel : figure.panels) {
    any_shaded = any_shaded || !panel.shaded.empty();
    any_marks = any_marks || !panel.marks.empty();
    any_learning = any_learning || !panel.learning.empty();
    any_clipped = any_clipped || PanelValueRange(panel).clipped;
  }
  if (!figure.value_label.empty()) {
    entries.push_back({figure.value_label, Kind::kLine, kTimelineValueColour});
  }
  if (!figure.zero_label.empty()) {
    entries.push_back({figure.zero_label, Kind::kDashedLine, kReferenceColour});
  }
  if (any_shaded && !figure.shaded_label.empty()) {
    entries.push_back({figure.shaded_label, Kind::kBox, kShadeColour});
  }
  if (any_marks && !figure.marks_label.empty()) {
    entries.push_back({figure.marks_label, Kind::kRug, kMarkColour});
  }
  if (any_learning && !figure.learning_label.empty()) {
    entries.push_back({figure.learning_label, Kind::kBox, kLearningColour, 0, kLearningAlpha});
  }
  if (any_clipped && !figure.clipped_label.empty()) {
    entries.push_back({figure.clipped_label, Kind::kTriangle, kClippedColour});
  }
  return entries;
}

TimelineLayout LayOutTimeline(cairo_t* cr, const TimelineFigure& figure) {
  TimelineLayout layout;
  double y = layout.title_top;
  if (!figure.title.empty()) y += LineHeight(cr, kTitleFont) + 6;
  layout.legend_top = y;
  layout.legend = TimelineLegend(figure);
  layout.legend_rows = LegendRows(cr, layout.legend, figure.width - 40.0);
  y += kLegendRowHeight * static_cast<double>(layout.legend_rows.size()) + 6;
  layout.panels_top = y;
  layout.panel_title_height = LineHeight(cr, kTimelinePanelTitleFont) + 4;
  const double tick_lines = figure.time_labels == TimeLabels::kUtc ? 2 : 1;
  layout.axis_height = kTickLength + 3 + tick_lines * LineHeight(cr, kTickFont) + 6 +
                       LineHeight(cr, kAxisLabelFont) + 8;
  const double panels = static_cast<double>(std::max<std::size_t>(1, figure.panels.size()));
  layout.height =
      static_cast<int>(std::ceil(y + panels * figure.panel_height + layout.axis_height));
  return layout;
}

void ValidateTimelineFigure(const TimelineFigure& figure, const std::string& path) {
  if (path.empty()) throw std::runtime_error("chart: empty output path");
  if (figure.width < 200 || figure.width > 10000) {
    Fail(path, "width " + std::to_string(figure.width) + " is outside 200..10000 pixels");
  }
  if (figure.panel_height < 80 || figure.panel_height > 5000) {
    Fail(path,
         "panel_height " + std::to_string(figure.panel_height) + " is outside 80..5000 pixels");
  }
  if (figure.panels.size() > 200) {
    Fail(path, std::to_string(figure.panels.size()) + " panels are more than 200");
  }
  for (std::size_t p = 0; p < figure.panels.size(); ++p) {
    const TimelinePanel& panel = figure.panels[p];
    const std::string where = PanelName(p, panel.title);
    if (panel.t.size() != panel.value.size()) {
      Fail(path, where + ": t has " + std::to_string(panel.t.size()) + " values but value has " +
                     std::to_string(panel.value.size()));
    }
    double latest = -std::numeric_limits<double>::infinity();
    std::size_t latest_index = 0;
    for (std::size_t i = 0; i < panel.t.size(); ++i) {
      if (!Finite(panel.t[i])) continue;
      if (panel.t[i] < latest) {
        Fail(path, where + ": t is not in time order: t[" + std::to_string(i) +
                       "] = " + Printf("%.*f", panel.t[i], 3) + " comes after t[" +
                       std::to_string(latest_index) + "] = " + Printf("%.*f", latest, 3));
      }
      latest = panel.t[i];
      latest_index = i;
    }
    for (std::size_t i = 0; i < panel.shaded.size(); ++i) {
      const Interval& interval = panel.shaded[i];
      if (!Finite(interval.start) || !Finite(interval.end) || interval.end < interval.start) {
        Fail(path, where + ": shaded interval " + std::to_string(i + 1) +
                       " must be finite with start <= end");
      }
    }
    for (std::size_t i = 0; i < panel.learning.size(); ++i) {
      const Interval& interval = panel.learning[i];
      if (!Finite(interval.start) || !Finite(interval.end) || interval.end < interval.start) {
        Fail(path, where + ": learning interval " + std::to_string(i + 1) +
                       " must be finite with start <= end");
      }
    }
    for (std::size_t i = 0; i < panel.marks.size(); ++i) {
      if (!Finite(panel.marks[i])) {
        Fail(path, where + ": mark " + std::to_string(i + 1) + " is not finite");
      }
    }
    ValidateRange(path, where, panel.y_range);
  }
}

std::optional<std::tm> UtcTime(double seconds) {
  if (!(std::fabs(seconds) < 1e14)) return std::nullopt;
  const auto whole = static_cast<std::time_t>(std::floor(seconds));
  std::tm parts{};
  if (gmtime_r(&whole, &parts) == nullptr) return std::nullopt;
  return parts;
}

std::string FormatUtc(double seconds, const char* format) {
  const std::optional<std::tm> parts = UtcTime(seconds);
  if (!parts) return "?";
  char buffer[64];
  const std::size_t length = std::strftime(buffer, sizeof buffer, format, &*parts);
  return std::string(buffer, length);
}

// Calendar steps, so that ticks fall on whole minutes, hours and days (Unix time has no leap
// seconds, so multiples of a day from the epoch are UTC midnights).
AxisTicks UtcTicks(double low, double high, int target) {
  static constexpr std::array<double, 21> kSteps = {
      1,    2,    5,    10,    15,    30,    60,    120,    300,    600,    900,
      1800, 3600, 7200, 10800, 21600, 43200, 86400, 172800, 604800, 1209600};
  const double span = high - low;
  const auto count_for = [&](double step) {
    return std::floor(high / step + 1e-9) - std::ceil(low / step - 1e-9) + 1;
  };
  double step = 0;
  std::size_t index = 0;
  while (index < kSteps.size() && span / kSteps[index] > target) ++index;
  if (index < kSteps.size()) {
    // The step that suits the target can leave one or two ticks in the span: take smaller ones.
    while (index > 0 && count_for(kSteps[index]) < 3) --index;
    step = kSteps[index];
  } else {  // beyond four weeks: whole days, at least three ticks
    step = LinearTicksAtLeast(low / 86400, high / 86400, target, 3).step * 86400;
  }
  AxisTicks out;
  if (count_for(step) < 3) {
    // Under two seconds: sub-second ticks, labelled with the fraction after the seconds.
    const Ticks fine = LinearTicksAtLeast(low, high, target, 3);
    for (double t : fine.values) {
      out.values.push_back(t);
      const double whole = std::floor(t);
      const std::string fraction = Printf("%.*f", t - whole, fine.fraction_digits);
      out.labels.push_back(FormatUtc(whole, "%H:%M:%S") + fraction.substr(1));
      out.second_labels.push_back(out.second_labels.empty() ? FormatUtc(whole, "%Y-%m-%d") : "");
    }
    return out;
  }
  const double first = std::ceil(low / step) * step;
  std::string previous_date;
  for (double t = first; t <= high + 1e-9 * step && out.values.size() < 1000; t += step) {
    out.values.push_back(t);
    const std::string date = FormatUtc(t, "%Y-%m-%d");
    if (step >= 86400) {
      out.labels.push_back(date);
      continue;
    }
    out.labels.push_back(FormatUtc(t, step < 60 ? "%H:%M:%S" : "%H:%M"));
    out.second_labels.push_back(date != previous_date ? date : "");
    previous_date = date;
  }
  if (out.values.empty()) return out;
  if (step >= 86400) out.second_labels.clear();
  return out;
}

struct ElapsedUnit {
  double seconds;
  const char* name;
};

ElapsedUnit ElapsedUnitFor(double span) {
  if (span >= 2 * 86400) return {86400, "days"};
  if (span >= 2 * 3600) return {3600, "hours"};
  if (span >= 2 * 60) return {60, "minutes"};
  return {1, "seconds"};
}

AxisTicks ElapsedTicks(double low, double high, int target) {
  const ElapsedUnit unit = ElapsedUnitFor(high - low);
  AxisTicks ticks = LinearAxisTicks(0, (high - low) / unit.seconds, target);
  for (double& v : ticks.values) v = low + v * unit.seconds;
  return ticks;
}

// Intervals sorted and merged, so that overlapping windows are shaded once.
std::vector<Interval> Merged(std::vector<Interval> intervals) {
  std::sort(intervals.begin(), intervals.end(),
            [](const Interval& a, const Interval& b) { return a.start < b.start; });
  std::vector<Interval> merged;
  for (const Interval& interval : intervals) {
    if (!merged.empty() && interval.start <= merged.back().end) {
      merged.back().end = std::max(merged.back().end, interval.end);
    } else {
      merged.push_back(interval);
    }
  }
  return merged;
}

// Pixel coordinates rounded to a quarter: finer detail is invisible under a 1.2 px line, and
// cairo keeps coordinates in 1/256 px, so a quarter prints in at most two decimals where a tenth
// would print as six ("0.398438"); short numbers keep the SVG path data small.
double Quarter(double p) { return std::round(p * 4) / 4; }

// The line through (t, value); with more points than pixel columns, each column is drawn from its
// lowest and highest value (DecimateToColumns), which keeps every spike and costs O(points) time
// and O(width) output. Values beyond the y axis are drawn at its edge, and each
// stretch of columns where that happens gets a triangle on the edge pointing the way they go.
void DrawDecimatedLine(cairo_t* cr, const TimelinePanel& panel, const Axis& x, const Axis& y,
                       const Rect& plot) {
  constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
  std::vector<Point> points;
  points.reserve(panel.t.size());
  std::vector<double> below, above;  // pixel columns with values beyond the axis
  std::size_t finite = 0;
  for (std::size_t i = 0; i < panel.t.size(); ++i) {
    if (!Finite(panel.t[i]) || !Finite(panel.value[i])) {
      points.push_back({kNaN, kNaN});
      continue;
    }
    ++finite;
    const double v = panel.value[i];
    const double px = x.Map(panel.t[i]);
    if (v < y.low) below.push_back(std::floor(px));
    if (v > y.high) above.push_back(std::floor(px));
    points.push_back({px, y.Map(std::clamp(v, y.low, y.high))});
  }
  if (static_cast<double>(finite) > 2 * plot.w) points = DecimateToColumns(points);
  SetColour(cr, kTimelineValueColour);
  cairo_set_line_width(cr, kTimelineLineWidth);
  cairo_set_line_join(cr, CAIRO_LINE_JOIN_ROUND);
  auto drawable = [&](std::size_t i) { return i < points.size() && !std::isnan(points[i].y); };
  std::vector<Point> isolated;  // no line shows them
  bool pen_down = false;
  Point previous;
  for (std::size_t i = 0; i < points.size(); ++i) {
    if (!drawable(i)) {
      pen_down = false;
      continue;
    }
    const double px = Quarter(points[i].x), py = Quarter(points[i].y);
    if (pen_down) {
      if (px == previous.x && py == previous.y) continue;  // the same vertex once rounded
      cairo_line_to(cr, px, py);
    } else {
      cairo_move_to(cr, px, py);
      if (!drawable(i + 1)) isolated.push_back({px, py});
    }
    previous = {px, py};
    pen_down = true;
  }
  cairo_stroke(cr);
  for (const Point& p : isolated) {
    cairo_new_sub_path(cr);
    cairo_arc(cr, p.x, p.y, 2.5, 0, 2 * std::numbers::pi);
  }
  cairo_fill(cr);

  // One triangle per stretch of clipped columns (a new one after a gap wider than a triangle).
  constexpr double kHalfBase = 4, kTriangleHeight = 7;
  const auto triangles = [&](const std::vector<double>& columns, double edge, double direction) {
    double previous = -std::numeric_limits<double>::infinity();
    for (double column : columns) {
      if (column - previous <= 2 * kHalfBase) {
        previous = column;
        continue;
      }
      const double centre = column + 0.5;
      cairo_move_to(cr, centre, edge + direction * 2);  // the tip, just outside the plot
      cairo_line_to(cr, centre - kHalfBase, edge - direction * (kTriangleHeight - 2));
      cairo_line_to(cr, centre + kHalfBase, edge - direction * (kTriangleHeight - 2));
      cairo_close_path(cr);
      previous = column;
    }
  };
  SetColour(cr, kClippedColour);
  triangles(below, plot.Bottom(), 1);
  triangles(above, plot.y, -1);
  cairo_fill(cr);
}

// The value at time t by linear interpolation between the neighbouring samples; nullopt outside
// the samples or next to a gap.
std::optional<double> ValueAt(const std::vector<double>& times, const std::vector<double>& values,
                              double t) {
  const auto after = std::lower_bound(times.begin(), times.end(), t);
  if (after == times.end()) return std::nullopt;
  const auto i = static_cast<std::size_t>(after - times.begin());
  if (times[i] == t) return Finite(values[i]) ? std::optional(values[i]) : std::nullopt;
  if (i == 0 || !Finite(values[i]) || !Finite(values[i - 1])) return std::nullopt;
  const double f = (t - times[i - 1]) / (times[i] - times[i - 1]);
  return values[i - 1] + f * (values[i] - values[i - 1]);
}

void DrawMarks(cairo_t* cr, const TimelinePanel& panel, const Axis& x, const Axis& y,
               const Rect& plot) {
  if (panel.marks.empty()) return;
  constexpr double kRugHeight = 12, kRugWidth = 3;
  SetColour(cr, kMarkColour);
  for (double mark : panel.marks) {
    if (mark < x.low || mark > x.high) continue;
    const double px = std::round(x.Map(mark));
    cairo_rectangle(cr, px - kRugWidth / 2 + 0.5, plot.Bottom() - kRugHeight, kRugWidth,
                    kRugHeight);
  }
  cairo_fill(cr);
  std::vector<double> times, values;  // the samples with a finite time, for the binary search
  times.reserve(panel.t.size());
  values.reserve(panel.t.size());
  for (std::size_t i = 0; i < panel.t.size(); ++i) {
    if (!Finite(panel.t[i])) continue;
    times.push_back(panel.t[i]);
    values.push_back(panel.value[i]);
  }
  for (double mark : panel.marks) {
    if (mark < x.low || mark > x.high) continue;
    const std::optional<double> value = ValueAt(times, values, mark);
    if (!value) continue;
    DrawMarker(cr, 0, x.Map(mark), y.Map(*value), kMarkColour, 3);
  }
}

void DrawTimelinePanel(cairo_t* cr, const TimelinePanel& panel, const Axis& time,
                       const AxisTicks& time_ticks, const Rect& plot, const Axis& y,
                       const AxisTicks& y_ticks, double block_left, bool has_data,
                       const std::string& learning_label) {
  DrawGridAndAxes(cr, plot, time, time_ticks, y, y_ticks);
  DrawYTickLabels(cr, plot, y, y_ticks);

  cairo_save(cr);
  cairo_rectangle(cr, plot.x - 4, plot.y - 4, plot.w + 8, plot.h + 8);
  cairo_clip(cr);
  // Pixel spans of merged intervals; a short window stays visible as 1 px.
  const auto bands = [&](const std::vector<Interval>& intervals) {
    std::vector<std::pair<double, double>> spans;
    for (const Interval& interval : Merged(intervals)) {
      if (interval.end < time.low || interval.start > time.high) continue;
      double left = time.Map(std::max(interval.start, time.low));
      double right = time.Map(std::min(interval.end, time.high));
      if (right - left < 1) {
        const double middle = (left + right) / 2;
        left = middle - 0.5;
        right = middle + 0.5;
      }
      spans.emplace_back(left, right);
    }
    return spans;
  };
  const std::vector<std::pair<double, double>> learning = bands(panel.learning);
  SetColour(cr, kLearningColour, kLearningAlpha);
  for (const auto& [left, right] : learning)
    cairo_rectangle(cr, left, plot.y, right - left, plot.h);
  cairo_fill(cr);
  SetColour(cr, kShadeColour, kShadeAlpha);
  for (const auto& [left, right] : bands(panel.shaded)) {
    cairo_rectangle(cr, left, plot.y, right - left, plot.h);
  }
  cairo_fill(cr);
  if (y.low <= 0 && y.high >= 0) {
    SetColour(cr, kReferenceColour);
    cairo_set_line_width(cr, 1);
    const double dashes[] = {6, 4};
    cairo_set_dash(cr, dashes, 2, 0);
    const double py = SnapOdd(y.Map(0));
    cairo_move_to(cr, plot.x, py);
    cairo_line_to(cr, plot.Right(), py);
    cairo_stroke(cr);
    cairo_set_dash(cr, nullptr, 0, 0);
  }
  DrawDecimatedLine(cr, panel, time, y, plot);
  DrawMarks(cr, panel, time, y, plot);
  cairo_restore(cr);
  // Each learning band says what it is, inside its top left corner (kept within the plot).
  for (const auto& [left, right] : learning) {
    if (learning_label.empty()) break;
    const double label_width = TextWidth(cr, learning_label, kTickFont);
    const double anchor = std::clamp(left + 4, plot.x + 4, plot.Right() - label_width - 4);
    DrawTextOnBox(cr, learning_label, anchor, plot.y + 4, kTickFont, kTextColour, HAlign::kLeft,
                  VAlign::kTop);
  }

  if (!has_data) DrawNote(cr, plot, "no data");
  if (!panel.title.empty()) {
    DrawText(cr, Fit(cr, panel.title, kTimelinePanelTitleFont, plot.Right() - plot.x), plot.x,
             plot.y - 4, kTimelinePanelTitleFont, kTextColour, HAlign::kLeft, VAlign::kBottom);
  }
  if (!panel.y_label.empty()) {
    DrawText(cr, Fit(cr, panel.y_label, kAxisLabelFont, plot.h), block_left, plot.y + plot.h / 2,
             kAxisLabelFont, kTextColour, HAlign::kCentre, VAlign::kTop, /*rotated=*/true);
  }
}

}  // namespace

// ---- Public functions -----------------------------------------------------------------------

std::optional<Format> FormatFromPath(std::string_view path) {
  const std::size_t dot = path.rfind('.');
  if (dot == std::string_view::npos) return std::nullopt;
  std::string extension(path.substr(dot + 1));
  std::transform(extension.begin(), extension.end(), extension.begin(),
                 [](unsigned char c) { return static_cast<char>(std::tolower(c)); });
  if (extension == "png") return Format::kPng;
  if (extension == "svg") return Format::kSvg;
  return std::nullopt;
}

std::uint32_t SeriesColour(std::size_t index) {
  return kSeriesColours[index % kSeriesColours.size()];
}

double NiceNumber(double x, bool round) {
  if (!(x > 0) || !std::isfinite(x)) {
    throw std::invalid_argument("NiceNumber needs a finite x > 0");
  }
  int exponent = static_cast<int>(std::floor(std::log10(x)));
  auto fraction_of = [&](int e) {
    const double f = e < 0 ? x * std::pow(10.0, -e) : x / std::pow(10.0, e);
    return std::round(f * 1e12) / 1e12;  // 0.3 / 0.1 is 2.9999999999999996
  };
  double fraction = fraction_of(exponent);
  if (fraction >= 10) fraction = fraction_of(++exponent);
  if (fraction < 1) fraction = fraction_of(--exponent);
  double nice;
  if (round) {
    nice = fraction < 1.5 ? 1 : fraction < 3 ? 2 : fraction < 7 ? 5 : 10;
  } else {
    nice = fraction <= 1 ? 1 : fraction <= 2 ? 2 : fraction <= 5 ? 5 : 10;
  }
  return exponent < 0 ? nice / std::pow(10.0, -exponent) : nice * std::pow(10.0, exponent);
}

Ticks LinearTicks(double low, double high, int target_count) {
  if (!std::isfinite(low) || !std::isfinite(high) || !(low < high) || target_count < 2) {
    throw std::invalid_argument("LinearTicks needs finite low < high and target_count >= 2");
  }
  Ticks ticks;
  ticks.step = NiceNumber((high - low) / (target_count - 1), true);
  const int exponent = static_cast<int>(std::floor(std::log10(ticks.step) + 1e-9));
  ticks.fraction_digits = std::max(0, -exponent);
  // Multiples are formed as k * mantissa / 10^-exponent, so that 3 * 0.2 prints as 0.6.
  const double mantissa = std::round(exponent < 0 ? ticks.step * std::pow(10.0, -exponent)
                                                  : ticks.step / std::pow(10.0, exponent));
  auto value_at = [&](double k) {
    return exponent < 0 ? k * mantissa / std::pow(10.0, -exponent)
                        : k * mantissa * std::pow(10.0, exponent);
  };
  const double first = std::ceil(low / ticks.step - 1e-9);
  const double last = std::floor(high / ticks.step + 1e-9);
  for (double k = first; k <= last && ticks.values.size() < 10000; ++k) {
    const double v = value_at(k);
    ticks.values.push_back(k == 0 ? 0.0 : v);
  }
  return ticks;
}

Ticks LinearTicksAtLeast(double low, double high, int target_count, int min_count) {
  if (min_count < 1 || min_count > 100) {
    throw std::invalid_argument("LinearTicksAtLeast needs 1 <= min_count <= 100");
  }
  Ticks ticks = LinearTicks(low, high, target_count);
  // Each pass at least halves the step, and a step of (high - low) / min_count or less fits
  // min_count ticks, so this ends; the bound only guards against a range at the edge of precision.
  for (int pass = 0; pass < 64 && static_cast<int>(ticks.values.size()) < min_count; ++pass) {
    const int exponent = static_cast<int>(std::floor(std::log10(ticks.step) + 1e-9));
    const double power = std::pow(10.0, exponent);
    const double mantissa = std::round(ticks.step / power);
    const double smaller = mantissa == 5 ? 2 * power : mantissa == 2 ? power : 0.5 * power;
    // The multiples of the smaller step, formed as LinearTicks forms them (k * mantissa / 10^-e).
    Ticks next;
    next.step = smaller;
    const int next_exponent = static_cast<int>(std::floor(std::log10(smaller) + 1e-9));
    next.fraction_digits = std::max(0, -next_exponent);
    const double next_mantissa = std::round(smaller / std::pow(10.0, next_exponent));
    const double first = std::ceil(low / smaller - 1e-9), last = std::floor(high / smaller + 1e-9);
    for (double k = first; k <= last && next.values.size() < 10000; ++k) {
      const double v = next_exponent < 0 ? k * next_mantissa / std::pow(10.0, -next_exponent)
                                         : k * next_mantissa * std::pow(10.0, next_exponent);
      next.values.push_back(k == 0 ? 0.0 : v);
    }
    ticks = std::move(next);
  }
  return ticks;
}

TimeTicks TimeAxisTicks(double low, double high, int target_count, TimeLabels style) {
  if (!std::isfinite(low) || !std::isfinite(high) || !(low < high) || target_count < 3) {
    throw std::invalid_argument("TimeAxisTicks needs finite low < high and target_count >= 3");
  }
  const AxisTicks ticks = style == TimeLabels::kUtc ? UtcTicks(low, high, target_count)
                                                    : ElapsedTicks(low, high, target_count);
  return TimeTicks{ticks.values, ticks.labels, ticks.second_labels};
}

std::pair<double, double> RatioAxisRange(const std::vector<double>& values) {
  double largest = 0;
  for (double v : values) {
    if (Finite(v)) largest = std::max(largest, v);
  }
  double top = 1;
  if (largest > 0) {
    // Heckbert's loose labelling of [0, largest] with 5 ticks.
    const double step = NiceNumber(NiceNumber(largest, false) / 4, true);
    top = std::ceil(largest / step - 1e-9) * step;
  }
  return {-0.03 * top, 1.03 * top};
}

ValueRange RobustValueRange(const std::vector<double>& values, double always_shown) {
  std::vector<double> sorted;
  sorted.reserve(values.size());
  for (double v : values) {
    if (Finite(v)) sorted.push_back(v);
  }
  ValueRange range;
  if (sorted.empty()) return range;
  std::sort(sorted.begin(), sorted.end());
  const auto quantile = [&](double p) {  // Hyndman & Fan type 7
    const double h = p * static_cast<double>(sorted.size() - 1);
    const auto below = static_cast<std::size_t>(std::floor(h));
    const std::size_t above = std::min(below + 1, sorted.size() - 1);
    return sorted[below] + (h - std::floor(h)) * (sorted[above] - sorted[below]);
  };
  Extent robust;
  robust.Add(quantile(0.005));
  robust.Add(quantile(0.995));
  if (Finite(always_shown)) robust.Add(always_shown);
  const double span = robust.high - robust.low;
  Extent full = robust;
  full.Add(sorted.front());
  full.Add(sorted.back());
  if (sorted.front() >= robust.low - 0.5 * span && sorted.back() <= robust.high + 0.5 * span) {
    std::tie(range.low, range.high) = PaddedRange(full, false);
    return range;
  }
  std::tie(range.low, range.high) = PaddedRange(robust, false);
  range.clipped = sorted.front() < range.low || sorted.back() > range.high;
  return range;
}

std::vector<Point> DecimateToColumns(const std::vector<Point>& points) {
  constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
  std::vector<Point> out;
  struct Column {
    double index = 0;
    std::size_t lowest = 0, highest = 0;
    bool active = false;
  } column;
  const auto flush = [&] {
    if (!column.active) return;
    out.push_back(points[std::min(column.lowest, column.highest)]);
    if (column.lowest != column.highest)
      out.push_back(points[std::max(column.lowest, column.highest)]);
    column.active = false;
  };
  for (std::size_t i = 0; i < points.size(); ++i) {
    const Point& p = points[i];
    if (!Finite(p.x) || !Finite(p.y)) {
      flush();
      if (!out.empty() && !std::isnan(out.back().y)) out.push_back({kNaN, kNaN});
      continue;
    }
    const double index = std::floor(p.x);
    if (column.active && index == column.index) {
      if (p.y < points[column.lowest].y) column.lowest = i;
      if (p.y > points[column.highest].y) column.highest = i;
    } else {
      flush();
      column = {index, i, i, true};
    }
  }
  flush();
  return out;
}

namespace {

void RenderLineFigure(const LineFigure& figure, const std::string& path, Format format) {
  Canvas canvas(figure.width, figure.height, format, path);
  cairo_t* cr = canvas.cr();
  const double width = figure.width;
  double y = 12;
  if (!figure.title.empty()) {
    DrawText(cr, Fit(cr, figure.title, kTitleFont, width - 24), width / 2, y, kTitleFont,
             kTextColour, HAlign::kCentre, VAlign::kTop);
    y += LineHeight(cr, kTitleFont) + 6;
  }
  const bool shared_legend = SharedSeriesNames(figure);
  if (shared_legend) {
    const std::vector<LegendEntry> entries = SeriesLegend(figure.panels[0]);
    const auto rows = LegendRows(cr, entries, width - 40);
    DrawLegendRows(cr, entries, rows, width / 2, y, width - 40);
    y += kLegendRowHeight * static_cast<double>(rows.size()) + 4;
  }
  const Rect grid{8, y + 4, width - 16, figure.height - y - 12};
  const double cell_w = grid.w / figure.cols, cell_h = grid.h / figure.rows;
  std::vector<std::string> titles;
  for (std::size_t i = 0; i < figure.panels.size(); ++i) {
    const auto row = static_cast<double>(i / static_cast<std::size_t>(figure.cols));
    const auto col = static_cast<double>(i % static_cast<std::size_t>(figure.cols));
    const Rect cell{grid.x + col * cell_w, grid.y + row * cell_h, cell_w, cell_h};
    DrawLinePanel(cr, figure.panels[i], cell, !shared_legend);
    titles.push_back(figure.panels[i].title);
  }
  if (figure.panels.empty()) DrawNote(cr, grid, "no panels");
  canvas.Save(figure.title, PanelTitles(titles));
}

}  // namespace

void DrawLineFigure(const LineFigure& figure, const std::string& path, Format format) {
  ValidateLineFigure(figure, path);
  try {
    RenderLineFigure(figure, path, format);
  } catch (const std::invalid_argument& error) {  // a range the checks let through
    Fail(path, error.what());
  }
}

int TimelineFigureHeight(const TimelineFigure& figure) {
  Measurer measurer;
  return LayOutTimeline(measurer.cr(), figure).height;
}

namespace {

void RenderTimelineFigure(const TimelineFigure& figure, const std::string& path, Format format) {
  TimelineLayout layout;
  {
    Measurer measurer;
    layout = LayOutTimeline(measurer.cr(), figure);
  }
  if (layout.height > 20000) {
    Fail(path, "the figure would be " + std::to_string(layout.height) +
                   " pixels tall (at most 20000); use fewer panels or a smaller panel_height");
  }
  Canvas canvas(figure.width, layout.height, format, path);
  cairo_t* cr = canvas.cr();
  const double width = figure.width;

  if (!figure.title.empty()) {
    DrawText(cr, Fit(cr, figure.title, kTitleFont, width - 24), width / 2, layout.title_top,
             kTitleFont, kTextColour, HAlign::kCentre, VAlign::kTop);
  }
  DrawLegendRows(cr, layout.legend, layout.legend_rows, width / 2, layout.legend_top, width - 40);

  // The shared time range: the samples, else the marks and windows.
  Extent time_extent;
  for (const TimelinePanel& panel : figure.panels) {
    for (double t : panel.t) {
      if (Finite(t)) time_extent.Add(t);
    }
  }
  if (time_extent.Empty()) {
    for (const TimelinePanel& panel : figure.panels) {
      for (double mark : panel.marks) time_extent.Add(mark);
      for (const Interval& interval : panel.shaded) {
        time_extent.Add(interval.start);
        time_extent.Add(interval.end);
      }
    }
  }
  Axis time;
  if (time_extent.Empty()) {
    time.low = 0;
    time.high = 3600;
  } else if (!(time_extent.high - time_extent.low >
               1e-12 * std::max(1.0, std::fabs(time_extent.low)))) {
    const double half = std::max(60.0, std::fabs(time_extent.low) * 1e-6);
    time.low = time_extent.low - half;
    time.high = time_extent.high + half;
  } else {
    time.low = time_extent.low;
    time.high = time_extent.high;
  }

  // Per-panel value ranges and ticks first: the widest tick label sets the common left edge.
  struct PanelScale {
    Axis y;
    AxisTicks ticks;
    bool has_data = false;
  };
  std::vector<PanelScale> scales(figure.panels.size());
  const double plot_h = figure.panel_height - layout.panel_title_height - 12;
  double widest_label = 0;
  bool any_y_label = false;
  for (std::size_t p = 0; p < figure.panels.size(); ++p) {
    const TimelinePanel& panel = figure.panels[p];
    scales[p].has_data = !DrawnValues(panel).empty();
    const ValueRange range = PanelValueRange(panel);  // the boundary (0) always shows
    scales[p].y.low = range.low;
    scales[p].y.high = range.high;
    scales[p].ticks = LinearAxisTicks(scales[p].y.low, scales[p].y.high,
                                      std::clamp(static_cast<int>(plot_h / 35), 2, 8));
    for (const std::string& label : scales[p].ticks.labels) {
      widest_label = std::max(widest_label, TextWidth(cr, label, kTickFont));
    }
    any_y_label = any_y_label || !panel.y_label.empty();
  }
  const double block_left = 10;
  double left = block_left + widest_label + kTickLength + 6;
  if (any_y_label) left += LineHeight(cr, kAxisLabelFont) + 6;
  const double right = std::max(width - 24, left + 10);
  time.pixel_low = left;
  time.pixel_high = right;
  const AxisTicks time_ticks = FitHorizontalTicks(cr, time, [&](int target) {
    const TimeTicks ticks =
        TimeAxisTicks(time.low, time.high, std::max(3, target), figure.time_labels);
    return AxisTicks{ticks.values, ticks.labels, ticks.second_labels};
  });

  double block_top = layout.panels_top;
  std::vector<std::string> titles;
  for (std::size_t p = 0; p < figure.panels.size(); ++p) {
    const Rect plot{left, block_top + layout.panel_title_height, right - left, plot_h};
    scales[p].y.pixel_low = plot.Bottom();
    scales[p].y.pixel_high = plot.y;
    DrawTimelinePanel(cr, figure.panels[p], time, time_ticks, plot, scales[p].y, scales[p].ticks,
                      block_left, scales[p].has_data, figure.learning_label);
    titles.push_back(figure.panels[p].title);
    block_top += figure.panel_height;
  }
  const Rect last_plot{left, block_top - figure.panel_height + layout.panel_title_height,
                       right - left, plot_h};
  if (figure.panels.empty()) {
    DrawNote(cr, last_plot, "no streams");
  } else {
    const double used = DrawXTickLabels(cr, last_plot, time, time_ticks, 4, width - 4);
    std::string label;
    if (figure.time_labels == TimeLabels::kUtc) {
      label = time_ticks.second_labels.empty() ? "date (UTC)" : "time (UTC)";
    } else {
      label = std::string("time since ") + FormatUtc(time.low, "%Y-%m-%d %H:%M:%S") + " UTC (" +
              ElapsedUnitFor(time.high - time.low).name + ")";
    }
    DrawText(cr, label, left + (right - left) / 2, last_plot.Bottom() + used + 6, kAxisLabelFont,
             kTextColour, HAlign::kCentre, VAlign::kTop);
  }
  // cairo writes words as glyph outlines: the key goes into the SVG's description too.
  std::string key;
  for (const LegendEntry& entry : layout.legend) key += (key.empty() ? "" : ", ") + entry.label;
  const std::string panels = PanelTitles(titles);
  canvas.Save(figure.title, panels + (panels.empty() || key.empty() ? "" : "; ") +
                                (key.empty() ? "" : "key: " + key));
}

}  // namespace

void DrawTimelineFigure(const TimelineFigure& figure, const std::string& path, Format format) {
  ValidateTimelineFigure(figure, path);
  try {
    RenderTimelineFigure(figure, path, format);
  } catch (const std::invalid_argument& error) {
    Fail(path, error.what());
  }
}

RasterImage ReadPng(const std::string& path) {
  cairo_surface_t* surface = cairo_image_surface_create_from_png(path.c_str());
  const cairo_status_t status = cairo_surface_status(surface);
  if (status != CAIRO_STATUS_SUCCESS) {
    cairo_surface_destroy(surface);
    Fail(path, std::string("cannot read as PNG: ") + cairo_status_to_string(status));
  }
  cairo_surface_flush(surface);
  RasterImage image;
  image.width = cairo_image_surface_get_width(surface);
  image.height = cairo_image_surface_get_height(surface);
  const int stride = cairo_image_surface_get_stride(surface);
  const cairo_format_t format = cairo_image_surface_get_format(surface);
  const unsigned char* data = cairo_image_surface_get_data(surface);
  image.pixels.resize(static_cast<std::size_t>(image.width) *
                      static_cast<std::size_t>(image.height));
  for (int row = 0; row < image.height; ++row) {
    const auto* pixels = reinterpret_cast<const std::uint32_t*>(data + row * stride);
    for (int col = 0; col < image.width; ++col) {
      std::uint32_t argb = pixels[col];
      if (format == CAIRO_FORMAT_ARGB32) {
        // Premultiplied: over white, each channel gains (255 - alpha).
        const std::uint32_t missing = 255 - (argb >> 24);
        std::uint32_t out = 0;
        for (int shift : {16, 8, 0}) {
          out |= std::min<std::uint32_t>(255, ((argb >> shift) & 0xFF) + missing) << shift;
        }
        argb = out;
      }
      image.pixels[static_cast<std::size_t>(row) * static_cast<std::size_t>(image.width) +
                   static_cast<std::size_t>(col)] = argb & 0xFFFFFF;
    }
  }
  cairo_surface_destroy(surface);
  return image;
}

}  // namespace nuwatch::charts
