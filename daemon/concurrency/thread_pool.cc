#include "concurrency/thread_pool.h"

#include <boost/asio/post.hpp>
#include <boost/asio/thread_pool.hpp>
#include <string>

#include "nuwatch/types.h"

namespace nuwatch {

ThreadPool::ThreadPool(int threads) : threads_(threads) {
  if (threads < 1) {
    throw PreconditionError("ThreadPool: threads = " + std::to_string(threads) + " must be >= 1");
  }
  pool_ = std::make_unique<boost::asio::thread_pool>(static_cast<std::size_t>(threads));
}

ThreadPool::~ThreadPool() { Join(); }

void ThreadPool::Post(std::function<void()> job) {
  if (joined_.load(std::memory_order_acquire)) {
    job();  // the contract says the job runs exactly once: never drop it
    return;
  }
  boost::asio::post(*pool_, std::move(job));
}

void ThreadPool::Join() {
  if (joined_.exchange(true)) return;
  pool_->join();
}

}  // namespace nuwatch
