#include "nuwatch/sample_window.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <deque>
#include <limits>
#include <random>
#include <vector>

namespace nuwatch {
namespace {

using ::testing::HasSubstr;

// The naive reference the ring is checked against: a deque of whole entries, evicting at the front.
struct ReferenceEntry {
  uint64_t id;
  double time;
  std::vector<double> x;
};

struct ReferenceWindow {
  ReferenceWindow(int64_t capacity, double max_age) : capacity(capacity), max_age(max_age) {}

  int64_t capacity;
  double max_age;
  uint64_t next_id = 1;
  std::deque<ReferenceEntry> entries;

  uint64_t Push(double time, const std::vector<double>& x) {
    if (static_cast<int64_t>(entries.size()) == capacity) entries.pop_front();
    entries.push_back({next_id, time, x});
    return next_id++;
  }
  void Expire(double now) {
    if (max_age == 0) return;
    while (!entries.empty() && entries.front().time < now - max_age) entries.pop_front();
  }
};

// `tolerance`: the window keeps float32 deviations from a reference row (sample_window.h), so a
// value comes back within 2^-20 x the window's range; each test passes that bound for its values.
void ExpectSameContents(const SampleWindow& window, const ReferenceWindow& reference,
                        double tolerance) {
  ASSERT_EQ(window.size(), static_cast<int64_t>(reference.entries.size()));
  MatrixD rows;
  std::vector<uint64_t> ids;
  std::vector<double> times;
  window.Snapshot(&rows, &ids, &times);
  ASSERT_EQ(rows.rows(), window.size());
  ASSERT_EQ(rows.cols(), window.dims());
  for (int64_t i = 0; i < window.size(); ++i) {
    const ReferenceEntry& expected = reference.entries[static_cast<std::size_t>(i)];
    EXPECT_EQ(window.Id(i), expected.id);
    EXPECT_EQ(ids[i], expected.id);
    EXPECT_EQ(window.Time(i), expected.time);
    EXPECT_EQ(times[i], expected.time);
    const auto row = window.Row(i);
    for (int j = 0; j < window.dims(); ++j) {
      EXPECT_NEAR(row[j], expected.x[j], tolerance);
      EXPECT_NEAR(rows(i, j), expected.x[j], tolerance);
    }
  }
}

TEST(SampleWindowTest, IdsStartAtOneAndIncreaseAcrossEvictionAndClear) {
  SampleWindow window(/*capacity=*/3, /*dims=*/2);
  const std::vector<double> x = {1.0, 2.0};
  EXPECT_EQ(window.Push(0, x), 1u);
  EXPECT_EQ(window.Push(1, x), 2u);
  EXPECT_EQ(window.Push(2, x), 3u);
  EXPECT_EQ(window.Push(3, x), 4u);  // evicts id 1
  EXPECT_EQ(window.size(), 3);
  EXPECT_EQ(window.Id(0), 2u);
  EXPECT_EQ(window.Id(2), 4u);
  window.Clear();
  EXPECT_TRUE(window.empty());
  EXPECT_EQ(window.next_id(), 5u);
  // A cleared window must not hand out an id a previous fit already knows (the warm-start map
  // would give an old alpha to a different sample).
  EXPECT_EQ(window.Push(4, x), 5u);
}

TEST(SampleWindowTest, EvictsOldestFirstWhenFull) {
  SampleWindow window(/*capacity=*/4, /*dims=*/1);
  for (int t = 0; t < 10; ++t) window.Push(t, std::vector<double>{static_cast<double>(t)});
  // Ten pushes into four slots keep the last four, oldest first: 6, 7, 8, 9.
  ASSERT_EQ(window.size(), 4);
  for (int64_t i = 0; i < 4; ++i) {
    EXPECT_EQ(window.Row(i)[0], 6.0 + static_cast<double>(i));
    EXPECT_EQ(window.Id(i), static_cast<uint64_t>(7 + i));
  }
}

TEST(SampleWindowTest, SnapshotOfAWrappedRingIsOldestFirst) {
  SampleWindow window(/*capacity=*/5, /*dims=*/3);
  ReferenceWindow reference(5, 0);
  for (int t = 0; t < 8; ++t) {  // head ends at slot 3: the contents span the wrap
    const std::vector<double> x = {1.0 * t, 10.0 * t, -1.0 * t};
    window.Push(t, x);
    reference.Push(t, x);
  }
  ExpectSameContents(window, reference, 0);  // integers: exact deviations
}

TEST(SampleWindowTest, AgeLimitDropsStrictlyOlderEntriesOnly) {
  SampleWindow window(/*capacity=*/10, /*dims=*/1, /*max_age_seconds=*/5);
  for (int t = 0; t < 8; ++t) window.Push(t, std::vector<double>{0.0});
  // now = 9, cutoff = 4: times 0..3 go, time 4 (exactly max_age old) stays.
  window.ExpireOlderThan(9);
  ASSERT_EQ(window.size(), 4);
  EXPECT_EQ(window.Time(0), 4.0);
  window.ExpireOlderThan(100);
  EXPECT_TRUE(window.empty());
}

TEST(SampleWindowTest, NoAgeLimitMeansExpireIsANoOp) {
  SampleWindow window(/*capacity=*/3, /*dims=*/1);
  window.Push(0, std::vector<double>{1.0});
  window.ExpireOlderThan(1e9);
  EXPECT_EQ(window.size(), 1);
}

TEST(SampleWindowTest, MatchesNaiveReferenceOnRandomOperations) {
  // Fast path against a naive reference implementation (common practice).
  std::mt19937_64 rng(20240611);
  std::uniform_real_distribution<double> value(-5, 5);
  std::uniform_int_distribution<int> op(0, 19);
  SampleWindow window(/*capacity=*/7, /*dims=*/2, /*max_age_seconds=*/12);
  ReferenceWindow reference(7, 12);
  const double kTolerance = 10 * std::ldexp(1.0, -20);  // values in [-5, 5]: a range of 10
  double time = 0;
  for (int step = 0; step < 2000; ++step) {
    const int choice = op(rng);
    if (choice < 16) {
      time += 1.0;
      const std::vector<double> x = {value(rng), value(rng)};
      ASSERT_EQ(window.Push(time, x), reference.Push(time, x));
    } else if (choice < 19) {
      const double now = time + value(rng) + 5;
      window.ExpireOlderThan(now);
      reference.Expire(now);
    } else {
      window.Clear();
      reference.entries.clear();
    }
    if (step % 50 == 0) ExpectSameContents(window, reference, kTolerance);
  }
  ExpectSameContents(window, reference, kTolerance);
}

TEST(SampleWindowTest, RestoreRoundTripsASnapshot) {
  SampleWindow original(/*capacity=*/4, /*dims=*/2, /*max_age_seconds=*/100);
  for (int t = 0; t < 6; ++t) original.Push(t, std::vector<double>{1.0 * t, 2.0 * t});
  MatrixD rows;
  std::vector<uint64_t> ids;
  std::vector<double> times;
  original.Snapshot(&rows, &ids, &times);

  SampleWindow restored(/*capacity=*/4, /*dims=*/2, /*max_age_seconds=*/100);
  restored.Restore(rows, ids, times, original.next_id());
  ReferenceWindow reference(4, 100);
  reference.next_id = 3;
  for (int t = 2; t < 6; ++t) reference.Push(t, {1.0 * t, 2.0 * t});
  ExpectSameContents(restored, reference, 0);  // small integers: their deviations are exact
  EXPECT_EQ(restored.Push(6, std::vector<double>{0.0, 0.0}), 7u);
}

TEST(SampleWindowTest, RestoreIntoASmallerWindowKeepsTheNewest) {
  MatrixD rows(3, 1);
  rows << 10, 20, 30;
  const std::vector<uint64_t> ids = {7, 8, 9};
  const std::vector<double> times = {1, 2, 3};
  SampleWindow window(/*capacity=*/2, /*dims=*/1);
  window.Restore(rows, ids, times, /*next_id=*/10);
  ASSERT_EQ(window.size(), 2);
  EXPECT_EQ(window.Id(0), 8u);
  EXPECT_EQ(window.Row(0)[0], 20.0);
  EXPECT_EQ(window.Id(1), 9u);
  EXPECT_EQ(window.next_id(), 10u);
  // The ids go on from the restored ones as the window slides.
  EXPECT_EQ(window.Push(4, std::vector<double>{40.0}), 10u);
  EXPECT_EQ(window.Id(0), 9u);
  EXPECT_EQ(window.Id(1), 10u);
  EXPECT_EQ(window.Row(1)[0], 40.0);
}

TEST(SampleWindowTest, RestoreRejectsBadStateAndLeavesTheWindowAlone) {
  SampleWindow window(/*capacity=*/3, /*dims=*/1);
  window.Push(0, std::vector<double>{5.0});
  MatrixD rows(2, 1);
  rows << 1, 2;
  const std::vector<double> times = {0, 1};
  try {
    window.Restore(rows, std::vector<uint64_t>{7, 7}, times, 8);
    FAIL() << "repeated id accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("row 1: id 7 after id 7"));
  }
  try {
    window.Restore(rows, std::vector<uint64_t>{3, 5}, times, 6);
    FAIL() << "a gap in the ids accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("row 1: id 5 after id 3"));
  }
  try {
    window.Restore(rows, std::vector<uint64_t>{3, 4}, times, 4);
    FAIL() << "next_id <= last id accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("next_id = 4"));
  }
  try {
    window.Restore(rows, std::vector<uint64_t>{3, 4}, times, 7);
    FAIL() << "next_id past the last id + 1 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("next_id = 7"));
  }
  EXPECT_THROW(window.Restore(rows, std::vector<uint64_t>{1}, times, 9), PreconditionError);
  EXPECT_THROW(window.Restore(MatrixD::Zero(2, 3), std::vector<uint64_t>{1, 2}, times, 9),
               PreconditionError);
  MatrixD with_nan = rows;
  with_nan(1, 0) = std::numeric_limits<double>::quiet_NaN();
  EXPECT_THROW(window.Restore(with_nan, std::vector<uint64_t>{1, 2}, times, 9), PreconditionError);
  ASSERT_EQ(window.size(), 1);
  EXPECT_EQ(window.Row(0)[0], 5.0);
  EXPECT_EQ(window.next_id(), 2u);
}

TEST(SampleWindowTest, BadPushIsRejectedWithoutChangingTheWindow) {
  SampleWindow window(/*capacity=*/2, /*dims=*/2);
  window.Push(0, std::vector<double>{1.0, 1.0});
  try {
    window.Push(1, std::vector<double>{1.0, 2.0, 3.0});
    FAIL() << "wrong length accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("3 values"));
    EXPECT_THAT(e.what(), HasSubstr("dims = 2"));
  }
  EXPECT_THROW(window.Push(1, std::vector<double>{1.0, std::numeric_limits<double>::infinity()}),
               PreconditionError);
  EXPECT_THROW(window.Push(std::numeric_limits<double>::quiet_NaN(), std::vector<double>{1.0, 1.0}),
               PreconditionError);
  EXPECT_EQ(window.size(), 1);
  EXPECT_EQ(window.next_id(), 2u);
  EXPECT_THROW(window.Row(1), PreconditionError);
  EXPECT_THROW(window.Id(-1), PreconditionError);
}

TEST(SampleWindowTest, ConstructorRejectsBadParameters) {
  try {
    SampleWindow window(0, 3);
    FAIL() << "capacity 0 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("capacity = 0"));
  }
  EXPECT_THROW(SampleWindow(5, 0), PreconditionError);
  EXPECT_THROW(SampleWindow(5, 2, -1.0), PreconditionError);
}

// Issue 9 section 5: a stream holds memory for the vectors it has, not a full window from its first
// vector. The buffer doubles from 16 slots and stops exactly at capacity.
TEST(SampleWindowTest, MemoryGrowsWithTheWindowAndStopsAtCapacity) {
  // A slot: 6 float32 deviations and a time (the ids are consecutive: only the oldest is kept);
  // once, the reference row and its scratch, in doubles.
  constexpr std::size_t kSlotBytes = 6 * sizeof(float) + sizeof(double);
  SampleWindow window(/*capacity=*/100, /*dims=*/6);
  const std::size_t empty = window.MemoryBytes() + 2 * 6 * sizeof(double);
  EXPECT_EQ(window.MemoryBytes(), sizeof(SampleWindow));  // nothing allocated before a vector
  window.Push(0, std::vector<double>(6, 1.0));
  EXPECT_EQ(window.MemoryBytes(), empty + 16 * kSlotBytes);
  for (int t = 1; t < 17; ++t) window.Push(t, std::vector<double>(6, 1.0));
  EXPECT_EQ(window.MemoryBytes(), empty + 32 * kSlotBytes);
  for (int t = 17; t < 250; ++t) window.Push(t, std::vector<double>(6, 1.0));
  // 64 doubled would be 128: the last step stops at the capacity, 100.
  const std::size_t full = window.MemoryBytes();
  EXPECT_EQ(full, empty + 100 * kSlotBytes);
  for (int t = 250; t < 500; ++t) window.Push(t, std::vector<double>(6, 1.0));
  EXPECT_EQ(window.MemoryBytes(), full);  // a full window never allocates again
  window.Clear();
  EXPECT_EQ(window.MemoryBytes(), full);  // nor does it shrink
}

// The float32 deviations keep the variation of a feature with a large offset, which float32
// values would round away: a float has 24 significant bits (IEEE 754 binary32), so at
// 12,345,678.9 its step is 1, and a reading that moves by hundredths is one value.
TEST(SampleWindowTest, AFeatureWithALargeOffsetKeepsItsVariation) {
  std::mt19937_64 random(5);
  std::normal_distribution<double> noise(0.0, 0.01);
  SampleWindow window(/*capacity=*/500, /*dims=*/1);
  std::vector<double> pushed;
  for (int t = 0; t < 500; ++t) {
    pushed.push_back(12345678.9 + noise(random));
    window.Push(t, std::vector<double>{pushed.back()});
  }
  EXPECT_EQ(static_cast<float>(pushed[0]), static_cast<float>(pushed[0] + 0.01));  // the premise
  MatrixD rows;
  window.Snapshot(&rows, nullptr, nullptr);
  double worst = 0;
  for (int i = 0; i < 500; ++i) worst = std::max(worst, std::abs(rows(i, 0) - pushed[i]));
  // The range is about 0.08 here (8 standard deviations): 2^-20 of it is below 1e-7.
  EXPECT_LT(worst, 1e-7);
  EXPECT_FALSE(window.holds_doubles());
}

// The reference follows a drifting process (re-based every capacity() pushes), so the error is
// bounded by the window's own range, not by how far the process has moved since it began.
TEST(SampleWindowTest, TheReferenceFollowsADriftingProcess) {
  SampleWindow window(/*capacity=*/100, /*dims=*/1);
  std::vector<double> pushed;
  for (int t = 0; t < 20000; ++t) {
    pushed.push_back(1000.0 * t + 0.001 * (t % 7));
    window.Push(t, std::vector<double>{pushed.back()});
  }
  MatrixD rows;
  window.Snapshot(&rows, nullptr, nullptr);
  double worst = 0;
  for (int i = 0; i < 100; ++i) worst = std::max(worst, std::abs(rows(i, 0) - pushed[19900 + i]));
  // The window's range is 99,000 (over its last 100 rows; under 2e5 over the rows each value
  // shared it with), so the error is below 2e5 x 2^-20 = 0.19. Against the first row (2e7 away)
  // a float would keep steps of 2 (IEEE 754 binary32 at 2e7).
  EXPECT_LT(worst, 2e5 * std::ldexp(1.0, -20));
}

// A window restored from its snapshot chooses the same reference row (by id) and so gives back
// the same values, bit for bit, then and after further pushes and expiries: a restarted stream
// refits on exactly what it would have refitted on (DetectorState's "goes on exactly" tests).
TEST(SampleWindowTest, ARestoredWindowGoesOnBitForBitAsTheOriginal) {
  std::mt19937_64 random(17);
  std::normal_distribution<double> value(250.0, 7.0);
  for (const double max_age : {0.0, 40.0}) {
    SampleWindow original(/*capacity=*/97, /*dims=*/3, max_age);
    double t = 0;
    auto push_both = [&](SampleWindow& a, SampleWindow* b) {
      t += 1;
      const std::vector<double> x = {value(random), -value(random), 1e6 + value(random)};
      a.Push(t, x);
      if (b != nullptr) b->Push(t, x);
    };
    for (int i = 0; i < 500; ++i) push_both(original, nullptr);
    for (int round = 0; round < 5; ++round) {
      MatrixD rows, restored_rows;
      std::vector<uint64_t> ids;
      std::vector<double> times;
      original.Snapshot(&rows, &ids, &times);
      SampleWindow restored(/*capacity=*/97, /*dims=*/3, max_age);
      restored.Restore(rows, ids, times, original.next_id());
      restored.Snapshot(&restored_rows, nullptr, nullptr);
      ASSERT_TRUE(restored_rows == rows) << "round " << round;
      for (int i = 0; i < 300; ++i) {
        push_both(original, &restored);
        if (i % 7 == 0) {
          original.ExpireOlderThan(t);
          restored.ExpireOlderThan(t);
        }
      }
      original.Snapshot(&rows, nullptr, nullptr);
      restored.Snapshot(&restored_rows, nullptr, nullptr);
      ASSERT_TRUE(restored_rows == rows) << "round " << round << ", after 300 pushes";
    }
  }
}

// A deviation beyond the float range turns the window to doubles, every value kept.
TEST(SampleWindowTest, AValueBeyondTheFloatRangeTurnsTheWindowToDoubles) {
  SampleWindow window(/*capacity=*/4, /*dims=*/2);
  window.Push(0, std::vector<double>{1.5, -2.0});
  window.Push(1, std::vector<double>{2.5, -3.0});
  EXPECT_FALSE(window.holds_doubles());
  window.Push(2, std::vector<double>{1e39, -1e300});
  EXPECT_TRUE(window.holds_doubles());
  window.Push(3, std::vector<double>{-1e300, 4.0});
  ReferenceWindow reference(4, 0);
  reference.Push(0, {1.5, -2.0});
  reference.Push(1, {2.5, -3.0});
  reference.Push(2, {1e39, -1e300});
  reference.Push(3, {-1e300, 4.0});
  ExpectSameContents(window, reference, 0);
  // A restore of such rows keeps doubles too.
  MatrixD rows;
  std::vector<uint64_t> ids;
  std::vector<double> times;
  window.Snapshot(&rows, &ids, &times);
  SampleWindow restored(/*capacity=*/4, /*dims=*/2);
  restored.Restore(rows, ids, times, window.next_id());
  EXPECT_TRUE(restored.holds_doubles());
  ExpectSameContents(restored, reference, 0);
}

// A refit waiting in the queue holds the packed window (detector.cc, RefitInput); unpacked on the
// refit thread it must give the rows, ids and times a Snapshot gave at the time, bit for bit, so
// that a refit fits what it would have fitted from the snapshot. Checked on a wrapped ring of
// float32 deviations, after a re-base, and on a window of doubles.
TEST(SampleWindowTest, APackedWindowUnpacksToTheSnapshotBitForBit) {
  std::mt19937_64 rng(7);
  std::normal_distribution<double> normal(1e6, 3.0);
  const auto check = [](const SampleWindow& window) {
    MatrixD rows, unpacked;
    std::vector<uint64_t> ids, unpacked_ids;
    std::vector<double> times;
    window.Snapshot(&rows, &ids, &times);
    SampleWindow::Packed packed;
    window.Pack(&packed);
    packed.Unpack(&unpacked, &unpacked_ids);
    ASSERT_EQ(packed.rows(), window.size());
    EXPECT_EQ(unpacked_ids, ids);
    EXPECT_EQ(packed.times, times);
    ASSERT_EQ(unpacked.rows(), rows.rows());
    ASSERT_EQ(unpacked.cols(), rows.cols());
    for (int64_t r = 0; r < rows.rows(); ++r)
      for (int64_t j = 0; j < rows.cols(); ++j)
        ASSERT_EQ(unpacked(r, j), rows(r, j)) << "row " << r << ", column " << j;
    // Half the bytes of the snapshot, or less, while the window holds floats.
    if (!window.holds_doubles()) {
      EXPECT_LE(packed.deviations.size() * sizeof(float),
                static_cast<std::size_t>(rows.size()) * sizeof(double) / 2);
    }
  };
  SampleWindow window(/*capacity=*/50, /*dims=*/3);
  SampleWindow::Packed empty;
  window.Pack(&empty);
  EXPECT_EQ(empty.rows(), 0);
  for (int t = 0; t < 137; ++t)  // wrapped, its reference moved more than once
    window.Push(t, std::vector<double>{normal(rng), -normal(rng), normal(rng) * 1e-6});
  ASSERT_FALSE(window.holds_doubles());
  check(window);
  window.Push(137, std::vector<double>{1e39, 0, 0});
  ASSERT_TRUE(window.holds_doubles());
  check(window);
}

// Growth moves the ring's contents into a bigger buffer: checked against the deque reference
// through pushes, expiries (so that the ring has wrapped when it grows), clears and restores.
TEST(SampleWindowTest, GrowingKeepsEveryEntryInOrderAgainstTheReference) {
  std::mt19937_64 random(91);
  for (int round = 0; round < 40; ++round) {
    const int64_t capacity = std::uniform_int_distribution<int64_t>(1, 300)(random);
    const double max_age = round % 2 == 0 ? 0.0 : 50.0;
    SampleWindow window(capacity, /*dims=*/3, max_age);
    ReferenceWindow reference(capacity, max_age);
    double t = 0;
    for (int step = 0; step < 600; ++step) {
      const int op = std::uniform_int_distribution<int>(0, 99)(random);
      if (op < 85) {
        t += std::uniform_real_distribution<double>(0, 2)(random);
        const std::vector<double> x = {t, -t, static_cast<double>(step)};
        ASSERT_EQ(window.Push(t, x), reference.Push(t, x));
      } else if (op < 97) {
        window.ExpireOlderThan(t);
        reference.Expire(t);
      } else if (op < 98) {
        window.Clear();
        reference.entries.clear();
      } else {
        // A restore of the window's own contents, as a state file gives them back.
        MatrixD rows;
        std::vector<uint64_t> ids;
        std::vector<double> times;
        window.Snapshot(&rows, &ids, &times);
        SampleWindow restored(capacity, 3, max_age);
        restored.Restore(rows, ids, times, window.next_id());
        window = restored;
      }
      // t grows by 2 a step at most over 600 steps: every range is below 1200.
      ASSERT_NO_FATAL_FAILURE(ExpectSameContents(window, reference, 1200 * std::ldexp(1.0, -20)))
          << "round " << round;
    }
  }
}

// --- MapWarmStart
// --------------------------------------------------------------------------------- Hand-worked
// from the recipe in methods.md "Warm starts on a sliding window" (alpha seeding, DeCoste &
// Wagstaff, KDD 2000); the box and sum constraints are the nu one-class dual's (Schölkopf et al.
// 2001): 0 <= a_i <= 1/(nu l), sum a_i = 1.

TEST(MapWarmStartTest, SlidWindowNewestFirst) {
  // Old fit: ids 1..5, nu = 0.5, bound 1/(0.5*5) = 0.4; alphas sum to 1.
  const std::vector<uint64_t> old_ids = {1, 2, 3, 4, 5};
  VectorD old_alpha(5);
  old_alpha << 0.4, 0.1, 0.0, 0.3, 0.2;
  // New window: ids 3..8 (1 and 2 left, 6, 7, 8 arrived), l = 6, bound 1/(0.5*6) = 1/3.
  // Survivors: id3 0, id4 0.3, id5 0.2 (all under 1/3, no clipping): sum 0.5, missing 0.5.
  // Newest first: id8 gets 1/3 (missing 1/6 left), id7 gets 1/6, id6 nothing.
  const std::vector<uint64_t> new_ids = {3, 4, 5, 6, 7, 8};
  const VectorD alpha = MapWarmStart(old_ids, old_alpha, new_ids, 0.5, nullptr);
  ASSERT_EQ(alpha.size(), 6);
  const double expected[] = {0.0, 0.3, 0.2, 0.0, 1.0 / 6, 1.0 / 3};
  for (int i = 0; i < 6; ++i) EXPECT_NEAR(alpha[i], expected[i], 1e-15) << "index " << i;
}

TEST(MapWarmStartTest, LowestGradientFirst) {
  // Same windows as above; gradients (any order-preserving stand-in for G = K a') for ids 3..8.
  const std::vector<uint64_t> old_ids = {1, 2, 3, 4, 5};
  VectorD old_alpha(5);
  old_alpha << 0.4, 0.1, 0.0, 0.3, 0.2;
  const std::vector<uint64_t> new_ids = {3, 4, 5, 6, 7, 8};
  VectorD gradient(6);
  gradient << 0.9, 0.1, 0.5, 0.2, 0.8, 0.7;
  // Missing 0.5, bound 1/3, by ascending gradient:
  //   id4 (0.1): 0.3 -> 1/3, takes 1/30, missing 14/30;
  //   id6 (0.2): 0 -> 1/3, takes 10/30, missing 4/30;
  //   id5 (0.5): 0.2 -> 0.2 + 4/30 = 1/3, missing 0; ids 8, 7, 3 get nothing.
  const VectorD alpha = MapWarmStart(old_ids, old_alpha, new_ids, 0.5, &gradient);
  const double expected[] = {0.0, 1.0 / 3, 1.0 / 3, 1.0 / 3, 0.0, 0.0};
  for (int i = 0; i < 6; ++i) EXPECT_NEAR(alpha[i], expected[i], 1e-15) << "index " << i;
  EXPECT_LE(alpha.maxCoeff(), 1.0 / 3);
}

TEST(MapWarmStartTest, SurvivorsAreClippedToTheNewBound) {
  // Old: ids {1, 2}, nu = 1, both at the bound 1/2. New: ids {1, 2, 3, 4}, nu = 1, bound 1/4.
  // Clipped survivors hold 1/2, missing 1/2 goes to ids 4 and 3 (newest first), 1/4 each.
  VectorD old_alpha(2);
  old_alpha << 0.5, 0.5;
  const VectorD alpha = MapWarmStart({1, 2}, old_alpha, {1, 2, 3, 4}, 1.0, nullptr);
  for (int i = 0; i < 4; ++i) EXPECT_NEAR(alpha[i], 0.25, 1e-15);
}

TEST(MapWarmStartTest, SurplusIsTakenOffTheLargestAlphas) {
  // A seed summing to 1.2 (e.g. from a bad state file): surplus 0.2, bound 1/(0.5*3) = 2/3, so
  // nothing is clipped. Lower the largest to a level t: the two largest (0.5, 0.4) to t with
  // 0.9 - 2t = 0.2, t = 0.35 >= 0.3 (the next value), so the result is {0.35, 0.35, 0.3}.
  VectorD old_alpha(3);
  old_alpha << 0.5, 0.4, 0.3;
  const VectorD alpha = MapWarmStart({1, 2, 3}, old_alpha, {1, 2, 3}, 0.5, nullptr);
  EXPECT_NEAR(alpha[0], 0.35, 1e-15);
  EXPECT_NEAR(alpha[1], 0.35, 1e-15);
  EXPECT_NEAR(alpha[2], 0.3, 1e-15);
}

TEST(MapWarmStartTest, NoSurvivorsSpreadsTheMassOverTheNewest) {
  // nu = 1: the bound is 1/l and every sample must sit at it (the only feasible point).
  const VectorD alpha = MapWarmStart({1, 2}, VectorD::Constant(2, 0.5), {10, 11, 12}, 1.0, nullptr);
  for (int i = 0; i < 3; ++i) EXPECT_NEAR(alpha[i], 1.0 / 3, 1e-15);
}

TEST(MapWarmStartTest, RandomSlidesGiveFeasibleGreedySeeds) {
  // Properties of the recipe: the result is feasible, survivors never lose mass (except to the
  // new bound), and mass goes by priority: any sample that received extra mass has every sample
  // of higher priority at the bound.
  std::mt19937_64 rng(7);
  std::uniform_real_distribution<double> unit(0, 1);
  for (int trial = 0; trial < 200; ++trial) {
    const int l_old = 5 + static_cast<int>(unit(rng) * 60);
    const int slide = static_cast<int>(unit(rng) * (l_old + 5));
    const int l_new = std::max(1, l_old - slide / 2 + static_cast<int>(unit(rng) * 20) - 10);
    std::vector<uint64_t> old_ids(l_old), new_ids(l_new);
    for (int i = 0; i < l_old; ++i) old_ids[i] = 100 + i;
    for (int i = 0; i < l_new; ++i) new_ids[i] = 100 + slide + i;
    VectorD old_alpha(l_old);
    for (int i = 0; i < l_old; ++i) old_alpha[i] = unit(rng) < 0.5 ? 0.0 : unit(rng);
    if (old_alpha.sum() == 0) old_alpha[0] = 1;
    old_alpha /= old_alpha.sum();  // feasible for nu_old = 1 / (l_old max alpha)
    const double nu = 0.02 + 0.98 * unit(rng);
    VectorD gradient(l_new);
    for (int i = 0; i < l_new; ++i) gradient[i] = std::floor(unit(rng) * 8);  // with ties
    const bool use_gradient = trial % 2 == 0;
    const VectorD alpha =
        MapWarmStart(old_ids, old_alpha, new_ids, nu, use_gradient ? &gradient : nullptr);

    const double bound = 1.0 / (nu * l_new);
    ASSERT_EQ(alpha.size(), l_new);
    EXPECT_NEAR(alpha.sum(), 1.0, 1e-12) << "trial " << trial;
    EXPECT_GE(alpha.minCoeff(), 0.0);
    EXPECT_LE(alpha.maxCoeff(), bound);
    std::vector<double> seeded(l_new, 0.0);
    for (int j = 0; j < l_new; ++j) {
      const uint64_t id = new_ids[j];
      if (id >= old_ids.front() && id <= old_ids.back()) {
        seeded[j] = std::min(old_alpha[static_cast<int>(id - old_ids.front())], bound);
      }
      EXPECT_GE(alpha[j], seeded[j] - 1e-15) << "survivor lost mass, trial " << trial;
    }
    auto higher_priority = [&](int a, int b) {  // a before b
      if (use_gradient && gradient[a] != gradient[b]) return gradient[a] < gradient[b];
      return a > b;
    };
    for (int j = 0; j < l_new; ++j) {
      if (alpha[j] <= seeded[j] + 1e-15) continue;  // received nothing
      for (int i = 0; i < l_new; ++i) {
        if (higher_priority(i, j)) {
          EXPECT_NEAR(alpha[i], bound, 1e-15) << "priority broken, trial " << trial;
        }
      }
    }
  }
}

TEST(MapWarmStartTest, RejectsBadInputNamingTheValue) {
  VectorD two = VectorD::Constant(2, 0.5);
  try {
    MapWarmStart({1, 2}, two, {2, 3}, 1.5, nullptr);
    FAIL() << "nu = 1.5 accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("nu = 1.5"));
  }
  try {
    MapWarmStart({2, 1}, two, {2, 3}, 0.5, nullptr);
    FAIL() << "unsorted ids accepted";
  } catch (const PreconditionError& e) {
    EXPECT_THAT(e.what(), HasSubstr("old id 1"));
  }
  EXPECT_THROW(MapWarmStart({1, 2, 3}, two, {2, 3}, 0.5, nullptr), PreconditionError);
  EXPECT_THROW(MapWarmStart({1, 2}, two, {}, 0.5, nullptr), PreconditionError);
  EXPECT_THROW(MapWarmStart({1, 2}, two, {3, 3}, 0.5, nullptr), PreconditionError);
  EXPECT_THROW(MapWarmStart({1, 2}, VectorD::Constant(2, -0.1), {2, 3}, 0.5, nullptr),
               PreconditionError);
  VectorD short_gradient = VectorD::Zero(1);
  EXPECT_THROW(MapWarmStart({1, 2}, two, {2, 3}, 0.5, &short_gradient), PreconditionError);
  VectorD nan_gradient = VectorD::Zero(2);
  nan_gradient[1] = std::numeric_limits<double>::quiet_NaN();
  EXPECT_THROW(MapWarmStart({1, 2}, two, {2, 3}, 0.5, &nan_gradient), PreconditionError);
  EXPECT_THROW(MapWarmStart({1, 2}, two, {2, 3}, 0.0, nullptr), PreconditionError);
}

}  // namespace
}  // namespace nuwatch
