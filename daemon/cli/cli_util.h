// Helpers shared by the nuwatch subcommands: reading feature CSV files, reading flag values with
// one phrasing per kind of mistake, and formatting numbers.
// Thread safety: the functions are reentrant; OutputFile is used by one thread.
#pragma once

#include <cmath>
#include <cstdio>
#include <string>
#include <vector>

#include "cli/commands.h"
#include "formats/feature_file.h"
#include "formats/stream_file.h"
#include "nuwatch/types.h"

namespace nuwatch::cli {

// ReadFeatureFile of formats/feature_file.h, its CsvError turned into CommandError (the file and
// line).
FeatureFile ReadFeatureFile(const std::string& path);

// The rows of `file` whose stream is `stream` (all when empty) and whose time lies in
// [from, until] (seconds; infinite: no bound). Throws CommandError when the file holds several
// streams and none was chosen ("--stream: the file holds 3 streams (pump-01, ...); choose one"),
// when a time bound is given without a time column, or when nothing is left.
FeatureFile SelectRows(FeatureFile file, const std::string& stream, double from, double until);

// The flag values every subcommand reads, with one phrasing per kind of mistake:
//   "--rate: 'abc' is not a number", "--count: '1.5' is not a whole number",
//   "--pumps: 120 is out of range (1..99)", "--grace: 'soon' is not a duration (e.g. ...)".
// Each throws CommandError with that phrasing; a bound at the type's limit, or infinite, is no
// bound (the range then reads ">= 0" or "<= 3600s").
enum class LowBound { kInclusive, kExclusive };
double NumberFlag(const std::string& flag, const std::string& text);
int64_t WholeNumberFlag(const std::string& flag, const std::string& text);
double NumberFlagIn(const std::string& flag, const std::string& text, double low, double high,
                    LowBound low_bound = LowBound::kInclusive);
int64_t WholeNumberFlagIn(const std::string& flag, const std::string& text, int64_t low,
                          int64_t high);
// A duration ("90", "90s", "15m", "2h", "7d") in seconds, from 0 (or above 0 with kExclusive) to
// `high` seconds.
double DurationFlag(const std::string& flag, const std::string& text, double high = INFINITY,
                    LowBound low_bound = LowBound::kInclusive);
// The range error of every flag: "--pumps: 120 is out of range (1..99)", for the ranges the
// functions above cannot state ("0 or >= 0.001").
CommandError OutOfRange(const std::string& flag, const std::string& text, const std::string& range);
// Throws CommandError for an endpoint without a transport ("127.0.0.1:7601" gets the hint to
// write "tcp://127.0.0.1:7601").
void CheckEndpoint(const std::string& flag, const std::string& endpoint);

// Before parsing: throws CommandError "--inptu: unknown flag (did you mean --input?)" for a
// "--name" argv does not know in the subcommand it names (CLI11 would first complain that a
// required flag is missing, without naming the typo).
void CheckUnknownFlags(const CLI::App& app, int argc, const char* const* argv);

// Shortest text that reads back as the same double ("0.125", "-3.5e-07").
std::string FormatNumber(double value);

// A FILE* that is stdout or a newly created file; closes on destruction.
class OutputFile {
 public:
  explicit OutputFile(const std::string& path);  // "" or "-": stdout
  ~OutputFile();
  OutputFile(const OutputFile&) = delete;
  OutputFile& operator=(const OutputFile&) = delete;
  std::FILE* get() const { return file_; }
  // Flushes and reports a write error (disk full, closed pipe) as CommandError.
  void Finish();

 private:
  std::string path_;
  std::FILE* file_ = nullptr;
  bool owned_ = false;
};

}  // namespace nuwatch::cli
