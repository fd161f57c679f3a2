// The shipped Prometheus files, checked by Prometheus' own tool:
// deploy/prometheus/nuwatch_rules.yml must pass `promtool check rules`, its unit tests
// (nuwatch_rules_test.yml: each alert firing and not firing) must pass `promtool test rules`, and
// prometheus.yml and prometheus-kubernetes.yml must pass `promtool check config`. promtool is
// /usr/bin/promtool from Debian's prometheus package (deploy/install-deps.sh); a missing promtool
// is a failure, not a skip.
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <array>
#include <cstdio>
#include <string>

#include "common/run_command.h"

namespace {

const std::string kPromtool = "/usr/bin/promtool";
const std::string kPrometheusDir = NUWATCH_SOURCE_DIR "/deploy/prometheus";

using RunResult = nuwatch::testing_data::CommandResult;

// Runs promtool with `arguments` (no shell quoting needed: fixed paths) in the rules' directory,
// so that relative rule_files resolve as they do for a user.
RunResult RunPromtool(const std::string& arguments) {
  return nuwatch::testing_data::RunCommand("cd '" + kPrometheusDir + "' && " + kPromtool + " " +
                                           arguments);
}

class PromtoolTest : public ::testing::Test {
 protected:
  void SetUp() override {
    ASSERT_EQ(::access(kPromtool.c_str(), X_OK), 0)
        << kPromtool << " is missing: install Debian's prometheus package (deploy/install-deps.sh)";
  }
};

TEST_F(PromtoolTest, RulesFilePassesCheckRules) {
  const RunResult run = RunPromtool("check rules nuwatch_rules.yml");
  EXPECT_EQ(run.exit_code, 0) << run.output;
  // promtool's success line names the number of rules: the thirteen alerts of group nuwatch, the
  // six recording rules and four alerts of group nuwatch-fleet.
  EXPECT_NE(run.output.find("SUCCESS: 23 rules found"), std::string::npos) << run.output;
}

TEST_F(PromtoolTest, RuleUnitTestsPass) {
  const RunResult run = RunPromtool("test rules nuwatch_rules_test.yml");
  EXPECT_EQ(run.exit_code, 0) << run.output;
  EXPECT_NE(run.output.find("SUCCESS"), std::string::npos) << run.output;
  EXPECT_EQ(run.output.find("FAILED"), std::string::npos) << run.output;
}

TEST_F(PromtoolTest, ScrapeConfigPassesCheckConfig) {
  const RunResult run = RunPromtool("check config prometheus.yml");
  EXPECT_EQ(run.exit_code, 0) << run.output;
  EXPECT_NE(run.output.find("SUCCESS: 1 rule files found"), std::string::npos) << run.output;
}

// The scrape configuration for a cluster: every replica behind the headless Service.
TEST_F(PromtoolTest, KubernetesScrapeConfigPassesCheckConfig) {
  const RunResult run = RunPromtool("check config prometheus-kubernetes.yml");
  EXPECT_EQ(run.exit_code, 0) << run.output;
  EXPECT_NE(run.output.find("SUCCESS: 1 rule files found"), std::string::npos) << run.output;
}

// promtool's exit code is what the tests above rely on; make sure it reports a broken rule file
// (an undefined function) rather than passing anything it is given.
TEST_F(PromtoolTest, CheckRulesRejectsABrokenRule) {
  char path[] = "/tmp/nuwatch-bad-rules-XXXXXX";
  const int fd = ::mkstemp(path);
  ASSERT_GE(fd, 0);
  const std::string text =
      "groups:\n  - name: broken\n    rules:\n      - alert: Broken\n"
      "        expr: no_such_function(nuwatch_streams) > 0\n";
  ASSERT_EQ(::write(fd, text.data(), text.size()), static_cast<ssize_t>(text.size()));
  ::close(fd);
  const RunResult run = RunPromtool(std::string("check rules ") + path);
  ::unlink(path);
  EXPECT_NE(run.exit_code, 0) << run.output;
}

}  // namespace
