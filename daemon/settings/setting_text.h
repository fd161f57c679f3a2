// Settings as text, for command-line flags and help: the value of a key as the user would type it
// ("0.05", "rbf", "scale", "a,b,c", "true") and back. The TOML form of the same values is
// config.cc's (typed TOML values, not text).
// Thread safety: reentrant.
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <type_traits>
#include <variant>
#include <vector>

#include "nuwatch/setting.h"

namespace nuwatch {

// `text` without leading and trailing spaces and tabs.
std::string_view TrimBlanks(std::string_view text);
// The items of a comma-separated list, each trimmed; "" (or blanks) has none, "a,,b" has an empty
// second item.
std::vector<std::string_view> SplitCommaList(std::string_view text);

// One value as text; lists comma-separated.
std::string ValueText(double value);
std::string ValueText(int64_t value);
std::string ValueText(bool value);
std::string ValueText(const std::string& value);
std::string ValueText(const std::vector<std::string>& value);
std::string ValueText(const std::vector<int64_t>& value);
std::string ValueText(KernelType value);
std::string ValueText(ScalerType value);
std::string ValueText(const GammaSpec& value);

// Text back to a value: nullopt and `out` set, or the reason the text is not one, e.g.
// "'abc' is not a number". Numbers must be whole text (no trailing characters); integers must fit
// the member's type; lists are comma-separated with spaces around items ignored ("" is empty).
// Ranges are not checked here: CheckSettings does that for every source alike.
std::optional<std::string> ParseValueText(std::string_view text, double& out);
std::optional<std::string> ParseValueText(std::string_view text, int& out);
std::optional<std::string> ParseValueText(std::string_view text, int64_t& out);
std::optional<std::string> ParseValueText(std::string_view text, std::size_t& out);
std::optional<std::string> ParseValueText(std::string_view text, bool& out);
std::optional<std::string> ParseValueText(std::string_view text, std::string& out);
std::optional<std::string> ParseValueText(std::string_view text, std::vector<std::string>& out);
std::optional<std::string> ParseValueText(std::string_view text, std::vector<int64_t>& out);
std::optional<std::string> ParseValueText(std::string_view text, KernelType& out);
std::optional<std::string> ParseValueText(std::string_view text, ScalerType& out);
std::optional<std::string> ParseValueText(std::string_view text, GammaSpec& out);

// The value of `setting` in `values` as text.
template <class S>
std::string SettingText(const Setting<S>& setting, const S& values) {
  return std::visit(
      [&](auto pointer) {
        using T = std::remove_cvref_t<decltype(values.*pointer)>;
        if constexpr (std::is_integral_v<T> && !std::is_same_v<T, bool>) {
          return ValueText(static_cast<int64_t>(values.*pointer));
        } else {
          return ValueText(values.*pointer);
        }
      },
      setting.member);
}

// Parses `text` into the member of `setting` in `values`; on failure `values` is unchanged and the
// reason is returned.
template <class S>
std::optional<std::string> ParseSettingText(const Setting<S>& setting, std::string_view text,
                                            S& values) {
  return std::visit(
      [&](auto pointer) -> std::optional<std::string> {
        auto value = values.*pointer;
        if (auto error = ParseValueText(text, value)) return error;
        values.*pointer = std::move(value);
        return std::nullopt;
      },
      setting.member);
}

// What a flag of this key takes, for help: "NUMBER", "INTEGER", "true|false", "rbf|linear|poly",
// "scale|median|min_volume|NUMBER", "TEXT", "LIST", ...
template <class S>
std::string SettingTypeName(const Setting<S>& setting) {
  if (!setting.choices.empty()) {
    std::string out;
    for (const std::string_view choice : setting.choices) {
      out += (out.empty() ? "" : "|") + std::string(choice);
    }
    return out;
  }
  return std::visit(
      [&](auto pointer) -> std::string {
        using T = std::remove_cvref_t<decltype(std::declval<S>().*pointer)>;
        if constexpr (std::is_same_v<T, double>) return "NUMBER";
        if constexpr (std::is_same_v<T, bool>) return "true|false";
        if constexpr (std::is_integral_v<T>) return "INTEGER";
        if constexpr (std::is_same_v<T, GammaSpec>) return "scale|median|min_volume|NUMBER";
        if constexpr (std::is_same_v<T, std::vector<std::string>>) return "NAME,...";
        if constexpr (std::is_same_v<T, std::vector<int64_t>>) return "INTEGER,...";
        return "TEXT";
      },
      setting.member);
}

// The candidate closest to `typed` (optimal string alignment distance, compared in lower case)
// within max(2, len/3) edits, and only if it shares something with it (distance below the
// candidate's length): no suggestion beats a wild one. For "did you mean" hints: config keys,
// command-line flags.
std::optional<std::string_view> ClosestName(std::string_view typed,
                                            const std::vector<std::string_view>& candidates);

}  // namespace nuwatch
