#include "charts/charts.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <cmath>
#include <cstdint>
#include <cstdio>
#include <fstream>
#include <iterator>
#include <limits>
#include <random>
#include <set>
#include <sstream>
#include <stdexcept>
#include <string>
#include <utility>
#include <vector>

namespace nuwatch::charts {
namespace {

using ::testing::HasSubstr;

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr std::uint32_t kWhite = 0xFFFFFF;

std::string TempPath(const std::string& name) { return ::testing::TempDir() + "charts_" + name; }

std::string ReadBytes(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  return std::string(std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>());
}

std::uint32_t BigEndian32(const std::string& bytes, std::size_t offset) {
  std::uint32_t value = 0;
  for (std::size_t i = 0; i < 4; ++i) {
    value = (value << 8) | static_cast<unsigned char>(bytes[offset + i]);
  }
  return value;
}

// PNG layout (RFC 2083 / ISO 15948): the 8-byte signature 89 50 4E 47 0D 0A 1A 0A, then the
// first chunk, which must be IHDR: length (4 bytes), type "IHDR" at offset 12, width at offset 16
// and height at offset 20, both big-endian.
void ExpectPngHeader(const std::string& path, std::uint32_t width, std::uint32_t height) {
  const std::string bytes = ReadBytes(path);
  ASSERT_GE(bytes.size(), 24u) << path;
  EXPECT_EQ(bytes.substr(0, 8), std::string("\x89PNG\r\n\x1a\n", 8)) << path;
  EXPECT_EQ(bytes.substr(12, 4), "IHDR") << path;
  EXPECT_EQ(BigEndian32(bytes, 16), width) << path;
  EXPECT_EQ(BigEndian32(bytes, 20), height) << path;
}

// An independent XML parser (Python's expat through ElementTree) reads each SVG and reports
// whether it parsed, the root element, its size attributes and the <title> text, a line each.
struct SvgFacts {
  bool parsed = false;
  std::string root, width, height, title;
};

std::vector<SvgFacts> ReadSvgs(const std::vector<std::string>& paths) {
  const std::string script_path = TempPath("read_svg.py");
  {
    std::ofstream script(script_path);
    script << "import sys, xml.etree.ElementTree as ET\n"
              "ns = '{http://www.w3.org/2000/svg}'\n"
              "for path in sys.argv[1:]:\n"
              "    try:\n"
              "        root = ET.parse(path).getroot()\n"
              "    except ET.ParseError:\n"
              "        print('error\\n\\n\\n\\n')\n"
              "        continue\n"
              "    title = root.find(ns + 'title')\n"
              "    text = '' if title is None or title.text is None else title.text\n"
              "    print('ok')\n"
              "    print(root.tag)\n"
              "    print(root.get('width'))\n"
              "    print(root.get('height'))\n"
              "    print(text.replace('\\n', ' '))\n";
  }
  std::string command = std::string(NUWATCH_PYTHON) + " " + script_path;
  for (const std::string& path : paths) command += " '" + path + "'";
  std::vector<SvgFacts> all(paths.size());
  FILE* pipe = popen(command.c_str(), "r");
  if (pipe == nullptr) return all;
  std::string output;
  char buffer[4096];
  while (std::fgets(buffer, sizeof buffer, pipe) != nullptr) output += buffer;
  const int status = pclose(pipe);
  std::istringstream lines(output);
  for (SvgFacts& facts : all) {
    std::string verdict;
    std::getline(lines, verdict);
    std::getline(lines, facts.root);
    std::getline(lines, facts.width);
    std::getline(lines, facts.height);
    std::getline(lines, facts.title);
    facts.parsed = status == 0 && verdict == "ok";
  }
  return all;
}

SvgFacts ReadSvg(const std::string& path) { return ReadSvgs({path})[0]; }

std::size_t CountInRow(const RasterImage& image, int y, std::uint32_t colour) {
  std::size_t count = 0;
  for (int x = 0; x < image.width; ++x) count += image.At(x, y) == colour ? 1 : 0;
  return count;
}

std::size_t CountInColumn(const RasterImage& image, int x, std::uint32_t colour) {
  std::size_t count = 0;
  for (int y = 0; y < image.height; ++y) count += image.At(x, y) == colour ? 1 : 0;
  return count;
}

// The row (or column) holding the most pixels of exactly this colour, and how many.
std::pair<int, std::size_t> BestRow(const RasterImage& image, std::uint32_t colour) {
  std::pair<int, std::size_t> best{-1, 0};
  for (int y = 0; y < image.height; ++y) {
    const std::size_t count = CountInRow(image, y, colour);
    if (count > best.second) best = {y, count};
  }
  return best;
}

std::pair<int, std::size_t> BestColumn(const RasterImage& image, std::uint32_t colour) {
  std::pair<int, std::size_t> best{-1, 0};
  for (int x = 0; x < image.width; ++x) {
    const std::size_t count = CountInColumn(image, x, colour);
    if (count > best.second) best = {x, count};
  }
  return best;
}

std::size_t CountColour(const RasterImage& image, std::uint32_t colour) {
  std::size_t count = 0;
  for (std::uint32_t pixel : image.pixels) count += pixel == colour ? 1 : 0;
  return count;
}

int Channel(std::uint32_t rgb, int shift) { return static_cast<int>((rgb >> shift) & 0xFF); }

bool Near(std::uint32_t a, std::uint32_t b, int tolerance) {
  for (int shift : {16, 8, 0}) {
    if (std::abs(Channel(a, shift) - Channel(b, shift)) > tolerance) return false;
  }
  return true;
}

// Source-over compositing of colour at alpha onto white (Porter & Duff, 1984): each channel is
// alpha * c + (1 - alpha) * 255.
std::uint32_t OverWhite(std::uint32_t colour, double alpha) {
  std::uint32_t out = 0;
  for (int shift : {16, 8, 0}) {
    const double c = alpha * Channel(colour, shift) + (1 - alpha) * 255;
    out |= static_cast<std::uint32_t>(std::lround(c)) << shift;
  }
  return out;
}

// Blue dominates: the timeline's value line, antialiased or not, and nothing else we draw
// (orange shade, vermillion marks, greys and black all have blue <= red).
bool Bluish(std::uint32_t rgb) { return Channel(rgb, 0) - Channel(rgb, 16) > 60; }

// ---- Builders (the structs are aggregates; these keep the tests short) --------------------

Series MakeSeries(std::string name, std::vector<double> x = {}, std::vector<double> y = {}) {
  Series series;
  series.name = std::move(name);
  series.x = std::move(x);
  series.y = std::move(y);
  return series;
}

LinePanel MakePanel(std::string title, std::vector<Series> series = {}, bool log_x = false,
                    std::string x_label = "x", std::string y_label = "y") {
  LinePanel panel;
  panel.title = std::move(title);
  panel.x_label = std::move(x_label);
  panel.y_label = std::move(y_label);
  panel.log_x = log_x;
  panel.series = std::move(series);
  return panel;
}

TimelinePanel MakeTimeline(std::string title, std::vector<double> t = {},
                           std::vector<double> value = {}) {
  TimelinePanel panel;
  panel.title = std::move(title);
  panel.t = std::move(t);
  panel.value = std::move(value);
  return panel;
}

// ---- Ticks ----------------------------------------------------------------------------------

// Heckbert's rules (Graphics Gems, 1990, "Nice numbers for graph labels"; thresholds recalled from
// memory): with rounding, the fraction f of x / 10^floor(log10 x) becomes 1 if f < 1.5, 2 if
// f < 3, 5 if f < 7, else 10; without rounding, the smallest of 1, 2, 5, 10 not below f.
TEST(NiceNumber, FollowsHeckbertsRules) {
  EXPECT_DOUBLE_EQ(NiceNumber(0.25, true), 0.2);   // f = 2.5 < 3
  EXPECT_DOUBLE_EQ(NiceNumber(0.25, false), 0.5);  // 2 < 2.5 <= 5
  EXPECT_DOUBLE_EQ(NiceNumber(1.4, true), 1);
  EXPECT_DOUBLE_EQ(NiceNumber(1.5, true), 2);    // 1.5 is not < 1.5
  EXPECT_DOUBLE_EQ(NiceNumber(0.3, true), 0.5);  // f = 3 exactly, despite 0.3 / 0.1 < 3 in doubles
  EXPECT_DOUBLE_EQ(NiceNumber(6.9, true), 5);
  EXPECT_DOUBLE_EQ(NiceNumber(7, true), 10);
  EXPECT_DOUBLE_EQ(NiceNumber(100.9, false), 200);
  EXPECT_DOUBLE_EQ(NiceNumber(1000, false), 1000);
  EXPECT_DOUBLE_EQ(NiceNumber(20.18, true), 20);
  EXPECT_DOUBLE_EQ(NiceNumber(0.00042, true), 0.0005);
  EXPECT_THROW(NiceNumber(0, true), std::invalid_argument);
  EXPECT_THROW(NiceNumber(-1, false), std::invalid_argument);
}

TEST(LinearTicks, HandWorkedExamples) {
  // [0, 1], 6 ticks: raw step 1 / 5 = 0.2, nice 0.2; multiples 0, 0.2, ..., 1.
  Ticks unit = LinearTicks(0, 1, 6);
  EXPECT_DOUBLE_EQ(unit.step, 0.2);
  EXPECT_EQ(unit.fraction_digits, 1);
  ASSERT_EQ(unit.values.size(), 6u);
  for (std::size_t i = 0; i < 6; ++i) EXPECT_NEAR(unit.values[i], 0.2 * i, 1e-12);

  // [-3.7, 97.2], 6 ticks: raw 100.9 / 5 = 20.18 -> 20; multiples of 20 inside: 0 .. 80.
  Ticks wide = LinearTicks(-3.7, 97.2, 6);
  EXPECT_DOUBLE_EQ(wide.step, 20);
  EXPECT_EQ(wide.fraction_digits, 0);
  EXPECT_EQ(wide.values, (std::vector<double>{0, 20, 40, 60, 80}));

  // [0.0012, 0.0047], 4 ticks: raw 0.0035 / 3 = 0.00117 -> 0.001; inside: 0.002, 0.003, 0.004.
  Ticks small = LinearTicks(0.0012, 0.0047, 4);
  EXPECT_DOUBLE_EQ(small.step, 0.001);
  EXPECT_EQ(small.fraction_digits, 3);
  ASSERT_EQ(small.values.size(), 3u);
  EXPECT_NEAR(small.values[0], 0.002, 1e-15);
  EXPECT_NEAR(small.values[2], 0.004, 1e-15);

  EXPECT_THROW(LinearTicks(1, 1, 5), std::invalid_argument);
  EXPECT_THROW(LinearTicks(0, kNaN, 5), std::invalid_argument);
  EXPECT_THROW(LinearTicks(0, 1, 1), std::invalid_argument);
}

// Properties that follow from the definition: the step is 1, 2 or 5 times a power of ten; every
// tick is a multiple of it inside the range; and since rounding to a nice number changes the raw
// step (high - low) / (n - 1) by a factor in (2/3, 5/3], there are at least floor(3 (n - 1) / 5)
// and at most floor(3 (n - 1) / 2) + 1 ticks.
TEST(LinearTicks, PropertiesOverRandomRanges) {
  std::mt19937 rng(20260301);
  std::uniform_real_distribution<double> exponent(-6, 8), unit(-1, 1);
  std::uniform_int_distribution<int> count(2, 12);
  for (int trial = 0; trial < 2000; ++trial) {
    const double scale = std::pow(10.0, exponent(rng));
    double low = unit(rng) * scale, high = unit(rng) * scale;
    if (low > high) std::swap(low, high);
    if (!(high - low > scale * 1e-3)) continue;
    const int n = count(rng);
    const Ticks ticks = LinearTicks(low, high, n);
    const double power = std::pow(10.0, std::floor(std::log10(ticks.step) + 1e-9));
    const double mantissa = ticks.step / power;
    EXPECT_TRUE(std::fabs(mantissa - 1) < 1e-9 || std::fabs(mantissa - 2) < 1e-9 ||
                std::fabs(mantissa - 5) < 1e-9)
        << "step " << ticks.step;
    ASSERT_GE(ticks.values.size(), static_cast<std::size_t>(3 * (n - 1) / 5))
        << low << " " << high << " " << n;
    EXPECT_LE(ticks.values.size(), static_cast<std::size_t>(3 * (n - 1) / 2 + 1))
        << low << " " << high << " " << n;
    for (std::size_t i = 0; i < ticks.values.size(); ++i) {
      const double v = ticks.values[i];
      EXPECT_GE(v, low - 1e-9 * ticks.step);
      EXPECT_LE(v, high + 1e-9 * ticks.step);
      EXPECT_NEAR(v / ticks.step, std::round(v / ticks.step), 1e-6);
      if (i > 0) {
        EXPECT_NEAR(v - ticks.values[i - 1], ticks.step, 1e-9 * ticks.step);
      }
    }
  }
}

// ---- Palette --------------------------------------------------------------------------------

// Okabe & Ito, "Color Universal Design" (2008), as the palette is commonly quoted (hex values from
// memory): orange E69F00, sky blue 56B4E9, bluish green 009E73, yellow F0E442, blue 0072B2,
// vermillion D55E00, reddish purple CC79A7.
TEST(Palette, IsOkabeIto) {
  const std::set<std::uint32_t> okabe_ito = {0xE69F00, 0x56B4E9, 0x009E73, 0xF0E442,
                                             0x0072B2, 0xD55E00, 0xCC79A7, 0x000000};
  std::set<std::uint32_t> used;
  for (std::size_t i = 0; i < 7; ++i) {
    EXPECT_TRUE(okabe_ito.count(SeriesColour(i))) << std::hex << SeriesColour(i);
    used.insert(SeriesColour(i));
  }
  EXPECT_EQ(used.size(), 7u);  // seven different colours before any repeats
  EXPECT_EQ(SeriesColour(0), 0x0072B2u);
  EXPECT_EQ(SeriesColour(1), 0xE69F00u);
  EXPECT_EQ(SeriesColour(7), SeriesColour(0));
  EXPECT_TRUE(okabe_ito.count(kTimelineValueColour));
  EXPECT_TRUE(okabe_ito.count(kShadeColour));
  EXPECT_TRUE(okabe_ito.count(kMarkColour));
}

TEST(FormatFromPath, ReadsTheExtension) {
  EXPECT_EQ(FormatFromPath("report/nu.png"), Format::kPng);
  EXPECT_EQ(FormatFromPath("NU.SVG"), Format::kSvg);
  EXPECT_EQ(FormatFromPath("nu.pdf"), std::nullopt);
  EXPECT_EQ(FormatFromPath("png"), std::nullopt);
}

// ---- Line figures ---------------------------------------------------------------------------

LineFigure TuningFigure() {
  LineFigure figure;
  figure.title = "Tuning nu (invented data)";
  figure.cols = 3;
  const std::vector<double> nus = {0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2};
  LinePanel precision = MakePanel("precision", {}, true, "nu", "precision");
  LinePanel recall = MakePanel("recall", {}, true, "nu", "recall");
  LinePanel alarms = MakePanel("false alarms", {}, true, "nu", "false alarms (per day)");
  for (int g = 0; g < 3; ++g) {
    const std::string name = "gamma=" + std::to_string(g + 1);
    Series p = MakeSeries(name), r = MakeSeries(name), f = MakeSeries(name);
    for (double nu : nus) {
      p.x.push_back(nu);
      r.x.push_back(nu);
      f.x.push_back(nu);
      p.y.push_back(1 / (1 + 15 * nu * (g + 1)));
      r.y.push_back(1 - std::exp(-nu * 60 / (g + 1)));
      f.y.push_back(nu * 200 * (1 + 0.3 * g));
    }
    precision.series.push_back(p);
    recall.series.push_back(r);
    alarms.series.push_back(f);
  }
  precision.y_range = recall.y_range = std::pair{0.0, 1.0};
  alarms.reference_y = 5;
  alarms.reference_label = "budget 5 per day";
  figure.panels = {precision, recall, alarms};
  return figure;
}

TEST(DrawLineFigure, PngHasSignatureAndStatedSize) {
  const std::string path = TempPath("tuning.png");
  DrawLineFigure(TuningFigure(), path, Format::kPng);
  ExpectPngHeader(path, 1200, 700);

  LineFigure small = TuningFigure();
  small.width = 640;
  small.height = 480;
  const std::string small_path = TempPath("tuning_small.png");
  DrawLineFigure(small, small_path, Format::kPng);
  ExpectPngHeader(small_path, 640, 480);
  const RasterImage image = ReadPng(small_path);
  EXPECT_EQ(image.width, 640);
  EXPECT_EQ(image.height, 480);
}

TEST(DrawLineFigure, PngIsNotBlank) {
  const std::string path = TempPath("tuning_content.png");
  DrawLineFigure(TuningFigure(), path, Format::kPng);
  const RasterImage image = ReadPng(path);
  std::set<std::uint32_t> colours(image.pixels.begin(), image.pixels.end());
  // Antialiased text and lines in three series colours give many shades.
  EXPECT_GE(colours.size(), 50u);
  const double drawn = 1.0 - static_cast<double>(CountColour(image, kWhite)) /
                                 static_cast<double>(image.pixels.size());
  EXPECT_GT(drawn, 0.01);
  EXPECT_LT(drawn, 0.5);
  for (std::size_t s = 0; s < 3; ++s) EXPECT_GT(CountColour(image, SeriesColour(s)), 500u);
}

TEST(DrawLineFigure, SvgIsWellFormedWithSizeAndTitle) {
  const std::string path = TempPath("tuning.svg");
  LineFigure figure = TuningFigure();
  figure.title = "Precision & recall <nu>";
  DrawLineFigure(figure, path, Format::kSvg);
  const SvgFacts svg = ReadSvg(path);
  ASSERT_TRUE(svg.parsed) << ReadBytes(path).substr(0, 400);
  EXPECT_EQ(svg.root, "{http://www.w3.org/2000/svg}svg");
  EXPECT_THAT(svg.width, ::testing::AnyOf("1200", "1200px"));
  EXPECT_THAT(svg.height, ::testing::AnyOf("700", "700px"));
  EXPECT_EQ(svg.title, "Precision & recall <nu>");
  EXPECT_THAT(ReadBytes(path), HasSubstr("Precision &amp; recall &lt;nu&gt;"));

  // The parser does reject a broken document: the first half of the same file.
  const std::string truncated = TempPath("truncated.svg");
  const std::string bytes = ReadBytes(path);
  std::ofstream(truncated, std::ios::binary) << bytes.substr(0, bytes.size() / 2);
  EXPECT_FALSE(ReadSvg(truncated).parsed);
}

// Horizontal lines at known values: with y fixed to [0, 4], y = 3, 2 and 1 are equally spaced down
// the plot; series B spans half of series A's x range, so its row holds about half as many pixels.
TEST(DrawLineFigure, SeriesColoursLandWhereTheValuesSay) {
  LineFigure figure;
  figure.title = "placement";
  LinePanel panel = MakePanel("rows", {}, false, "x (s)", "y (s)");
  panel.series.push_back({"A", {0, 10}, {1, 1}});
  panel.series.push_back({"B", {0, 5}, {3, 3}});
  panel.y_range = std::pair{0.0, 4.0};
  panel.reference_y = 2;
  figure.panels = {panel};
  const std::string path = TempPath("placement.png");
  DrawLineFigure(figure, path, Format::kPng);
  const RasterImage image = ReadPng(path);

  const auto [row_a, count_a] = BestRow(image, SeriesColour(0));
  const auto [row_b, count_b] = BestRow(image, SeriesColour(1));
  // The reference line is the only pure black: text is dark grey.
  const auto [row_reference, count_reference] = BestRow(image, 0x000000);
  ASSERT_GT(count_a, static_cast<std::size_t>(image.width) / 2);
  ASSERT_GT(count_b, static_cast<std::size_t>(image.width) / 4);
  ASSERT_GT(count_reference, static_cast<std::size_t>(image.width) / 3);  // dashed
  EXPECT_LT(row_b, row_reference);                                        // larger y is higher up
  EXPECT_LT(row_reference, row_a);
  EXPECT_NEAR(row_reference - row_b, row_a - row_reference, 2);
  const double ratio = static_cast<double>(count_b) / static_cast<double>(count_a);
  EXPECT_NEAR(ratio, 0.5, 0.06);
}

// Vertical lines at x = 1, 10 and 100: on a log axis the three are equally spaced; on a linear
// axis the gap from 1 to 10 is 9/99 of the gap from 1 to 100.
TEST(DrawLineFigure, LogAxisSpacesDecadesEqually) {
  auto columns = [](bool log_x, const std::string& path) {
    LineFigure figure;
    LinePanel panel = MakePanel("verticals", {}, log_x);
    for (double x : {1.0, 10.0, 100.0}) panel.series.push_back({"", {x, x}, {0, 1}});
    figure.panels = {panel};
    DrawLineFigure(figure, path, Format::kPng);
    const RasterImage image = ReadPng(path);
    return std::vector<int>{BestColumn(image, SeriesColour(0)).first,
                            BestColumn(image, SeriesColour(1)).first,
                            BestColumn(image, SeriesColour(2)).first};
  };
  const std::vector<int> log = columns(true, TempPath("log.png"));
  EXPECT_LT(log[0], log[1]);
  EXPECT_NEAR(log[1] - log[0], log[2] - log[1], 2);
  const std::vector<int> linear = columns(false, TempPath("linear.png"));
  EXPECT_NEAR(static_cast<double>(linear[1] - linear[0]) / (linear[2] - linear[0]), 9.0 / 99, 0.01);
}

// y = 1 at x = 0..10 with y[5] missing: the segments 4-5 and 5-6 are not drawn, so the line's row
// keeps about 8 of its 10 segments.
TEST(DrawLineFigure, NanBreaksTheLine) {
  auto row_count = [](bool gap, const std::string& path) {
    LineFigure figure;
    Series series = MakeSeries("s");
    for (int i = 0; i <= 10; ++i) {
      series.x.push_back(i);
      series.y.push_back(gap && i == 5 ? kNaN : 1.0);
    }
    figure.panels = {MakePanel("gap", {series})};
    DrawLineFigure(figure, path, Format::kPng);
    return BestRow(ReadPng(path), SeriesColour(0)).second;
  };
  const double whole = static_cast<double>(row_count(false, TempPath("whole.png")));
  const double broken = static_cast<double>(row_count(true, TempPath("broken.png")));
  EXPECT_NEAR(broken / whole, 0.8, 0.05);
}

struct DegenerateCase {
  const char* name;
  LinePanel panel;
};

std::vector<DegenerateCase> DegenerateLinePanels() {
  const double inf = std::numeric_limits<double>::infinity();
  return {
      {"no_series", MakePanel("none")},
      {"empty_series", MakePanel("empty", {MakeSeries("e")})},
      {"all_nan", MakePanel("nan", {MakeSeries("n", {1, 2}, {kNaN, kNaN})})},
      {"single_point", MakePanel("one", {MakeSeries("p", {3}, {7})})},
      {"constant_y", MakePanel("flat", {MakeSeries("c", {1, 2, 3}, {5, 5, 5})})},
      {"constant_x", MakePanel("upright", {MakeSeries("c", {2, 2}, {1, 3})})},
      {"log_non_positive", MakePanel("log", {MakeSeries("l", {-1, 0}, {1, 2})}, true)},
      {"infinite_and_huge",
       MakePanel("big", {MakeSeries("b", {0, 1, 2, 3}, {inf, 1e308, -1e308, 1})})},
      {"bad_utf8_name", MakePanel("\xff\xfe", {MakeSeries("\xc3", {1, 2}, {1, 2})})},
  };
}

TEST(DrawLineFigure, DegenerateInputsGiveValidFiles) {
  std::vector<std::string> svgs, names;
  for (const DegenerateCase& test_case : DegenerateLinePanels()) {
    SCOPED_TRACE(test_case.name);
    LineFigure figure;
    figure.title = test_case.name;
    figure.panels = {test_case.panel};
    const std::string png = TempPath(std::string(test_case.name) + ".png");
    const std::string svg = TempPath(std::string(test_case.name) + ".svg");
    ASSERT_NO_THROW(DrawLineFigure(figure, png, Format::kPng));
    ASSERT_NO_THROW(DrawLineFigure(figure, svg, Format::kSvg));
    ExpectPngHeader(png, 1200, 700);
    EXPECT_EQ(ReadPng(png).width, 1200);
    svgs.push_back(svg);
    names.push_back(test_case.name);
  }
  const std::vector<SvgFacts> facts = ReadSvgs(svgs);
  for (std::size_t i = 0; i < svgs.size(); ++i) {
    EXPECT_TRUE(facts[i].parsed) << svgs[i];
    EXPECT_EQ(facts[i].title, names[i]);
  }
  LineFigure empty;  // no panels at all
  ASSERT_NO_THROW(DrawLineFigure(empty, TempPath("no_panels.png"), Format::kPng));
  ExpectPngHeader(TempPath("no_panels.png"), 1200, 700);
}

TEST(DrawLineFigure, SinglePointAndConstantStillShow) {
  LineFigure figure;
  figure.cols = 2;
  figure.panels = {MakePanel("one", {MakeSeries("p", {3}, {7})}),
                   MakePanel("flat", {MakeSeries("c", {1, 2, 3}, {5, 5, 5})})};
  figure.panels[1].series.insert(figure.panels[1].series.begin(), MakeSeries("unused"));
  const std::string path = TempPath("shows.png");
  DrawLineFigure(figure, path, Format::kPng);
  const RasterImage image = ReadPng(path);
  // The lone point is a marker of series 0's colour (plus its legend sample); the constant series
  // is series 1 of the second panel, a horizontal line across most of that panel.
  EXPECT_GT(CountColour(image, SeriesColour(0)), 40u);
  EXPECT_GT(BestRow(image, SeriesColour(1)).second, static_cast<std::size_t>(image.width) / 3);
}

TEST(DrawLineFigure, InconsistentInputThrowsNamingPathAndSeries) {
  const std::string path = TempPath("bad.png");
  LineFigure figure;
  figure.panels = {MakePanel("recall", {MakeSeries("nu=0.05", {1, 2, 3}, {1, 2})})};
  try {
    DrawLineFigure(figure, path, Format::kPng);
    FAIL() << "expected an exception";
  } catch (const std::runtime_error& error) {
    EXPECT_THAT(error.what(), HasSubstr(path));
    EXPECT_THAT(error.what(), HasSubstr("nu=0.05"));
    EXPECT_THAT(error.what(), HasSubstr("recall"));
  }
  LineFigure crowded;
  crowded.panels.resize(3);
  crowded.rows = crowded.cols = 1;
  EXPECT_THROW(DrawLineFigure(crowded, path, Format::kPng), std::runtime_error);
  LineFigure tiny;
  tiny.width = 10;
  EXPECT_THROW(DrawLineFigure(tiny, path, Format::kPng), std::runtime_error);
  LineFigure reversed;
  reversed.panels = {MakePanel("")};
  reversed.panels[0].y_range = std::pair{1.0, 0.0};
  EXPECT_THROW(DrawLineFigure(reversed, path, Format::kSvg), std::runtime_error);
  LineFigure bad_reference;
  bad_reference.panels = {MakePanel("")};
  bad_reference.panels[0].reference_y = kNaN;
  EXPECT_THROW(DrawLineFigure(bad_reference, path, Format::kPng), std::runtime_error);
}

TEST(DrawLineFigure, UnwritablePathThrowsNamingIt) {
  const std::string path = "/nonexistent-nuwatch-dir/chart.png";
  for (Format format : {Format::kPng, Format::kSvg}) {
    try {
      DrawLineFigure(TuningFigure(), path, format);
      FAIL() << "expected an exception";
    } catch (const std::runtime_error& error) {
      EXPECT_THAT(error.what(), HasSubstr(path));
    }
  }
}

// ---- Timelines ------------------------------------------------------------------------------

constexpr double kStart = 1772323200;  // 2026-03-01T00:00:00Z
constexpr int kPoints = 60000;

// Two invented streams of 60k points 10 s apart (about a week): stream 0 with an incident window
// over the middle third of the time range, stream 1 a ramp with five alarms.
TimelineFigure WeekFigure() {
  TimelineFigure figure;
  figure.title = "Decision values (invented data)";
  TimelinePanel shaded = MakeTimeline("stream-a"), marked = MakeTimeline("stream-b");
  std::mt19937 rng(7);
  std::uniform_real_distribution<double> noise(-0.5, 0.5);
  const double span = (kPoints - 1) * 10.0;
  for (int i = 0; i < kPoints; ++i) {
    const double t = kStart + i * 10.0;
    shaded.t.push_back(t);
    shaded.value.push_back(noise(rng));
    marked.t.push_back(t);
    marked.value.push_back(-1 + 2.0 * i / kPoints);
  }
  shaded.y_range = std::pair{-2.0, 2.0};  // the top quarter stays free of the line
  shaded.shaded = {{kStart + span / 3, kStart + 2 * span / 3}};
  shaded.y_label = marked.y_label = "decision";
  for (int k = 1; k <= 5; ++k) marked.marks.push_back(kStart + span * k / 6);
  figure.panels = {shaded, marked};
  return figure;
}

TEST(DrawTimelineFigure, PngAndSvgHaveTheStatedSize) {
  const TimelineFigure figure = WeekFigure();
  const int height = TimelineFigureHeight(figure);
  EXPECT_GE(height, 2 * figure.panel_height);
  EXPECT_LE(height, 2 * figure.panel_height + 200);
  const std::string png = TempPath("week.png"), svg = TempPath("week.svg");
  DrawTimelineFigure(figure, png, Format::kPng);
  DrawTimelineFigure(figure, svg, Format::kSvg);
  ExpectPngHeader(png, 1200, static_cast<std::uint32_t>(height));
  const SvgFacts facts = ReadSvg(svg);
  ASSERT_TRUE(facts.parsed);
  EXPECT_THAT(facts.width, ::testing::AnyOf("1200", "1200px"));
  EXPECT_THAT(facts.height,
              ::testing::AnyOf(std::to_string(height), std::to_string(height) + "px"));
  EXPECT_EQ(facts.title, figure.title);
  // Decimated to at most two vertices per pixel column: far below the ~20 bytes per point that
  // 120k undecimated vertices would take in SVG path data.
  EXPECT_LT(ReadBytes(svg).size(), 600'000u);
}

TEST(DrawTimelineFigure, ShadeCoversItsShareOfTheTimeAxis) {
  const std::string path = TempPath("week_shade.png");
  DrawTimelineFigure(WeekFigure(), path, Format::kPng);
  const RasterImage image = ReadPng(path);
  const std::uint32_t shade = OverWhite(kShadeColour, kShadeAlpha);
  std::size_t best_row_count = 0;
  for (int y = 0; y < image.height; ++y) {
    std::size_t count = 0;
    for (int x = 0; x < image.width; ++x) count += Near(image.At(x, y), shade, 3) ? 1 : 0;
    best_row_count = std::max(best_row_count, count);
  }
  // The value line runs from the first to the last sample, i.e. across the whole time axis.
  int first_blue = image.width, last_blue = -1;
  for (int y = 0; y < image.height; ++y) {
    for (int x = 0; x < image.width; ++x) {
      if (Bluish(image.At(x, y))) {
        first_blue = std::min(first_blue, x);
        last_blue = std::max(last_blue, x);
      }
    }
  }
  ASSERT_GT(last_blue - first_blue, image.width / 2);
  EXPECT_NEAR(static_cast<double>(best_row_count) / (last_blue - first_blue), 1.0 / 3, 0.03);
}

TEST(DrawTimelineFigure, AlarmMarksAppearOncePerAlarm) {
  const std::string path = TempPath("week_marks.png");
  DrawTimelineFigure(WeekFigure(), path, Format::kPng);
  const RasterImage image = ReadPng(path);
  const int row = BestRow(image, kMarkColour).first;
  ASSERT_GE(row, 0);
  int clusters = 0;
  std::vector<int> centres;
  for (int x = 0; x < image.width; ++x) {
    if (image.At(x, row) == kMarkColour && (x == 0 || image.At(x - 1, row) != kMarkColour)) {
      ++clusters;
      centres.push_back(x);
    }
  }
  EXPECT_EQ(clusters, 5);
  // Alarms at 1/6 .. 5/6 of the range are equally spaced.
  ASSERT_EQ(centres.size(), 5u);
  for (std::size_t k = 2; k < centres.size(); ++k) {
    EXPECT_NEAR(centres[k] - centres[k - 1], centres[1] - centres[0], 2);
  }
}

// One sample in 60k reaches 10 while the rest are 0: drawing every n-th sample would most likely
// miss it, keeping each pixel column's extremes cannot.
TEST(DrawTimelineFigure, DecimationKeepsASingleSpike) {
  auto blue_height = [](bool spike, const std::string& path) {
    TimelineFigure figure;
    figure.value_label = "";  // no legend sample: the only blue is the line
    TimelinePanel panel = MakeTimeline("spike");
    for (int i = 0; i < kPoints; ++i) {
      panel.t.push_back(kStart + i * 10.0);
      panel.value.push_back(spike && i == 31'337 ? 10.0 : 0.0);
    }
    panel.y_range = std::pair{-1.0, 11.0};
    figure.panels = {panel};
    DrawTimelineFigure(figure, path, Format::kPng);
    const RasterImage image = ReadPng(path);
    int top = image.height, bottom = -1;
    for (int y = 0; y < image.height; ++y) {
      for (int x = 0; x < image.width; ++x) {
        if (Bluish(image.At(x, y))) {
          top = std::min(top, y);
          bottom = std::max(bottom, y);
        }
      }
    }
    return bottom - top;
  };
  // The plot is about 190 px tall for 12 units, so 10 units is well over 100 px.
  EXPECT_GT(blue_height(true, TempPath("spike.png")), 100);
  EXPECT_LT(blue_height(false, TempPath("flat.png")), 10);
}

TEST(DrawTimelineFigure, DegenerateInputsGiveValidFiles) {
  std::vector<std::pair<const char*, TimelineFigure>> cases;
  cases.push_back({"no_panels", TimelineFigure{}});
  TimelineFigure empty;
  empty.panels.resize(2);
  empty.panels[1].marks = {100};
  empty.panels[1].shaded = {{50, 70}, {60, 80}};
  cases.push_back({"empty_panels", empty});
  TimelineFigure single;
  single.panels = {MakeTimeline("one", {kStart}, {0.5})};
  cases.push_back({"single_point", single});
  TimelineFigure nan;
  nan.panels = {MakeTimeline("nan", {kStart, kNaN, kStart + 20}, {kNaN, 1, kNaN})};
  nan.time_labels = TimeLabels::kElapsed;
  cases.push_back({"nan", nan});
  TimelineFigure constant;
  constant.panels = {MakeTimeline("flat", {0, 1, 2, 3}, {2, 2, 2, 2})};
  constant.panels[0].marks = {-5, 1.5, 99};  // two outside the time range
  cases.push_back({"constant", constant});
  std::vector<std::string> svgs;
  for (const auto& [name, figure] : cases) {
    SCOPED_TRACE(name);
    const std::string png = TempPath(std::string("timeline_") + name + ".png");
    const std::string svg = TempPath(std::string("timeline_") + name + ".svg");
    ASSERT_NO_THROW(DrawTimelineFigure(figure, png, Format::kPng));
    ASSERT_NO_THROW(DrawTimelineFigure(figure, svg, Format::kSvg));
    ExpectPngHeader(png, 1200, static_cast<std::uint32_t>(TimelineFigureHeight(figure)));
    svgs.push_back(svg);
  }
  const std::vector<SvgFacts> facts = ReadSvgs(svgs);
  for (std::size_t i = 0; i < svgs.size(); ++i) EXPECT_TRUE(facts[i].parsed) << svgs[i];
}

TEST(DrawTimelineFigure, InconsistentInputThrowsNamingPath) {
  const std::string path = TempPath("bad_timeline.svg");
  auto expect_error = [&](const TimelineFigure& figure, const std::string& detail) {
    try {
      DrawTimelineFigure(figure, path, Format::kSvg);
      ADD_FAILURE() << "expected an exception mentioning " << detail;
    } catch (const std::runtime_error& error) {
      EXPECT_THAT(error.what(), HasSubstr(path));
      EXPECT_THAT(error.what(), HasSubstr(detail));
    }
  };
  TimelineFigure mismatch;
  mismatch.panels = {MakeTimeline("db", {1, 2, 3}, {1, 2})};
  expect_error(mismatch, "db");
  TimelineFigure unordered;
  unordered.panels = {MakeTimeline("api", {1, 3, 2}, {0, 0, 0})};
  expect_error(unordered, "t[2]");
  TimelineFigure reversed;
  reversed.panels = {MakeTimeline("win", {1, 2}, {0, 0})};
  reversed.panels[0].shaded = {{5, 4}};
  expect_error(reversed, "shaded interval 1");
  TimelineFigure short_panels;
  short_panels.panel_height = 10;
  expect_error(short_panels, "panel_height");

  const std::string unwritable = "/nonexistent-nuwatch-dir/timeline.png";
  try {
    DrawTimelineFigure(WeekFigure(), unwritable, Format::kPng);
    FAIL() << "expected an exception";
  } catch (const std::runtime_error& error) {
    EXPECT_THAT(error.what(), HasSubstr(unwritable));
  }
}

TEST(ReadPng, ThrowsNamingPathForNonPng) {
  const std::string path = TempPath("not_a_png.png");
  std::ofstream(path) << "plain text";
  try {
    ReadPng(path);
    FAIL() << "expected an exception";
  } catch (const std::runtime_error& error) {
    EXPECT_THAT(error.what(), HasSubstr(path));
  }
}

// ---- Issue 11 section 4: fitted ratio axes, three ticks, robust ranges, learning, SVG size ----

// Heckbert's loose labelling ("Nice numbers for graph labels", Graphics Gems, 1990; worked example
// recalled from memory): data 105..543 with 5 ticks gives range NiceNumber(438, false) = 500, step
// NiceNumber(500 / 4, true) = 100 and a top label of 600. For [0, max] the same rules apply to
// max: 543 -> NiceNumber(543, false) = 1000, step NiceNumber(250, true) = 200, top 600.
TEST(RatioAxisRange, HeckbertsLooseTopWithZeroInView) {
  auto top_of = [](const std::vector<double>& values) {
    const auto [low, high] = RatioAxisRange(values);
    EXPECT_NEAR(low, -0.03 / 1.03 * high, 1e-12);  // 3% of the top below 0
    return high / 1.03;
  };
  EXPECT_NEAR(top_of({543, 105}), 600, 1e-9);
  // 0.05: NiceNumber(0.05, false) = 0.05, step NiceNumber(0.0125, true) = 0.01, top 0.05.
  EXPECT_NEAR(top_of({0.01, 0.05, 0.03, kNaN}), 0.05, 1e-12);
  // 0.73: range 1, step NiceNumber(0.25, true) = 0.2, top ceil(3.65) * 0.2 = 0.8.
  EXPECT_NEAR(top_of({0.2, 0.73}), 0.8, 1e-12);
  EXPECT_NEAR(top_of({1.0, 0.4}), 1.0, 1e-12);   // full ratios keep the 0-1 axis
  EXPECT_NEAR(top_of({0.0, kNaN}), 1.0, 1e-12);  // nothing positive: the 0-1 axis
  EXPECT_NEAR(top_of({}), 1.0, 1e-12);
  // The case: a sweep whose best precision is 0.05 gets an axis below 0.1.
  const auto [low, high] = RatioAxisRange({0.002, 0.05, 0.017});
  EXPECT_LT(high, 0.1);
  EXPECT_LE(low, 0.0);
}

// End to end: precisions 0.01..0.05 drawn on the fitted axis fill most of the plot's height; on
// the old fixed -0.03..1.03 axis the same points sit within a few per cent of it.
TEST(DrawLineFigure, SmallRatiosFillThePanelOnAFittedAxis) {
  const std::vector<double> nu = {0.01, 0.02, 0.05, 0.1}, precision = {0.01, 0.02, 0.05, 0.03};
  auto blue_extent = [&](std::pair<double, double> range, const std::string& path) {
    LineFigure figure;
    figure.width = 500;
    figure.height = 400;
    LinePanel panel = MakePanel("precision", {MakeSeries("", nu, precision)}, true);
    panel.y_range = range;
    figure.panels = {panel};
    DrawLineFigure(figure, path, Format::kPng);
    const RasterImage image = ReadPng(path);
    int top = image.height, bottom = -1;
    for (int y = 0; y < image.height; ++y) {
      if (CountInRow(image, y, SeriesColour(0)) > 0) {
        top = std::min(top, y);
        bottom = std::max(bottom, y);
      }
    }
    return bottom - top;
  };
  const int fitted = blue_extent(RatioAxisRange(precision), TempPath("ratio_fitted.png"));
  const int fixed = blue_extent({-0.03, 1.03}, TempPath("ratio_fixed.png"));
  EXPECT_GT(fitted, 200);  // the plot is about 300 px tall
  EXPECT_LT(fixed, 30);
}

TEST(LinearTicksAtLeast, HandWorkedExamples) {
  // [0, 1], target 2: LinearTicks gives step 1 (0 and 1); lowered to 0.5: 0, 0.5, 1.
  const Ticks unit = LinearTicksAtLeast(0, 1, 2, 3);
  EXPECT_DOUBLE_EQ(unit.step, 0.5);
  EXPECT_EQ(unit.values, (std::vector<double>{0, 0.5, 1}));
  EXPECT_EQ(unit.fraction_digits, 1);
  // [0.1, 0.95], target 2: step 1 has no multiple inside, 0.5 one, 0.2 four (0.2 .. 0.8).
  const Ticks inner = LinearTicksAtLeast(0.1, 0.95, 2, 3);
  EXPECT_DOUBLE_EQ(inner.step, 0.2);
  ASSERT_EQ(inner.values.size(), 4u);
  EXPECT_NEAR(inner.values[3], 0.8, 1e-15);
  // Enough already: the same as LinearTicks.
  EXPECT_EQ(LinearTicksAtLeast(0, 1, 6, 3).values, LinearTicks(0, 1, 6).values);
  EXPECT_THROW(LinearTicksAtLeast(0, 1, 5, 0), std::invalid_argument);
  EXPECT_THROW(LinearTicksAtLeast(1, 0, 5, 3), std::invalid_argument);
}

TEST(LinearTicksAtLeast, AlwaysThreeNiceTicksInsideTheRange) {
  std::mt19937 rng(11);
  std::uniform_real_distribution<double> exponent(-6, 8), unit(-1, 1);
  std::uniform_int_distribution<int> count(2, 12);
  for (int trial = 0; trial < 2000; ++trial) {
    const double scale = std::pow(10.0, exponent(rng));
    double low = unit(rng) * scale, high = unit(rng) * scale;
    if (low > high) std::swap(low, high);
    if (!(high - low > scale * 1e-3)) continue;
    const Ticks ticks = LinearTicksAtLeast(low, high, count(rng), 3);
    ASSERT_GE(ticks.values.size(), 3u) << low << " " << high;
    const double power = std::pow(10.0, std::floor(std::log10(ticks.step) + 1e-9));
    const double mantissa = ticks.step / power;
    EXPECT_TRUE(std::fabs(mantissa - 1) < 1e-9 || std::fabs(mantissa - 2) < 1e-9 ||
                std::fabs(mantissa - 5) < 1e-9)
        << "step " << ticks.step;
    for (double v : ticks.values) {
      EXPECT_GE(v, low - 1e-9 * ticks.step);
      EXPECT_LE(v, high + 1e-9 * ticks.step);
    }
  }
}

// A timeline over two hours from 00:10 UTC with room for 3 ticks: hourly ticks would give only
// 01:00 and 02:00; half-hourly ones give four labels.
TEST(TimeAxisTicks, TwoHoursGetAtLeastThreeLabels) {
  const double from = kStart + 600, to = kStart + 600 + 7200;
  const TimeTicks three = TimeAxisTicks(from, to, 3, TimeLabels::kUtc);
  EXPECT_EQ(three.labels, (std::vector<std::string>{"00:30", "01:00", "01:30", "02:00"}));
  ASSERT_EQ(three.second_labels.size(), 4u);
  EXPECT_EQ(three.second_labels[0], "2026-03-01");  // the date under the first tick of the day
  for (const TimeLabels style : {TimeLabels::kUtc, TimeLabels::kElapsed}) {
    for (double span : {1.5, 59.0, 7200.0, 86400.0 * 7, 86400.0 * 40, 86400.0 * 400}) {
      for (int target = 3; target <= 20; ++target) {
        const TimeTicks ticks = TimeAxisTicks(from, from + span, target, style);
        ASSERT_GE(ticks.values.size(), 3u) << span << " s, target " << target;
        ASSERT_EQ(ticks.labels.size(), ticks.values.size());
        for (const std::string& label : ticks.labels) EXPECT_FALSE(label.empty());
        if (style == TimeLabels::kElapsed) {  // clock labels repeat daily, under their dates
          const std::set<std::string> distinct(ticks.labels.begin(), ticks.labels.end());
          EXPECT_EQ(distinct.size(), ticks.labels.size()) << span << " s, target " << target;
        }
        for (double t : ticks.values) {
          EXPECT_GE(t, from - 1e-6);
          EXPECT_LE(t, from + span + 1e-6);
        }
      }
    }
  }
  EXPECT_THROW(TimeAxisTicks(from, from, 5, TimeLabels::kUtc), std::invalid_argument);
}

// Independent quantiles: numpy's default (method "linear", Hyndman & Fan type 7).
std::pair<double, double> NumpyQuantiles(const std::vector<double>& values) {
  const std::string data = TempPath("quantile_values.txt");
  {
    std::ofstream out(data);
    out.precision(17);
    for (double v : values) out << v << "\n";
  }
  const std::string command = std::string(NUWATCH_PYTHON) +
                              " -c 'import sys, numpy; v = numpy.loadtxt(sys.argv[1]); "
                              "print(repr(numpy.quantile(v, 0.005)), repr(numpy.quantile(v, "
                              "0.995)))' '" +
                              data + "'";
  FILE* pipe = popen(command.c_str(), "r");
  double low = kNaN, high = kNaN;
  if (pipe != nullptr) {
    if (std::fscanf(pipe, "%lf %lf", &low, &high) != 2) low = high = kNaN;
    pclose(pipe);
  }
  return {low, high};
}

TEST(RobustValueRange, OneDeepDipDoesNotSetTheRange) {
  std::vector<double> values;
  for (int i = 0; i <= 10000; ++i) values.push_back(-1 + 2.0 * i / 10000);
  const ValueRange normal = RobustValueRange(values, 0);
  EXPECT_FALSE(normal.clipped);
  EXPECT_LE(normal.low, -1);
  EXPECT_GE(normal.high, 1);
  values[5000] = -1000;
  const ValueRange dipped = RobustValueRange(values, 0);
  EXPECT_TRUE(dipped.clipped);
  EXPECT_GT(dipped.low, -1.5);  // within a small multiple of the normal spread (2)
  EXPECT_LT(dipped.high, 1.5);
  EXPECT_LT(dipped.high - dipped.low, 3);
  // Not rare: 2% of the values that deep is part of the picture, shown whole.
  for (int i = 0; i < 200; ++i) values[static_cast<std::size_t>(i * 50)] = -1000;
  const ValueRange common = RobustValueRange(values, 0);
  EXPECT_FALSE(common.clipped);
  EXPECT_LE(common.low, -1000);
  // The value always shown (the envelope boundary) widens the range.
  EXPECT_LE(RobustValueRange({5, 6, 5.5}, 0).low, 0);
  const ValueRange none = RobustValueRange({kNaN}, 0);
  EXPECT_EQ(none.low, -1);
  EXPECT_EQ(none.high, 1);
}

TEST(RobustValueRange, QuantilesAgreeWithNumpy) {
  std::mt19937 rng(5);
  std::cauchy_distribution<double> heavy(3, 0.5);  // heavy tails: clipping is certain
  std::vector<double> values(4000);
  for (double& v : values) v = heavy(rng);
  const auto [q_low, q_high] = NumpyQuantiles(values);
  ASSERT_TRUE(std::isfinite(q_low) && std::isfinite(q_high)) << "python3 with numpy is needed";
  const ValueRange range = RobustValueRange(values, kNaN);  // nothing else to show
  ASSERT_TRUE(range.clipped);
  const double span = q_high - q_low;
  EXPECT_NEAR(range.low, q_low - 0.05 * span, 1e-9 * span);
  EXPECT_NEAR(range.high, q_high + 0.05 * span, 1e-9 * span);
}

// One sample at -1000 among values in [-1, 1]: the normal variation keeps most of the panel's
// height (the axis follows the robust range), and the dip is marked by a black triangle on the
// bottom edge (with no legend entry here, the only black besides the dashed zero line).
TEST(DrawTimelineFigure, DeepDipIsClippedAndMarked) {
  auto draw = [](bool dip, const std::string& path) {
    TimelineFigure figure;
    figure.clipped_label = "";
    figure.value_label = "";
    TimelinePanel panel = MakeTimeline("dip");
    std::mt19937 rng(3);
    std::uniform_real_distribution<double> noise(-1, 1);
    for (int i = 0; i < 3000; ++i) {
      panel.t.push_back(kStart + i * 60.0);
      panel.value.push_back(dip && i == 2250 ? -1000 : noise(rng));
    }
    figure.panels = {panel};
    DrawTimelineFigure(figure, path, Format::kPng);
    return ReadPng(path);
  };
  const RasterImage with_dip = draw(true, TempPath("dip.png"));
  const RasterImage without = draw(false, TempPath("no_dip.png"));
  // Rows holding the line in the left half (away from the dip at 3/4 of the time axis).
  auto line_rows = [](const RasterImage& image) {
    int rows = 0;
    for (int y = 0; y < image.height; ++y) {
      bool any = false;
      for (int x = 0; x < image.width / 2 && !any; ++x) any = Bluish(image.At(x, y));
      rows += any ? 1 : 0;
    }
    return rows;
  };
  EXPECT_GT(line_rows(with_dip), 100);  // a panel of about 190 px; squashed it would be ~1 px
  EXPECT_NEAR(line_rows(with_dip), line_rows(without), 30);
  const std::size_t black_with = CountColour(with_dip, kClippedColour);
  const std::size_t black_without = CountColour(without, kClippedColour);
  EXPECT_GE(black_with, black_without + 12) << "no triangle marks the clipped dip";
}

// The learning span (no decision values) is a grey band labelled in the key; in the PNG it covers
// its share of the time axis, in the SVG the key names it (cairo writes words as outlines, so the
// description carries them).
TEST(DrawTimelineFigure, LearningSpanIsABandNamedInTheKey) {
  TimelineFigure figure;
  figure.title = "learning (invented data)";
  TimelinePanel panel = MakeTimeline("pump");
  const int points = 4000;
  for (int i = 0; i < points; ++i) {
    panel.t.push_back(kStart + i * 60.0);
    panel.value.push_back(i < points / 4 ? kNaN : std::sin(i / 50.0));
  }
  panel.learning = {{panel.t.front(), panel.t[points / 4]}};
  figure.panels = {panel};
  const std::string png = TempPath("learning.png"), svg = TempPath("learning.svg");
  DrawTimelineFigure(figure, png, Format::kPng);
  DrawTimelineFigure(figure, svg, Format::kSvg);
  const RasterImage image = ReadPng(png);
  const std::uint32_t band = OverWhite(kLearningColour, kLearningAlpha);
  std::size_t best_row = 0;
  for (int y = 0; y < image.height; ++y) {
    std::size_t count = 0;
    for (int x = 0; x < image.width; ++x) count += Near(image.At(x, y), band, 3) ? 1 : 0;
    best_row = std::max(best_row, count);
  }
  int first_blue = image.width, last_blue = -1;
  for (int y = 0; y < image.height; ++y) {
    for (int x = 0; x < image.width; ++x) {
      if (Bluish(image.At(x, y))) {
        first_blue = std::min(first_blue, x);
        last_blue = std::max(last_blue, x);
      }
    }
  }
  // The line spans the scored three quarters; the band the learning quarter before it.
  ASSERT_GT(last_blue - first_blue, image.width / 3);
  EXPECT_NEAR(static_cast<double>(best_row) / (last_blue - first_blue), 1.0 / 3, 0.04);
  const std::string text = ReadBytes(svg);
  EXPECT_THAT(text, HasSubstr("<desc>pump; key: decision value, envelope boundary (0), learning"));
  EXPECT_TRUE(ReadSvg(svg).parsed);
  // A learning interval must be finite and ordered.
  panel.learning = {{kStart + 10, kStart}};
  figure.panels = {panel};
  EXPECT_THROW(DrawTimelineFigure(figure, TempPath("bad_learning.svg"), Format::kSvg),
               std::runtime_error);
}

TEST(DecimateToColumns, KeepsEachColumnsExtremesInOrder) {
  // Column 0: values 5, 9, 1, 4 at x 0.1..0.7: the highest (9, x 0.3) comes before the lowest
  // (1, x 0.5), and stays first; column 1 holds one value, kept once.
  const std::vector<Point> column = {{0.1, 5}, {0.3, 9}, {0.5, 1}, {0.7, 4}, {1.5, 2}};
  const std::vector<Point> kept = DecimateToColumns(column);
  ASSERT_EQ(kept.size(), 3u);
  EXPECT_EQ(kept[0].x, 0.3);
  EXPECT_EQ(kept[0].y, 9);
  EXPECT_EQ(kept[1].x, 0.5);
  EXPECT_EQ(kept[1].y, 1);
  EXPECT_EQ(kept[2].y, 2);
  // A break survives as a NaN point; a lone point stays one point.
  const std::vector<Point> broken = DecimateToColumns({{0.2, 1}, {1.2, kNaN}, {2.5, 3}});
  ASSERT_EQ(broken.size(), 3u);
  EXPECT_TRUE(std::isnan(broken[1].y));
  // 100,000 random points over 1000 columns: at most 2 per column, and every column's minimum
  // and maximum (computed here directly) are among the kept points.
  std::mt19937 rng(9);
  std::normal_distribution<double> noise(0, 1);
  std::vector<Point> many;
  for (int i = 0; i < 100000; ++i) many.push_back({i / 100.0, noise(rng)});
  const std::vector<Point> decimated = DecimateToColumns(many);
  EXPECT_LE(decimated.size(), 2000u);
  std::vector<double> low(1000, 1e9), high(1000, -1e9), kept_low(1000, 1e9), kept_high(1000, -1e9);
  for (const Point& p : many) {
    const auto c = static_cast<std::size_t>(p.x);
    low[c] = std::min(low[c], p.y);
    high[c] = std::max(high[c], p.y);
  }
  for (const Point& p : decimated) {
    const auto c = static_cast<std::size_t>(p.x);
    kept_low[c] = std::min(kept_low[c], p.y);
    kept_high[c] = std::max(kept_high[c], p.y);
  }
  EXPECT_EQ(low, kept_low);
  EXPECT_EQ(high, kept_high);
}

// A colour channel as cairo's SVG surface writes it: the percentage printed with "%f", trailing
// zeros (and a bare point) dropped, e.g. 213 -> "83.529412", 0 -> "0", 255 -> "100".
std::string CairoPercent(int channel) {
  char text[32];
  std::snprintf(text, sizeof text, "%f", channel / 255.0 * 100);
  std::string out = text;
  out.erase(out.find_last_not_of('0') + 1);
  if (out.back() == '.') out.pop_back();
  return out;
}

// How often the SVG fills a shape with this colour (cairo writes "fill:rgb(R%,G%,B%)").
std::size_t CountFills(const std::string& svg, std::uint32_t colour) {
  char pattern[96];
  std::snprintf(pattern, sizeof pattern, "fill:rgb(%s%%,%s%%,%s%%)",
                CairoPercent(Channel(colour, 16)).c_str(), CairoPercent(Channel(colour, 8)).c_str(),
                CairoPercent(Channel(colour, 0)).c_str());
  std::size_t count = 0;
  for (std::size_t at = svg.find(pattern); at != std::string::npos;
       at = svg.find(pattern, at + 1)) {
    ++count;
  }
  return count;
}

// A week of 100,000 samples with 40 alarms: the SVG stays under 150 kB (it holds O(width) points,
// not O(samples)), and each of the 40 alarms still has its own dot (plus one path for the rug).
TEST(DrawTimelineFigure, SvgOfManySamplesIsSmallAndKeepsEveryAlarm) {
  TimelineFigure figure;
  figure.marks_label = "";  // no legend sample in the alarm colour
  TimelinePanel panel = MakeTimeline("stream");
  std::mt19937 rng(1);
  std::normal_distribution<double> noise(0, 0.3);
  for (int i = 0; i < 100000; ++i) {
    panel.t.push_back(kStart + i * 6.0);
    panel.value.push_back(noise(rng));
  }
  for (int k = 0; k < 40; ++k) panel.marks.push_back(kStart + 6.0 * (1000 + k * 2400 + k % 3));
  figure.panels = {panel};
  const std::string svg_path = TempPath("many.svg");
  DrawTimelineFigure(figure, svg_path, Format::kSvg);
  const std::string svg = ReadBytes(svg_path);
  EXPECT_LT(svg.size(), 150'000u);
  EXPECT_EQ(CountFills(svg, kMarkColour), 40u + 1);
  EXPECT_TRUE(ReadSvg(svg_path).parsed);
}

}  // namespace
}  // namespace nuwatch::charts
