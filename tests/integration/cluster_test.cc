// Runs tests/integration/cluster_test.py: three and four nuwatchd replicas sharing 300 streams by
// owner (daemon/protocol/PROTOCOL.md §13), driven by a routing sender written from the document
// (Python's hashlib.blake2b, pyzmq) and by `nuwatch send --member`, one unittest class per test
// here. The script's output is shown on failure.
#include <gtest/gtest.h>
#include <unistd.h>

#include <string>

#include "common/run_command.h"

namespace {

const std::string kNuwatchd = NUWATCHD_PROGRAM;
const std::string kNuwatch = NUWATCH_PROGRAM;
const std::string kScript = NUWATCH_SOURCE_DIR "/tests/integration/cluster_test.py";

std::string Quote(const std::string& text) {
  std::string quoted = "'";
  for (char c : text) quoted += c == '\'' ? std::string("'\\''") : std::string(1, c);
  return quoted + "'";
}

void RunScript(const std::string& test) {
  // CI always builds both programs; a missing one is a failure, never a skip.
  ASSERT_EQ(::access(kNuwatchd.c_str(), X_OK), 0) << kNuwatchd << " is missing";
  ASSERT_EQ(::access(kNuwatch.c_str(), X_OK), 0) << kNuwatch << " is missing";
  const nuwatch::testing_data::CommandResult run = nuwatch::testing_data::RunCommand(
      std::string(NUWATCH_PYTHON) + " " + Quote(kScript) + " --nuwatchd " + Quote(kNuwatchd) +
      " --nuwatch " + Quote(kNuwatch) + " " + test);
  EXPECT_EQ(run.exit_code, 0) << run.output;
  // unittest's closing line on success; guards against a script that exits 0 without running.
  EXPECT_NE(run.output.find("\nOK"), std::string::npos) << run.output;
}

TEST(Cluster, EveryStreamIsScoredOnceByItsOwnerAsALoneDaemonScoresIt) {
  RunScript("OwnershipAndRouting");
}

TEST(Cluster, ReplicasOnOnePublisherKeepTheirOwnStreamsAndCountTheRest) {
  RunScript("SubscribedReplicas");
}

TEST(Cluster, AFourthMemberTakesAboutAQuarterOfTheStreamsWhichRelearnThere) {
  RunScript(
      "MembershipChanges.test_a_fourth_member_takes_about_a_quarter_of_the_streams_which_"
      "relearn_there");
}

TEST(Cluster, AFourthMemberTakesOverAQuarterOfTheStreamsWithTheirStateAndScoresOnWithoutWarmUp) {
  RunScript(
      "MembershipChanges.test_a_fourth_member_takes_over_a_quarter_of_the_streams_with_their_"
      "state");
}

TEST(Cluster, AStateThatDoesNotComeInTimeLeavesTheStreamToStartAfresh) {
  RunScript(
      "MembershipChanges.test_a_state_that_does_not_come_in_time_leaves_the_stream_to_start_"
      "afresh");
}

TEST(Cluster, AChangeTakenBackBeforeTheHandoffResumesTheStreamsFromTheirState) {
  RunScript(
      "MembershipChanges.test_a_change_taken_back_before_the_handoff_resumes_the_streams_from_"
      "their_state");
}

TEST(Cluster, AMemberTakenOutOfTheListHandsItsStreamsToTheOthers) {
  RunScript(
      "MembershipChanges.test_a_member_taken_out_of_the_list_hands_its_streams_to_the_others");
}

TEST(Cluster, AMemberRestartedUnderTheSameListWaitsForNoHandoff) {
  RunScript("MembershipChanges.test_a_member_restarted_under_the_same_list_waits_for_no_handoff");
}

TEST(Cluster, AKilledMemberLeavesItsStreamsToTheOthersWhichStartThemFresh) {
  RunScript(
      "MembershipChanges.test_a_killed_member_leaves_its_streams_to_the_others_which_start_"
      "them_fresh");
}

TEST(Cluster, BadMemberListsAreRefusedWithOneLine) { RunScript("ConfigurationErrors"); }

}  // namespace
