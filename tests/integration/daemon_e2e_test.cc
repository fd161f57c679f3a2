// Runs tests/integration/daemon_e2e_test.py, the end-to-end tests of nuwatchd with third-party
// tools (pyzmq, an independent Python implementation of daemon/protocol/PROTOCOL.md, urllib,
// promtool), one unittest class per test here, and asserts that it passes. The script's output is
// shown on failure.
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <array>
#include <cstdio>
#include <string>

#include "common/run_command.h"

namespace {

const std::string kNuwatchd = NUWATCHD_PROGRAM;
const std::string kNuwatch = NUWATCH_PROGRAM;
const std::string kScript = NUWATCH_SOURCE_DIR "/tests/integration/daemon_e2e_test.py";

std::string Quote(const std::string& text) {
  std::string quoted = "'";
  for (char c : text) quoted += c == '\'' ? std::string("'\\''") : std::string(1, c);
  return quoted + "'";
}

using RunResult = nuwatch::testing_data::CommandResult;
const auto& Run = nuwatch::testing_data::RunCommand;

// The script's unittest class `test_class`, which must pass.
void RunScript(const std::string& test_class) {
  // CI always builds both programs; a missing one is a failure, never a skip.
  ASSERT_EQ(::access(kNuwatchd.c_str(), X_OK), 0)
      << kNuwatchd << " is missing: build the nuwatchd target first";
  ASSERT_EQ(::access(kNuwatch.c_str(), X_OK), 0)
      << kNuwatch << " is missing: build the nuwatch target first";
  const RunResult run = Run(std::string(NUWATCH_PYTHON) + " " + Quote(kScript) + " --nuwatchd " +
                            Quote(kNuwatchd) + " --nuwatch " + Quote(kNuwatch) + " " + test_class);
  EXPECT_EQ(run.exit_code, 0) << run.output;
  // unittest's closing line on success; guards against a script that exits 0 without running.
  EXPECT_NE(run.output.find("\nOK"), std::string::npos) << run.output;
}

TEST(DaemonEndToEnd, ScoresFlagsRejectsCountsAndStops) { RunScript("ScoringRejectionsAndMetrics"); }

TEST(DaemonEndToEnd, BatchResultsCarryAMessagesResultsInOneMessage) { RunScript("BatchResults"); }

TEST(DaemonEndToEnd, BinaryResultBatchesCarryWhatTheJsonFormCarries) { RunScript("BinaryResults"); }

TEST(DaemonEndToEnd, RestartResumesModelsAndMovesCorruptStateAside) {
  RunScript("RestartFromState");
}

TEST(DaemonEndToEnd, SendAndTailTalkToTheDaemon) { RunScript("SendAndTail"); }

TEST(DaemonEndToEnd, SendAndTailRefuseBadInputWithOneLine) { RunScript("ClientBadInput"); }

TEST(DaemonEndToEnd, AnOversizedFrameDropsItsSenderWhileOthersKeepScoring) {
  RunScript("OversizedFrames");
}

TEST(DaemonEndToEnd, ABurstPastTheIngestByteBoundWaitsAndIsScoredWholeInOrder) {
  RunScript("IngestQueueBytes");
}

TEST(DaemonEndToEnd, AMessageWhoseFramesNeverEndIsCutAndCounted) { RunScript("UnendingMessage"); }

TEST(DaemonEndToEnd, AFloodPastTheUnreadBudgetIsShedFromItsSenderAloneAndCounted) {
  RunScript("UnreadBudget.test_a_flood_past_the_budget_is_shed_from_its_sender_alone_and_counted");
}

TEST(DaemonEndToEnd, AFloodFromASubscribedPublisherIsShedAndCounted) {
  RunScript("UnreadBudget.test_a_flood_from_a_subscribed_publisher_is_shed_and_counted");
}

TEST(DaemonEndToEnd, ASenderOverTheLimitIsRefusedAndCounted) { RunScript("SenderLimit"); }

TEST(DaemonEndToEnd, MetricsNeedTheConfiguredUserAndPassword) { RunScript("MetricsBasicAuth"); }

TEST(DaemonEndToEnd, EachThreadsCpuSecondsAgreeWithTheKernelsCountAndStatusNamesTheOwner) {
  RunScript("ThreadCpu");
}

TEST(DaemonEndToEnd, SigtermStopsADaemonWhosePublisherIsDown) { RunScript("AbsentPublisher"); }

TEST(DaemonEndToEnd, ASubscriberOverTheLimitIsRefusedAndCounted) { RunScript("SubscriberLimit"); }

TEST(DaemonEndToEnd, CurveAdmitsListedKeysOnlyAndCountsRefusals) {
  RunScript("CurveAuthentication");
}

}  // namespace
