#include "cli/client_keys.h"

#include <atomic>
#include <cstring>
#include <iterator>
#include <vector>
#include <zmq_addon.hpp>

#include "protocol/curve_keys.h"

namespace nuwatch::cli {

void AddClientKeyFlags(CLI::App* command, ClientKeyFlags* flags) {
  command
      ->add_option("--client-key", flags->client_key,
                   "This client's CURVE secret certificate (NAME.key_secret of nuwatch keygen), "
                   "for a daemon with [auth]; needs --server-key")
      ->type_name("FILE");
  command
      ->add_option("--server-key", flags->server_key,
                   "The daemon's CURVE public certificate (its NAME.key), for a daemon with "
                   "[auth]; needs --client-key")
      ->type_name("FILE");
}

void ApplyClientKeys(const ClientKeyFlags& flags, zmq::socket_t& socket) {
  if (!flags.enabled()) return;
  if (flags.client_key.empty() || flags.server_key.empty()) {
    throw CommandError(std::string(flags.client_key.empty() ? "--server-key" : "--client-key") +
                       " needs " + (flags.client_key.empty() ? "--client-key" : "--server-key") +
                       " too: CURVE needs this client's secret key and the daemon's public key");
  }
  if (!CurveAvailable()) throw CommandError(CurveUnavailableMessage());
  CurveKeyPair client;
  CurveKeyPair server;
  try {
    client = ReadCurveKeyFile(flags.client_key, /*need_secret=*/true);
  } catch (const CurveKeyError& e) {
    throw CommandError(std::string("--client-key: ") + e.what());
  }
  try {
    server = ReadCurveKeyFile(flags.server_key, /*need_secret=*/false);
  } catch (const CurveKeyError& e) {
    throw CommandError(std::string("--server-key: ") + e.what());
  }
  socket.set(zmq::sockopt::curve_serverkey, server.public_key);
  socket.set(zmq::sockopt::curve_publickey, client.public_key);
  socket.set(zmq::sockopt::curve_secretkey, client.secret_key);
}

HandshakeWatch::HandshakeWatch(zmq::context_t& context, zmq::socket_t& socket,
                               const ClientKeyFlags& flags)
    : monitor_(context, zmq::socket_type::pair), with_keys_(flags.enabled()) {
  static std::atomic<int> watches{0};
  const std::string endpoint = "inproc://nuwatch-handshake-" + std::to_string(watches++);
  if (zmq_socket_monitor(socket.handle(), endpoint.c_str(),
                         ZMQ_EVENT_CONNECTED | ZMQ_EVENT_DISCONNECTED |
                             ZMQ_EVENT_HANDSHAKE_SUCCEEDED | ZMQ_EVENT_HANDSHAKE_FAILED_PROTOCOL |
                             ZMQ_EVENT_HANDSHAKE_FAILED_NO_DETAIL |
                             ZMQ_EVENT_HANDSHAKE_FAILED_AUTH) != 0) {
    throw CommandError(std::string("cannot watch the connection: ") + zmq_strerror(zmq_errno()));
  }
  monitor_.set(zmq::sockopt::linger, 0);
  monitor_.connect(endpoint);
}

std::optional<std::string> HandshakeWatch::Failure() {
  while (true) {
    std::vector<zmq::message_t> event;
    if (!zmq::recv_multipart(monitor_, std::back_inserter(event), zmq::recv_flags::dontwait)) {
      return std::nullopt;
    }
    if (event.empty() || event[0].size() < 6) continue;
    uint16_t id = 0;
    uint32_t value = 0;
    std::memcpy(&id, event[0].data(), sizeof id);
    std::memcpy(&value, static_cast<const char*>(event[0].data()) + sizeof id, sizeof value);
    switch (id) {
      case ZMQ_EVENT_CONNECTED:
        pending_ = true;
        break;
      case ZMQ_EVENT_HANDSHAKE_SUCCEEDED:
        succeeded_ = true;
        pending_ = false;
        break;
      case ZMQ_EVENT_HANDSHAKE_FAILED_AUTH:
        return "nuwatchd refused this client key (ZAP status " + std::to_string(value) +
               "): is its public key (the NAME.key beside --client-key) in the daemon's "
               "auth.client_keys?";
      case ZMQ_EVENT_HANDSHAKE_FAILED_PROTOCOL:
        if (value == ZMQ_PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH) {
          return with_keys_ ? std::string(
                                  "the peer does not use CURVE: this daemon has no [auth], "
                                  "so leave out --client-key and --server-key")
                            : std::string(
                                  "the daemon requires CURVE authentication: pass "
                                  "--client-key and --server-key");
        }
        // Another protocol error: a socket of the wrong type (ZMTP checks the pair). Left to
        // the caller's own report (control's timeout), as before there was a watch.
        pending_ = false;
        break;
      case ZMQ_EVENT_HANDSHAKE_FAILED_NO_DETAIL:
      case ZMQ_EVENT_DISCONNECTED:
        if (id == ZMQ_EVENT_DISCONNECTED && !pending_) break;
        pending_ = false;
        // A CURVE server that cannot open the client's HELLO (the server key is not its own)
        // closes the connection without a word; so does a socket of the wrong type. But the
        // server may also close before this side has read why (a mechanism mismatch): ZeroMQ
        // reconnects, so wait for a few attempts before settling for the vaguer reason.
        if (++unexplained_closes_ < kUnexplainedClosesBeforeFailing) break;
        return with_keys_ ? std::string(
                                "the connection closed during the handshake: is "
                                "--server-key this daemon's key, and is this the right "
                                "socket?")
                          : std::string(
                                "the connection closed during the handshake: the daemon may "
                                "require CURVE (pass --client-key and --server-key), or this "
                                "is the wrong kind of socket");
      default:
        break;
    }
  }
}

}  // namespace nuwatch::cli
