#include "service/ingest_guard.h"

#include <arpa/inet.h>
#include <linux/tcp.h>  // tcpi_bytes_received: glibc's <netinet/tcp.h> stops before it
#include <sys/socket.h>

#include <algorithm>
#include <cstring>
#include <functional>

namespace nuwatch {
namespace {

// A ZMTP frame's header: a flags byte, then its size in one byte up to 255, else in eight.
int64_t FrameHeaderBytes(std::size_t body) { return body <= 255 ? 2 : 9; }

std::string PeerText(const sockaddr_storage& peer) {
  char host[INET6_ADDRSTRLEN] = "?";
  unsigned port = 0;
  if (peer.ss_family == AF_INET) {
    const auto& in = reinterpret_cast<const sockaddr_in&>(peer);
    ::inet_ntop(AF_INET, &in.sin_addr, host, sizeof host);
    port = ntohs(in.sin_port);
  } else if (peer.ss_family == AF_INET6) {
    const auto& in6 = reinterpret_cast<const sockaddr_in6&>(peer);
    ::inet_ntop(AF_INET6, &in6.sin6_addr, host, sizeof host);
    port = ntohs(in6.sin6_port);
    return std::string("[") + host + "]:" + std::to_string(port);
  }
  return std::string(host) + ":" + std::to_string(port);
}

bool SamePeer(const sockaddr_storage& a, socklen_t a_length, const sockaddr_storage& b,
              socklen_t b_length) {
  return a_length == b_length && std::memcmp(&a, &b, a_length) == 0;
}

}  // namespace

IngestConnectionGuard::IngestConnectionGuard(int64_t max_frame_bytes, int64_t receive_mark)
    : max_frame_bytes_(max_frame_bytes), receive_mark_(receive_mark) {}

int64_t IngestConnectionGuard::WireBytes(std::size_t size, bool curve) {
  // CURVE (RFC 26): a MESSAGE command, "\x07MESSAGE" (8), a short nonce (8), then the box: a
  // 16-byte authenticator over a flags byte and the frame.
  const std::size_t body = curve ? size + 33 : size;
  return FrameHeaderBytes(body) + static_cast<int64_t>(body);
}

int64_t IngestConnectionGuard::CountFrame(int fd, std::size_t size, bool curve) {
  if (fd < 0) return 0;
  const auto index = static_cast<std::size_t>(fd);
  if (index >= delivered_.size()) delivered_.resize(std::max<std::size_t>(index + 1, 64) * 2);
  const int64_t wire = WireBytes(size, curve);
  delivered_[index] += wire;
  return wire;
}

int64_t IngestConnectionGuard::Delivered(int fd) const {
  const auto index = static_cast<std::size_t>(fd);
  return index < delivered_.size() ? delivered_[index] : 0;
}

int64_t IngestConnectionGuard::last_unread_bytes(int fd) const {
  const auto it = tracked_.find(fd);
  return it == tracked_.end() ? 0 : it->second.last_unread;
}

std::vector<IngestConnectionGuard::Cut> IngestConnectionGuard::Check(
    const std::vector<Connection>& live, Clock::time_point now, bool drained) {
  // Allocates nothing in the steady state (design.md): entries are updated in place and the
  // connections not listed any more erased afterwards; only a new connection or a cut allocates.
  std::vector<Cut> cuts;
  ++check_;
  total_unread_ = 0;
  for (const Connection& connection : live) {
    const int fd = connection.fd;
    tcp_info info{};
    socklen_t info_length = sizeof info;
    sockaddr_storage peer{};
    socklen_t peer_length = sizeof peer;
    // Not TCP (ipc://), or closed already: nothing to check.
    if (::getsockopt(fd, IPPROTO_TCP, TCP_INFO, &info, &info_length) != 0 ||
        info_length < offsetof(tcp_info, tcpi_bytes_received) + sizeof info.tcpi_bytes_received ||
        ::getpeername(fd, reinterpret_cast<sockaddr*>(&peer), &peer_length) != 0) {
      continue;
    }
    const auto received = static_cast<int64_t>(info.tcpi_bytes_received);
    auto it = tracked_.find(fd);
    if (it == tracked_.end()) it = tracked_.emplace(fd, Tracked{}).first;
    Tracked& tracked = it->second;
    tracked.check = check_;
    if (tracked.generation != connection.generation ||
        !SamePeer(tracked.peer, tracked.peer_length, peer, peer_length)) {
      // First seen: what it sent before is taken as read. Its messages read since, if any, were
      // counted under this descriptor too, so this errs towards leaving it alone.
      tracked = Tracked{};
      tracked.check = check_;
      tracked.generation = connection.generation;
      tracked.curve = connection.curve;
      tracked.peer = peer;
      tracked.peer_length = peer_length;
      tracked.received_at_start = received;
      tracked.delivered_at_start = Delivered(fd);
      tracked.first_seen = now;
      continue;
    }
    if (!tracked.cut) {
      const int64_t unread =
          (received - tracked.received_at_start) - (Delivered(fd) - tracked.delivered_at_start);
      tracked.last_unread = unread;
      total_unread_ += std::max<int64_t>(unread, 0);
      int receive_buffer = 0;
      socklen_t buffer_length = sizeof receive_buffer;
      if (::getsockopt(fd, SOL_SOCKET, SO_RCVBUF, &receive_buffer, &buffer_length) != 0) {
        receive_buffer = 0;
      }
      const double hours = std::chrono::duration<double>(now - tracked.first_seen).count() / 3600;
      // A message the protocol admits: two frames of the limit at most.
      const int64_t message =
          2 * WireBytes(static_cast<std::size_t>(max_frame_bytes_), tracked.curve);
      // Not drained: up to the mark of whole messages may wait too, and one more that libzmq's
      // decoder holds while the queue is full (no mark: no bound to check).
      const int64_t messages = drained ? 1 : receive_mark_ > 0 ? receive_mark_ + 2 : 0;
      const int64_t allowance = messages * message + receive_buffer + kSlackBytes +
                                static_cast<int64_t>(hours * kDriftBytesPerHour);
      if (messages > 0 && unread > allowance) {
        // libzmq sees the end of the stream, closes the connection and drops what it held of it.
        ::shutdown(fd, SHUT_RDWR);
        tracked.cut = true;
        cuts.push_back({PeerText(peer), unread, allowance});
        total_unread_ -= std::max<int64_t>(unread, 0);
        quota_left_ -= tracked.quota;
        tracked.quota = 0;
      }
    }
  }
  std::erase_if(tracked_, [this](const auto& entry) {
    if (entry.second.check == check_) return false;
    quota_left_ -= entry.second.quota;
    return true;
  });
  return cuts;
}

std::vector<IngestConnectionGuard::Quota> IngestConnectionGuard::PlanShedding(
    int64_t max_unread_bytes, int64_t held_bytes) {
  StopShedding();
  std::vector<Quota> quotas;
  const int64_t total = total_unread_ + std::max<int64_t>(held_bytes, 0);
  if (max_unread_bytes <= 0 || total <= max_unread_bytes) return quotas;
  const auto eligible = [this](const Tracked& t) {
    return t.check == check_ && !t.cut && t.last_unread > 0;
  };
  levels_.clear();
  for (const auto& [fd, tracked] : tracked_) {
    if (eligible(tracked)) levels_.push_back(tracked.last_unread);
  }
  if (levels_.empty()) return quotas;
  std::sort(levels_.begin(), levels_.end(), std::greater<>());
  // The level L to which the largest are brought: sum over them of (unread - L) = the excess
  // (L = 0, all they hold, when what is held elsewhere exceeds the budget on its own).
  const int64_t excess = total - max_unread_bytes / 2;
  int64_t sum = 0;
  int64_t level = 0;
  for (std::size_t k = 0; k < levels_.size(); ++k) {
    sum += levels_[k];
    level = (sum - excess) / static_cast<int64_t>(k + 1);
    if (k + 1 == levels_.size() || level >= levels_[k + 1]) break;
  }
  level = std::max<int64_t>(level, 0);
  for (auto& [fd, tracked] : tracked_) {
    if (!eligible(tracked) || tracked.last_unread <= level) continue;
    tracked.quota = tracked.last_unread - level;
    quota_left_ += tracked.quota;
    quotas.push_back({PeerText(tracked.peer), tracked.last_unread, tracked.quota});
  }
  std::sort(quotas.begin(), quotas.end(),
            [](const Quota& a, const Quota& b) { return a.unread_bytes > b.unread_bytes; });
  return quotas;
}

bool IngestConnectionGuard::ShedFromQuota(int fd, int64_t wire_bytes) {
  const auto it = tracked_.find(fd);
  if (it == tracked_.end() || it->second.quota <= 0) return false;
  const int64_t used = std::min(it->second.quota, wire_bytes);
  it->second.quota -= used;
  quota_left_ -= used;
  return true;
}

void IngestConnectionGuard::StopShedding() {
  for (auto& [fd, tracked] : tracked_) tracked.quota = 0;
  quota_left_ = 0;
}

}  // namespace nuwatch
