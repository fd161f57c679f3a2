#include "service/curve_auth.h"

#include <pthread.h>
#include <spdlog/spdlog.h>
#include <sys/eventfd.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <cstring>
#include <iterator>
#include <zmq_addon.hpp>

namespace nuwatch {
namespace {

// ZeroMQ RFC 27 (ZAP): the handler's endpoint and version, and the status codes used here.
constexpr const char* kZapEndpoint = "inproc://zeromq.zap.01";
constexpr std::string_view kZapVersion = "1.0";
constexpr std::size_t kCurveKeyBytes = 32;

// The monitor events that say how a handshake ended (zmq_socket_monitor(3), libzmq 4.3).
// Accepted and disconnected, whose value is the connection's descriptor, count the connections.
constexpr int kWatchedEvents =
    ZMQ_EVENT_HANDSHAKE_SUCCEEDED | ZMQ_EVENT_HANDSHAKE_FAILED_NO_DETAIL |
    ZMQ_EVENT_HANDSHAKE_FAILED_PROTOCOL | ZMQ_EVENT_HANDSHAKE_FAILED_AUTH | ZMQ_EVENT_ACCEPTED |
    ZMQ_EVENT_CONNECTED | ZMQ_EVENT_DISCONNECTED;

std::string Frame(const zmq::message_t& message) { return message.to_string(); }

}  // namespace

CurveAuthenticator::CurveAuthenticator(zmq::context_t& context, std::set<std::string> allowed_keys,
                                       DaemonMetrics* metrics)
    : context_(context), metrics_(metrics), zap_(context, zmq::socket_type::rep) {
  {
    MutexLock lock(&mutex_);
    allowed_ = std::move(allowed_keys);
  }
  zap_.set(zmq::sockopt::linger, 0);
  zap_.bind(kZapEndpoint);
  wake_fd_ = ::eventfd(0, EFD_NONBLOCK | EFD_CLOEXEC);
  if (wake_fd_ < 0) throw zmq::error_t();
}

CurveAuthenticator::~CurveAuthenticator() {
  Stop();
  if (wake_fd_ >= 0) ::close(wake_fd_);
}

void CurveAuthenticator::Protect(zmq::socket_t& socket, AuthSocket which,
                                 const CurveKeyPair& server) {
  socket.set(zmq::sockopt::curve_server, true);
  socket.set(zmq::sockopt::curve_secretkey, server.secret_key);
  // A ZAP domain makes libzmq ask the handler for every handshake on the socket, and tells the
  // handler which socket asks.
  socket.set(zmq::sockopt::zap_domain, AuthSocketLabel(which));
  Watch(socket, which, /*client=*/false, /*curve=*/true);
}

void CurveAuthenticator::Gate(zmq::socket_t& socket, AuthSocket which) {
  socket.set(zmq::sockopt::zap_domain, AuthSocketLabel(which));
  Watch(socket, which, /*client=*/false, /*curve=*/false);
}

void CurveAuthenticator::Track(zmq::socket_t& socket, AuthSocket which) {
  Watch(socket, which, /*client=*/true, /*curve=*/false);
}

void CurveAuthenticator::SetConnectionLimit(AuthSocket which, int64_t limit) {
  for (Watched& w : watched_) {
    if (w.which == which && !w.client) w.limit = limit;
  }
}

std::size_t CurveAuthenticator::ConnectionCount(AuthSocket which) const {
  std::size_t count = 0;
  for (const Watched& w : watched_) {
    if (w.which == which && !w.client) count += w.connections.size();
  }
  return count;
}

int64_t CurveAuthenticator::ConnectionLimit(AuthSocket which) const {
  for (const Watched& w : watched_) {
    if (w.which == which && !w.client) return w.limit;
  }
  return 0;
}

void CurveAuthenticator::ProtectClient(zmq::socket_t& socket, AuthSocket which,
                                       const CurveKeyPair& client,
                                       const std::string& server_public_key) {
  socket.set(zmq::sockopt::curve_serverkey, server_public_key);
  socket.set(zmq::sockopt::curve_publickey, client.public_key);
  socket.set(zmq::sockopt::curve_secretkey, client.secret_key);
  Watch(socket, which, /*client=*/true, /*curve=*/true);
}

void CurveAuthenticator::Watch(zmq::socket_t& socket, AuthSocket which, bool client, bool curve) {
  const std::string endpoint = "inproc://nuwatchd-auth-monitor-" + std::to_string(monitors_++);
  if (zmq_socket_monitor(socket.handle(), endpoint.c_str(), kWatchedEvents) != 0) {
    throw zmq::error_t();
  }
  zmq::socket_t monitor(context_, zmq::socket_type::pair);
  monitor.set(zmq::sockopt::linger, 0);
  monitor.connect(endpoint);
  watched_.push_back({which, client, curve, std::move(monitor), 0, {}});
}

void CurveAuthenticator::Start() {
  thread_ = std::thread([this] { Run(); });
}

void CurveAuthenticator::ReplaceAllowed(std::set<std::string> keys) {
  MutexLock lock(&mutex_);
  allowed_ = std::move(keys);
}

void CurveAuthenticator::Connections(AuthSocket which, std::vector<PeerConnection>* out) const {
  MutexLock lock(&mutex_);
  const std::vector<PeerConnection>& listed = connections_[static_cast<std::size_t>(which)];
  out->assign(listed.begin(), listed.end());
}

std::size_t CurveAuthenticator::allowed_count() const {
  MutexLock lock(&mutex_);
  return allowed_.size();
}

bool CurveAuthenticator::Allowed(const std::string& z85_key) const {
  MutexLock lock(&mutex_);
  return allowed_.count(z85_key) > 0;
}

void CurveAuthenticator::Stop() {
  if (!thread_.joinable()) return;
  stop_ = true;
  const uint64_t one = 1;
  [[maybe_unused]] const ssize_t n = ::write(wake_fd_, &one, sizeof one);
  thread_.join();
}

void CurveAuthenticator::Run() {
  pthread_setname_np(pthread_self(), "nuwatchd-auth");
  std::vector<zmq_pollitem_t> items;
  items.push_back({nullptr, wake_fd_, ZMQ_POLLIN, 0});
  items.push_back({zap_.handle(), 0, ZMQ_POLLIN, 0});
  for (Watched& w : watched_) items.push_back({w.monitor.handle(), 0, ZMQ_POLLIN, 0});
  while (!stop_.load()) {
    try {
      zmq::poll(items, std::chrono::milliseconds(-1));
      if (items[1].revents & ZMQ_POLLIN) HandleZapRequest();
      for (std::size_t i = 0; i < watched_.size(); ++i) {
        if (items[2 + i].revents & ZMQ_POLLIN) HandleMonitorEvent(watched_[i]);
      }
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      if (e.num() == ETERM) break;
      spdlog::error("auth: ZeroMQ error: {}", e.what());
    } catch (const std::exception& e) {
      spdlog::error("auth: internal error: {}", e.what());
    }
  }
  for (Watched& w : watched_) w.monitor.close();
  zap_.close();
}

void CurveAuthenticator::TakeFailedHandshakes(AuthSocket which, std::vector<std::string>* out) {
  out->clear();
  if (!failed_handshakes_pending_.load(std::memory_order_acquire)) return;
  MutexLock lock(&mutex_);
  out->swap(failed_handshakes_[static_cast<std::size_t>(which)]);
  bool pending = false;
  for (const auto& listed : failed_handshakes_) pending = pending || !listed.empty();
  failed_handshakes_pending_.store(pending, std::memory_order_release);
}

void CurveAuthenticator::NoteFailedHandshake(const Watched& watched, const std::string& endpoint) {
  if (!watched.client) return;  // a server's peers connect again themselves
  MutexLock lock(&mutex_);
  std::vector<std::string>& listed = failed_handshakes_[static_cast<std::size_t>(watched.which)];
  if (std::find(listed.begin(), listed.end(), endpoint) == listed.end()) listed.push_back(endpoint);
  failed_handshakes_pending_.store(true, std::memory_order_release);
}

void CurveAuthenticator::Refuse(AuthSocket which, AuthRefusal reason, const std::string& detail) {
  metrics_->auth_refused(which, reason).Increment();
  bool& logged = logged_[static_cast<std::size_t>(reason)];
  const auto level = logged ? spdlog::level::debug : spdlog::level::warn;
  spdlog::log(level, "auth: refused a peer on the {} socket: {} ({}){}", AuthSocketLabel(which),
              AuthRefusalLabel(reason), detail,
              logged ? "" : "; further refusals of this kind are logged at debug level");
  logged = true;
}

void CurveAuthenticator::HandleZapRequest() {
  std::vector<zmq::message_t> request;
  (void)zmq::recv_multipart(zap_, std::back_inserter(request), zmq::recv_flags::dontwait);
  if (request.empty()) return;
  // RFC 27: version, request id, domain, address, routing id, mechanism, credentials...
  std::string status = "400";
  std::string status_text = "not admitted";
  std::string user_id;
  const std::string request_id = request.size() > 1 ? Frame(request[1]) : std::string();
  // The connection asking was accepted before its handshake reached here: count it first.
  for (Watched& w : watched_) {
    while (HandleMonitorEvent(w)) {
    }
  }
  if (request.size() < 6 || Frame(request[0]) != kZapVersion) {
    status = "500";
    status_text = "malformed ZAP request";
    spdlog::error("auth: a malformed ZAP request ({} frames); refused", request.size());
  } else {
    const std::string domain = Frame(request[2]);
    const std::string address = Frame(request[3]);
    const std::string mechanism = Frame(request[5]);
    AuthSocket which = AuthSocket::kIngest;
    for (std::size_t i = 0; i < kAuthSocketCount; ++i) {
      if (domain == AuthSocketLabel(static_cast<AuthSocket>(i))) which = static_cast<AuthSocket>(i);
    }
    const Watched* watched = nullptr;
    for (const Watched& w : watched_) {
      if (w.which == which && !w.client && watched == nullptr) watched = &w;
    }
    // Over the limit: the sockets hold more connections than they admit, this one included.
    const std::size_t connections = ConnectionCount(which);
    const int64_t limit = ConnectionLimit(which);
    const bool over_limit = limit > 0 && static_cast<int64_t>(connections) > limit;
    auto refuse_over_limit = [&] {
      status = "400";
      status_text = "too many connections";
      Refuse(
          which,
          which == AuthSocket::kIngest ? AuthRefusal::kSenderLimit : AuthRefusal::kSubscriberLimit,
          std::to_string(connections - 1) + " connections already, the limit is " +
              std::to_string(limit) + "; " + address);
    };
    if (mechanism == "NULL" && watched != nullptr && !watched->curve) {
      // A gated socket without CURVE: only the limit applies.
      if (over_limit) {
        refuse_over_limit();
      } else {
        status = "200";
        status_text = "OK";
      }
    } else if (mechanism != "CURVE" || request.size() < 7 || request[6].size() != kCurveKeyBytes) {
      Refuse(which, AuthRefusal::kWrongMechanism, "mechanism " + mechanism + " from " + address);
    } else {
      char z85[kZ85KeyLength + 1] = {};
      zmq_z85_encode(z85, static_cast<const uint8_t*>(request[6].data()), kCurveKeyBytes);
      const std::string key(z85, kZ85KeyLength);
      if (Allowed(key) && over_limit) {
        refuse_over_limit();
      } else if (Allowed(key)) {
        status = "200";
        status_text = "OK";
        user_id = key;
        spdlog::debug("auth: admitted client key {} from {} on the {} socket", key, address,
                      AuthSocketLabel(which));
      } else {
        Refuse(which, AuthRefusal::kUnknownKey, "client key " + key + " from " + address);
      }
    }
  }
  const std::string_view reply[] = {kZapVersion, request_id, status, status_text, user_id, ""};
  for (std::size_t i = 0; i < std::size(reply); ++i) {
    zap_.send(zmq::buffer(reply[i]),
              i + 1 < std::size(reply) ? zmq::send_flags::sndmore : zmq::send_flags::none);
  }
}

bool CurveAuthenticator::HandleMonitorEvent(Watched& watched) {
  // zmq_socket_monitor(3), version 1: an event frame (16-bit event, 32-bit value, host order)
  // and an endpoint frame.
  std::vector<zmq::message_t> frames;
  if (!zmq::recv_multipart(watched.monitor, std::back_inserter(frames),
                           zmq::recv_flags::dontwait)) {
    return false;
  }
  if (frames.size() != 2 || frames[0].size() < 6) return true;
  uint16_t event = 0;
  uint32_t value = 0;
  std::memcpy(&event, frames[0].data(), sizeof event);
  std::memcpy(&value, static_cast<const char*>(frames[0].data()) + sizeof event, sizeof value);
  const std::string endpoint = Frame(frames[1]);
  // A socket only tracked (Track), a plain SUB, admits no one, but its handshakes can fail (a
  // publisher that requires CURVE): those are counted and said below like any other refusal.
  switch (event) {
    case ZMQ_EVENT_ACCEPTED:
    case ZMQ_EVENT_CONNECTED:
    case ZMQ_EVENT_DISCONNECTED: {
      // A server's connections are accepted, a client's connected; both end as disconnected.
      if (event == (watched.client ? ZMQ_EVENT_ACCEPTED : ZMQ_EVENT_CONNECTED)) break;
      const int fd = static_cast<int>(value);
      const bool opened = event != ZMQ_EVENT_DISCONNECTED;
      if (!watched.client) {
        if (opened) {
          watched.connections.insert(fd);
        } else {
          watched.connections.erase(fd);
        }
      }
      MutexLock lock(&mutex_);
      std::vector<PeerConnection>& listed = connections_[static_cast<std::size_t>(watched.which)];
      std::erase_if(listed, [fd](const PeerConnection& c) { return c.fd == fd; });
      if (opened) listed.push_back({fd, next_generation_++});
      if (!watched.client) {
        if (watched.which == AuthSocket::kPublish) {
          metrics_->publish_connections().Set(static_cast<double>(watched.connections.size()));
        } else if (watched.which == AuthSocket::kIngest) {
          metrics_->ingest_connections().Set(
              static_cast<double>(ConnectionCount(AuthSocket::kIngest)));
        }
      }
      break;
    }
    case ZMQ_EVENT_HANDSHAKE_SUCCEEDED:
      if (watched.curve) metrics_->auth_admitted(watched.which).Increment();
      break;
    case ZMQ_EVENT_HANDSHAKE_FAILED_PROTOCOL:
      NoteFailedHandshake(watched, endpoint);
      if (value == ZMQ_PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH) {
        // RFC 23: both peers must use the same mechanism; the mismatch is told from this side.
        std::string detail;
        if (!watched.client) {
          detail = watched.curve ? "a peer without CURVE on " + endpoint
                                 : "a peer using CURVE on " + endpoint + ", which does not";
        } else if (watched.curve) {
          detail = "the publisher at " + endpoint + " does not use CURVE";
        } else {
          detail = "the publisher at " + endpoint +
                   " uses CURVE: name its public key in auth.subscribe_server_key_file";
        }
        Refuse(watched.which, AuthRefusal::kWrongMechanism, detail);
      } else if (value >= ZMQ_PROTOCOL_ERROR_ZAP_UNSPECIFIED &&
                 value < ZMQ_PROTOCOL_ERROR_WS_UNSPECIFIED) {
        spdlog::error("auth: libzmq rejected this handler's ZAP reply (error 0x{:x})", value);
      } else {
        char code[16];
        std::snprintf(code, sizeof code, "0x%x", value);
        Refuse(watched.which, AuthRefusal::kBadHandshake,
               std::string("ZMTP error ") + code + " on " + endpoint +
                   (value != ZMQ_PROTOCOL_ERROR_ZMTP_CRYPTOGRAPHIC ? ""
                    : watched.client
                        ? ": the publisher does not hold auth.subscribe_server_key_file's key"
                        : ": the client's server key is not this daemon's"));
      }
      break;
    case ZMQ_EVENT_HANDSHAKE_FAILED_AUTH:
      // On a server socket the ZAP handler has counted this refusal already (it made it).
      NoteFailedHandshake(watched, endpoint);
      if (watched.client) {
        Refuse(watched.which, AuthRefusal::kUnknownKey,
               "the publisher at " + endpoint + " does not admit this daemon" +
                   (watched.curve ? "'s key" : "") + " (status " + std::to_string(value) + ")");
      }
      break;
    case ZMQ_EVENT_HANDSHAKE_FAILED_NO_DETAIL:
      Refuse(watched.which, AuthRefusal::kIncompleteHandshake,
             std::string("on ") + endpoint + ": " + zmq_strerror(static_cast<int>(value)));
      break;
    default:
      break;  // MONITOR_STOPPED when the socket closes; nothing to count
  }
  return true;
}

}  // namespace nuwatch
