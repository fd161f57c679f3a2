// Tests of the settings tables (nuwatch/setting.h) and the detector's table
// (nuwatch/detector_settings.h): one set of rules for every caller, the messages that name the key
// and the value, and the types a table holds (numbers, enum-like strings, lists of integers) shown
// on a table of its own.
#include "nuwatch/detector_settings.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <set>
#include <string>
#include <vector>

#include "nuwatch/detector.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

std::string Plain(std::string_view, std::string_view key) { return std::string(key); }

// The message of the first rule `options` breaks, or "" when it breaks none.
std::string Violation(const DetectorOptions& options) {
  const auto violation = FindDetectorViolation(options, Plain);
  return violation ? violation->message : "";
}

TEST(DetectorKeys, TheDefaultsPassTheirOwnRules) { EXPECT_EQ(Violation(DetectorOptions{}), ""); }

TEST(DetectorKeys, NamesAreUniqueAndEveryKeyIsDocumented) {
  std::set<std::string_view> names;
  for (const auto& key : DetectorKeys()) {
    EXPECT_TRUE(names.insert(key.name).second) << key.name << " twice";
    EXPECT_EQ(key.section, "detector");
    EXPECT_FALSE(key.doc.empty()) << key.name;
    EXPECT_FALSE(key.group.empty()) << key.name;
    EXPECT_EQ(key.reload, ReloadEffect::kNextRefit) << key.name;  // Detector::UpdateOptions
    if (!key.at_most.empty()) {
      EXPECT_NE(FindSetting(DetectorKeys(), key.at_most), nullptr);
    }
  }
  // 32 members of DetectorOptions (detector_options.h).
  EXPECT_EQ(names.size(), 32u);
}

TEST(DetectorKeys, TheChoicesOfEnumKeysAreWhatTheParsersAccept) {
  for (const auto& choice : FindSetting(DetectorKeys(), "kernel")->choices) {
    ASSERT_TRUE(ParseKernelType(choice)) << choice;
    EXPECT_EQ(KernelName(*ParseKernelType(choice)), choice);
  }
  for (const auto& choice : FindSetting(DetectorKeys(), "scaler")->choices) {
    ASSERT_TRUE(ParseScalerType(choice)) << choice;
    EXPECT_EQ(ScalerName(*ParseScalerType(choice)), choice);
  }
}

// Regression: the detector (CheckDetectorOptions) and the config loader had two sets of rules and
// disagreed on these three; a config or replay accepted what the other refused. Now both read the
// table, so each is refused by both with the same message.
TEST(DetectorKeys, OneSetOfRulesForTheDetectorAndTheConfig) {
  DetectorOptions o;
  o.drift_min_samples = 0;  // the detector accepted 0 (>= 0), the config file refused it (>= 1)
  EXPECT_EQ(Violation(o), "drift_min_samples = 0 must be at least 1");
  o = DetectorOptions{};
  o.degree = 0;  // the detector checked the degree only for the polynomial kernel
  EXPECT_EQ(o.kernel, KernelType::kRbf);
  EXPECT_EQ(Violation(o), "degree = 0 must be at least 1");
  o = DetectorOptions{};
  o.cache_bytes = 64;  // the detector did not check the cache at all
  EXPECT_EQ(Violation(o), "cache_bytes = 64 must be at least 1048576 (1 MiB); the unit is bytes");
  try {
    Detector detector(o, 2);
    FAIL() << "cache_bytes = 64 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_STREQ(e.what(),
                 "Detector: cache_bytes = 64 must be at least 1048576 (1 MiB); the unit is bytes");
  }
}

TEST(DetectorKeys, MessagesNameTheKeyTheValueAndTheRange) {
  DetectorOptions o;
  o.nu = 1.5;
  EXPECT_EQ(Violation(o), "nu = 1.5 is outside (0, 1]");
  o.nu = std::numeric_limits<double>::quiet_NaN();
  EXPECT_EQ(Violation(o), "nu = nan is not finite");
  o = DetectorOptions{};
  o.gamma.mode = GammaSpec::Mode::kValue;
  o.gamma.value = -0.5;
  EXPECT_EQ(Violation(o),
            "gamma = -0.5 must be positive (or \"scale\", \"median\" or \"min_volume\")");
  o = DetectorOptions{};
  o.refit_every = -1;
  EXPECT_EQ(Violation(o), "refit_every = -1 must not be negative (0: fit once, never refit)");
  o = DetectorOptions{};
  o.window = 100;
  o.warmup = 500;
  const auto violation = FindDetectorViolation(o, Plain);
  ASSERT_TRUE(violation);
  EXPECT_EQ(violation->message, "warmup = 500 must not exceed window = 100");
  EXPECT_EQ(violation->keys, (std::vector<std::string>{"warmup", "window"}));
  // The rules the table cannot state (detector_settings.cc): warmup 0 or >= 2, folds 0 or >= 2,
  // a budget when calibrating, a statistic when rolling windows are set.
  o = DetectorOptions{};
  o.warmup = 1;
  EXPECT_EQ(Violation(o), "warmup = 1 must be at least 2 (0: the whole window)");
  o = DetectorOptions{};
  o.calibration_folds = 1;
  EXPECT_EQ(
      Violation(o),
      "calibration_folds = 1: cross-fitting needs at least 2 folds (0 turns calibration off)");
  o = DetectorOptions{};
  o.false_alarm_rate = 0;
  o.false_incidents_per_day = 0;
  EXPECT_EQ(Violation(o),
            "false_alarm_rate and false_incidents_per_day are both 0: set a false-alarm budget, "
            "or calibration_folds = 0 to flag decision < 0");
  o.calibration_folds = 0;
  EXPECT_FALSE(FindDetectorViolation(o, Plain));
  o = DetectorOptions{};
  o.rolling_windows = {6};
  o.rolling_statistics = {};
  EXPECT_EQ(
      Violation(o),
      "rolling_statistics is empty while rolling_windows is set: name at least one statistic");
  o.rolling_statistics = {"mean", "median"};
  EXPECT_EQ(
      Violation(o),
      "rolling_statistics element 2 = \"median\" must be one of \"mean\", \"std\", \"slope\"");
  o = DetectorOptions{};
  o.rolling_windows = {6, 1};
  EXPECT_EQ(Violation(o), "rolling_windows element 2 = 1 is outside [2, 100000]");
  // A key's own range comes before a rule between keys.
  o = DetectorOptions{};
  o.open_window = 0;
  EXPECT_EQ(Violation(o), "open_window = 0 is outside [1, 1000000]");
  o = DetectorOptions{};
  o.feature_names = {"a", "b", "a"};
  EXPECT_EQ(Violation(o), "feature_names names \"a\" twice");
}

TEST(SettingBoundsText, WritesIntervalsAsMathematicsDoes) {
  EXPECT_EQ(SettingBoundsText({.min = 0, .min_open = true, .max = 1}), "(0, 1]");
  EXPECT_EQ(SettingBoundsText({.min = 1, .max = 65535}), "[1, 65535]");
  EXPECT_EQ(SettingBoundsText({.min = 2}), ">= 2");
  EXPECT_EQ(SettingBoundsText({.min = 0, .min_open = true}), "> 0");
  EXPECT_EQ(SettingBoundsText({}), "");
}

// The key types that are not in DetectorOptions yet (lists of integers, enum-like strings) on a
// table of their own: what a new key of these types gets from the table without further code.
struct Toy {
  std::vector<int64_t> lags = {1, 2};
  std::string method = "split";
  int64_t count = 3;
};
constexpr std::string_view kMethods[] = {"split", "full"};
const Setting<Toy> kToyKeys[] = {
    {.section = "toy",
     .name = "lags",
     .member = &Toy::lags,
     .doc = "Lags.",
     .bounds = {.min = 1, .max = 100},
     .distinct = true},
    {.section = "toy",
     .name = "method",
     .member = &Toy::method,
     .doc = "How.",
     .choices = kMethods},
    {.section = "toy",
     .name = "count",
     .member = &Toy::count,
     .doc = "How many.",
     .bounds = {.min = 1},
     .at_most = "lags"},  // not a number: the rule between keys does not apply
};

std::string ToyViolation(const Toy& toy) {
  const auto violation = CheckSettings(std::span<const Setting<Toy>>(kToyKeys), toy,
                                       [](std::string_view section, std::string_view key) {
                                         return std::string(section) + "." + std::string(key);
                                       });
  return violation ? violation->message : "";
}

TEST(CheckSettings, ChecksListsOfIntegersAndEnumLikeStrings) {
  Toy toy;
  EXPECT_EQ(ToyViolation(toy), "");
  toy.lags = {1, 0};
  EXPECT_EQ(ToyViolation(toy), "toy.lags element 2 = 0 is outside [1, 100]");
  toy.lags = {3, 3};
  EXPECT_EQ(ToyViolation(toy), "toy.lags names 3 twice");
  toy = Toy{};
  toy.method = "half";
  EXPECT_EQ(ToyViolation(toy), "toy.method = \"half\" must be one of \"split\", \"full\"");
  toy = Toy{};
  toy.count = 0;
  EXPECT_EQ(ToyViolation(toy), "toy.count = 0 must be at least 1");
}

}  // namespace
}  // namespace nuwatch
