// The daemon's CURVE authentication (daemon/protocol/PROTOCOL.md §12): a ZAP handler (ZeroMQ RFC
// 27) on inproc://zeromq.zap.01 that admits only the configured client public keys, and a socket
// monitor on each protected socket that counts the handshakes ZAP never sees (a client without
// CURVE, a client with the wrong server key).
//
// Why both: libzmq asks the ZAP handler only once a CURVE handshake has got as far as the client's
// public key. A peer that speaks another mechanism, or cannot open the server's box, fails before
// that, and only the socket's monitor reports it. Every refusal is counted in
// nuwatch_auth_refusals_total{socket,reason}; every admitted handshake in
// nuwatch_auth_handshakes_total{socket}.
//
// libzmq admits every CURVE client when no ZAP handler is bound in the context, so the handler is
// bound in the constructor, before any protected socket binds, and stops only once they are all
// closed (Stop's requirement).
//
// The same handler bounds how many peers the sockets of one kind hold at once (SetConnectionLimit;
// the result socket's publish.max_subscribers, the ingest sockets' ingest.max_senders), with or
// without CURVE: a socket without CURVE is given a ZAP
// domain (Gate), which makes libzmq ask the handler about its NULL-mechanism handshakes too. The
// monitor's accepted and disconnected events count a socket's connections; before answering a
// request the handler takes every pending event, so that the connection asking is counted (libzmq
// reports its accept before its handshake can reach ZAP). A connection over the limit is refused
// and counted as subscriber_limit or sender_limit, with ZAP status 400: RFC 27's 300 (a temporary
// error) would fit better, but libzmq then closes the connection without an ERROR command, and the
// peer's monitor sees a bare failed handshake (EPIPE); with 400 it sees HANDSHAKE_FAILED_AUTH and
// the status (observed with libzmq 4.3.4), so a client can say why. A peer still in its handshake
// holds a place until libzmq's handshake timeout (ZMQ_HANDSHAKE_IVL, 30 s by default) drops it.
//
// Threads: one thread, "nuwatchd-auth", owns the ZAP socket and the monitor sockets from Start to
// Stop. ReplaceAllowed may be called from any thread.
#pragma once

#include <array>
#include <atomic>
#include <cstdint>
#include <set>
#include <string>
#include <thread>
#include <vector>
#include <zmq.hpp>

#include "nuwatch/mutex.h"
#include "protocol/curve_keys.h"
#include "service/metrics.h"

namespace nuwatch {

class CurveAuthenticator {
 public:
  // Binds the ZAP socket in `context`. Requires: CurveAvailable(); no other ZAP handler in the
  // context; `metrics` outlives this. Throws zmq::error_t if the ZAP endpoint cannot be bound.
  CurveAuthenticator(zmq::context_t& context, std::set<std::string> allowed_keys,
                     DaemonMetrics* metrics);
  // Stop().
  ~CurveAuthenticator();
  CurveAuthenticator(const CurveAuthenticator&) = delete;
  CurveAuthenticator& operator=(const CurveAuthenticator&) = delete;

  // Makes `socket` a CURVE server with `server` (its secret key), names its ZAP domain after
  // `which` and watches its handshakes. Requires: before Start, on the thread that owns `socket`,
  // before `socket` binds.
  void Protect(zmq::socket_t& socket, AuthSocket which, const CurveKeyPair& server);
  // Makes `socket` a CURVE client offering `client` to a server that must hold
  // `server_public_key` (Z85), and watches its handshakes: one with a server that does not hold
  // that key fails (bad_handshake or incomplete_handshake), one the server refuses counts as
  // unknown_key. Requires: as Protect, before `socket` connects.
  void ProtectClient(zmq::socket_t& socket, AuthSocket which, const CurveKeyPair& client,
                     const std::string& server_public_key);
  // Brings a server socket without CURVE before the handler (a ZAP domain), which admits its
  // peers within the connection limit. Requires: as Protect.
  void Gate(zmq::socket_t& socket, AuthSocket which);
  // Watches the connections of a client socket without CURVE (the plain SUB socket of
  // ingest.subscribe), for Connections, and its failed handshakes: one with a server that requires
  // CURVE counts as wrong_mechanism (or incomplete_handshake, when that server hung up first).
  // Requires: as Protect, before `socket` connects.
  void Track(zmq::socket_t& socket, AuthSocket which);
  // At most `limit` connections at once on the server sockets `which`, all of them together (0:
  // no limit). Requires: before Start; the sockets protected or gated.
  void SetConnectionLimit(AuthSocket which, int64_t limit);
  // Starts the thread. Call once, after every Protect.
  void Start();
  // The keys admitted from now on (a connection admitted before keeps its session).
  void ReplaceAllowed(std::set<std::string> keys) EXCLUDES(mutex_);
  std::size_t allowed_count() const EXCLUDES(mutex_);
  // The connections of the sockets `which` (all of them: there may be several ingest sockets;
  // a server's accepted, a client's connected) as the handler last counted them, each with a
  // generation that tells a reused descriptor from the connection before. Any thread; a connection
  // accepted a moment ago may be missing, one closed a moment ago still listed.
  struct PeerConnection {
    int fd = -1;
    uint64_t generation = 0;
  };
  // Fills `out` (cleared first; its capacity is reused, so a caller that keeps it allocates
  // nothing once it is large enough).
  void Connections(AuthSocket which, std::vector<PeerConnection>* out) const EXCLUDES(mutex_);
  // Moves into `out` (cleared first) the endpoints of the client sockets `which` (ProtectClient,
  // Track) whose handshake failed since the last call: a mechanism mismatch, a server key that
  // does not match, a refusal by the server. libzmq connects again after a lost connection but
  // never after such a failure, so the socket's owner must (a publisher set right later would
  // otherwise never be heard again). An endpoint is listed once however often it failed. Any
  // thread; cheap when nothing failed (an atomic read).
  void TakeFailedHandshakes(AuthSocket which, std::vector<std::string>* out) EXCLUDES(mutex_);
  // Stops and joins the thread. Requires: every protected socket is closed. Idempotent.
  void Stop();

 private:
  struct Watched {
    AuthSocket which;
    bool client = false;        // a CURVE client: no ZAP request; a server's refusal is an event
    bool curve = true;          // false: gated only (NULL mechanism)
    zmq::socket_t monitor;      // PAIR, connected to the protected socket's monitor endpoint
    int64_t limit = 0;          // connections at once; 0: no limit
    std::set<int> connections;  // a server's accepted, not yet disconnected, by descriptor
  };
  void Watch(zmq::socket_t& socket, AuthSocket which, bool client, bool curve);
  // The server sockets `which` hold this many connections, and may hold that many (0: no limit).
  std::size_t ConnectionCount(AuthSocket which) const;
  int64_t ConnectionLimit(AuthSocket which) const;
  void Run();
  void HandleZapRequest();
  // Takes one pending event of `watched`'s monitor; false when there was none.
  bool HandleMonitorEvent(Watched& watched);
  bool Allowed(const std::string& z85_key) const EXCLUDES(mutex_);
  void Refuse(AuthSocket which, AuthRefusal reason, const std::string& detail);
  // Lists `endpoint` for TakeFailedHandshakes when `watched` is a client socket.
  void NoteFailedHandshake(const Watched& watched, const std::string& endpoint) EXCLUDES(mutex_);

  zmq::context_t& context_;
  DaemonMetrics* metrics_;
  zmq::socket_t zap_;             // REP on inproc://zeromq.zap.01
  std::vector<Watched> watched_;  // filled before Start, then the thread's
  int wake_fd_ = -1;              // Stop wakes the thread
  std::atomic<bool> stop_{false};
  std::thread thread_;
  int monitors_ = 0;
  std::array<bool, kAuthRefusalCount> logged_{};  // the thread's: first refusal of each reason

  mutable Mutex mutex_;
  std::set<std::string> allowed_ GUARDED_BY(mutex_);
  // The server sockets' connections, by socket kind; written by the thread, read by Connections.
  std::array<std::vector<PeerConnection>, kAuthSocketCount> connections_ GUARDED_BY(mutex_);
  uint64_t next_generation_ = 1;  // the thread's
  // The client sockets' endpoints whose handshake failed (TakeFailedHandshakes), by socket kind.
  std::array<std::vector<std::string>, kAuthSocketCount> failed_handshakes_ GUARDED_BY(mutex_);
  std::atomic<bool> failed_handshakes_pending_{false};
};

}  // namespace nuwatch
