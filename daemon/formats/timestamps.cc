#include "formats/timestamps.h"

#include <charconv>
#include <cmath>
#include <cstdio>
#include <ctime>
#include <string>

namespace nuwatch {
namespace {

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
    char c = text[*pos + i];
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

// Days from 1970-01-01 to the given civil date (proleptic Gregorian); H. Hinnant's algorithm.
int64_t DaysFromCivil(int64_t y, unsigned m, unsigned d) {
  y -= m <= 2;
  const int64_t era = (y >= 0 ? y : y - 399) / 400;
  const unsigned yoe = static_cast<unsigned>(y - era * 400);
  const unsigned doy = (153 * (m + (m > 2 ? -3 : 9)) + 2) / 5 + d - 1;
  const unsigned doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
  return era * 146097 + static_cast<int64_t>(doe) - 719468;
}

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
  static constexpr int kDaysInMonth[] = {31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
  if (month < 1 || month > 12 || day < 1 || day > kDaysInMonth[month - 1] || hour > 23 ||
      minute > 59 || second > 60)
    return std::nullopt;
  double fraction = 0;
  if (pos < text.size() && text[pos] == '.') {
    std::size_t start = pos;
    ++pos;
    while (pos < text.size() && text[pos] >= '0' && text[pos] <= '9') ++pos;
    if (pos == start + 1) return std::nullopt;
    fraction = *ParseNumber("0" + std::string(text.substr(start, pos - start)));
  }
  int offset_seconds = 0;
  if (pos < text.size()) {
    char c = text[pos];
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
  const int64_t days = DaysFromCivil(year, month, day);
  return static_cast<double>(days * 86400 + hour * 3600 + minute * 60 + second - offset_seconds) +
         fraction;
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
  const std::time_t t = static_cast<std::time_t>(whole);
  std::tm tm{};
  gmtime_r(&t, &tm);
  char buffer[96];
  if (millis == 0) {
    std::snprintf(buffer, sizeof buffer, "%04d-%02d-%02dT%02d:%02d:%02dZ", tm.tm_year + 1900,
                  tm.tm_mon + 1, tm.tm_mday, tm.tm_hour, tm.tm_min, tm.tm_sec);
  } else {
    std::snprintf(buffer, sizeof buffer, "%04d-%02d-%02dT%02d:%02d:%02d.%03dZ", tm.tm_year + 1900,
                  tm.tm_mon + 1, tm.tm_mday, tm.tm_hour, tm.tm_min, tm.tm_sec, millis);
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
