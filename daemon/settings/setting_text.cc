#include "settings/setting_text.h"

#include <algorithm>
#include <cctype>
#include <charconv>
#include <limits>

namespace nuwatch {
namespace {

// Appended piece by piece: GCC 12 warns falsely (-Wrestrict) on "'" + std::string(...).
std::string Shown(std::string_view text) {
  std::string shown = "'";
  shown += text;
  shown += '\'';
  return shown;
}

template <class T>
std::optional<std::string> ParseInteger(std::string_view text, T& out) {
  const std::string_view t = TrimBlanks(text);
  int64_t value = 0;
  const auto [end, error] = std::from_chars(t.data(), t.data() + t.size(), value);
  if (t.empty() || error == std::errc::invalid_argument || end != t.data() + t.size()) {
    return Shown(text) + " is not a whole number";
  }
  if (error == std::errc::result_out_of_range ||
      value < static_cast<int64_t>(std::numeric_limits<T>::min()) ||
      (std::numeric_limits<T>::max() < std::numeric_limits<int64_t>::max() &&
       value > static_cast<int64_t>(std::numeric_limits<T>::max()))) {
    return Shown(text) + " is out of range [" + std::to_string(std::numeric_limits<T>::min()) +
           ", " + std::to_string(std::numeric_limits<T>::max()) + "]";
  }
  out = static_cast<T>(value);
  return std::nullopt;
}

}  // namespace

std::string_view TrimBlanks(std::string_view text) {
  while (!text.empty() && (text.front() == ' ' || text.front() == '\t')) text.remove_prefix(1);
  while (!text.empty() && (text.back() == ' ' || text.back() == '\t')) text.remove_suffix(1);
  return text;
}

std::vector<std::string_view> SplitCommaList(std::string_view text) {
  std::vector<std::string_view> items;
  if (TrimBlanks(text).empty()) return items;
  while (true) {
    const auto comma = text.find(',');
    items.push_back(TrimBlanks(text.substr(0, comma)));
    if (comma == std::string_view::npos) break;
    text.remove_prefix(comma + 1);
  }
  return items;
}

std::string ValueText(double value) { return SettingNumberText(value); }
std::string ValueText(int64_t value) { return std::to_string(value); }
std::string ValueText(bool value) { return value ? "true" : "false"; }
std::string ValueText(const std::string& value) { return value; }
std::string ValueText(const std::vector<std::string>& value) {
  std::string out;
  for (std::size_t i = 0; i < value.size(); ++i) {
    if (i > 0) out += ',';
    out += value[i];
  }
  return out;
}
std::string ValueText(const std::vector<int64_t>& value) {
  std::string out;
  for (std::size_t i = 0; i < value.size(); ++i) {
    if (i > 0) out += ',';
    out += std::to_string(value[i]);
  }
  return out;
}
std::string ValueText(KernelType value) { return std::string(KernelName(value)); }
std::string ValueText(ScalerType value) { return std::string(ScalerName(value)); }
std::string ValueText(const GammaSpec& value) {
  return value.mode == GammaSpec::Mode::kValue ? SettingNumberText(value.value) : value.ToString();
}

std::optional<std::string> ParseValueText(std::string_view text, double& out) {
  const std::string_view t = TrimBlanks(text);
  double value = 0;
  const auto [end, error] = std::from_chars(t.data(), t.data() + t.size(), value);
  if (t.empty() || error != std::errc() || end != t.data() + t.size()) {
    return Shown(text) + " is not a number";
  }
  out = value;
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, int& out) {
  return ParseInteger(text, out);
}
std::optional<std::string> ParseValueText(std::string_view text, int64_t& out) {
  return ParseInteger(text, out);
}
std::optional<std::string> ParseValueText(std::string_view text, std::size_t& out) {
  int64_t value = 0;
  if (auto error = ParseInteger(text, value)) return error;
  if (value < 0) return Shown(text) + " must not be negative";
  out = static_cast<std::size_t>(value);
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, bool& out) {
  const std::string_view t = TrimBlanks(text);
  if (t == "true") {
    out = true;
  } else if (t == "false") {
    out = false;
  } else {
    return Shown(text) + " is not true or false";
  }
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, std::string& out) {
  out = std::string(text);
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, std::vector<std::string>& out) {
  std::vector<std::string> values;
  for (const std::string_view item : SplitCommaList(text)) values.emplace_back(item);
  out = std::move(values);
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, std::vector<int64_t>& out) {
  std::vector<int64_t> values;
  for (const std::string_view item : SplitCommaList(text)) {
    int64_t value = 0;
    if (auto error = ParseInteger(item, value)) return error;
    values.push_back(value);
  }
  out = std::move(values);
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, KernelType& out) {
  const auto parsed = ParseKernelType(TrimBlanks(text));
  if (!parsed) return Shown(text) + " is not one of rbf, linear, poly";
  out = *parsed;
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, ScalerType& out) {
  const auto parsed = ParseScalerType(TrimBlanks(text));
  if (!parsed) return Shown(text) + " is not one of none, standard, robust";
  out = *parsed;
  return std::nullopt;
}
std::optional<std::string> ParseValueText(std::string_view text, GammaSpec& out) {
  const auto parsed = GammaSpec::Parse(TrimBlanks(text));
  if (!parsed) return Shown(text) + " is not scale, median, min_volume or a number > 0";
  out = *parsed;
  return std::nullopt;
}

// Optimal string alignment distance: Levenshtein plus transposition of adjacent characters, so
// that "refit_evrey" is one edit from "refit_every".
namespace {

std::size_t EditDistance(std::string_view a, std::string_view b) {
  const std::size_t n = a.size(), m = b.size();
  std::vector<std::vector<std::size_t>> d(n + 1, std::vector<std::size_t>(m + 1));
  for (std::size_t i = 0; i <= n; ++i) d[i][0] = i;
  for (std::size_t j = 0; j <= m; ++j) d[0][j] = j;
  for (std::size_t i = 1; i <= n; ++i) {
    for (std::size_t j = 1; j <= m; ++j) {
      const std::size_t cost = a[i - 1] == b[j - 1] ? 0 : 1;
      d[i][j] = std::min({d[i - 1][j] + 1, d[i][j - 1] + 1, d[i - 1][j - 1] + cost});
      if (i > 1 && j > 1 && a[i - 1] == b[j - 2] && a[i - 2] == b[j - 1]) {
        d[i][j] = std::min(d[i][j], d[i - 2][j - 2] + 1);
      }
    }
  }
  return d[n][m];
}

}  // namespace

std::optional<std::string_view> ClosestName(std::string_view typed,
                                            const std::vector<std::string_view>& candidates) {
  std::string lowered(typed);
  for (char& c : lowered) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  std::optional<std::string_view> best;
  std::size_t best_distance = std::numeric_limits<std::size_t>::max();
  for (const std::string_view candidate : candidates) {
    const std::size_t distance = EditDistance(lowered, candidate);
    if (distance < best_distance) {
      best = candidate;
      best_distance = distance;
    }
  }
  const std::size_t limit = std::max<std::size_t>(2, typed.size() / 3);
  if (best && best_distance <= limit && best_distance < best->size()) return best;
  return std::nullopt;
}

}  // namespace nuwatch
