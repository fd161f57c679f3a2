#include "formats/timestamps.h"

#include <charconv>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <string>

namespace nuwatch {
namespace {

namespace chrono = std::chrono;

std::optional<double> ParseNumber(std::string_view text) {
  double value = 0;
  const char* end = text.data() + text.size();
  auto [ptr, ec] = std::from_chars(text.data(), end, value);
  if (ec != std::errc() || ptr != end || !std::isfinite(value)) return std::nullopt;
  return value;
}

// Reads exactly `digits` decimal digits at text[*pos].
bool ReadDigits(std::string_view text, std::size_t* pos, int digits, int* out) {
  if (*pos + digits > text.size()) return false;
  int value = 0;
  for (int i = 0; i < digits; ++i) {
    const char c = text[*pos + i];
    if (c < '0' || c > '9') return false;
    value = value * 10 + (c - '0');
  }
  *pos += digits;
  *out = value;
  return true;
}

bool Expect(std::string_view text, std::size_t* pos, char c) {
  if (*pos >= text.size() || text[*pos] != c) return false;
  ++*pos;
  return true;
}

// The calendar (which days exist, leap years included, and the day count since 1970-01-01) is
// C++20's <chrono> (year_month_day::ok, sys_days), not ours: a table of month lengths once let
// 2026-02-29 through as 1 March. GCC 12 has the calendar but not std::chrono::parse (GCC 14), so
// the fixed-width fields are split here.
std::optional<double> ParseIso8601(std::string_view text) {
  std::size_t pos = 0;
  int year = 0, month = 0, day = 0, hour = 0, minute = 0, second = 0;
  if (!ReadDigits(text, &pos, 4, &year) || !Expect(text, &pos, '-') ||
      !ReadDigits(text, &pos, 2, &month) || !Expect(text, &pos, '-') ||
      !ReadDigits(text, &pos, 2, &day))
    return std::nullopt;
  if (pos >= text.size() || (text[pos] != 'T' && text[pos] != ' ')) return std::nullopt;
  ++pos;
  if (!ReadDigits(text, &pos, 2, &hour) || !Expect(text, &pos, ':') ||
      !ReadDigits(text, &pos, 2, &minute) || !Expect(text, &pos, ':') ||
      !ReadDigits(text, &pos, 2, &second))
    return std::nullopt;
  const chrono::year_month_day date{chrono::year{year}, chrono::month{static_cast<unsigned>(month)},
                                    chrono::day{static_cast<unsigned>(day)}};
  // A leap second (:60) is accepted as ISO-8601 allows it, and counted as POSIX time does: as the
  // first second of the next minute.
  if (!date.ok() || hour > 23 || minute > 59 || second > 60) return std::nullopt;
  double fraction = 0;
  if (pos < text.size() && text[pos] == '.') {
    const std::size_t start = pos;
    ++pos;
    while (pos < text.size() && text[pos] >= '0' && text[pos] <= '9') ++pos;
    if (pos == start + 1) return std::nullopt;
    fraction = *ParseNumber(text.substr(start, pos - start));
  }
  int offset_seconds = 0;
  if (pos < text.size()) {
    const char c = text[pos];
    if (c == 'Z') {
      ++pos;
    } else if (c == '+' || c == '-') {
      ++pos;
      int oh = 0, om = 0;
      if (!ReadDigits(text, &pos, 2, &oh)) return std::nullopt;
      if (pos < text.size() && text[pos] == ':') ++pos;
      if (!ReadDigits(text, &pos, 2, &om) || oh > 23 || om > 59) return std::nullopt;
      offset_seconds = (oh * 3600 + om * 60) * (c == '+' ? 1 : -1);
    }
  }
  if (pos != text.size()) return std::nullopt;
  const chrono::sys_seconds at = chrono::sys_days(date) + chrono::hours(hour) +
                                 chrono::minutes(minute) + chrono::seconds(second - offset_seconds);
  return static_cast<double>(at.time_since_epoch().count()) + fraction;
}

}  // namespace

std::optional<double> ParseTimestamp(std::string_view text) {
  while (!text.empty() && (text.front() == ' ' || text.front() == '\t')) text.remove_prefix(1);
  while (!text.empty() && (text.back() == ' ' || text.back() == '\t')) text.remove_suffix(1);
  if (text.empty()) return std::nullopt;
  if (auto number = ParseNumber(text)) return number;
  return ParseIso8601(text);
}

std::string FormatTimestamp(double seconds_since_epoch) {
  // ISO-8601 writes four-digit years; outside them (and for a time_t that could not hold the
  // value: the cast would be undefined) the number itself, which ParseTimestamp reads back.
  constexpr double kYear0 = -62167219200.0;      // 0000-01-01T00:00:00Z
  constexpr double kYear10000 = 253402300800.0;  // 10000-01-01T00:00:00Z
  if (!(seconds_since_epoch >= kYear0 && seconds_since_epoch < kYear10000 - 0.5)) {
    char number[64];
    const auto result = std::to_chars(number, number + sizeof number, seconds_since_epoch);
    return std::string(number, result.ptr);
  }
  double whole = std::floor(seconds_since_epoch);
  int millis = static_cast<int>(std::lround((seconds_since_epoch - whole) * 1000.0));
  if (millis == 1000) {
    whole += 1;
    millis = 0;
  }
  const chrono::sys_seconds at{chrono::seconds(static_cast<int64_t>(whole))};
  const chrono::sys_days day = chrono::floor<chrono::days>(at);
  const chrono::year_month_day date(day);
  const chrono::hh_mm_ss<chrono::seconds> time(at - day);
  char buffer[96];
  const int length = std::snprintf(
      buffer, sizeof buffer, "%04d-%02u-%02uT%02d:%02d:%02d", static_cast<int>(date.year()),
      static_cast<unsigned>(date.month()), static_cast<unsigned>(date.day()),
      static_cast<int>(time.hours().count()), static_cast<int>(time.minutes().count()),
      static_cast<int>(time.seconds().count()));
  if (millis == 0) {
    std::snprintf(buffer + length, sizeof buffer - length, "Z");
  } else {
    std::snprintf(buffer + length, sizeof buffer - length, ".%03dZ", millis);
  }
  return buffer;
}

std::optional<double> ParseDuration(std::string_view text) {
  if (text.empty()) return std::nullopt;
  double unit = 1;
  switch (text.back()) {
    case 's':
      unit = 1;
      break;
    case 'm':
      unit = 60;
      break;
    case 'h':
      unit = 3600;
      break;
    case 'd':
      unit = 86400;
      break;
    default:
      unit = 0;
  }
  if (unit != 0)
    text.remove_suffix(1);
  else
    unit = 1;
  auto value = ParseNumber(text);
  if (!value || *value < 0) return std::nullopt;
  return *value * unit;
}

}  // namespace nuwatch
