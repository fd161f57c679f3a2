// The client side of CURVE (daemon/protocol/PROTOCOL.md §12) for `nuwatch send`, `tail` and
// `control`: the --client-key and --server-key flags, applied to a socket before it connects, and
// a watch on the socket's handshakes that turns a refusal into one clear line instead of a
// silent wait (ZeroMQ retries a refused connection for ever).
// Thread safety: a HandshakeWatch belongs to the thread that owns the watched socket.
#pragma once

#include <optional>
#include <string>
#include <zmq.hpp>

#include "cli/commands.h"

namespace nuwatch::cli {

struct ClientKeyFlags {
  std::string client_key;  // the client's secret certificate, NAME.key_secret
  std::string server_key;  // the daemon's public certificate, NAME.key
  bool enabled() const { return !client_key.empty() || !server_key.empty(); }
};

void AddClientKeyFlags(CLI::App* command, ClientKeyFlags* flags);

// Makes `socket` a CURVE client. Requires: before it connects. Throws CommandError for one flag
// without the other, an unreadable or malformed key file, or a libzmq without CURVE. Does
// nothing without the flags.
void ApplyClientKeys(const ClientKeyFlags& flags, zmq::socket_t& socket);

// Watches `socket`'s handshakes (zmq_socket_monitor). Requires: created before `socket`
// connects, in `socket`'s context; destroyed before `socket` closes.
class HandshakeWatch {
 public:
  HandshakeWatch(zmq::context_t& context, zmq::socket_t& socket, const ClientKeyFlags& flags);
  // Reads the events so far; a message explaining a failed handshake, if any: a refused key
  // ("nuwatchd refused this client key (ZAP status 400): ..."), a CURVE/plain mismatch, or three
  // connections in a row closed during their handshake without a reason (a wrong server key, or
  // a daemon that closed before this side read the mismatch). A socket of the wrong type is not
  // reported here.
  std::optional<std::string> Failure();
  bool succeeded() const { return succeeded_; }

 private:
  zmq::socket_t monitor_;
  bool with_keys_;
  static constexpr int kUnexplainedClosesBeforeFailing = 3;
  bool succeeded_ = false;
  bool pending_ = false;
  int unexplained_closes_ = 0;
};

}  // namespace nuwatch::cli
