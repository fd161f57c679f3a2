// The one thread pool of the daemon side: a fixed set of worker threads that run posted jobs.
// nuwatchd's refits (service/refit_pool) and `nuwatch tune`'s settings (offline/tuning) both run
// on it; Boost.Asio's thread_pool does the work inside and stays inside.
// Thread safety: Post may be called from any thread, concurrently, including from a job. Join
// from one thread, once no more jobs are posted.
#pragma once

#include <atomic>
#include <functional>
#include <memory>

namespace boost::asio {
class thread_pool;
}

namespace nuwatch {

class ThreadPool {
 public:
  // Requires: threads >= 1 (PreconditionError naming the value otherwise).
  explicit ThreadPool(int threads);
  ~ThreadPool();  // Join()
  ThreadPool(const ThreadPool&) = delete;
  ThreadPool& operator=(const ThreadPool&) = delete;

  int threads() const { return threads_; }
  // Runs `job` on a pool thread. Ensures: it runs exactly once, unless Post is called after Join
  // (a precondition violation: the job then runs on the caller's thread, so it still runs). A job
  // must not throw: an exception escaping a job ends the program (std::terminate), as from any
  // thread.
  void Post(std::function<void()> job);
  // Waits until every posted job has finished; the pool takes no more jobs afterwards.
  void Join();

 private:
  int threads_;
  std::unique_ptr<boost::asio::thread_pool> pool_;
  std::atomic<bool> joined_{false};
};

}  // namespace nuwatch
