// The debounce rule under test is the one in design.md (Detector: "opens after k of the last m
// flagged, closes after q clean"); k-of-m alarm debouncing is common practice in process alarm
// management. The expected events below are worked out by hand from that rule and from the
// start/end/peak conventions documented in incident_tracker.h.
#include "nuwatch/incident_tracker.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <cmath>
#include <limits>
#include <string>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

IncidentTrackerOptions Options(int open_after, int open_window, int close_after) {
  IncidentTrackerOptions options;
  options.open_after = open_after;
  options.open_window = open_window;
  options.close_after = close_after;
  return options;
}

struct Recorded {
  int step;  // 0-based index into the pattern
  IncidentTransition event;
};

// Feeds a pattern ('F' flagged, '.' clean); vector i has time 10 * (first_step + i) and decision
// -0.1 when flagged, +0.2 when clean, unless decisions are given. Returns the non-kNone events.
std::vector<Recorded> Feed(IncidentTracker& tracker, const std::string& pattern, int first_step = 0,
                           const std::vector<double>& decisions = {}) {
  std::vector<Recorded> events;
  for (std::size_t i = 0; i < pattern.size(); ++i) {
    const bool flagged = pattern[i] == 'F';
    const double decision = decisions.empty() ? (flagged ? -0.1 : 0.2) : decisions[i];
    const int step = first_step + static_cast<int>(i);
    const IncidentTransition event = tracker.Update(10.0 * step, flagged, decision);
    if (event.type != IncidentTransitionType::kNone) events.push_back({step, event});
  }
  return events;
}

TEST(IncidentTrackerTest, OpensExactlyAtTheKthFlagOfTheWindow) {
  // k = 3 of m = 5: F.F.F has its third flag at step 4, with all three in the last five vectors.
  IncidentTracker tracker(Options(3, 5, 4));
  const auto events = Feed(tracker, "F.F.F");
  ASSERT_EQ(events.size(), 1u);
  EXPECT_EQ(events[0].step, 4);
  EXPECT_EQ(events[0].event.type, IncidentTransitionType::kOpened);
  EXPECT_EQ(events[0].event.incident.id, 1u);
  EXPECT_EQ(events[0].event.incident.start_time, 0.0);  // the first flag, step 0
  EXPECT_EQ(events[0].event.incident.end_time, 40.0);
  EXPECT_EQ(events[0].event.incident.flagged_vectors, 3);
  ASSERT_TRUE(tracker.open_incident().has_value());
}

TEST(IncidentTrackerTest, StartTimeIsTheFirstFlagStillInTheOpeningWindow) {
  // k = 3 of m = 5 on F...FF F: at step 5 the window (steps 1..5) holds 2 flags; at step 6 it
  // holds steps 2..6 = ..FFF, 3 flags: opens, and the step-0 flag has left the window, so the
  // start is step 4's time (40), not step 0's.
  IncidentTracker tracker(Options(3, 5, 4));
  const auto events = Feed(tracker, "F...FFF");
  ASSERT_EQ(events.size(), 1u);
  EXPECT_EQ(events[0].step, 6);
  EXPECT_EQ(events[0].event.incident.start_time, 40.0);
  EXPECT_EQ(events[0].event.incident.flagged_vectors, 3);
}

TEST(IncidentTrackerTest, IsolatedFlagsNeverOpen) {
  // k = 2 of m = 5 with flags 5 apart: any 5 consecutive vectors hold at most one flag.
  IncidentTracker tracker(Options(2, 5, 3));
  std::string pattern;
  for (int i = 0; i < 40; ++i) pattern += "F....";
  EXPECT_TRUE(Feed(tracker, pattern).empty());
  EXPECT_FALSE(tracker.open_incident().has_value());
  // Flags 4 apart put two flags in one window of 5: the second flag opens.
  IncidentTracker closer(Options(2, 5, 3));
  const auto events = Feed(closer, "F...F");
  ASSERT_EQ(events.size(), 1u);
  EXPECT_EQ(events[0].step, 4);
}

TEST(IncidentTrackerTest, ClosesAfterExactlyQCleanWithEndAtTheLastFlag) {
  // q = 4: opens at step 2 (FFF), clean steps 3, 4, 5 keep it open, step 6 (the 4th clean)
  // closes it. The end is the last flag (step 2, time 20), not the close step.
  IncidentTracker tracker(Options(3, 5, 4));
  const auto events = Feed(tracker, "FFF....");
  ASSERT_EQ(events.size(), 2u);
  EXPECT_EQ(events[0].event.type, IncidentTransitionType::kOpened);
  EXPECT_EQ(events[0].step, 2);
  EXPECT_EQ(events[1].event.type, IncidentTransitionType::kClosed);
  EXPECT_EQ(events[1].step, 6);
  EXPECT_EQ(events[1].event.incident.id, 1u);
  EXPECT_EQ(events[1].event.incident.start_time, 0.0);
  EXPECT_EQ(events[1].event.incident.end_time, 20.0);
  EXPECT_FALSE(tracker.open_incident().has_value());
}

TEST(IncidentTrackerTest, AFlagInsideTheCleanRunRestartsTheCount) {
  // q = 4: open at step 2; steps 3..5 clean (3 of 4), step 6 flagged (count back to 0),
  // steps 7..9 clean (3), step 10 clean (4th) closes. End = step 6 (time 60).
  IncidentTracker tracker(Options(3, 5, 4));
  std::vector<double> decisions = {-0.1, -0.2, -0.3, 0.1, 0.1, 0.1, -0.7, 0.1, 0.1, 0.1, 0.1};
  const auto events = Feed(tracker, "FFF...F....", 0, decisions);
  ASSERT_EQ(events.size(), 2u);
  EXPECT_EQ(events[1].event.type, IncidentTransitionType::kClosed);
  EXPECT_EQ(events[1].step, 10);
  EXPECT_EQ(events[1].event.incident.end_time, 60.0);
  EXPECT_EQ(events[1].event.incident.flagged_vectors, 4);
  // Peak: the minimum decision over the flagged vectors -0.1, -0.2, -0.3, -0.7.
  EXPECT_EQ(events[1].event.incident.peak_decision, -0.7);
}

TEST(IncidentTrackerTest, PeakCoversTheOpeningWindowsFlags) {
  // The deepest flag came before the opening vector: the peak must still be it.
  IncidentTracker tracker(Options(3, 5, 2));
  const auto events = Feed(tracker, "F.FF", 0, {-0.9, 0.3, -0.2, -0.4});
  ASSERT_EQ(events.size(), 1u);
  EXPECT_EQ(events[0].step, 3);
  EXPECT_EQ(events[0].event.incident.peak_decision, -0.9);
  ASSERT_TRUE(tracker.open_incident().has_value());
  EXPECT_EQ(tracker.open_incident()->peak_decision, -0.9);
}

TEST(IncidentTrackerTest, IdsIncreaseAndCarryOverFromASetNextId) {
  IncidentTracker tracker(Options(2, 3, 2));
  // FF opens #1 at step 1, .. closes it at step 3; FF opens #2 at step 5, .. closes at step 7.
  const auto events = Feed(tracker, "FF..FF..");
  ASSERT_EQ(events.size(), 4u);
  EXPECT_EQ(events[0].event.incident.id, 1u);
  EXPECT_EQ(events[1].event.incident.id, 1u);
  EXPECT_EQ(events[2].event.incident.id, 2u);
  EXPECT_EQ(events[2].step, 5);
  EXPECT_EQ(events[3].event.incident.id, 2u);
  EXPECT_EQ(tracker.next_id(), 3u);
  tracker.set_next_id(42);  // e.g. read back from the state file after a restart
  const auto later = Feed(tracker, "FF", 8);
  ASSERT_EQ(later.size(), 1u);
  EXPECT_EQ(later[0].event.incident.id, 42u);
  EXPECT_THROW(tracker.set_next_id(42), PreconditionError);  // not above the open incident's id
  EXPECT_THROW(tracker.set_next_id(0), PreconditionError);
}

TEST(IncidentTrackerTest, CloseClearsTheRecentFlags) {
  // k = 3 of m = 5, q = 2. FFF.. opens at step 2 and closes at step 4. Without clearing, the
  // window at step 5 would be FF..F (3 flags) and reopen at once; with clearing (documented in
  // incident_tracker.h) one flag is not enough, and the third fresh flag (step 7) reopens.
  IncidentTracker tracker(Options(3, 5, 2));
  const auto events = Feed(tracker, "FFF..FFF");
  ASSERT_EQ(events.size(), 3u);
  EXPECT_EQ(events[1].event.type, IncidentTransitionType::kClosed);
  EXPECT_EQ(events[1].step, 4);
  EXPECT_EQ(events[2].event.type, IncidentTransitionType::kOpened);
  EXPECT_EQ(events[2].step, 7);
  EXPECT_EQ(events[2].event.incident.start_time, 50.0);
}

TEST(IncidentTrackerTest, OneOfOneOpensOnEveryFlag) {
  // Degenerate k = m = 1, q = 1: every flag opens, every clean vector closes.
  IncidentTracker tracker(Options(1, 1, 1));
  const auto events = Feed(tracker, "F.F.");
  ASSERT_EQ(events.size(), 4u);
  const IncidentTransitionType expected[] = {
      IncidentTransitionType::kOpened, IncidentTransitionType::kClosed,
      IncidentTransitionType::kOpened, IncidentTransitionType::kClosed};
  for (int i = 0; i < 4; ++i) {
    EXPECT_EQ(events[i].step, i);
    EXPECT_EQ(events[i].event.type, expected[i]);
  }
  EXPECT_EQ(events[2].event.incident.id, 2u);
  EXPECT_EQ(events[3].event.incident.start_time, 20.0);
  EXPECT_EQ(events[3].event.incident.end_time, 20.0);
}

TEST(IncidentTrackerTest, ExportedStateResumesTheSameSequence) {
  const std::string pattern = "F.FF..F.F..FFF.....F.F.F.";
  for (std::size_t cut = 0; cut <= pattern.size(); ++cut) {
    IncidentTracker uninterrupted(Options(3, 5, 3));
    const auto expected = Feed(uninterrupted, pattern);

    IncidentTracker before(Options(3, 5, 3));
    auto events = Feed(before, pattern.substr(0, cut));
    IncidentTracker after(Options(3, 5, 3));  // a restart
    after.ImportState(before.ExportState());
    const auto rest = Feed(after, pattern.substr(cut), static_cast<int>(cut));
    events.insert(events.end(), rest.begin(), rest.end());

    ASSERT_EQ(events.size(), expected.size()) << "cut at " << cut;
    for (std::size_t i = 0; i < events.size(); ++i) {
      EXPECT_EQ(events[i].step, expected[i].step) << "cut at " << cut;
      EXPECT_EQ(events[i].event.type, expected[i].event.type) << "cut at " << cut;
      EXPECT_EQ(events[i].event.incident.id, expected[i].event.incident.id);
      EXPECT_EQ(events[i].event.incident.start_time, expected[i].event.incident.start_time);
      EXPECT_EQ(events[i].event.incident.end_time, expected[i].event.incident.end_time);
    }
  }
}

TEST(IncidentTrackerTest, ImportIntoASmallerWindowKeepsTheNewestFlags) {
  IncidentTrackerState state;
  state.next_id = 7;
  state.recent_flags = {true, true, false, true};
  state.recent_times = {0, 10, 20, 30};
  state.recent_decisions = {-1, -1, 1, -1};
  IncidentTracker tracker(Options(2, 2, 3));  // keeps {false, true}
  tracker.ImportState(state);
  const IncidentTrackerState exported = tracker.ExportState();
  EXPECT_EQ(exported.recent_flags, (std::vector<bool>{false, true}));
  EXPECT_EQ(exported.recent_times, (std::vector<double>{20, 30}));
  EXPECT_EQ(exported.next_id, 7u);
  // The next flag makes 2 of the last 2: opens #7, starting at the imported flag at time 30.
  const IncidentTransition event = tracker.Update(40, true, -0.5);
  EXPECT_EQ(event.type, IncidentTransitionType::kOpened);
  EXPECT_EQ(event.incident.id, 7u);
  EXPECT_EQ(event.incident.start_time, 30.0);
}

TEST(IncidentTrackerTest, ImportRejectsInconsistentState) {
  IncidentTracker tracker(Options(2, 3, 2));
  IncidentTrackerState state;
  state.next_id = 3;
  state.open_incident = TrackedIncident{3, 0, 0, -1, 2};  // id not below next_id
  try {
    tracker.ImportState(state);
    FAIL() << "open incident id 3 with next_id 3 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("open incident id 3"));
  }
  state.open_incident.reset();
  state.recent_flags = {true};
  EXPECT_THROW(tracker.ImportState(state), PreconditionError);  // no time, no decision
  state.recent_times = {std::numeric_limits<double>::quiet_NaN()};
  state.recent_decisions = {0};
  EXPECT_THROW(tracker.ImportState(state), PreconditionError);
  state = IncidentTrackerState{};
  state.next_id = 0;
  EXPECT_THROW(tracker.ImportState(state), PreconditionError);
  EXPECT_EQ(tracker.next_id(), 1u);  // unchanged by the rejected imports
}

TEST(IncidentTrackerTest, RejectsInvalidParametersNamingThem) {
  try {
    IncidentTracker tracker(Options(4, 3, 2));
    FAIL() << "open_after > open_window accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("open_after = 4"));
    EXPECT_THAT(e.what(), HasSubstr("open_window = 3"));
  }
  try {
    IncidentTracker tracker(Options(0, 3, 2));
    FAIL() << "open_after = 0 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("open_after = 0"));
  }
  try {
    IncidentTracker tracker(Options(1, 0, 2));
    FAIL() << "open_window = 0 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("open_window = 0"));
  }
  try {
    IncidentTracker tracker(Options(1, 1, 0));
    FAIL() << "close_after = 0 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("close_after = 0"));
  }
}

TEST(IncidentTrackerTest, RejectsNonFiniteInputWithoutChangingState) {
  IncidentTracker tracker(Options(2, 3, 2));
  Feed(tracker, "F");
  EXPECT_THROW(tracker.Update(std::numeric_limits<double>::quiet_NaN(), true, -1),
               PreconditionError);
  EXPECT_THROW(tracker.Update(20, true, std::numeric_limits<double>::infinity()),
               PreconditionError);
  // Had a rejected flag been recorded, this second flag would be the third; it is the second of 3,
  // which opens with k = 2, starting at the first flag (time 0).
  const IncidentTransition event = tracker.Update(30, true, -0.1);
  EXPECT_EQ(event.type, IncidentTransitionType::kOpened);
  EXPECT_EQ(event.incident.flagged_vectors, 2);
}

}  // namespace
}  // namespace nuwatch
