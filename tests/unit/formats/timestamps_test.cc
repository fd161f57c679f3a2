// Tests of the timestamp and duration text (formats/timestamps.h) against implementations outside
// the project: GNU date (`date -u -d @SECONDS +%FT%TZ`, coreutils 9.1) for the written form,
// Python's datetime (/usr/bin/python3) for the calendar.
#include "formats/timestamps.h"

#include <gtest/gtest.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <fstream>
#include <limits>
#include <optional>
#include <sstream>
#include <string>
#include <vector>

#include "common/run_command.h"

namespace nuwatch {
namespace {

TEST(FormatTimestamp, WritesIsoUtcAsGnuDateDoes) {
  EXPECT_EQ(FormatTimestamp(0), "1970-01-01T00:00:00Z");             // date -u -d @0
  EXPECT_EQ(FormatTimestamp(1767225600), "2026-01-01T00:00:00Z");    // date -u -d @1767225600
  EXPECT_EQ(FormatTimestamp(253402300799), "9999-12-31T23:59:59Z");  // the last 4-digit year
  EXPECT_EQ(FormatTimestamp(-62167219200), "0000-01-01T00:00:00Z");  // the first
  EXPECT_EQ(FormatTimestamp(1767225600.25), "2026-01-01T00:00:00.250Z");
}

// Regression, issue 10: FormatTimestamp(1e300) cast 1e300 to time_t (undefined behaviour,
// UndefinedBehaviorSanitizer: "1e+300 is outside the range of representable values"), reachable
// from `nuwatch tail` with a result whose t is 1e300. Times outside the four-digit years are now
// written as the number, which ParseTimestamp reads back.
TEST(FormatTimestampRegression, HugeTimeIsWrittenAsItsNumberWithoutUndefinedBehaviour) {
  for (const double t : {1e300, -1e300, 253402300800.0, -62167219201.0, 1e19, -9.3e18,
                         std::numeric_limits<double>::max(), -std::numeric_limits<double>::max()}) {
    const std::string text = FormatTimestamp(t);
    const std::optional<double> back = ParseTimestamp(text);
    ASSERT_TRUE(back.has_value()) << t << " written as '" << text << "'";
    EXPECT_EQ(*back, t) << text;
  }
  EXPECT_EQ(FormatTimestamp(1e300), "1e+300");
  EXPECT_EQ(FormatTimestamp(std::nan("")), "nan");
  EXPECT_EQ(FormatTimestamp(std::numeric_limits<double>::infinity()), "inf");
}

TEST(FormatTimestamp, ReadsBackWithinAMillisecond) {
  for (const double t : {-1.5, 0.0005, 1767225600.9996, 253402300799.4, -62167219199.75}) {
    const std::optional<double> back = ParseTimestamp(FormatTimestamp(t));
    ASSERT_TRUE(back.has_value()) << t;
    EXPECT_NEAR(*back, t, 5e-4) << FormatTimestamp(t);
  }
}

using testing_data::RunCommand;

// Python's answer for each candidate: seconds since the epoch (UTC), or "invalid" when
// datetime refuses the date or time. fromisoformat reads "Z" and "+01:00" from Python 3.11 on
// (Debian 12 ships 3.11).
constexpr const char* kPythonReference = R"(
import sys
from datetime import datetime, timezone
for line in sys.stdin:
    text = line.rstrip("\n")
    try:
        t = datetime.fromisoformat(text)
    except ValueError:
        print("invalid")
        continue
    if t.tzinfo is None:
        t = t.replace(tzinfo=timezone.utc)
    print(repr(t.timestamp()))
)";

std::vector<std::string> PythonAnswers(const std::vector<std::string>& candidates) {
  char dir[] = "/tmp/nuwatch_timestamps_XXXXXX";
  EXPECT_NE(::mkdtemp(dir), nullptr);
  const std::string script = std::string(dir) + "/reference.py";
  const std::string input = std::string(dir) + "/candidates.txt";
  std::ofstream(script) << kPythonReference;
  {
    std::ofstream out(input);
    for (const std::string& c : candidates) out << c << "\n";
  }
  const auto result = RunCommand(std::string(NUWATCH_PYTHON) + " " + script + " < " + input);
  EXPECT_EQ(result.exit_code, 0) << result.output;
  std::vector<std::string> answers;
  std::istringstream lines(result.output);
  for (std::string line; std::getline(lines, line);) answers.push_back(line);
  std::remove(script.c_str());
  std::remove(input.c_str());
  ::rmdir(dir);
  return answers;
}

TEST(TimestampsTest, LeapYearsAsTheGregorianCalendarHasThem) {
  // Regression: a table of month lengths accepted 2026-02-29 as 1 March. Published calendar
  // facts: 2028 and 2000 are leap years (divisible by 4, resp. 400), 2026 and 1900 are not.
  EXPECT_FALSE(ParseTimestamp("2026-02-29T00:00:00Z"));
  EXPECT_FALSE(ParseTimestamp("1900-02-29T00:00:00Z"));
  ASSERT_TRUE(ParseTimestamp("2028-02-29T00:00:00Z"));
  ASSERT_TRUE(ParseTimestamp("2000-02-29T00:00:00Z"));
  // 2028-02-29 is the day after 2028-02-28 and the day before 2028-03-01.
  EXPECT_EQ(*ParseTimestamp("2028-02-29T00:00:00Z") - *ParseTimestamp("2028-02-28T00:00:00Z"),
            86400);
  EXPECT_EQ(*ParseTimestamp("2028-03-01T00:00:00Z") - *ParseTimestamp("2028-02-29T00:00:00Z"),
            86400);
}

TEST(TimestampsTest, EveryMonthEndOfTwoCenturiesAgreesWithPython) {
  // Days 28 to 31 of every month from 1899 to 2104 (the century rules of 1900, 2000 and 2100),
  // at a time of day with a zone offset, and the same date written without a zone (UTC).
  std::vector<std::string> candidates;
  for (int year = 1899; year <= 2104; ++year) {
    for (int month = 1; month <= 12; ++month) {
      for (int day = 28; day <= 31; ++day) {
        char text[64];
        std::snprintf(text, sizeof text, "%04d-%02d-%02dT13:45:07+01:30", year, month, day);
        candidates.push_back(text);
        std::snprintf(text, sizeof text, "%04d-%02d-%02d 23:59:59", year, month, day);
        candidates.push_back(text);
      }
    }
  }
  const std::vector<std::string> answers = PythonAnswers(candidates);
  ASSERT_EQ(answers.size(), candidates.size());
  int valid = 0;
  for (std::size_t i = 0; i < candidates.size(); ++i) {
    const std::optional<double> ours = ParseTimestamp(candidates[i]);
    if (answers[i] == "invalid") {
      EXPECT_FALSE(ours) << candidates[i];
      continue;
    }
    ++valid;
    ASSERT_TRUE(ours) << candidates[i];
    EXPECT_EQ(*ours, std::stod(answers[i])) << candidates[i];
  }
  // 206 years x 12 months x 4 days x 2 forms, minus the days that do not exist: the check above
  // saw both kinds.
  EXPECT_GT(valid, 0);
  EXPECT_LT(valid, static_cast<int>(candidates.size()));
}

TEST(TimestampsTest, FractionsZonesAndNumbers) {
  // 2026-03-01T00:00:00Z = 1772323200 (Python: calendar.timegm((2026, 3, 1, 0, 0, 0))).
  EXPECT_EQ(*ParseTimestamp("2026-03-01T00:00:00Z"), 1772323200.0);
  EXPECT_EQ(*ParseTimestamp("2026-03-01T00:00:00.5Z"), 1772323200.5);
  EXPECT_EQ(*ParseTimestamp("2026-03-01T01:00:00+01:00"), 1772323200.0);
  EXPECT_EQ(*ParseTimestamp("2026-02-28T23:00:00-0100"), 1772323200.0);
  EXPECT_EQ(*ParseTimestamp(" 1772323200.25 "), 1772323200.25);
  for (const char* bad :
       {"", "2026-03-01", "2026-3-01T00:00:00Z", "2026-03-01T24:00:00Z", "2026-03-01T00:60:00Z",
        "2026-03-01T00:00:00.Z", "2026-13-01T00:00:00Z", "2026-00-10T00:00:00Z",
        "2026-04-31T00:00:00Z", "nan", "inf", "2026-03-01T00:00:00Zjunk"}) {
    EXPECT_FALSE(ParseTimestamp(bad)) << bad;
  }
}

TEST(TimestampsTest, FormatsAsPythonsIsoformatDoes) {
  // Python: datetime.fromtimestamp(t, timezone.utc).isoformat(timespec="milliseconds").
  EXPECT_EQ(FormatTimestamp(1772323200.0), "2026-03-01T00:00:00Z");
  EXPECT_EQ(FormatTimestamp(1772323200.25), "2026-03-01T00:00:00.250Z");
  EXPECT_EQ(FormatTimestamp(1835395200.0), "2028-02-29T00:00:00Z");
  EXPECT_EQ(FormatTimestamp(-1.0), "1969-12-31T23:59:59Z");
  EXPECT_EQ(FormatTimestamp(1772323199.9996), "2026-03-01T00:00:00Z");
  // Round trip over four years at an odd step, leap day included.
  for (double t = 1735689600; t < 1735689600 + 4 * 365.25 * 86400; t += 86400 * 1.37 + 11) {
    EXPECT_EQ(*ParseTimestamp(FormatTimestamp(t)), t) << FormatTimestamp(t);
  }
}

TEST(TimestampsTest, Durations) {
  EXPECT_EQ(*ParseDuration("90"), 90);
  EXPECT_EQ(*ParseDuration("15m"), 900);
  EXPECT_EQ(*ParseDuration("1.5h"), 5400);
  EXPECT_EQ(*ParseDuration("7d"), 7 * 86400);
  EXPECT_FALSE(ParseDuration("-1s"));
  EXPECT_FALSE(ParseDuration("5 minutes"));
  EXPECT_FALSE(ParseDuration(""));
}

}  // namespace
}  // namespace nuwatch
