// Tests of the timestamp text (formats/timestamps.h). Expected texts are GNU date's
// (`date -u -d @SECONDS +%FT%TZ`, coreutils 9.1), an implementation outside the project.
#include "formats/timestamps.h"

#include <gtest/gtest.h>

#include <cmath>
#include <limits>
#include <optional>
#include <string>

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

}  // namespace
}  // namespace nuwatch
