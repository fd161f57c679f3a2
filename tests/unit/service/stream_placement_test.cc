// StreamPlacement's contract (service/stream_placement.h): each key is placed on the thread with
// the fewest keys when first seen, keeps it for good, and a full table or an unadmitted key goes
// by hash. The reference for "by hash" is std::hash of the key modulo the threads, which is what
// routed every key before the table existed.
#include "service/stream_placement.h"

#include <gtest/gtest.h>

#include <algorithm>
#include <map>
#include <string>
#include <vector>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

// `n` keys "unit-K" that a hash of the key would all put on thread `thread` of `threads`: the
// case the table is for.
std::vector<std::string> KeysHashedTo(std::size_t thread, std::size_t threads, int n) {
  std::vector<std::string> keys;
  for (int i = 0; static_cast<int>(keys.size()) < n; ++i) {
    std::string key = "unit-" + std::to_string(i);
    if (std::hash<std::string_view>{}(key) % threads == thread) keys.push_back(std::move(key));
  }
  return keys;
}

TEST(StreamPlacement, KeysThatHashToOneThreadAreSpreadOverAll) {
  for (std::size_t threads : {2u, 3u, 4u}) {
    for (int n : {2, 3, 4, 7, 12}) {
      StreamPlacement placement(threads, 4096);
      std::vector<int> per_thread(threads, 0);
      for (const std::string& key : KeysHashedTo(0, threads, n)) {
        const std::size_t thread = placement.Place(key);
        ASSERT_LT(thread, threads);
        ++per_thread[thread];
      }
      const auto [fewest, most] = std::minmax_element(per_thread.begin(), per_thread.end());
      EXPECT_LE(*most - *fewest, 1) << n << " keys over " << threads << " threads";
      EXPECT_EQ(placement.placed(), static_cast<std::size_t>(n));
      for (std::size_t t = 0; t < threads; ++t)
        EXPECT_EQ(placement.placed_on(t), static_cast<std::size_t>(per_thread[t]));
    }
  }
}

TEST(StreamPlacement, TheFirstKeysGoToTheThreadsInTurn) {
  StreamPlacement placement(3, 4096);
  EXPECT_EQ(placement.Place("a"), 0u);
  EXPECT_EQ(placement.Place("b"), 1u);
  EXPECT_EQ(placement.Place("c"), 2u);
  EXPECT_EQ(placement.Place("d"), 0u);  // ties go to the lowest index
}

TEST(StreamPlacement, AKeyKeepsItsThreadWhateverComesAfter) {
  StreamPlacement placement(2, 4096);
  std::map<std::string, std::size_t> first;
  for (int i = 0; i < 200; ++i) {
    const std::string key = "k" + std::to_string(i);
    first[key] = placement.Place(key);
    // Every key placed so far, asked again between new ones, and looked up without placing.
    for (int j = 0; j <= i; j += 17) {
      const std::string old = "k" + std::to_string(j);
      EXPECT_EQ(placement.Place(old), first[old]);
      EXPECT_EQ(placement.Find(old), first[old]);
    }
  }
  EXPECT_EQ(placement.placed(), 200u);
}

TEST(StreamPlacement, AFullTableSendsNewKeysByHashForGood) {
  constexpr std::size_t kThreads = 4;
  StreamPlacement placement(kThreads, 3);
  const std::vector<std::string> placed = {"p0", "p1", "p2"};
  for (std::size_t i = 0; i < placed.size(); ++i) EXPECT_EQ(placement.Place(placed[i]), i);
  for (int i = 0; i < 50; ++i) {
    const std::string key = "late-" + std::to_string(i);
    const std::size_t hashed = std::hash<std::string_view>{}(key) % kThreads;
    EXPECT_EQ(placement.Find(key), hashed);
    EXPECT_EQ(placement.Place(key), hashed);
    EXPECT_EQ(placement.Place(key), hashed);
  }
  EXPECT_EQ(placement.placed(), 3u);
  for (std::size_t i = 0; i < placed.size(); ++i) EXPECT_EQ(placement.Place(placed[i]), i);
}

TEST(StreamPlacement, AKeyNotAdmittedGoesByHashAndTakesNoRoom) {
  StreamPlacement placement(2, 4096);
  int asked = 0;
  const auto refuse = [&](std::string_view) {
    ++asked;
    return false;
  };
  const auto admit = [&](std::string_view) {
    ++asked;
    return true;
  };
  for (const std::string& key : KeysHashedTo(1, 2, 3)) {
    EXPECT_EQ(placement.Place(key, refuse), 1u);
  }
  EXPECT_EQ(asked, 3);
  EXPECT_EQ(placement.placed(), 0u);
  // Admitted, a key is asked about once: not again once placed (the per-message path).
  EXPECT_EQ(placement.Place("valid", admit), 0u);
  EXPECT_EQ(placement.Place("valid", admit), 0u);
  EXPECT_EQ(placement.Place("valid", refuse), 0u);
  EXPECT_EQ(asked, 4);
}

TEST(StreamPlacement, FindPlacesNothing) {
  StreamPlacement placement(2, 4096);
  EXPECT_EQ(placement.Place("first"), 0u);
  EXPECT_EQ(placement.Find("second"), 1u);  // where it would go now
  EXPECT_EQ(placement.Find("third"), 1u);
  EXPECT_EQ(placement.placed(), 1u);
  EXPECT_EQ(placement.Place("third"), 1u);
  EXPECT_EQ(placement.Find("second"), 0u);  // the counts moved on
}

TEST(StreamPlacement, NoThreadsIsRefused) {
  EXPECT_THROW(StreamPlacement(0, 16), PreconditionError);
}

}  // namespace
}  // namespace nuwatch
