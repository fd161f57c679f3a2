#include "service/handoff.h"

#include <poll.h>
#include <spdlog/spdlog.h>
#include <sys/eventfd.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <cstring>
#include <map>
#include <nlohmann/json.hpp>
#include <set>
#include <stdexcept>
#include <thread>
#include <zmq.hpp>

#include "nuwatch/mutex.h"

namespace nuwatch {
namespace {

using Clock = std::chrono::steady_clock;

// A receiver that does not answer within this is taken as unreachable for the round: its
// connection is dropped (a REQ socket that lost its reply cannot send again) and made anew.
constexpr auto kReplyTimeout = std::chrono::seconds(5);
// Between rounds while offers are pending: the receivers reload one by one, within seconds.
constexpr auto kFirstBackoff = std::chrono::milliseconds(50);
constexpr auto kMaxBackoff = std::chrono::seconds(1);

struct Pending {
  int64_t serial = 0;  // order of Offer: a withdrawal applies to the offers queued before it
  HandoffOffer offer;
  std::string from;
  Clock::time_point deadline;
  HandoffReport report;
};

double Seconds(Clock::duration d) { return std::chrono::duration<double>(d).count(); }

}  // namespace

struct HandoffSender::State {
  State(zmq::context_t& c, std::optional<CurveKeyPair> k, Report r)
      : context(c), keys(std::move(k)), report(std::move(r)) {}

  zmq::context_t& context;
  const std::optional<CurveKeyPair> keys;
  const Report report;
  int wake_fd = -1;
  std::thread thread;

  struct Withdrawal {
    int64_t before_serial;  // applies to offers with a smaller serial
    std::function<bool(const std::string&)> owned_again;
  };

  Mutex mutex;
  std::vector<Pending> incoming GUARDED_BY(mutex);
  std::vector<Withdrawal> new_withdrawals GUARDED_BY(mutex);
  int64_t next_serial GUARDED_BY(mutex) = 0;
  bool stopping GUARDED_BY(mutex) = false;

  // The handoff thread's own.
  std::vector<Pending> pending;
  std::vector<Withdrawal> withdrawals;           // until no pending offer is older than one
  std::map<std::string, zmq::socket_t> sockets;  // by endpoint, made on first use
  Clock::time_point batch_start{};
  int64_t batch_adopted = 0;
  int64_t batch_ended = 0;

  void Wake() const {
    const uint64_t one = 1;
    [[maybe_unused]] const ssize_t n = ::write(wake_fd, &one, sizeof one);
  }
  // Waits for a wake-up or `timeout` (-1: none).
  void Wait(int timeout_ms) const {
    pollfd item{wake_fd, POLLIN, 0};
    if (::poll(&item, 1, timeout_ms) > 0) {
      uint64_t count;
      [[maybe_unused]] const ssize_t n = ::read(wake_fd, &count, sizeof count);
    }
  }
  zmq::socket_t& SocketFor(const std::string& endpoint) {
    auto it = sockets.find(endpoint);
    if (it != sockets.end()) return it->second;
    zmq::socket_t socket(context, zmq::socket_type::req);
    socket.set(zmq::sockopt::linger, 0);
    if (keys) {
      // The members share one server key pair (handoff.h): the receiver's server key is ours.
      socket.set(zmq::sockopt::curve_serverkey, keys->public_key);
      socket.set(zmq::sockopt::curve_publickey, keys->public_key);
      socket.set(zmq::sockopt::curve_secretkey, keys->secret_key);
    }
    socket.connect(endpoint);
    return sockets.emplace(endpoint, std::move(socket)).first->second;
  }
  void End(Pending& p, HandoffEnd end) {
    p.report.end = end;
    ++batch_ended;
    if (end == HandoffEnd::kAdopted) ++batch_adopted;
    report(p.offer, p.report);
  }
  // Takes the withdrawals made since the last call.
  void CollectWithdrawals() {
    MutexLock lock(&mutex);
    for (Withdrawal& w : new_withdrawals) withdrawals.push_back(std::move(w));
    new_withdrawals.clear();
  }
  bool Withdrawn(const Pending& p) const {
    return std::any_of(withdrawals.begin(), withdrawals.end(), [&p](const Withdrawal& w) {
      return p.serial < w.before_serial && w.owned_again(p.offer.stream);
    });
  }
  // One attempt; true when the offer has ended (and was reported).
  bool TryOnce(Pending& p, std::set<std::string>& silent);
  void Run();
};

bool HandoffSender::State::TryOnce(Pending& p, std::set<std::string>& silent) {
  const std::string& endpoint = p.offer.endpoint;
  if (silent.count(endpoint)) return false;  // did not answer in this round: next round
  ++p.report.attempts;
  const std::string request =
      nlohmann::json{{"command", "adopt"}, {"stream", p.offer.stream}, {"from", p.from}}.dump();
  try {
    zmq::socket_t& socket = SocketFor(endpoint);
    // Not connected yet: ZeroMQ queues on the connection being made (ZMQ_IMMEDIATE is 0).
    if (!socket.send(zmq::buffer(request), zmq::send_flags::sndmore | zmq::send_flags::dontwait) ||
        !socket.send(zmq::buffer(p.offer.state), zmq::send_flags::dontwait)) {
      throw std::runtime_error("the request could not be queued");
    }
    const auto left =
        std::max<Clock::duration>(p.deadline - Clock::now(), std::chrono::milliseconds(10));
    const auto wait = std::chrono::duration_cast<std::chrono::milliseconds>(
        std::min<Clock::duration>(left, kReplyTimeout));
    zmq_pollitem_t item{socket.handle(), 0, ZMQ_POLLIN, 0};
    if (zmq::poll(&item, 1, wait) == 0) {
      throw std::runtime_error("no reply within " + std::to_string(wait.count()) + " ms");
    }
    zmq::message_t reply;
    (void)socket.recv(reply, zmq::recv_flags::none);
    for (bool more = reply.more(); more;) {
      zmq::message_t extra;
      (void)socket.recv(extra, zmq::recv_flags::none);
      more = extra.more();
    }
    const nlohmann::json parsed = nlohmann::json::parse(reply.to_string_view(), nullptr, false);
    if (!parsed.is_object() || !parsed.contains("ok") || !parsed["ok"].is_boolean()) {
      p.report.reason = "bad_reply";
      p.report.detail = "the reply is not a control reply: " + reply.to_string();
      End(p, HandoffEnd::kRefused);
      return true;
    }
    if (parsed["ok"].get<bool>()) {
      p.report.reason.clear();
      p.report.detail.clear();
      const auto written = parsed.find("state_written");
      p.report.state_written =
          written != parsed.end() && written->is_boolean() && written->get<bool>();
      const auto held = parsed.find("held_vectors");
      if (held != parsed.end() && held->is_number_integer()) p.report.held_vectors = *held;
      End(p, HandoffEnd::kAdopted);
      return true;
    }
    const auto reason = parsed.find("reason");
    const auto error = parsed.find("error");
    p.report.reason = reason != parsed.end() && reason->is_string() ? reason->get<std::string>()
                                                                    : std::string("refused");
    p.report.detail = error != parsed.end() && error->is_string() ? error->get<std::string>() : "";
    if (p.report.reason == "not_owner") return false;  // it has not reloaded yet: again later
    End(p, HandoffEnd::kRefused);
    return true;
  } catch (const std::exception& e) {
    // zmq::error_t or no reply: drop the connection (a REQ socket waiting for a reply cannot
    // send again) and try the endpoint again in the next round.
    sockets.erase(endpoint);
    silent.insert(endpoint);
    p.report.reason = "no_reply";
    p.report.detail = endpoint + ": " + e.what();
    return false;
  }
}

void HandoffSender::State::Run() {
  auto backoff = std::chrono::duration_cast<std::chrono::milliseconds>(kFirstBackoff);
  while (true) {
    {
      MutexLock lock(&mutex);
      if (stopping) break;
      if (pending.empty() && !incoming.empty()) {
        batch_start = Clock::now();
        batch_adopted = batch_ended = 0;
      }
      for (Pending& p : incoming) pending.push_back(std::move(p));
      incoming.clear();
    }
    if (pending.empty()) {
      Wait(-1);
      continue;
    }
    std::set<std::string> silent;
    const Clock::time_point now = Clock::now();
    std::erase_if(pending, [&](Pending& p) {
      // Checked before each attempt, so that a withdrawal waits for one attempt at most (up to
      // kReplyTimeout), not for a whole round.
      CollectWithdrawals();
      if (Withdrawn(p)) {
        p.report.reason.clear();
        p.report.detail.clear();
        End(p, HandoffEnd::kWithdrawn);
        return true;
      }
      if (now >= p.deadline) {
        End(p, HandoffEnd::kTimedOut);
        return true;
      }
      return TryOnce(p, silent);
    });
    if (!pending.empty()) {
      const int64_t oldest =
          std::min_element(pending.begin(), pending.end(), [](const Pending& a, const Pending& b) {
            return a.serial < b.serial;
          })->serial;
      std::erase_if(withdrawals,
                    [oldest](const Withdrawal& w) { return w.before_serial <= oldest; });
    } else {
      withdrawals.clear();
    }
    if (pending.empty()) {
      spdlog::info("handoff: {} of {} streams adopted by their new owners in {:.3f} s",
                   batch_adopted, batch_ended, Seconds(Clock::now() - batch_start));
      backoff = std::chrono::duration_cast<std::chrono::milliseconds>(kFirstBackoff);
      continue;
    }
    Wait(static_cast<int>(backoff.count()));
    backoff =
        std::min(backoff * 2, std::chrono::duration_cast<std::chrono::milliseconds>(kMaxBackoff));
  }
  std::vector<Pending> left = std::move(pending);
  {
    MutexLock lock(&mutex);
    for (Pending& p : incoming) left.push_back(std::move(p));
    incoming.clear();
  }
  for (Pending& p : left) End(p, HandoffEnd::kStopped);
  sockets.clear();
}

HandoffSender::HandoffSender(zmq::context_t& context, std::optional<CurveKeyPair> client_keys,
                             Report report)
    : state_(std::make_unique<State>(context, std::move(client_keys), std::move(report))) {
  state_->wake_fd = ::eventfd(0, EFD_NONBLOCK | EFD_CLOEXEC);
  if (state_->wake_fd < 0) {
    throw std::runtime_error(std::string("eventfd failed: ") + std::strerror(errno));
  }
  state_->thread = std::thread([s = state_.get()] { s->Run(); });
}

HandoffSender::~HandoffSender() {
  Stop();
  if (state_->wake_fd >= 0) ::close(state_->wake_fd);
}

void HandoffSender::Offer(std::string from_member, std::vector<HandoffOffer> offers,
                          std::chrono::steady_clock::time_point deadline) {
  {
    MutexLock lock(&state_->mutex);
    for (HandoffOffer& offer : offers) {
      state_->incoming.push_back(
          Pending{state_->next_serial++, std::move(offer), from_member, deadline, {}});
    }
  }
  state_->Wake();
}

void HandoffSender::Withdraw(std::function<bool(const std::string& stream)> owned_again) {
  {
    MutexLock lock(&state_->mutex);
    state_->new_withdrawals.push_back({state_->next_serial, std::move(owned_again)});
  }
  state_->Wake();
}

void HandoffSender::Stop() {
  {
    MutexLock lock(&state_->mutex);
    state_->stopping = true;
  }
  state_->Wake();
  if (state_->thread.joinable()) state_->thread.join();
}

}  // namespace nuwatch
