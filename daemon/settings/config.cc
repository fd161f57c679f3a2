// Strict TOML loading for nuwatchd. One table of keys per struct drives parsing, copying,
// comparison and description, so a key added to a table is read, overridden, compared and written
// back without further code; the range checks are the only per-key code.
#include "settings/config.h"

#include <fnmatch.h>
#include <toml++/toml.h>

#include <algorithm>
#include <cctype>
#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <limits>
#include <map>
#include <optional>
#include <set>
#include <sstream>
#include <type_traits>
#include <variant>

namespace nuwatch {
namespace {

// ---------------------------------------------------------------------------------------------
// Values as TOML text (for DescribeDetectorOptions and for quoting values in messages).

std::string FormatDouble(double v) {
  if (std::isnan(v)) return "nan";
  if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
  char buffer[64];
  // Shortest text that reads back to the same double.
  const auto result = std::to_chars(buffer, buffer + sizeof buffer, v);
  std::string text(buffer, result.ptr);
  // TOML reads "3" as an integer; keep floats floats so the round trip keeps the type.
  if (text.find_first_of(".eE") == std::string::npos) text += ".0";
  return text;
}

std::string Quote(std::string_view s) {
  std::string out = "\"";
  for (const char c : s) {
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
  out += '"';
  return out;
}

std::string ToToml(double v) { return FormatDouble(v); }
std::string ToToml(bool v) { return v ? "true" : "false"; }
std::string ToToml(const std::string& v) { return Quote(v); }
std::string ToToml(KernelType v) { return Quote(KernelName(v)); }
std::string ToToml(ScalerType v) { return Quote(ScalerName(v)); }
std::string ToToml(const GammaSpec& v) {
  switch (v.mode) {
    case GammaSpec::Mode::kScale:
      return Quote("scale");
    case GammaSpec::Mode::kMedian:
      return Quote("median");
    case GammaSpec::Mode::kValue:
      break;
  }
  return FormatDouble(v.value);
}
std::string ToToml(const std::vector<std::string>& v) {
  std::string out = "[";
  for (std::size_t i = 0; i < v.size(); ++i) {
    if (i > 0) out += ", ";
    out += Quote(v[i]);
  }
  return out + "]";
}
template <class T>
requires std::is_integral_v<T> std::string ToToml(T v) { return std::to_string(v); }

bool SameValue(const GammaSpec& a, const GammaSpec& b) {
  return a.mode == b.mode && (a.mode != GammaSpec::Mode::kValue || a.value == b.value);
}
template <class T>
bool SameValue(const T& a, const T& b) {
  return a == b;
}

// ---------------------------------------------------------------------------------------------
// The key tables.

template <class S>
using Member =
    std::variant<double S::*, int S::*, int64_t S::*, std::size_t S::*, bool S::*, std::string S::*,
                 std::vector<std::string> S::*, KernelType S::*, ScalerType S::*, GammaSpec S::*>;

template <class S>
struct KeySpec {
  std::string_view section;
  std::string_view name;
  Member<S> member;
};

using D = DetectorOptions;
const std::vector<KeySpec<D>>& DetectorKeys() {
  static const std::vector<KeySpec<D>> keys = {
      {"detector", "nu", &D::nu},
      {"detector", "kernel", &D::kernel},
      {"detector", "gamma", &D::gamma},
      {"detector", "degree", &D::degree},
      {"detector", "coef0", &D::coef0},
      {"detector", "scaler", &D::scaler},
      {"detector", "tolerance", &D::tolerance},
      {"detector", "max_iterations", &D::max_iterations},
      {"detector", "cache_bytes", &D::cache_bytes},
      {"detector", "window", &D::window},
      {"detector", "max_age_seconds", &D::max_age_seconds},
      {"detector", "warmup", &D::warmup},
      {"detector", "refit_every", &D::refit_every},
      {"detector", "max_model_age_seconds", &D::max_model_age_seconds},
      {"detector", "cold_refit_every", &D::cold_refit_every},
      {"detector", "support_vector_budget", &D::support_vector_budget},
      {"detector", "learn_from_anomalies", &D::learn_from_anomalies},
      {"detector", "drift_detection", &D::drift_detection},
      {"detector", "drift_delta", &D::drift_delta},
      {"detector", "drift_lambda", &D::drift_lambda},
      {"detector", "drift_min_samples", &D::drift_min_samples},
      {"detector", "open_after", &D::open_after},
      {"detector", "open_window", &D::open_window},
      {"detector", "close_after", &D::close_after},
      {"detector", "feature_names", &D::feature_names},
  };
  return keys;
}

using S = DaemonSettings;
const std::vector<KeySpec<S>>& DaemonKeys() {
  static const std::vector<KeySpec<S>> keys = {
      {"daemon", "log_level", &S::log_level},
      {"daemon", "refit_threads", &S::refit_threads},
      {"ingest", "endpoints", &S::ingest_endpoints},
      {"ingest", "subscribe", &S::subscribe_endpoints},
      {"ingest", "receive_high_water_mark", &S::receive_high_water_mark},
      {"publish", "endpoint", &S::publish_endpoint},
      {"publish", "high_water_mark", &S::publish_high_water_mark},
      {"publish", "include_learning", &S::publish_learning},
      {"control", "endpoint", &S::control_endpoint},
      {"metrics", "listen", &S::metrics_listen},
      {"metrics", "anomaly_ratio_window", &S::anomaly_ratio_window},
      {"state", "dir", &S::state_dir},
      {"state", "snapshot_interval_seconds", &S::snapshot_interval_seconds},
      {"limits", "max_streams", &S::max_streams},
      {"limits", "max_dims", &S::max_dims},
      {"limits", "max_message_bytes", &S::max_message_bytes},
      {"limits", "max_vectors_per_message", &S::max_vectors_per_message},
      {"recording", "dir", &S::record_dir},
      {"recording", "rotate_bytes", &S::record_rotate_bytes},
      {"recording", "keep_files", &S::record_keep_files},
  };
  return keys;
}

constexpr std::string_view kDaemonSections[] = {"daemon",  "ingest", "publish", "control",
                                                "metrics", "state",  "limits",  "recording"};
constexpr std::string_view kDetectorSection = "detector";
constexpr std::string_view kStreamSection = "stream";
constexpr std::string_view kMatchKey = "match";

const KeySpec<D>* FindDetectorKey(std::string_view name) {
  for (const auto& key : DetectorKeys()) {
    if (key.name == name) return &key;
  }
  return nullptr;
}

template <class T>
void CopyMember(const Member<T>& member, const T& from, T& to) {
  std::visit([&](auto pointer) { to.*pointer = from.*pointer; }, member);
}

// ---------------------------------------------------------------------------------------------
// Suggestions for misspelt keys.

// Optimal string alignment distance: Levenshtein plus transposition of adjacent characters, so
// that "refit_evrey" is one edit from "refit_every".
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

// The closest candidate within max(2, len/3) edits of `typed` (compared in lower case), and only
// if it shares something with it (distance below the candidate's length): no suggestion beats a
// wild one.
std::optional<std::string_view> ClosestKey(std::string_view typed,
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

// ---------------------------------------------------------------------------------------------
// Reading nodes.

std::string Position(const std::string& path, const toml::source_region& region) {
  return path + ":" + std::to_string(region.begin.line) + ":" + std::to_string(region.begin.column);
}

std::string Describe(const toml::node& node) {
  switch (node.type()) {
    case toml::node_type::string:
      return "the string " + Quote(node.as_string()->get());
    case toml::node_type::integer:
      return "an integer";
    case toml::node_type::floating_point:
      return "a floating-point number";
    case toml::node_type::boolean:
      return "a boolean";
    case toml::node_type::array:
      return "an array";
    case toml::node_type::table:
      return "a table";
    case toml::node_type::date:
      return "a date";
    case toml::node_type::time:
      return "a time";
    case toml::node_type::date_time:
      return "a date-time";
    case toml::node_type::none:
      break;
  }
  return "nothing";
}

class Reader {
 public:
  explicit Reader(const std::string& path) : path_(path) {}

  const std::string& path() const { return path_; }
  std::string At(const toml::source_region& region) const { return Position(path_, region) + ": "; }

  [[noreturn]] void Fail(const toml::source_region& region, const std::string& message) const {
    throw ConfigError(At(region) + message);
  }
  [[noreturn]] void WrongType(const toml::node& node, const std::string& key,
                              std::string_view expected) const {
    Fail(node.source(),
         "key '" + key + "' must be " + std::string(expected) + ", not " + Describe(node));
  }

  template <class T>
  T Read(const toml::node& node, const std::string& key) const {
    if constexpr (std::is_same_v<T, double>) {
      if (const auto* f = node.as_floating_point()) return f->get();
      if (const auto* i = node.as_integer()) return static_cast<double>(i->get());
      WrongType(node, key, "a number");
    } else if constexpr (std::is_same_v<T, bool>) {
      if (const auto* b = node.as_boolean()) return b->get();
      WrongType(node, key, "a boolean (true or false)");
    } else if constexpr (std::is_integral_v<T>) {
      const auto* i = node.as_integer();
      if (i == nullptr) WrongType(node, key, "an integer");
      const int64_t v = i->get();
      if constexpr (std::is_unsigned_v<T>) {
        if (v < 0) Fail(node.source(), key + " = " + std::to_string(v) + " must not be negative");
      } else {
        if (v < std::numeric_limits<T>::min() || v > std::numeric_limits<T>::max()) {
          Fail(node.source(), key + " = " + std::to_string(v) + " is out of range [" +
                                  std::to_string(std::numeric_limits<T>::min()) + ", " +
                                  std::to_string(std::numeric_limits<T>::max()) + "]");
        }
      }
      return static_cast<T>(v);
    } else if constexpr (std::is_same_v<T, std::string>) {
      if (const auto* s = node.as_string()) return s->get();
      WrongType(node, key, "a string");
    } else if constexpr (std::is_same_v<T, std::vector<std::string>>) {
      const auto* array = node.as_array();
      if (array == nullptr) WrongType(node, key, "an array of strings");
      std::vector<std::string> out;
      for (std::size_t i = 0; i < array->size(); ++i) {
        const auto* s = (*array)[i].as_string();
        if (s == nullptr) {
          Fail((*array)[i].source(), "key '" + key + "' must be an array of strings; element " +
                                         std::to_string(i + 1) + " is " + Describe((*array)[i]));
        }
        out.push_back(s->get());
      }
      return out;
    } else if constexpr (std::is_same_v<T, KernelType>) {
      constexpr std::string_view kExpected = "one of \"rbf\", \"linear\", \"poly\"";
      const auto* s = node.as_string();
      if (s == nullptr) WrongType(node, key, kExpected);
      const auto parsed = ParseKernelType(s->get());
      if (!parsed) WrongType(node, key, kExpected);
      return *parsed;
    } else if constexpr (std::is_same_v<T, ScalerType>) {
      constexpr std::string_view kExpected = "one of \"none\", \"standard\", \"robust\"";
      const auto* s = node.as_string();
      if (s == nullptr) WrongType(node, key, kExpected);
      const auto parsed = ParseScalerType(s->get());
      if (!parsed) WrongType(node, key, kExpected);
      return *parsed;
    } else if constexpr (std::is_same_v<T, GammaSpec>) {
      constexpr std::string_view kExpected = "\"scale\", \"median\" or a positive number";
      if (const auto* s = node.as_string()) {
        const auto parsed = GammaSpec::Parse(s->get());
        if (!parsed) WrongType(node, key, kExpected);
        return *parsed;
      }
      if (node.is_number()) {
        // The range check (> 0, finite) is ValidateDetectorOptions's, shared with the tools.
        GammaSpec spec;
        spec.mode = GammaSpec::Mode::kValue;
        spec.value = Read<double>(node, key);
        return spec;
      }
      WrongType(node, key, kExpected);
    } else {
      static_assert(sizeof(T) == 0, "no reader for this member type");
    }
  }

  template <class T>
  void ReadInto(const Member<T>& member, const toml::node& node, const std::string& key,
                T& target) const {
    std::visit(
        [&](auto pointer) {
          using Value = std::remove_cvref_t<decltype(target.*pointer)>;
          target.*pointer = Read<Value>(node, key);
        },
        member);
  }

 private:
  const std::string& path_;
};

struct Entry {
  const toml::key* key;
  const toml::node* node;
};

// toml::table iterates in key order; errors and StreamOverride::keys follow the file instead.
std::vector<Entry> InFileOrder(const toml::table& table) {
  std::vector<Entry> entries;
  for (const auto& [key, node] : table) entries.push_back({&key, &node});
  std::sort(entries.begin(), entries.end(), [](const Entry& a, const Entry& b) {
    const auto& pa = a.key->source().begin;
    const auto& pb = b.key->source().begin;
    return pa.line != pb.line ? pa.line < pb.line : pa.column < pb.column;
  });
  return entries;
}

// Where the keys of one table were set: key name -> the value's position.
using KeyPositions = std::map<std::string, toml::source_region, std::less<>>;

// "key 'detector.nuu' is not a known key (did you mean 'nu'?)"; `table` is "" at the top level.
[[noreturn]] void UnknownKey(const Reader& reader, const toml::key& key, const toml::node& node,
                             std::string_view table, const std::vector<std::string_view>& valid) {
  const std::string typed(key.str());
  std::string message;
  if (table.empty()) {
    const bool is_section = node.is_table() || node.is_array();
    message = std::string(is_section ? "section '" : "key '") + typed + "' is not a known " +
              (is_section ? "section" : "key at the top level");
  } else {
    message = "key '" + std::string(table) + "." + typed + "' is not a known key";
  }
  std::string hint;
  if (const auto close = ClosestKey(typed, valid)) {
    hint = "did you mean '" + std::string(*close) + "'?";
  } else {
    // The right key in the wrong section: name the section it belongs to.
    std::vector<std::string> homes;
    for (const auto& k : DaemonKeys()) {
      if (k.name == typed && k.section != table) homes.push_back(std::string(k.section));
    }
    if (FindDetectorKey(typed) != nullptr && table != kDetectorSection && table != kStreamSection) {
      homes.push_back(std::string(kDetectorSection));
    }
    if (!homes.empty()) {
      hint = "did you mean '" + homes.front() + "." + typed + "'?";
    } else if (valid.size() <= 10) {
      hint = std::string(table.empty() ? "known sections: " : "known keys here: ");
      for (std::size_t i = 0; i < valid.size(); ++i) {
        hint += (i > 0 ? ", " : "") + std::string(valid[i]);
      }
    }
  }
  if (!hint.empty()) message += " (" + hint + ")";
  reader.Fail(key.source(), message);
}

const toml::table& RequireTable(const Reader& reader, const toml::key& key,
                                const toml::node& node) {
  const auto* table = node.as_table();
  if (table == nullptr) {
    reader.Fail(node.source(), "key '" + std::string(key.str()) + "' must be a table ([" +
                                   std::string(key.str()) + "]), not " + Describe(node));
  }
  return *table;
}

void ParseDaemonSection(const Reader& reader, std::string_view section, const toml::table& table,
                        DaemonSettings& out, KeyPositions& positions) {
  std::vector<std::string_view> valid;
  for (const auto& k : DaemonKeys()) {
    if (k.section == section) valid.push_back(k.name);
  }
  for (const Entry& entry : InFileOrder(table)) {
    const KeySpec<S>* spec = nullptr;
    for (const auto& k : DaemonKeys()) {
      if (k.section == section && k.name == entry.key->str()) spec = &k;
    }
    if (spec == nullptr) UnknownKey(reader, *entry.key, *entry.node, section, valid);
    const std::string full = std::string(section) + "." + std::string(spec->name);
    reader.ReadInto(spec->member, *entry.node, full, out);
    positions[full] = entry.node->source();
  }
}

std::vector<std::string_view> DetectorKeyNames() {
  std::vector<std::string_view> names;
  for (const auto& k : DetectorKeys()) names.push_back(k.name);
  return names;
}

void ParseDetectorSection(const Reader& reader, const toml::table& table, DetectorOptions& out,
                          KeyPositions& positions) {
  const auto valid = DetectorKeyNames();
  for (const Entry& entry : InFileOrder(table)) {
    const auto* spec = FindDetectorKey(entry.key->str());
    if (spec == nullptr) UnknownKey(reader, *entry.key, *entry.node, kDetectorSection, valid);
    const std::string name(spec->name);
    reader.ReadInto(spec->member, *entry.node, "detector." + name, out);
    positions[name] = entry.node->source();
  }
}

Config::StreamOverride ParseOverride(const Reader& reader, const toml::table& table,
                                     KeyPositions& positions) {
  Config::StreamOverride result;
  result.origin = reader.path() + ":" + std::to_string(table.source().begin.line);
  auto valid = DetectorKeyNames();
  valid.insert(valid.begin(), kMatchKey);
  bool has_match = false;
  for (const Entry& entry : InFileOrder(table)) {
    const std::string name(entry.key->str());
    if (name == kMatchKey) {
      result.match = reader.Read<std::string>(*entry.node, "stream.match");
      if (result.match.empty()) {
        reader.Fail(entry.node->source(),
                    "stream.match is empty; it must be a glob on the stream key, e.g. "
                    "match = \"pump-0*\"");
      }
      has_match = true;
      positions[name] = entry.node->source();
      continue;
    }
    const auto* spec = FindDetectorKey(name);
    if (spec == nullptr) UnknownKey(reader, *entry.key, *entry.node, kStreamSection, valid);
    reader.ReadInto(spec->member, *entry.node, "stream." + name, result.values);
    result.keys.push_back(name);
    positions[name] = entry.node->source();
  }
  if (!has_match) {
    reader.Fail(table.source(),
                "[[stream]] has no 'match' key (a glob on the stream key, e.g. "
                "match = \"pump-0*\")");
  }
  return result;
}

void ApplyOverride(const Config::StreamOverride& override_table, DetectorOptions& options) {
  for (const auto& name : override_table.keys) {
    // ParseOverride only records names of the table, so the lookup cannot fail.
    if (const auto* spec = FindDetectorKey(name)) {
      CopyMember(spec->member, override_table.values, options);
    }
  }
}

// ---------------------------------------------------------------------------------------------
// Range checks. A violation names the keys it involves (the most specific first) so that the
// config loader can point at the one the file set.

struct Violation {
  std::vector<std::string> keys;
  std::string message;
};
using Namer = std::function<std::string(std::string_view key)>;

std::string Num(double v) {
  std::string text = FormatDouble(v);
  // Messages show 2.0 as 2: the user wrote a number, not a TOML float.
  if (text.size() > 2 && text.ends_with(".0")) text.resize(text.size() - 2);
  return text;
}
std::string Num(int64_t v) { return std::to_string(v); }

std::optional<Violation> CheckDetector(const DetectorOptions& o, const Namer& name) {
  auto fail = [&](std::vector<std::string> keys, std::string message) {
    return std::optional<Violation>(Violation{std::move(keys), std::move(message)});
  };
  auto show = [&](std::string_view key, auto value) { return name(key) + " = " + Num(value); };
  const std::pair<std::string_view, double> finite[] = {
      {"nu", o.nu},
      {"coef0", o.coef0},
      {"tolerance", o.tolerance},
      {"max_age_seconds", o.max_age_seconds},
      {"max_model_age_seconds", o.max_model_age_seconds},
      {"drift_delta", o.drift_delta},
      {"drift_lambda", o.drift_lambda},
      {"gamma", o.gamma.mode == GammaSpec::Mode::kValue ? o.gamma.value : 1.0},
  };
  for (const auto& [key, value] : finite) {
    if (!std::isfinite(value)) return fail({std::string(key)}, show(key, value) + " is not finite");
  }
  if (!(o.nu > 0 && o.nu <= 1)) return fail({"nu"}, show("nu", o.nu) + " is outside (0, 1]");
  if (o.gamma.mode == GammaSpec::Mode::kValue && !(o.gamma.value > 0)) {
    return fail({"gamma"},
                show("gamma", o.gamma.value) + " must be positive (or \"scale\" or \"median\")");
  }
  if (o.degree < 1) {
    return fail({"degree"}, show("degree", int64_t{o.degree}) + " must be at least 1");
  }
  if (!(o.tolerance > 0)) {
    return fail({"tolerance"}, show("tolerance", o.tolerance) + " must be positive");
  }
  if (o.max_iterations < 0) {
    return fail({"max_iterations"}, show("max_iterations", o.max_iterations) +
                                        " must not be negative (0: the solver's default cap)");
  }
  constexpr std::size_t kMinCacheBytes = 1u << 20;
  if (o.cache_bytes < kMinCacheBytes) {
    return fail({"cache_bytes"}, show("cache_bytes", static_cast<int64_t>(o.cache_bytes)) +
                                     " must be at least 1048576 (1 MiB); the unit is bytes");
  }
  if (o.window < 2) return fail({"window"}, show("window", o.window) + " must be at least 2");
  if (o.max_age_seconds < 0) {
    return fail({"max_age_seconds"},
                show("max_age_seconds", o.max_age_seconds) + " must not be negative (0: no limit)");
  }
  // The first fit needs two vectors at least (a single row makes a degenerate problem).
  if (o.warmup < 2) return fail({"warmup"}, show("warmup", o.warmup) + " must be at least 2");
  if (o.warmup > o.window) {
    return fail({"warmup", "window"},
                show("warmup", o.warmup) + " must not exceed " + show("window", o.window));
  }
  if (o.refit_every < 0) {
    return fail({"refit_every"}, show("refit_every", o.refit_every) +
                                     " must not be negative (0: fit once, never refit)");
  }
  if (o.max_model_age_seconds < 0) {
    return fail({"max_model_age_seconds"}, show("max_model_age_seconds", o.max_model_age_seconds) +
                                               " must not be negative (0: no age limit)");
  }
  if (o.cold_refit_every < 1) {
    return fail({"cold_refit_every"}, show("cold_refit_every", o.cold_refit_every) +
                                          " must be at least 1 (1: every refit is cold)");
  }
  if (o.support_vector_budget < 1) {
    return fail({"support_vector_budget"},
                show("support_vector_budget", o.support_vector_budget) + " must be at least 1");
  }
  if (o.drift_delta < 0) {
    return fail({"drift_delta"}, show("drift_delta", o.drift_delta) + " must not be negative");
  }
  if (!(o.drift_lambda > 0)) {
    return fail({"drift_lambda"}, show("drift_lambda", o.drift_lambda) + " must be positive");
  }
  if (o.drift_min_samples < 1) {
    return fail({"drift_min_samples"},
                show("drift_min_samples", o.drift_min_samples) + " must be at least 1");
  }
  if (o.open_after < 1) {
    return fail({"open_after"}, show("open_after", int64_t{o.open_after}) + " must be at least 1");
  }
  if (o.open_window < 1) {
    return fail({"open_window"},
                show("open_window", int64_t{o.open_window}) + " must be at least 1");
  }
  if (o.open_after > o.open_window) {
    return fail({"open_after", "open_window"}, show("open_after", int64_t{o.open_after}) +
                                                   " must not exceed " +
                                                   show("open_window", int64_t{o.open_window}));
  }
  if (o.close_after < 1) {
    return fail({"close_after"},
                show("close_after", int64_t{o.close_after}) + " must be at least 1");
  }
  std::set<std::string_view> seen;
  for (std::size_t i = 0; i < o.feature_names.size(); ++i) {
    const std::string& feature = o.feature_names[i];
    if (feature.empty()) {
      return fail({"feature_names"}, name("feature_names") + " has an empty name at position " +
                                         std::to_string(i + 1));
    }
    if (!seen.insert(feature).second) {
      return fail({"feature_names"}, name("feature_names") + " names " + Quote(feature) + " twice");
    }
  }
  return std::nullopt;
}

// "TRANSPORT://ADDRESS" with a lower-case transport; ZeroMQ itself checks the address.
bool LooksLikeEndpoint(std::string_view endpoint) {
  const auto separator = endpoint.find("://");
  if (separator == std::string_view::npos || separator == 0) return false;
  if (separator + 3 >= endpoint.size()) return false;
  for (const char c : endpoint.substr(0, separator)) {
    if (!std::islower(static_cast<unsigned char>(c)) &&
        !std::isdigit(static_cast<unsigned char>(c)))
      return false;
  }
  return true;
}

// An ephemeral port ("tcp://127.0.0.1:*" or ":0") can be bound any number of times.
bool IsEphemeral(std::string_view endpoint) {
  return endpoint.ends_with(":*") || endpoint.ends_with(":0");
}

// "HOST:PORT" (IPv6 hosts in brackets), port 0..65535.
bool LooksLikeListenAddress(std::string_view address) {
  const auto colon = address.rfind(':');
  if (colon == std::string_view::npos || colon == 0 || colon + 1 == address.size()) return false;
  const std::string_view host = address.substr(0, colon);
  const std::string_view port = address.substr(colon + 1);
  if (port.size() > 5) return false;
  int value = 0;
  const auto [end, ec] = std::from_chars(port.data(), port.data() + port.size(), value);
  if (ec != std::errc() || end != port.data() + port.size() || value > 65535) return false;
  if (host.find(':') != std::string_view::npos) {
    return host.size() > 2 && host.front() == '[' && host.back() == ']';
  }
  return true;
}

constexpr std::string_view kLogLevels[] = {"trace", "debug",    "info", "warn",
                                           "error", "critical", "off"};

std::optional<Violation> CheckDaemon(const DaemonSettings& s) {
  auto fail = [](std::string key, std::string message) {
    return std::optional<Violation>(Violation{{std::move(key)}, std::move(message)});
  };
  const std::string example = " (TRANSPORT://ADDRESS, e.g. tcp://127.0.0.1:7601)";
  // Every endpoint the daemon binds, with the key it came from, for the duplicate check.
  std::vector<std::pair<std::string, std::string>> bound;
  for (std::size_t i = 0; i < s.ingest_endpoints.size(); ++i) {
    const std::string& e = s.ingest_endpoints[i];
    if (!LooksLikeEndpoint(e)) {
      return fail("ingest.endpoints", "ingest.endpoints element " + std::to_string(i + 1) + " = " +
                                          Quote(e) + " is not a ZeroMQ endpoint" + example);
    }
    bound.emplace_back("ingest.endpoints", e);
  }
  for (std::size_t i = 0; i < s.subscribe_endpoints.size(); ++i) {
    const std::string& e = s.subscribe_endpoints[i];
    if (!LooksLikeEndpoint(e)) {
      return fail("ingest.subscribe", "ingest.subscribe element " + std::to_string(i + 1) + " = " +
                                          Quote(e) + " is not a ZeroMQ endpoint" + example);
    }
  }
  if (s.ingest_endpoints.empty() && s.subscribe_endpoints.empty()) {
    return std::optional<Violation>(
        Violation{{"ingest.endpoints", "ingest.subscribe"},
                  "ingest.endpoints and ingest.subscribe are both empty: the daemon would "
                  "receive nothing"});
  }
  if (!LooksLikeEndpoint(s.publish_endpoint)) {
    return fail("publish.endpoint", "publish.endpoint = " + Quote(s.publish_endpoint) +
                                        " is not a ZeroMQ endpoint" + example);
  }
  bound.emplace_back("publish.endpoint", s.publish_endpoint);
  if (!LooksLikeEndpoint(s.control_endpoint)) {
    return fail("control.endpoint", "control.endpoint = " + Quote(s.control_endpoint) +
                                        " is not a ZeroMQ endpoint" + example);
  }
  bound.emplace_back("control.endpoint", s.control_endpoint);
  for (std::size_t i = 0; i < bound.size(); ++i) {
    for (std::size_t j = 0; j < i; ++j) {
      if (bound[i].second == bound[j].second && !IsEphemeral(bound[i].second)) {
        return fail(bound[i].first, bound[i].first + " = " + Quote(bound[i].second) +
                                        " is also bound by " + bound[j].first +
                                        "; each socket needs its own endpoint");
      }
    }
  }
  if (s.receive_high_water_mark < 0) {
    return fail("ingest.receive_high_water_mark",
                "ingest.receive_high_water_mark = " + Num(int64_t{s.receive_high_water_mark}) +
                    " must not be negative (0: no limit)");
  }
  if (s.publish_high_water_mark < 0) {
    return fail("publish.high_water_mark",
                "publish.high_water_mark = " + Num(int64_t{s.publish_high_water_mark}) +
                    " must not be negative (0: no limit)");
  }
  if (!LooksLikeListenAddress(s.metrics_listen)) {
    return fail("metrics.listen", "metrics.listen = " + Quote(s.metrics_listen) +
                                      " must be HOST:PORT, e.g. 127.0.0.1:9464 (port 0: any free "
                                      "port)");
  }
  if (s.anomaly_ratio_window < 1) {
    return fail(
        "metrics.anomaly_ratio_window",
        "metrics.anomaly_ratio_window = " + Num(s.anomaly_ratio_window) + " must be at least 1");
  }
  if (!std::isfinite(s.snapshot_interval_seconds) || !(s.snapshot_interval_seconds > 0)) {
    return fail("state.snapshot_interval_seconds",
                "state.snapshot_interval_seconds = " + Num(s.snapshot_interval_seconds) +
                    " must be a positive number of seconds");
  }
  if (std::find(std::begin(kLogLevels), std::end(kLogLevels), s.log_level) ==
      std::end(kLogLevels)) {
    return fail("daemon.log_level",
                "daemon.log_level = " + Quote(s.log_level) +
                    " must be one of \"trace\", \"debug\", \"info\", \"warn\", \"error\", "
                    "\"critical\", \"off\"");
  }
  if (s.refit_threads < 1) {
    return fail("daemon.refit_threads",
                "daemon.refit_threads = " + Num(int64_t{s.refit_threads}) + " must be at least 1");
  }
  if (s.max_streams < 1) {
    return fail("limits.max_streams",
                "limits.max_streams = " + Num(s.max_streams) + " must be at least 1");
  }
  // The wire bounds of daemon/protocol/PROTOCOL.md §7: the binary dims field is 16 bits, and 28
  // bytes is the smallest binary message.
  if (s.max_dims < 1 || s.max_dims > 65535) {
    return fail("limits.max_dims",
                "limits.max_dims = " + Num(int64_t{s.max_dims}) + " is outside [1, 65535]");
  }
  if (s.max_message_bytes < 28) {
    return fail("limits.max_message_bytes",
                "limits.max_message_bytes = " + Num(static_cast<int64_t>(s.max_message_bytes)) +
                    " must be at least 28 (the smallest binary message)");
  }
  if (s.max_vectors_per_message < 1) {
    return fail("limits.max_vectors_per_message",
                "limits.max_vectors_per_message = " + Num(int64_t{s.max_vectors_per_message}) +
                    " must be at least 1");
  }
  if (s.record_rotate_bytes < 1) {
    return fail("recording.rotate_bytes", "recording.rotate_bytes = 0 must be at least 1");
  }
  if (s.record_keep_files < 0) {
    return fail("recording.keep_files",
                "recording.keep_files = " + Num(int64_t{s.record_keep_files}) +
                    " must not be negative (0: keep every file)");
  }
  return std::nullopt;
}

// "FILE:LINE:COL: " of the first key of the violation that the table set, else `fallback`.
std::string Locate(const Reader& reader, const Violation& violation, const KeyPositions& positions,
                   const std::string& fallback) {
  for (const auto& key : violation.keys) {
    if (const auto it = positions.find(key); it != positions.end()) return reader.At(it->second);
  }
  return fallback;
}

}  // namespace

// -----------------------------------------------------------------------------------------------

Config DefaultConfig() { return Config{}; }

Config ParseConfig(std::string_view toml_text, const std::string& path_for_messages) {
  const Reader reader(path_for_messages);
  toml::table root;
  try {
    root = toml::parse(toml_text, std::string_view(path_for_messages));
  } catch (const toml::parse_error& error) {
    throw ConfigError(reader.At(error.source()) +
                      "TOML syntax error: " + std::string(error.description()));
  }

  Config config;
  config.source_path = path_for_messages;
  KeyPositions daemon_positions;
  KeyPositions detector_positions;
  std::vector<KeyPositions> override_positions;

  std::vector<std::string_view> sections(std::begin(kDaemonSections), std::end(kDaemonSections));
  sections.push_back(kDetectorSection);
  sections.push_back(kStreamSection);

  for (const Entry& entry : InFileOrder(root)) {
    const std::string_view name = entry.key->str();
    if (name == kDetectorSection) {
      ParseDetectorSection(reader, RequireTable(reader, *entry.key, *entry.node), config.detector,
                           detector_positions);
    } else if (name == kStreamSection) {
      const auto* array = entry.node->as_array();
      if (array == nullptr) {
        reader.Fail(entry.node->source(),
                    "'stream' must be an array of tables: write [[stream]] (double brackets), "
                    "not " +
                        Describe(*entry.node));
      }
      for (const auto& element : *array) {
        const auto* table = element.as_table();
        if (table == nullptr) {
          reader.Fail(element.source(),
                      "each 'stream' entry must be a table ([[stream]]), not " + Describe(element));
        }
        KeyPositions positions;
        config.overrides.push_back(ParseOverride(reader, *table, positions));
        override_positions.push_back(std::move(positions));
      }
    } else if (std::find(std::begin(kDaemonSections), std::end(kDaemonSections), name) !=
               std::end(kDaemonSections)) {
      ParseDaemonSection(reader, name, RequireTable(reader, *entry.key, *entry.node), config.daemon,
                         daemon_positions);
    } else {
      UnknownKey(reader, *entry.key, *entry.node, "", sections);
    }
  }

  const std::string file_prefix = path_for_messages + ": ";
  if (const auto violation = CheckDaemon(config.daemon)) {
    throw ConfigError(Locate(reader, *violation, daemon_positions, file_prefix) +
                      violation->message);
  }
  const auto in_detector = [](std::string_view key) { return "detector." + std::string(key); };
  if (const auto violation = CheckDetector(config.detector, in_detector)) {
    throw ConfigError(Locate(reader, *violation, detector_positions, file_prefix) +
                      violation->message);
  }
  const auto check_dims = [&](const DetectorOptions& options, const std::string& key_name,
                              const std::string& where) {
    if (options.feature_names.size() > static_cast<std::size_t>(config.daemon.max_dims)) {
      throw ConfigError(where + key_name + " has " + std::to_string(options.feature_names.size()) +
                        " names but limits.max_dims = " + std::to_string(config.daemon.max_dims));
    }
  };
  {
    const auto it = detector_positions.find("feature_names");
    check_dims(config.detector, "detector.feature_names",
               it == detector_positions.end() ? file_prefix : reader.At(it->second));
  }

  for (std::size_t i = 0; i < config.overrides.size(); ++i) {
    const auto& override_table = config.overrides[i];
    const auto& positions = override_positions[i];
    for (std::size_t j = 0; j < i; ++j) {
      if (config.overrides[j].match == override_table.match) {
        throw ConfigError(reader.At(positions.at(std::string(kMatchKey))) +
                          "stream.match = " + Quote(override_table.match) +
                          " repeats the [[stream]] at " + config.overrides[j].origin +
                          "; the first match wins, so this one would never apply");
      }
    }
    DetectorOptions merged = config.detector;
    ApplyOverride(override_table, merged);
    const auto namer = [&](std::string_view key) {
      const bool set_here = positions.find(key) != positions.end();
      return std::string(set_here ? "stream." : "detector.") + std::string(key);
    };
    const std::string origin_prefix = override_table.origin + ": ";
    if (const auto violation = CheckDetector(merged, namer)) {
      throw ConfigError(Locate(reader, *violation, positions, origin_prefix) + violation->message);
    }
    const auto it = positions.find("feature_names");
    if (it != positions.end()) check_dims(merged, "stream.feature_names", reader.At(it->second));
  }
  return config;
}

Config LoadConfig(const std::string& path) {
  std::error_code error;
  if (std::filesystem::is_directory(path, error)) {
    throw ConfigError(path + ": is a directory, not a config file");
  }
  std::ifstream in(path, std::ios::binary);
  if (!in) {
    throw ConfigError(path + ": cannot open the config file: " + std::strerror(errno));
  }
  std::ostringstream text;
  text << in.rdbuf();
  if (in.bad()) {
    throw ConfigError(path + ": cannot read the config file: " + std::strerror(errno));
  }
  return ParseConfig(text.str(), path);
}

const Config::StreamOverride* MatchingOverride(const Config& config, std::string_view stream_key) {
  const std::string key(stream_key);  // fnmatch needs a terminated string
  for (const auto& override_table : config.overrides) {
    if (fnmatch(override_table.match.c_str(), key.c_str(), 0) == 0) return &override_table;
  }
  return nullptr;
}

DetectorOptions DetectorOptionsFor(const Config& config, std::string_view stream_key) {
  DetectorOptions options = config.detector;
  if (const auto* override_table = MatchingOverride(config, stream_key)) {
    ApplyOverride(*override_table, options);
  }
  return options;
}

void ValidateDetectorOptions(const DetectorOptions& options, const std::string& where) {
  const auto plain = [](std::string_view key) { return std::string(key); };
  if (const auto violation = CheckDetector(options, plain)) {
    throw ConfigError(where.empty() ? violation->message : where + ": " + violation->message);
  }
}

void ValidateDaemonSettings(const DaemonSettings& settings, const std::string& where) {
  if (const auto violation = CheckDaemon(settings)) {
    throw ConfigError(where.empty() ? violation->message : where + ": " + violation->message);
  }
}

std::string DescribeDetectorOptions(const DetectorOptions& options) {
  std::string out = "[detector]\n";
  for (const auto& key : DetectorKeys()) {
    out += std::string(key.name) + " = " +
           std::visit([&](auto pointer) { return ToToml(options.*pointer); }, key.member) + "\n";
  }
  return out;
}

bool SameDetectorOptions(const DetectorOptions& a, const DetectorOptions& b) {
  for (const auto& key : DetectorKeys()) {
    const bool same =
        std::visit([&](auto pointer) { return SameValue(a.*pointer, b.*pointer); }, key.member);
    if (!same) return false;
  }
  return true;
}

std::vector<std::string> KnownConfigKeys() {
  std::vector<std::string> keys;
  for (const auto& k : DaemonKeys())
    keys.push_back(std::string(k.section) + "." + std::string(k.name));
  for (const auto& k : DetectorKeys()) keys.push_back("detector." + std::string(k.name));
  keys.push_back("stream.match");
  return keys;
}

}  // namespace nuwatch
