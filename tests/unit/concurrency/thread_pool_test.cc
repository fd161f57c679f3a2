// Tests of the daemon side's one thread pool (concurrency/thread_pool.h): every job runs exactly
// once, on the pool's threads, also when posted from a job; after Join a job runs on the caller.
#include "concurrency/thread_pool.h"

#include <gtest/gtest.h>

#include <atomic>
#include <mutex>
#include <set>
#include <thread>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

TEST(ThreadPoolTest, RunsEveryJobOnceOnItsThreads) {
  std::atomic<int> runs{0};
  std::mutex mutex;
  std::set<std::thread::id> threads;
  {
    ThreadPool pool(2);
    EXPECT_EQ(pool.threads(), 2);
    for (int i = 0; i < 1000; ++i) {
      pool.Post([&] {
        runs.fetch_add(1);
        std::lock_guard<std::mutex> lock(mutex);
        threads.insert(std::this_thread::get_id());
      });
    }
    pool.Join();
    EXPECT_EQ(runs.load(), 1000);
  }
  EXPECT_LE(threads.size(), 2u);
  EXPECT_EQ(threads.count(std::this_thread::get_id()), 0u);
}

TEST(ThreadPoolTest, JobsPostedByJobsRunBeforeJoinReturns) {
  std::atomic<int> runs{0};
  ThreadPool pool(2);
  for (int i = 0; i < 10; ++i) {
    pool.Post([&] {
      runs.fetch_add(1);
      pool.Post([&] { runs.fetch_add(1); });
    });
  }
  pool.Join();
  EXPECT_EQ(runs.load(), 20);
}

TEST(ThreadPoolTest, AfterJoinAJobStillRunsOnce) {
  ThreadPool pool(1);
  pool.Join();
  std::thread::id ran_on;
  pool.Post([&] { ran_on = std::this_thread::get_id(); });
  EXPECT_EQ(ran_on, std::this_thread::get_id());
}

TEST(ThreadPoolTest, NeedsAThread) {
  try {
    ThreadPool pool(0);
    FAIL() << "no error";
  } catch (const PreconditionError& e) {
    EXPECT_STREQ(e.what(), "ThreadPool: threads = 0 must be >= 1");
  }
}

}  // namespace
}  // namespace nuwatch
