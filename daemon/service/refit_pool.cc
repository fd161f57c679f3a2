#include "service/refit_pool.h"

#include <boost/asio/post.hpp>
#include <boost/asio/thread_pool.hpp>
#include <string>

namespace nuwatch {

RefitPool::RefitPool(int threads) : threads_(threads) {
  if (threads < 1) {
    throw PreconditionError("RefitPool: threads = " + std::to_string(threads) + " must be >= 1");
  }
  pool_ = std::make_unique<boost::asio::thread_pool>(static_cast<std::size_t>(threads));
}

RefitPool::~RefitPool() { Join(); }

void RefitPool::Post(std::function<void()> job) {
  if (joined_.load(std::memory_order_acquire)) {
    job();  // the executor contract says the job runs exactly once: never drop it
    return;
  }
  boost::asio::post(*pool_, std::move(job));
}

void RefitPool::Join() {
  if (joined_.exchange(true)) return;
  pool_->join();
}

TrackedRefitExecutor::TrackedRefitExecutor(RefitExecutor* base, std::function<void()> on_finished)
    : base_(base), on_finished_(std::move(on_finished)) {}

void TrackedRefitExecutor::Post(std::function<void()> job) {
  ++posted_;
  base_->Post([this, job = std::move(job)] {
    job();
    finished_.fetch_add(1, std::memory_order_release);
    if (on_finished_) on_finished_();
  });
}

}  // namespace nuwatch
