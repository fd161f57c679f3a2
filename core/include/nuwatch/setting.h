// A table of settings: one entry per key of a settings struct (DetectorOptions here; the daemon's
// DaemonSettings in daemon/settings) says its name, type, range, unit, documentation line and what
// a reload does with it. The default is the struct's own member initialiser, so it is written once.
// What follows from the table: the range checks (CheckSettings, the only rules there are), the
// config file's reading and writing, the command-line flags (named as the keys, `_` -> `-`), the
// restart-only keys and the documentation checks.
//
// Adding a key of an existing type is one member (with its default) and one table entry, plus
// its paragraph in config/REFERENCE.md. The member types a table can hold are SettingMember's
// alternatives; an enum-like key is a std::string member with `choices` (no new type needed).
// Thread safety: the tables are immutable; the functions are reentrant.
#pragma once

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <functional>
#include <limits>
#include <optional>
#include <set>
#include <span>
#include <string>
#include <string_view>
#include <type_traits>
#include <variant>
#include <vector>

#include "nuwatch/kernel.h"
#include "nuwatch/scaler.h"

namespace nuwatch {

// What a running daemon does when a reload changes the key.
enum class ReloadEffect {
  kImmediate,  // applies at once
  kNextRefit,  // applies at each stream's next refit (detector keys)
  kRestart,    // the running value stays; only a restart applies the new one
};
std::string_view ReloadEffectName(ReloadEffect effect);  // "immediate", "next refit", "restart"

// Bounds on a number (or on each element of a list of integers). Infinite: unbounded.
struct SettingBounds {
  double min = -std::numeric_limits<double>::infinity();
  bool min_open = false;  // true: min itself is outside
  double max = std::numeric_limits<double>::infinity();
  bool max_open = false;
};

// A pointer to the member that holds a key's value. Integer lists hold e.g. lags.
template <class S>
using SettingMember =
    std::variant<double S::*, int S::*, int64_t S::*, std::size_t S::*, bool S::*, std::string S::*,
                 std::vector<std::string> S::*, std::vector<int64_t> S::*, KernelType S::*,
                 ScalerType S::*, GammaSpec S::*>;

template <class S>
struct Setting {
  std::string_view section = {};  // the TOML table the key lives in, e.g. "detector"
  std::string_view name = {};     // the key; the command-line flag is --name with '_' -> '-'
  SettingMember<S> member = {};
  std::string_view doc = {};   // one line: what the key does and its trade-off
  std::string_view unit = {};  // "seconds", "bytes", "vectors", ...; "" when it has none
  SettingBounds bounds = {};   // numbers, the number of a GammaSpec, the elements of integer lists
  // Appended to a bounds message, e.g. " (0: no limit)".
  std::string_view bounds_note = {};
  // A key of the same table this one must not exceed (warmup <= window).
  std::string_view at_most = {};
  // Strings and string lists: the allowed values (enum-like keys); KernelType and ScalerType:
  // their names.
  std::span<const std::string_view> choices = {};
  // Lists: every element non-empty (strings) and no element twice.
  bool distinct = false;
  ReloadEffect reload = ReloadEffect::kNextRefit;
  // Heading the key is listed under in config/nuwatchd.toml (within its section).
  std::string_view group = {};
};

// A broken rule: the section and the keys it involves (the key whose value is wrong first; a rule
// between keys involves keys of one section) and a one-line message such as
// "nu = 1.5 is outside (0, 1]" (keys named by the SettingNamer given).
struct SettingViolation {
  std::string section;
  std::vector<std::string> keys;
  std::string message;
};
// How a message names a key of the table, e.g. "detector.nu" for the config file, "nu" for a
// caller that has one section.
using SettingNamer = std::function<std::string(std::string_view section, std::string_view key)>;

// Shortest text that reads back to the same double, "2" for 2.0, "nan", "inf".
std::string SettingNumberText(double value);

// `text` as a TOML basic string: quoted, with \" \\ \b \t \n \f \r and \uXXXX escapes (TOML 1.0
// "String"), for messages and the config file.
std::string SettingQuoted(std::string_view text);

// "(0, 1]", ">= 2", "> 0", "[1, 65535]", "" (unbounded) for documentation and help.
std::string SettingBoundsText(const SettingBounds& bounds);

namespace setting_internal {

std::string ChoicesText(std::span<const std::string_view> choices);
// "must be at least 2", "is outside (0, 1]", ...; "" when `value` is within the bounds.
std::string BoundsMessage(const SettingBounds& bounds, double value);

template <class T>
constexpr bool kIsNumber = std::is_arithmetic_v<T> && !std::is_same_v<T, bool>;

}  // namespace setting_internal

template <class S>
const Setting<S>* FindSetting(std::span<const Setting<S>> table, std::string_view name) {
  for (const Setting<S>& setting : table) {
    if (setting.name == name) return &setting;
  }
  return nullptr;
}

// The first rule `values` breaks, in table order (per key: finite, bounds, choices, distinct
// elements, at_most), or nullopt. These are all the per-key rules there are; the daemon adds
// checks that span keys of its own (endpoint syntax, endpoints bound twice).
template <class S>
std::optional<SettingViolation> CheckSettings(std::span<const Setting<S>> table, const S& values,
                                              const SettingNamer& name) {
  namespace internal = setting_internal;
  for (const Setting<S>& setting : table) {
    std::optional<SettingViolation> violation;
    const auto fail = [&](std::string message) {
      violation = SettingViolation{
          std::string(setting.section), {std::string(setting.name)}, std::move(message)};
    };
    const std::string key = name(setting.section, setting.name);
    // `text`: the value as written, for integers beyond 2^53 that the double rounds (a window of
    // 2^63 - 1 was reported as 9223372036854775808).
    const auto check_number = [&](double value, std::string_view note, std::string text = "") {
      const std::string shown = key + " = " + (text.empty() ? SettingNumberText(value) : text);
      if (!std::isfinite(value)) return fail(shown + " is not finite");
      const std::string message = internal::BoundsMessage(setting.bounds, value);
      if (!message.empty()) fail(shown + " " + message + std::string(note));
    };
    std::visit(
        [&](auto pointer) {
          using T = std::remove_cvref_t<decltype(values.*pointer)>;
          const T& value = values.*pointer;
          if constexpr (internal::kIsNumber<T>) {
            if constexpr (std::is_integral_v<T>) {
              check_number(static_cast<double>(value), setting.bounds_note, std::to_string(value));
            } else {
              check_number(static_cast<double>(value), setting.bounds_note);
            }
          } else if constexpr (std::is_same_v<T, GammaSpec>) {
            if (value.mode == GammaSpec::Mode::kValue)
              check_number(value.value, setting.bounds_note);
          } else if constexpr (std::is_same_v<T, std::string>) {
            if (!setting.choices.empty() &&
                std::find(setting.choices.begin(), setting.choices.end(), value) ==
                    setting.choices.end()) {
              fail(key + " = " + SettingQuoted(value) + " must be one of " +
                   internal::ChoicesText(setting.choices));
            }
          } else if constexpr (std::is_same_v<T, std::vector<std::string>> ||
                               std::is_same_v<T, std::vector<int64_t>>) {
            using Element = typename T::value_type;
            std::set<Element> seen;
            for (std::size_t i = 0; i < value.size() && !violation; ++i) {
              const std::string position = std::to_string(i + 1);
              if constexpr (std::is_same_v<Element, std::string>) {
                if (!setting.choices.empty() &&
                    std::find(setting.choices.begin(), setting.choices.end(), value[i]) ==
                        setting.choices.end()) {
                  fail(key + " element " + position + " = " + SettingQuoted(value[i]) +
                       " must be one of " + internal::ChoicesText(setting.choices));
                } else if (setting.distinct && value[i].empty()) {
                  fail(key + " has an empty name at position " + position);
                } else if (setting.distinct && !seen.insert(value[i]).second) {
                  fail(key + " names " + SettingQuoted(value[i]) + " twice");
                }
              } else {
                const std::string message =
                    internal::BoundsMessage(setting.bounds, static_cast<double>(value[i]));
                if (!message.empty()) {
                  fail(key + " element " + position + " = " + std::to_string(value[i]) + " " +
                       message + std::string(setting.bounds_note));
                } else if (setting.distinct && !seen.insert(value[i]).second) {
                  fail(key + " names " + std::to_string(value[i]) + " twice");
                }
              }
            }
          }
        },
        setting.member);
    if (violation) return violation;
  }
  // Rules between keys come second, so that a key's own range is reported first.
  const auto number = [&](const Setting<S>& s) {
    return std::visit(
        [&](auto pointer) -> double {
          using T = std::remove_cvref_t<decltype(values.*pointer)>;
          if constexpr (internal::kIsNumber<T>) {
            return static_cast<double>(values.*pointer);
          } else {
            return std::numeric_limits<double>::quiet_NaN();
          }
        },
        s.member);
  };
  for (const Setting<S>& setting : table) {
    const Setting<S>* limit =
        setting.at_most.empty() ? nullptr : FindSetting(table, setting.at_most);
    if (limit == nullptr) continue;
    const double value = number(setting);
    const double bound = number(*limit);
    if (value > bound) {
      return SettingViolation{std::string(setting.section),
                              {std::string(setting.name), std::string(limit->name)},
                              name(setting.section, setting.name) + " = " +
                                  SettingNumberText(value) + " must not exceed " +
                                  name(limit->section, limit->name) + " = " +
                                  SettingNumberText(bound)};
    }
  }
  return std::nullopt;
}

}  // namespace nuwatch
