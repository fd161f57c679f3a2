// Where the daemon's refits run: the daemon side's ThreadPool (concurrency/thread_pool.h) behind
// nuwatch::RefitExecutor, and a per-stream adapter that knows whether the stream has a refit queued
// or running.
//
// The pool's queue needs no bound of its own: each Detector has at most one refit in flight
// (later ones are coalesced), so at most one job per stream is ever queued.
// Thread safety: Post may be called from any thread, concurrently. Join from one thread, once no
// more jobs are posted.
#pragma once

#include <atomic>
#include <cstdint>
#include <functional>
#include <memory>

#include "concurrency/thread_pool.h"
#include "nuwatch/detector.h"

namespace nuwatch {

class RefitPool : public RefitExecutor {
 public:
  // Requires: threads >= 1 (PreconditionError otherwise).
  explicit RefitPool(int threads);
  ~RefitPool() override;  // Join()

  int threads() const { return pool_.threads(); }
  // Runs `job` on a pool thread. Ensures: it runs exactly once, unless Post is called after Join
  // (a precondition violation: the job is then run on the caller's thread, so it still runs).
  // The pool's threads run at a lower priority than the rest of the process (nice + 10, set by
  // each thread on its first job), so that under saturation scoring takes the cores first.
  void Post(std::function<void()> job) override;
  // Waits until every posted job has finished; the pool takes no more jobs afterwards.
  void Join();
  // Jobs posted and not yet started (any thread; a snapshot).
  int64_t queued() const { return queued_.load(std::memory_order_relaxed); }

 private:
  ThreadPool pool_;
  std::atomic<int64_t> queued_{0};
};

// A stream's view of the pool: counts the jobs it posted and those that finished, and calls
// `on_finished` on the pool thread after each job has returned (the detector has marked its refit
// done by then, so idle() implies that Detector::ExportState will not wait).
// Thread safety: Post and idle() from the stream's owner thread; the counts are atomics.
class TrackedRefitExecutor : public RefitExecutor {
 public:
  // Requires: `base` outlives this object and every job it posted.
  TrackedRefitExecutor(RefitExecutor* base, std::function<void()> on_finished);

  void Post(std::function<void()> job) override;
  // No job of this stream is queued or running.
  bool idle() const { return posted_ == finished_.load(std::memory_order_acquire); }
  // Every job posted has returned and so has its `on_finished`: nothing of this object is in use
  // on a pool thread any more, so it may be destroyed.
  bool settled() const { return posted_ == settled_.load(std::memory_order_acquire); }
  int64_t posted() const { return posted_; }

 private:
  RefitExecutor* base_;
  std::function<void()> on_finished_;
  int64_t posted_ = 0;  // owner thread only
  std::atomic<int64_t> finished_{0};
  std::atomic<int64_t> settled_{0};  // jobs whose on_finished has returned too
};

}  // namespace nuwatch
