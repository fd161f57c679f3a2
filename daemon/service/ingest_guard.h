// Cuts an ingest TCP connection that makes ZeroMQ hold more bytes than any whole message explains.
//
// Why: libzmq 4.3 bounds what it queues for a connection in whole messages (ZMQ_RCVHWM) and each
// frame in bytes (ZMQ_MAXMSGSIZE), but nothing bounds the frames of a message that is still open.
// It holds them until the last frame comes, and the daemon cannot read a message before then. A
// peer that writes ZMTP by hand and sends frame after frame with the MORE flag, never a last one,
// took a PULL socket with a mark of 8 and a 2 MiB frame limit to 650 MB in one second (measured
// on this machine; tests/integration/daemon_e2e_test.py has the peer). CURVE keeps out a peer
// without an admitted key; this guard bounds what any connected peer can make the daemon hold.
//
// How: for each ingest connection (a sender's to a PULL socket, or one the SUB socket of
// ingest.subscribe made to a publisher), the bytes the kernel received from it (TCP_INFO's
// tcpi_bytes_received, Linux 4.1 and later) less the wire bytes of every frame the daemon read
// from it (ZMQ_SRCFD names the connection a frame came from) are the bytes still on their way:
// in the kernel's receive buffer, in libzmq's decoder, in its queue. Whenever the daemon has read
// every whole message ZeroMQ holds, that queue has no whole message left, so those bytes can only
// be the message in progress (at most two frames of the frame limit), the kernel buffer and some
// small change (the handshake, heartbeats). At any other moment the queue may also hold up to the
// mark of whole messages, each of at most two frames in a message the protocol admits (PROTOCOL.md
// §2; a message of more frames is refused only once read, and libzmq counts it as one message
// however many frames it has), so the allowance is the mark plus two (the one in progress, one
// the decoder holds while the queue is full) times two frames, with the same buffer and change. A
// connection over its allowance is shut down (shutdown(2), so libzmq closes it and drops its
// unfinished message) and counted (a SUB socket then connects again). Unix-domain (ipc://)
// connections have no TCP_INFO and are not checked: their peers passed the socket file's
// permissions.
//
// Shedding: the same measure, summed over the connections, is what ZeroMQ and the kernel hold for
// ingest and the daemon has not read. libzmq bounds it only in whole messages per connection (a
// mark of 10,000 maximal messages is 40 GB a sender), and shutting a connection down frees none
// of it: the whole messages of a closed connection stay queued until read (the daemon's linger
// of -1). So when the sum passes a budget (ingest.max_unread_bytes) while the daemon cannot keep
// up, PlanShedding gives the connections holding most a quota, bytes to be read and dropped
// until the sum is back at half the budget ("water-filling": the largest are brought down to a
// common level, the others keep all they hold), and Shed tells the socket thread whether a
// message just read falls under its connection's quota. A connection within its share loses
// nothing, so a flood from one sender does not cost another stream its data.
//
// Thread safety: none; one thread (nuwatchd's socket thread) calls everything.
#pragma once

#include <netinet/in.h>
#include <sys/socket.h>

#include <chrono>
#include <cstddef>
#include <cstdint>
#include <string>
#include <unordered_map>
#include <vector>

namespace nuwatch {

class IngestConnectionGuard {
 public:
  using Clock = std::chrono::steady_clock;

  // One live connection of an ingest socket: its descriptor, a number that changes when the
  // descriptor is reused for another connection, and whether its frames come in CURVE boxes
  // (each then travels in a MESSAGE command, 33 bytes larger).
  struct Connection {
    int fd = -1;
    uint64_t generation = 0;
    bool curve = false;
  };
  struct Cut {
    std::string peer;  // "address:port"
    int64_t unread_bytes = 0;
    int64_t allowance_bytes = 0;
  };
  // A connection given a quota by PlanShedding.
  struct Quota {
    std::string peer;  // "address:port"
    int64_t unread_bytes = 0;
    int64_t quota_bytes = 0;
  };

  // `max_frame_bytes`: the sockets' ZMQ_MAXMSGSIZE. `receive_mark`: their ZMQ_RCVHWM (0: none, and
  // then only drained checks can cut).
  IngestConnectionGuard(int64_t max_frame_bytes, int64_t receive_mark);

  // A frame of `size` bytes was read from the connection `fd` (ZMQ_SRCFD; < 0: not a socket the
  // guard can see, e.g. inproc), in a CURVE box if `curve` (as its Connection says). Cheap: an
  // add into a table by descriptor. Returns the frame's wire bytes (0 when fd < 0).
  int64_t CountFrame(int fd, std::size_t size, bool curve);

  // Checks `live` and shuts down each connection over its allowance. `drained`: every whole
  // message ZeroMQ held on the ingest sockets has been read just before the call (the tight
  // allowance applies); else the allowance counts a full queue. Ensures: forgets connections not
  // in `live`. Returns the connections cut.
  std::vector<Cut> Check(const std::vector<Connection>& live, Clock::time_point now, bool drained);

  // What the last Check found still on its way from connection `fd` (0 if it was not checked).
  // For the tests and diagnostics.
  int64_t last_unread_bytes(int fd) const;
  // What the last Check found on its way from all the connections it checked, those it cut aside.
  int64_t last_total_unread_bytes() const { return total_unread_; }

  // Replaces the quotas of the last plan. When the last Check's total plus `held_bytes` (taken
  // from ZeroMQ's queues and not handed on yet) exceeds `max_unread_bytes` (> 0), gives the
  // connections holding most quotas that sum to that less half the budget, each at most what it
  // holds, and returns them (largest first); else clears every quota and returns nothing.
  // Allocates only when it returns quotas.
  std::vector<Quota> PlanShedding(int64_t max_unread_bytes, int64_t held_bytes = 0);
  // Whether a message of `wire_bytes` just read from connection `fd` is to be dropped: its
  // connection still has quota left (which the message then uses up, wholly or in part). Inline
  // when nothing is to be shed: the socket thread asks for every message.
  bool Shed(int fd, int64_t wire_bytes) { return quota_left_ > 0 && ShedFromQuota(fd, wire_bytes); }
  // Quota left over all connections: a message read now may be shed.
  bool shedding() const { return quota_left_ > 0; }
  // Clears every quota (the stop's drain takes everything that was accepted into ZeroMQ).
  void StopShedding();

  // The bytes a frame of `size` bytes takes on the wire (ZMTP 3.0, RFC 23; CURVE, RFC 26).
  static int64_t WireBytes(std::size_t size, bool curve);

  // Room above the message in progress and the kernel's buffer (the handshake, heartbeats, a
  // batch libzmq has decoded but not yet queued), and what a connection may add to it per hour
  // (heartbeats, 9 bytes each). Public for the tests.
  static constexpr int64_t kSlackBytes = 1 << 20;
  static constexpr int64_t kDriftBytesPerHour = 256 << 10;

 private:
  struct Tracked {
    uint64_t generation = 0;
    sockaddr_storage peer{};
    socklen_t peer_length = 0;
    int64_t received_at_start = 0;   // tcpi_bytes_received when first seen
    int64_t delivered_at_start = 0;  // delivered_[fd] then
    Clock::time_point first_seen{};
    int64_t last_unread = 0;
    uint64_t check = 0;  // the last Check that listed it
    int64_t quota = 0;   // bytes still to shed (PlanShedding)
    bool curve = false;
    bool cut = false;
  };
  int64_t Delivered(int fd) const;
  bool ShedFromQuota(int fd, int64_t wire_bytes);

  int64_t max_frame_bytes_;
  int64_t receive_mark_;
  std::vector<int64_t> delivered_;  // wire bytes read, by descriptor, since the daemon started
  std::unordered_map<int, Tracked> tracked_;
  uint64_t check_ = 0;
  int64_t total_unread_ = 0;
  int64_t quota_left_ = 0;
  std::vector<int64_t> levels_;  // PlanShedding's scratch, kept so that it allocates once
};

}  // namespace nuwatch
