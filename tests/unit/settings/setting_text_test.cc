// Tests of the text form of settings (settings/setting_text.h), which the command-line flags named
// as the keys use: every key reads back to the same value, and text that is not of the key's type
// is refused with a reason naming the text.
#include "settings/setting_text.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <string>
#include <vector>

#include "common/detector_options_samples.h"
#include "nuwatch/detector_settings.h"
#include "settings/config.h"

namespace nuwatch {
namespace {

// The text form the command-line flags use reads back to the same value for every key.
TEST(SettingText, EveryDetectorKeyRoundTripsThroughItsText) {
  for (const DetectorOptions& options : {DetectorOptions{}, UnusualDetectorOptions()}) {
    for (const auto& key : DetectorKeys()) {
      DetectorOptions back;
      ASSERT_EQ(ParseSettingText(key, SettingText(key, options), back), std::nullopt) << key.name;
      DetectorOptions expected;
      std::visit([&](auto pointer) { expected.*pointer = options.*pointer; }, key.member);
      EXPECT_TRUE(SameDetectorOptions(back, expected))
          << key.name << " = " << SettingText(key, options);
    }
  }
}

TEST(SettingText, RefusesTextThatIsNotOfTheKeysType) {
  DetectorOptions o;
  const auto error = [&](std::string_view key, std::string_view text) {
    return ParseSettingText(*FindSetting(DetectorKeys(), key), text, o).value_or("accepted");
  };
  EXPECT_EQ(error("nu", "abc"), "'abc' is not a number");
  EXPECT_EQ(error("nu", "0.5x"), "'0.5x' is not a number");
  EXPECT_EQ(error("window", "1.5"), "'1.5' is not a whole number");
  EXPECT_EQ(error("degree", "3000000000"),
            "'3000000000' is out of range [-2147483648, 2147483647]");
  EXPECT_EQ(error("cache_bytes", "-1"), "'-1' must not be negative");
  EXPECT_EQ(error("kernel", "sigmoid"), "'sigmoid' is not one of rbf, linear, poly");
  EXPECT_EQ(error("gamma", "wide"), "'wide' is not scale, median, min_volume or a number > 0");
  EXPECT_EQ(error("gamma", "min_volume"), "accepted");
  EXPECT_EQ(o.gamma.mode, GammaSpec::Mode::kMinVolume);
  EXPECT_EQ(error("drift_detection", "yes"), "'yes' is not true or false");
  EXPECT_EQ(o.nu, DetectorOptions{}.nu);  // unchanged by the failures
  EXPECT_EQ(error("feature_names", " a, b ,c"), "accepted");
  EXPECT_EQ(o.feature_names, (std::vector<std::string>{"a", "b", "c"}));
}

}  // namespace
}  // namespace nuwatch
