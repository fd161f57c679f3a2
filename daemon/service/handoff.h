// The old owner's half of a stream handoff (daemon/protocol/PROTOCOL.md §13.4): after a reload
// changed cluster.members, every stream this member no longer owns is offered to its new owner
// with an `adopt` control request (§11.7: a JSON frame and the stream's state, state_store.h's
// EncodeStreamState bytes), from a thread of its own, so that the socket thread and the scoring
// threads go on serving the other streams meanwhile.
//
// Each offer is retried, 50 ms after a round and doubling up to 1 s, while the receiver answers
// `not_owner` (it has not reloaded yet) or does not answer (not started, restarting: a request
// waits at most 5 s for its reply, then the connection is dropped and made again), until the
// deadline. Any other refusal is final. An offer may be withdrawn, when a later reload gives the
// stream back to this member before it was adopted (the change taken back). Every offer ends in
// exactly one report.
//
// Thread safety: Offer, Withdraw and Stop from any thread; the report runs on the handoff thread.
#pragma once

#include <chrono>
#include <cstdint>
#include <functional>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "protocol/curve_keys.h"

namespace zmq {
class context_t;
}

namespace nuwatch {

// One stream to hand over.
struct HandoffOffer {
  std::string stream;          // the key
  std::string to_member;       // its new owner
  std::string endpoint;        // the new owner's control endpoint
  std::vector<uint8_t> state;  // EncodeStreamState of the stream as it was released
};

enum class HandoffEnd {
  kAdopted,    // the new owner replied ok
  kRefused,    // the new owner refused it for good (reason and error in the report)
  kTimedOut,   // no adoption before the deadline (the last reason in the report)
  kStopped,    // the daemon stopped first
  kWithdrawn,  // Withdraw took it back before it was adopted: the offer's state is the caller's
};

struct HandoffReport {
  HandoffEnd end = HandoffEnd::kTimedOut;
  std::string reason;          // the receiver's refusal label, "no_reply", or "" when adopted
  std::string detail;          // the receiver's error, or what went wrong here
  bool state_written = false;  // adopted, and the new owner wrote its state file (§11.7)
  int64_t held_vectors = 0;    // adopted: vectors the new owner had held for it
  int attempts = 0;
};

class HandoffSender {
 public:
  using Report = std::function<void(const HandoffOffer&, const HandoffReport&)>;

  // `client_keys`: with CURVE on the receivers' control sockets ([auth]), this member's key
  // pair, used as the client pair and its public key as the server key: the members share one
  // server key pair, which each admits in auth.client_keys (README "Several replicas").
  HandoffSender(zmq::context_t& context, std::optional<CurveKeyPair> client_keys, Report report);
  // Stop().
  ~HandoffSender();
  HandoffSender(const HandoffSender&) = delete;
  HandoffSender& operator=(const HandoffSender&) = delete;

  // Queues the offers of one change of members; each is tried until `deadline`. `from_member`:
  // this member's name, sent in each request.
  void Offer(std::string from_member, std::vector<HandoffOffer> offers,
             std::chrono::steady_clock::time_point deadline);
  // Withdraws every offer queued before this call whose stream `owned_again` names (it is called
  // on the handoff thread, so it must read nothing the caller changes afterwards): each is
  // reported kWithdrawn, at once if no attempt is under way; an attempt under way ends first, and
  // an offer it got adopted stays adopted (kAdopted).
  void Withdraw(std::function<bool(const std::string& stream)> owned_again);
  // Ends the thread; offers still pending are reported kStopped. Idempotent.
  void Stop();

 private:
  struct State;
  std::unique_ptr<State> state_;
};

}  // namespace nuwatch
