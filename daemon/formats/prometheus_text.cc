#include "formats/prometheus_text.h"

#include <cctype>
#include <charconv>
#include <cmath>
#include <optional>

namespace nuwatch {
namespace {

// The exposition format separates tokens by spaces and tabs.
bool IsTokenSeparator(char c) { return c == ' ' || c == '\t'; }

void SkipBlanks(std::string_view line, std::size_t* at) {
  while (*at < line.size() && IsTokenSeparator(line[*at])) ++*at;
}

// A sample value: a float as Go's strconv.ParseFloat reads it, which includes "+Inf", "-Inf" and
// "NaN" (the format's own spelling). std::from_chars takes neither a leading '+' nor "Inf" in
// every case, so those are handled here.
std::optional<double> ParseSampleValue(std::string_view text) {
  if (text == "+Inf" || text == "Inf") return INFINITY;
  if (text == "-Inf") return -INFINITY;
  if (text == "NaN") return NAN;
  if (!text.empty() && text.front() == '+') text.remove_prefix(1);
  double value = 0;
  const auto [end, error] = std::from_chars(text.data(), text.data() + text.size(), value);
  if (error != std::errc() || end != text.data() + text.size()) return std::nullopt;
  return value;
}

}  // namespace

std::map<std::string, double> SamplesByLabel(std::string_view exposition, std::string_view metric,
                                             std::string_view label) {
  std::map<std::string, double> samples;
  int line_number = 0;
  while (!exposition.empty()) {
    const std::size_t end = exposition.find('\n');
    std::string_view line = exposition.substr(0, end);
    exposition.remove_prefix(end == std::string_view::npos ? exposition.size() : end + 1);
    ++line_number;
    if (!line.empty() && line.back() == '\r') line.remove_suffix(1);
    std::size_t at = 0;
    SkipBlanks(line, &at);
    if (line.substr(at, metric.size()) != metric) continue;  // comments and other metrics too
    at += metric.size();
    if (at < line.size() && line[at] != '{' && !IsTokenSeparator(line[at]))
      continue;  // metric_created
    const auto fail = [&](const std::string& why) {
      return ExpositionError("line " + std::to_string(line_number) + " (" + std::string(metric) +
                             "): " + why);
    };
    std::string wanted_value;  // the value of `label`; "" when the sample has none
    if (at < line.size() && line[at] == '{') {
      ++at;
      while (true) {
        SkipBlanks(line, &at);
        if (at >= line.size()) throw fail("the label set is not closed");
        if (line[at] == '}') {
          ++at;
          break;
        }
        const std::size_t name_start = at;
        while (at < line.size() && line[at] != '=' && !IsTokenSeparator(line[at])) ++at;
        const std::string_view name = line.substr(name_start, at - name_start);
        SkipBlanks(line, &at);
        if (name.empty() || at >= line.size() || line[at] != '=')
          throw fail("a label without '=' in the label set");
        ++at;
        SkipBlanks(line, &at);
        if (at >= line.size() || line[at] != '"') throw fail("a label value without quotes");
        ++at;
        std::string value;
        bool closed = false;
        while (at < line.size()) {
          const char c = line[at++];
          if (c == '"') {
            closed = true;
            break;
          }
          if (c != '\\') {
            value += c;
            continue;
          }
          if (at >= line.size()) break;
          const char escaped = line[at++];
          if (escaped == '\\' || escaped == '"') {
            value += escaped;
          } else if (escaped == 'n') {
            value += '\n';
          } else {
            throw fail(std::string("unknown escape \\") + escaped + " in a label value");
          }
        }
        if (!closed) throw fail("a label value is not closed");
        if (name == label) wanted_value = std::move(value);
        SkipBlanks(line, &at);
        if (at < line.size() && line[at] == ',') ++at;
      }
    }
    SkipBlanks(line, &at);
    std::size_t value_end = at;
    while (value_end < line.size() && !IsTokenSeparator(line[value_end])) ++value_end;
    const std::string_view value_text = line.substr(at, value_end - at);
    if (value_text.empty()) throw fail("no value");
    const std::optional<double> value = ParseSampleValue(value_text);
    if (!value) throw fail("'" + std::string(value_text) + "' is not a number");
    samples[wanted_value] += *value;
  }
  return samples;
}

}  // namespace nuwatch
