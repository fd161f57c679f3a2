// Timestamps and durations as the command line and the CSV files write them.
// Thread safety: pure functions.
#pragma once

#include <optional>
#include <string>
#include <string_view>

namespace nuwatch {

// Seconds since the Unix epoch from either a number ("1700000000", "1700000000.25") or ISO-8601
// ("2026-03-01T12:00:00Z", "2026-03-01T12:00:00.5+01:00", "2026-03-01 12:00:00"; no zone means
// UTC). Returns nullopt for anything else, including non-finite numbers.
std::optional<double> ParseTimestamp(std::string_view text);

// ISO-8601 UTC with a 'Z', e.g. "2026-03-01T12:00:00Z"; fractional seconds only when present
// (millisecond resolution). Outside the years 0000 to 9999 the number of seconds instead
// ("1e+300"; "nan", "inf" for those), so that any double is written without undefined behaviour
// and a finite one reads back with ParseTimestamp.
std::string FormatTimestamp(double seconds_since_epoch);

// "90", "90s", "15m", "2h", "7d", "1.5h" (a bare number is seconds). Returns nullopt for anything
// else or a negative value.
std::optional<double> ParseDuration(std::string_view text);

}  // namespace nuwatch
