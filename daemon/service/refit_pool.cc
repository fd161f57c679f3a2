#include "service/refit_pool.h"

#include <sys/resource.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>

namespace nuwatch {

RefitPool::RefitPool(int threads) : pool_(threads) {}

RefitPool::~RefitPool() { Join(); }

namespace {

constexpr int kRefitNiceIncrement = 10;

// Lowers the calling thread's priority once (Linux: nice values are per thread). Best effort: a
// refusal only leaves the refits at the scoring threads' priority.
void LowerThisThreadsPriority() {
  thread_local bool lowered = false;
  if (lowered) return;
  lowered = true;
  const id_t tid = static_cast<id_t>(::gettid());
  errno = 0;
  const int nice_now = ::getpriority(PRIO_PROCESS, tid);
  if (errno != 0) return;
  (void)::setpriority(PRIO_PROCESS, tid, std::min(19, nice_now + kRefitNiceIncrement));
}

}  // namespace

void RefitPool::Post(std::function<void()> job) {
  queued_.fetch_add(1, std::memory_order_relaxed);
  pool_.Post([this, job = std::move(job)] {
    queued_.fetch_sub(1, std::memory_order_relaxed);
    LowerThisThreadsPriority();
    job();
  });
}

void RefitPool::Join() { pool_.Join(); }

TrackedRefitExecutor::TrackedRefitExecutor(RefitExecutor* base, std::function<void()> on_finished)
    : base_(base), on_finished_(std::move(on_finished)) {}

void TrackedRefitExecutor::Post(std::function<void()> job) {
  ++posted_;
  base_->Post([this, job = std::move(job)] {
    job();
    finished_.fetch_add(1, std::memory_order_release);
    if (on_finished_) on_finished_();
    settled_.fetch_add(1, std::memory_order_release);  // the last use of `this`
  });
}

}  // namespace nuwatch
