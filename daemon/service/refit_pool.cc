#include "service/refit_pool.h"

namespace nuwatch {

RefitPool::RefitPool(int threads) : pool_(threads) {}

RefitPool::~RefitPool() { Join(); }

void RefitPool::Post(std::function<void()> job) { pool_.Post(std::move(job)); }

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
