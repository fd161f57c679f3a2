// HandoffSender's withdrawal (PROTOCOL.md §13.4 "A change taken back"), against a receiver that
// speaks the `adopt` request of §11.7 over a real ZeroMQ REP socket (inproc): an offer withdrawn
// while its receiver keeps answering not_owner ends kWithdrawn with its state; the withdrawal
// names only the streams it was given, and it does not reach an offer of the same stream made
// after it (a third reload that hands the stream away again).
#include "service/handoff.h"

#include <gtest/gtest.h>

#include <atomic>
#include <chrono>
#include <condition_variable>
#include <mutex>
#include <nlohmann/json.hpp>
#include <string>
#include <thread>
#include <vector>
#include <zmq.hpp>

namespace nuwatch {
namespace {

using namespace std::chrono_literals;

// Answers every `adopt` with not_owner (the new owner has not reloaded yet, §11.7), or with ok
// once `adopting` is set; records the streams it was asked for.
class Receiver {
 public:
  Receiver(zmq::context_t& context, std::string endpoint)
      : socket_(context, zmq::socket_type::rep) {
    socket_.set(zmq::sockopt::linger, 0);
    socket_.bind(endpoint);
    thread_ = std::thread([this] { Run(); });
  }
  ~Receiver() {
    stop_ = true;
    thread_.join();
  }
  std::atomic<bool> adopting{false};
  int requests_for(const std::string& stream) {
    std::lock_guard lock(mutex_);
    int n = 0;
    for (const std::string& s : streams_) n += s == stream ? 1 : 0;
    return n;
  }

 private:
  void Run() {
    while (!stop_) {
      zmq_pollitem_t item{socket_.handle(), 0, ZMQ_POLLIN, 0};
      if (zmq::poll(&item, 1, 20ms) == 0) continue;
      zmq::message_t request, state;
      (void)socket_.recv(request, zmq::recv_flags::none);
      if (request.more()) (void)socket_.recv(state, zmq::recv_flags::none);
      const nlohmann::json parsed = nlohmann::json::parse(request.to_string_view());
      {
        std::lock_guard lock(mutex_);
        streams_.push_back(parsed.at("stream").get<std::string>());
      }
      const nlohmann::json reply =
          adopting ? nlohmann::json{{"ok", true}, {"state_written", true}, {"held_vectors", 0}}
                   : nlohmann::json{{"ok", false},
                                    {"reason", "not_owner"},
                                    {"error", "this member has not reloaded"}};
      (void)socket_.send(zmq::buffer(reply.dump()), zmq::send_flags::none);
    }
  }

  zmq::socket_t socket_;
  std::atomic<bool> stop_{false};
  std::mutex mutex_;
  std::vector<std::string> streams_;
  std::thread thread_;
};

struct Reported {
  HandoffOffer offer;
  HandoffReport report;
};

class Reports {
 public:
  void Add(const HandoffOffer& offer, const HandoffReport& report) {
    std::lock_guard lock(mutex_);
    reports_.push_back({offer, report});
    changed_.notify_all();
  }
  // The reports once there are `n` of them, or what there is after 20 s.
  std::vector<Reported> WaitFor(std::size_t n) {
    std::unique_lock lock(mutex_);
    changed_.wait_for(lock, 20s, [&] { return reports_.size() >= n; });
    return reports_;
  }

 private:
  std::mutex mutex_;
  std::condition_variable changed_;
  std::vector<Reported> reports_;
};

bool WaitUntil(const std::function<bool()>& done) {
  const auto deadline = std::chrono::steady_clock::now() + 20s;
  while (!done()) {
    if (std::chrono::steady_clock::now() > deadline) return false;
    std::this_thread::sleep_for(5ms);  // polling the receiver thread's record, bounded
  }
  return true;
}

TEST(HandoffSender, AWithdrawalEndsOnlyTheOffersItNamesThatWereMadeBeforeIt) {
  zmq::context_t context;
  const std::string endpoint = "inproc://handoff-test";
  Receiver receiver(context, endpoint);
  Reports reports;
  HandoffSender sender(context, std::nullopt,
                       [&](const HandoffOffer& o, const HandoffReport& r) { reports.Add(o, r); });
  const auto deadline = std::chrono::steady_clock::now() + 60s;
  sender.Offer("a", {{"pump-1", "b", endpoint, {1, 2, 3}}, {"pump-2", "b", endpoint, {7}}},
               deadline);
  // Both pending: the receiver has refused each as not_owner at least once.
  ASSERT_TRUE(WaitUntil(
      [&] { return receiver.requests_for("pump-1") > 0 && receiver.requests_for("pump-2") > 0; }));

  sender.Withdraw([](const std::string& stream) { return stream == "pump-1"; });
  std::vector<Reported> got = reports.WaitFor(1);
  ASSERT_EQ(got.size(), 1u);
  EXPECT_EQ(got[0].offer.stream, "pump-1");
  EXPECT_EQ(got[0].report.end, HandoffEnd::kWithdrawn);
  EXPECT_EQ(got[0].offer.state, (std::vector<uint8_t>{1, 2, 3}));  // the caller's state, back

  // pump-1 offered again after the withdrawal (handed away once more): the withdrawal does not
  // reach it, nor pump-2, which it never named. Both are adopted once the receiver takes them.
  sender.Offer("a", {{"pump-1", "b", endpoint, {4, 5}}}, deadline);
  receiver.adopting = true;
  got = reports.WaitFor(3);
  ASSERT_EQ(got.size(), 3u);
  for (std::size_t i = 1; i < got.size(); ++i) {
    EXPECT_EQ(got[i].report.end, HandoffEnd::kAdopted) << got[i].offer.stream;
  }
  EXPECT_EQ(got[1].offer.stream == "pump-1" ? got[1].offer.state : got[2].offer.state,
            (std::vector<uint8_t>{4, 5}));
}

TEST(HandoffSender, AWithdrawalWithNothingPendingChangesNothingLater) {
  zmq::context_t context;
  const std::string endpoint = "inproc://handoff-test-idle";
  Receiver receiver(context, endpoint);
  receiver.adopting = true;
  Reports reports;
  HandoffSender sender(context, std::nullopt,
                       [&](const HandoffOffer& o, const HandoffReport& r) { reports.Add(o, r); });
  sender.Withdraw([](const std::string&) { return true; });
  sender.Offer("a", {{"pump-3", "b", endpoint, {9}}}, std::chrono::steady_clock::now() + 60s);
  const std::vector<Reported> got = reports.WaitFor(1);
  ASSERT_EQ(got.size(), 1u);
  EXPECT_EQ(got[0].report.end, HandoffEnd::kAdopted);
  EXPECT_EQ(receiver.requests_for("pump-3"), 1);
}

}  // namespace
}  // namespace nuwatch
