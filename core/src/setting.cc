#include "nuwatch/setting.h"

#include <charconv>
#include <cstdio>

namespace nuwatch {

std::string_view ReloadEffectName(ReloadEffect effect) {
  switch (effect) {
    case ReloadEffect::kImmediate:
      return "immediate";
    case ReloadEffect::kNextRefit:
      return "next refit";
    case ReloadEffect::kRestart:
      return "restart";
  }
  return "unknown";
}

std::string SettingNumberText(double value) {
  if (std::isnan(value)) return "nan";
  if (std::isinf(value)) return value > 0 ? "inf" : "-inf";
  char buffer[64];
  // Integers as integers ("100000", not "1e+05"), below 2^53 where a double holds them exactly.
  if (value == std::floor(value) && std::abs(value) < 9007199254740992.0) {
    const auto result = std::to_chars(buffer, buffer + sizeof buffer, static_cast<int64_t>(value));
    return std::string(buffer, result.ptr);
  }
  // Shortest text that reads back to the same double; "2" for 2.0 (the user wrote a number).
  const auto result = std::to_chars(buffer, buffer + sizeof buffer, value);
  return std::string(buffer, result.ptr);
}

std::string SettingBoundsText(const SettingBounds& b) {
  const bool has_min = std::isfinite(b.min);
  const bool has_max = std::isfinite(b.max);
  if (has_min && has_max) {
    return std::string(b.min_open ? "(" : "[") + SettingNumberText(b.min) + ", " +
           SettingNumberText(b.max) + (b.max_open ? ")" : "]");
  }
  if (has_min) return std::string(b.min_open ? "> " : ">= ") + SettingNumberText(b.min);
  if (has_max) return std::string(b.max_open ? "< " : "<= ") + SettingNumberText(b.max);
  return "";
}

std::string SettingQuoted(std::string_view text) {
  std::string out = "\"";
  for (const char c : text) {
    const auto u = static_cast<unsigned char>(c);
    switch (c) {
      case '"':
        out += "\\\"";
        break;
      case '\\':
        out += "\\\\";
        break;
      case '\b':
        out += "\\b";
        break;
      case '\t':
        out += "\\t";
        break;
      case '\n':
        out += "\\n";
        break;
      case '\f':
        out += "\\f";
        break;
      case '\r':
        out += "\\r";
        break;
      default:
        if (u < 0x20 || u == 0x7f) {
          char escaped[8];
          std::snprintf(escaped, sizeof escaped, "\\u%04X", u);
          out += escaped;
        } else {
          out += c;
        }
    }
  }
  return out + "\"";
}

namespace setting_internal {

std::string ChoicesText(std::span<const std::string_view> choices) {
  std::string out;
  for (std::size_t i = 0; i < choices.size(); ++i) {
    if (i > 0) out += ", ";
    out += SettingQuoted(choices[i]);
  }
  return out;
}

std::string BoundsMessage(const SettingBounds& b, double value) {
  const bool below = b.min_open ? !(value > b.min) : !(value >= b.min);
  const bool above = b.max_open ? !(value < b.max) : !(value <= b.max);
  if (!below && !above) return "";
  const bool has_min = std::isfinite(b.min);
  const bool has_max = std::isfinite(b.max);
  if (has_min && has_max) return "is outside " + SettingBoundsText(b);
  if (has_min) {
    if (b.min == 0) return b.min_open ? "must be positive" : "must not be negative";
    return std::string(b.min_open ? "must exceed " : "must be at least ") +
           SettingNumberText(b.min);
  }
  return std::string(b.max_open ? "must be below " : "must not exceed ") + SettingNumberText(b.max);
}

}  // namespace setting_internal
}  // namespace nuwatch
