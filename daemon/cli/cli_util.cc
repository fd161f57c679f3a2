#include "cli/cli_util.h"

#include <algorithm>
#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstring>
#include <limits>
#include <type_traits>

#include "formats/timestamps.h"
#include "settings/config.h"
#include "settings/setting_text.h"

namespace nuwatch::cli {

FeatureFile ReadFeatureFile(const std::string& path) {
  try {
    return nuwatch::ReadFeatureFile(path);
  } catch (const CsvError& e) {
    throw CommandError(e.what());
  }
}

FeatureFile SelectRows(FeatureFile file, const std::string& stream, double from, double until) {
  const bool bounded = std::isfinite(from) || std::isfinite(until);
  if (bounded && !file.has_time) {
    throw CommandError(file.path + ": --from/--until need a time column");
  }
  if (stream.empty() && file.has_stream) {
    std::vector<std::string_view> streams;
    for (std::size_t r = 0; r < file.streams.size(); ++r) {
      if (std::find(streams.begin(), streams.end(), file.streams[r]) == streams.end())
        streams.push_back(file.streams[r]);
    }
    if (streams.size() > 1) {
      std::string list;
      for (std::size_t i = 0; i < streams.size() && i < 3; ++i)
        list += (i ? ", " : "") + std::string(streams[i]);
      if (streams.size() > 3) list += ", ...";
      throw CommandError("--stream: " + file.path + " holds " + std::to_string(streams.size()) +
                         " streams (" + list + "); choose one with --stream NAME");
    }
  }
  if (!stream.empty() && !file.has_stream) {
    throw CommandError("--stream " + stream + ": " + file.path + " has no stream column");
  }
  std::vector<int64_t> keep;
  for (int64_t r = 0; r < file.rows(); ++r) {
    if (!stream.empty() && file.streams[r] != stream) continue;
    if (bounded && (file.times[r] < from || file.times[r] > until)) continue;
    keep.push_back(r);
  }
  if (keep.empty()) {
    throw CommandError(file.path + ": no rows" +
                       (stream.empty() ? std::string() : " of stream " + stream) +
                       (bounded ? " in the time range given" : ""));
  }
  if (static_cast<int64_t>(keep.size()) == file.rows()) return file;
  FeatureFile out;
  out.path = file.path;
  out.names = file.names;
  out.has_time = file.has_time;
  out.has_stream = file.has_stream;
  out.values.resize(static_cast<int64_t>(keep.size()), file.values.cols());
  for (std::size_t i = 0; i < keep.size(); ++i) {
    out.values.row(static_cast<int64_t>(i)) = file.values.row(keep[i]);
    if (file.has_time) {
      out.times.push_back(file.times[keep[i]]);
      out.time_text.push_back(file.time_text[keep[i]]);
    }
    if (file.has_stream) out.streams.push_back(file.streams[keep[i]]);
  }
  return out;
}

namespace {

// "1..99", ">= 0", "> 0", "<= 10", "> 0 and <= 1": the range a flag's value must lie in, as every
// range error shows it. A bound at the type's limit, or infinite, is no bound.
template <typename Number>
std::string RangeText(Number low, Number high, bool low_open, const char* unit = "") {
  const auto text = [unit](Number v) {
    if constexpr (std::is_floating_point_v<Number>) {
      return FormatNumber(v) + unit;
    } else {
      return std::to_string(v) + unit;
    }
  };
  const auto unbounded = [](Number v) {
    if constexpr (std::is_floating_point_v<Number>) {
      return std::isinf(v);
    } else {
      return v == std::numeric_limits<Number>::min() || v == std::numeric_limits<Number>::max();
    }
  };
  const bool has_low = !unbounded(low), has_high = !unbounded(high);
  if (has_low && has_high && !low_open) return text(low) + ".." + text(high);
  const std::string low_text = std::string(low_open ? "> " : ">= ") + text(low);
  if (has_low && has_high) return low_text + " and <= " + text(high);
  if (has_low) return low_text;
  return "<= " + text(high);
}

}  // namespace

CommandError OutOfRange(const std::string& flag, const std::string& text,
                        const std::string& range) {
  return CommandError(flag + ": " + text + " is out of range (" + range + ")");
}

double NumberFlag(const std::string& flag, const std::string& text) {
  const std::optional<double> value = ParseFiniteNumber(text);
  if (!value || text.empty() || text != TrimField(text))
    throw CommandError(flag + ": '" + text + "' is not a number");
  return *value;
}

int64_t WholeNumberFlag(const std::string& flag, const std::string& text) {
  int64_t value = 0;
  const char* begin = text.data() + (!text.empty() && text[0] == '+' ? 1 : 0);
  const char* end = text.data() + text.size();
  const auto [ptr, error] = std::from_chars(begin, end, value);
  if (error == std::errc::result_out_of_range && ptr == end)
    throw OutOfRange(flag, text,
                     std::to_string(std::numeric_limits<int64_t>::min()) + ".." +
                         std::to_string(std::numeric_limits<int64_t>::max()));
  if (begin == end || error != std::errc() || ptr != end)
    throw CommandError(flag + ": '" + text + "' is not a whole number");
  return value;
}

double NumberFlagIn(const std::string& flag, const std::string& text, double low, double high,
                    LowBound low_bound) {
  const double value = NumberFlag(flag, text);
  const bool open = low_bound == LowBound::kExclusive;
  if (value < low || (open && value == low) || value > high)
    throw OutOfRange(flag, text, RangeText(low, high, open));
  return value;
}

int64_t WholeNumberFlagIn(const std::string& flag, const std::string& text, int64_t low,
                          int64_t high) {
  const int64_t value = WholeNumberFlag(flag, text);
  if (value < low || value > high) throw OutOfRange(flag, text, RangeText(low, high, false));
  return value;
}

double DurationFlag(const std::string& flag, const std::string& text, double high,
                    LowBound low_bound) {
  const std::optional<double> seconds = ParseDuration(text);
  if (!seconds || !std::isfinite(*seconds))
    throw CommandError(flag + ": '" + text + "' is not a duration (e.g. 90, 90s, 15m, 2h, 7d)");
  const bool open = low_bound == LowBound::kExclusive;
  if ((open && *seconds == 0) || *seconds > high)
    throw OutOfRange(flag, text, RangeText(0.0, high, open, "s"));
  return *seconds;
}

void CheckEndpoint(const std::string& flag, const std::string& endpoint) {
  const std::string problem = EndpointSyntaxProblem(endpoint);
  if (!problem.empty()) throw CommandError(flag + ": " + problem);
}

void CheckUnknownFlags(const CLI::App& app, int argc, const char* const* argv) {
  if (argc < 2) return;
  const CLI::App* sub = nullptr;
  for (const CLI::App* candidate : app.get_subcommands([](const CLI::App*) { return true; }))
    if (candidate->check_name(argv[1])) sub = candidate;
  if (sub == nullptr) return;
  std::vector<std::string> names = {"help"};
  for (const CLI::Option* option : sub->get_options())
    for (const std::string& name : option->get_lnames()) names.push_back(name);
  const std::vector<std::string_view> candidates(names.begin(), names.end());
  for (int i = 2; i < argc; ++i) {
    const std::string_view arg = argv[i];
    if (arg == "--") break;  // what follows is not a flag
    if (arg.size() < 3 || arg.substr(0, 2) != "--") continue;
    const std::string_view name = arg.substr(2, arg.find('=') - 2);
    if (std::find(candidates.begin(), candidates.end(), name) != candidates.end()) continue;
    const std::optional<std::string_view> close = ClosestName(name, candidates);
    throw CommandError(
        "--" + std::string(name) + ": unknown flag" +
        (close ? " (did you mean --" + std::string(*close) + "?)" : " (see --help)"));
  }
}

std::string FormatNumber(double value) {
  char buffer[32];
  auto result = std::to_chars(buffer, buffer + sizeof buffer, value);
  return std::string(buffer, result.ptr);
}

OutputFile::OutputFile(const std::string& path) : path_(path) {
  if (path.empty() || path == "-") {
    file_ = stdout;
    path_ = "standard output";
    return;
  }
  file_ = std::fopen(path.c_str(), "w");
  if (file_ == nullptr) throw CommandError(path + ": cannot create: " + std::strerror(errno));
  owned_ = true;
}

OutputFile::~OutputFile() {
  if (owned_ && file_ != nullptr) std::fclose(file_);
}

void OutputFile::Finish() {
  if (std::fflush(file_) != 0 || std::ferror(file_))
    throw CommandError(path_ + ": write failed: " + std::strerror(errno));
  if (owned_) {
    const int rc = std::fclose(file_);
    file_ = nullptr;
    if (rc != 0) throw CommandError(path_ + ": write failed: " + std::strerror(errno));
  }
}

}  // namespace nuwatch::cli
