// The ingest guard on real loopback TCP connections: the kernel's count of bytes received
// (TCP_INFO) against the frames the test says were read. The frame sizes are checked against the
// framing of ZeroMQ RFC 23 (ZMTP 3.0, §"Framing": a flags byte, then the size in one byte up to
// 255, else in eight) and RFC 26 (CurveZMQ: a frame travels as a MESSAGE command,
// "\x07MESSAGE", an 8-byte nonce and a box of a 16-byte authenticator over a flags byte and the
// frame). The daemon-level check, a hand-written ZMTP peer against nuwatchd, is
// DaemonEndToEnd.AMessageWhoseFramesNeverEndIsCutAndCounted.
#include "service/ingest_guard.h"

#include <arpa/inet.h>
#include <gtest/gtest.h>
#include <netinet/in.h>
#include <sys/socket.h>
#include <unistd.h>

#include <cstring>
#include <string>
#include <thread>
#include <vector>
#include <zmq.hpp>

namespace nuwatch {
namespace {

constexpr int64_t kMaxFrame = 64 << 10;
constexpr std::size_t kFrame = 60000;
constexpr int64_t kMark = 8;

// A connected pair on 127.0.0.1: `client` writes, `server` is the daemon's end.
struct TcpPair {
  int client = -1;
  int server = -1;
  TcpPair() {
    const int listener = ::socket(AF_INET, SOCK_STREAM, 0);
    sockaddr_in address{};
    address.sin_family = AF_INET;
    address.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
    socklen_t length = sizeof address;
    EXPECT_EQ(::bind(listener, reinterpret_cast<sockaddr*>(&address), sizeof address), 0);
    EXPECT_EQ(::listen(listener, 1), 0);
    EXPECT_EQ(::getsockname(listener, reinterpret_cast<sockaddr*>(&address), &length), 0);
    client = ::socket(AF_INET, SOCK_STREAM, 0);
    EXPECT_EQ(::connect(client, reinterpret_cast<sockaddr*>(&address), sizeof address), 0);
    server = ::accept(listener, nullptr, nullptr);
    EXPECT_GE(server, 0);
    ::close(listener);
  }
  ~TcpPair() {
    ::close(client);
    ::close(server);
  }
  // The client sends `frames` frames of kFrame bytes (header and body, as RFC 23); the server end
  // reads them all, as libzmq would, and says so to `guard` only when `counted`.
  void Send(int frames, IngestConnectionGuard& guard, bool counted) {
    const std::string header = std::string("\x03\x00\x00\x00\x00\x00\x00\xea\x60", 9);  // MORE|LONG
    const std::string frame = header + std::string(kFrame, 'x');
    std::thread writer([&] {
      for (int i = 0; i < frames; ++i) {
        std::size_t done = 0;
        while (done < frame.size()) {
          const ssize_t n = ::send(client, frame.data() + done, frame.size() - done, MSG_NOSIGNAL);
          ASSERT_GT(n, 0) << std::strerror(errno);
          done += static_cast<std::size_t>(n);
        }
      }
    });
    std::vector<char> buffer(1 << 16);
    std::size_t total = 0;
    while (total < frame.size() * static_cast<std::size_t>(frames)) {
      const ssize_t n = ::recv(server, buffer.data(), buffer.size(), 0);
      ASSERT_GT(n, 0);
      total += static_cast<std::size_t>(n);
    }
    writer.join();
    if (counted) {
      for (int i = 0; i < frames; ++i) guard.CountFrame(server, kFrame, false);
    }
  }
  // True once the server end has sent its FIN (the guard's shutdown).
  bool ClosedByServer() const {
    char byte;
    return ::recv(client, &byte, 1, MSG_DONTWAIT) == 0;
  }
};

TEST(IngestConnectionGuard, WireBytesFollowZmtpFramingWithAndWithoutCurve) {
  // RFC 23: a one-byte size up to 255, then eight bytes.
  EXPECT_EQ(IngestConnectionGuard::WireBytes(0, false), 2);
  EXPECT_EQ(IngestConnectionGuard::WireBytes(255, false), 2 + 255);
  EXPECT_EQ(IngestConnectionGuard::WireBytes(256, false), 9 + 256);
  // RFC 26: the command's body is 8 + 8 + 16 + 1 bytes larger than the frame.
  EXPECT_EQ(IngestConnectionGuard::WireBytes(0, true), 2 + 33);
  EXPECT_EQ(IngestConnectionGuard::WireBytes(222, true), 2 + 255);
  EXPECT_EQ(IngestConnectionGuard::WireBytes(223, true), 9 + 256);
}

// The framing checked against libzmq itself: two-frame messages of several sizes go to the
// daemon's end, a PULL socket a PUSH socket connected to (ingest.endpoints), or a SUB socket
// connected to a PUB socket (ingest.subscribe). Once every message is read, and each frame counted
// under its ZMQ_SRCFD, nothing is left unexplained: the kernel's count of bytes received equals
// the sum of WireBytes, to the byte, with and without CURVE, on the accepting and on the
// connecting side.
TEST(IngestConnectionGuard, WireBytesMatchWhatLibzmqSends) {
  for (const bool subscribe : {false, true}) {
    for (const bool curve : {false, true}) {
      const std::string label =
          std::string(subscribe ? "SUB" : "PULL") + (curve ? " with CURVE" : " without CURVE");
      zmq::context_t context;
      // The daemon's end, and the sender's end; the server (bind) side holds the CURVE secret.
      zmq::socket_t daemon_end(context, subscribe ? zmq::socket_type::sub : zmq::socket_type::pull);
      zmq::socket_t sender(context, subscribe ? zmq::socket_type::pub : zmq::socket_type::push);
      zmq::socket_t& server = subscribe ? sender : daemon_end;
      zmq::socket_t& client = subscribe ? daemon_end : sender;
      if (subscribe) {
        daemon_end.set(zmq::sockopt::subscribe, "");
        sender.set(zmq::sockopt::sndhwm, 0);  // a PUB drops at its mark: none here
      }
      if (curve) {
        char server_public[41], server_secret[41], client_public[41], client_secret[41];
        ASSERT_EQ(zmq_curve_keypair(server_public, server_secret), 0);
        ASSERT_EQ(zmq_curve_keypair(client_public, client_secret), 0);
        server.set(zmq::sockopt::curve_server, true);
        server.set(zmq::sockopt::curve_secretkey, std::string(server_secret));
        client.set(zmq::sockopt::curve_serverkey, std::string(server_public));
        client.set(zmq::sockopt::curve_publickey, std::string(client_public));
        client.set(zmq::sockopt::curve_secretkey, std::string(client_secret));
      }
      server.bind("tcp://127.0.0.1:*");
      client.connect(server.get(zmq::sockopt::last_endpoint));
      daemon_end.set(zmq::sockopt::rcvtimeo, 50);
      IngestConnectionGuard guard(kMaxFrame, kMark);
      auto now = IngestConnectionGuard::Clock::now();
      int fd = -1;
      // Reads one message, counting its frames; its first frame, or "" when none came in 50 ms.
      auto receive = [&]() -> std::string {
        zmq::message_t frame;
        if (!daemon_end.recv(frame)) return "";
        std::string first = frame.to_string();
        while (true) {
          fd = zmq_msg_get(frame.handle(), ZMQ_SRCFD);
          guard.CountFrame(fd, frame.size(), curve);
          if (!frame.more()) break;
          if (!daemon_end.recv(frame)) ADD_FAILURE() << label << ": a message's frames parted";
        }
        return first;
      };
      // A PUB sends nothing until the subscription has reached it: warm up until a message comes,
      // then read up to a marker sent after it, so that nothing sent before is still on its way.
      for (int tries = 0; tries < 200 && receive().empty(); ++tries) {
        sender.send(zmq::str_buffer("warm"), zmq::send_flags::sndmore);
        sender.send(zmq::str_buffer("up"));
      }
      sender.send(zmq::str_buffer("marker"), zmq::send_flags::sndmore);
      sender.send(zmq::str_buffer("."));
      for (int tries = 0; tries < 200 && receive() != "marker"; ++tries) {
      }
      ASSERT_GE(fd, 0) << label;
      const std::vector<IngestConnectionGuard::Connection> live = {{fd, 1, curve}};
      EXPECT_TRUE(guard.Check(live, now, true).empty());  // first seen: the handshake is behind
      const std::size_t sizes[] = {0, 100, 222, 223, 255, 256, 5000, 60000};
      for (int round = 0; round < 20; ++round) {
        for (const std::size_t size : sizes) {
          sender.send(zmq::buffer(std::string("pump-a")), zmq::send_flags::sndmore);
          sender.send(zmq::buffer(std::string(size, 'x')));
        }
      }
      int read = 0;
      while (read < 20 * static_cast<int>(std::size(sizes)) && !receive().empty()) ++read;
      ASSERT_EQ(read, 20 * static_cast<int>(std::size(sizes))) << label;
      EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(100), true).empty());
      EXPECT_EQ(guard.last_unread_bytes(fd), 0) << label;
      // And the count can fail: frames taken as the other framing leave 33 bytes a frame over
      // or under, which the same check shows.
      if (!curve) {
        sender.send(zmq::buffer(std::string("pump-a")), zmq::send_flags::sndmore);
        sender.send(zmq::buffer(std::string(100, 'x')));
        zmq::message_t frame;
        ASSERT_TRUE(daemon_end.recv(frame));
        guard.CountFrame(fd, frame.size(), /*curve=*/true);
        ASSERT_TRUE(daemon_end.recv(frame));
        guard.CountFrame(fd, frame.size(), /*curve=*/true);
        EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(200), true).empty());
        EXPECT_EQ(guard.last_unread_bytes(fd), -2 * 33) << label;
      }
    }
  }
}

TEST(IngestConnectionGuard, AConnectionWhoseFramesWereAllReadIsLeftAlone) {
  TcpPair pair;
  IngestConnectionGuard guard(kMaxFrame, kMark);
  const std::vector<IngestConnectionGuard::Connection> live = {{pair.server, 1}};
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check(live, now, true).empty());  // first seen
  pair.Send(600, guard, /*counted=*/true);            // 36 MB, all read as whole messages
  EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(100), true).empty());
  EXPECT_FALSE(pair.ClosedByServer());
}

TEST(IngestConnectionGuard, BytesNoReadFrameExplainsPastTheAllowanceCutTheConnection) {
  TcpPair pair;
  IngestConnectionGuard guard(kMaxFrame, kMark);
  const std::vector<IngestConnectionGuard::Connection> live = {{pair.server, 1}};
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check(live, now, true).empty());
  // Under the allowance (two frames of the limit, the receive buffer, 1 MiB): left alone.
  pair.Send(10, guard, /*counted=*/false);  // 600 kB held
  EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(100), true).empty());
  // 36 MB that no whole message explains: cut, once.
  pair.Send(600, guard, /*counted=*/false);
  const auto cuts = guard.Check(live, now + std::chrono::milliseconds(200), true);
  ASSERT_EQ(cuts.size(), 1u);
  EXPECT_EQ(cuts[0].peer.rfind("127.0.0.1:", 0), 0u) << cuts[0].peer;
  // Every byte since it was first seen: the kernel counts exactly what was sent.
  EXPECT_EQ(cuts[0].unread_bytes, int64_t{610} * static_cast<int64_t>(kFrame + 9));
  EXPECT_GE(cuts[0].allowance_bytes, 2 * kMaxFrame + IngestConnectionGuard::kSlackBytes);
  EXPECT_TRUE(pair.ClosedByServer());
  EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(300), true).empty());
}

// Between drained checks up to the mark of whole messages may wait in ZeroMQ's queue, each of two
// frames at most: the allowance counts them, and bytes past even that are cut at once.
TEST(IngestConnectionGuard, WhileWholeMessagesMayWaitTheAllowanceCountsAFullQueue) {
  TcpPair pair;
  // A fixed receive buffer (512 KiB as the kernel doubles it): autotuning on loopback may grow it
  // to tens of MB, which would blur the two allowances.
  const int buffer = 256 << 10;
  ASSERT_EQ(::setsockopt(pair.server, SOL_SOCKET, SO_RCVBUF, &buffer, sizeof buffer), 0);
  IngestConnectionGuard guard(kMaxFrame, /*receive_mark=*/64);
  const std::vector<IngestConnectionGuard::Connection> live = {{pair.server, 1}};
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check(live, now, false).empty());
  pair.Send(85, guard, /*counted=*/false);  // 5.1 MB: under 65 messages of two 64 KiB frames
  EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(100), false).empty());
  EXPECT_FALSE(pair.ClosedByServer());
  // Drained, no whole message is left to explain them.
  const auto cuts = guard.Check(live, now + std::chrono::milliseconds(200), true);
  ASSERT_EQ(cuts.size(), 1u);
  EXPECT_GT(cuts[0].unread_bytes, cuts[0].allowance_bytes);
  EXPECT_TRUE(pair.ClosedByServer());

  TcpPair flooded;
  ASSERT_EQ(::setsockopt(flooded.server, SOL_SOCKET, SO_RCVBUF, &buffer, sizeof buffer), 0);
  const std::vector<IngestConnectionGuard::Connection> other = {{flooded.server, 2}};
  EXPECT_TRUE(guard.Check(other, now, false).empty());
  flooded.Send(300, guard, /*counted=*/false);  // 18 MB: more than a full queue
  EXPECT_EQ(guard.Check(other, now + std::chrono::milliseconds(100), false).size(), 1u);
  EXPECT_TRUE(flooded.ClosedByServer());
}

TEST(IngestConnectionGuard, WithoutAMarkOnlyADrainedCheckCuts) {
  TcpPair pair;
  IngestConnectionGuard guard(kMaxFrame, /*receive_mark=*/0);
  const std::vector<IngestConnectionGuard::Connection> live = {{pair.server, 1}};
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check(live, now, false).empty());
  pair.Send(600, guard, /*counted=*/false);
  EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(100), false).empty());
  EXPECT_EQ(guard.Check(live, now + std::chrono::milliseconds(200), true).size(), 1u);
}

TEST(IngestConnectionGuard, AReusedDescriptorStartsAfresh) {
  TcpPair pair;
  IngestConnectionGuard guard(kMaxFrame, kMark);
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check({{pair.server, 1}}, now, true).empty());
  pair.Send(600, guard, /*counted=*/false);
  // The same descriptor under a new generation (another connection, as the monitor reported):
  // what came before is not held against it.
  EXPECT_TRUE(guard.Check({{pair.server, 2}}, now + std::chrono::milliseconds(100), true).empty());
  EXPECT_TRUE(guard.Check({{pair.server, 2}}, now + std::chrono::milliseconds(200), true).empty());
  EXPECT_FALSE(pair.ClosedByServer());
}

// Shedding (ingest.max_unread_bytes): over the budget, the connections holding most are brought
// down to a common level whose quotas sum to the total less half the budget ("water-filling", the
// textbook allocation, here from memory); one under that level keeps everything it holds.
TEST(IngestConnectionGuard, OverTheBudgetTheConnectionsHoldingMostShedDownToACommonLevel) {
  TcpPair heavy, medium, light;
  IngestConnectionGuard guard(kMaxFrame, /*receive_mark=*/1000);
  const std::vector<IngestConnectionGuard::Connection> live = {
      {heavy.server, 1}, {medium.server, 2}, {light.server, 3}};
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check(live, now, false).empty());  // first seen
  heavy.Send(100, guard, /*counted=*/false);
  medium.Send(30, guard, /*counted=*/false);
  light.Send(2, guard, /*counted=*/false);
  // Not drained, a mark of 1000: no cut, all of it is held.
  EXPECT_TRUE(guard.Check(live, now + std::chrono::milliseconds(20), false).empty());
  const int64_t frame = static_cast<int64_t>(kFrame) + 9;
  EXPECT_EQ(guard.last_unread_bytes(heavy.server), 100 * frame);
  EXPECT_EQ(guard.last_total_unread_bytes(), 132 * frame);

  EXPECT_TRUE(guard.PlanShedding(0).empty());            // no budget
  EXPECT_TRUE(guard.PlanShedding(132 * frame).empty());  // within it
  EXPECT_FALSE(guard.shedding());

  const int64_t budget = 4 << 20;
  const auto quotas = guard.PlanShedding(budget);
  ASSERT_EQ(quotas.size(), 2u);
  EXPECT_EQ(quotas[0].unread_bytes, 100 * frame);
  EXPECT_EQ(quotas[1].unread_bytes, 30 * frame);
  const int64_t excess = 132 * frame - budget / 2;
  EXPECT_GE(quotas[0].quota_bytes + quotas[1].quota_bytes, excess);
  EXPECT_LT(quotas[0].quota_bytes + quotas[1].quota_bytes, excess + 2);  // the level's rounding
  // Both come down to the same level, above what the light one holds.
  const int64_t level = quotas[0].unread_bytes - quotas[0].quota_bytes;
  EXPECT_EQ(quotas[1].unread_bytes - quotas[1].quota_bytes, level);
  EXPECT_GT(level, 2 * frame);
  EXPECT_TRUE(guard.shedding());

  // The light connection loses nothing; the others shed messages until their quota is used up.
  EXPECT_FALSE(guard.Shed(light.server, frame));
  EXPECT_FALSE(guard.Shed(-1, frame));
  int shed_heavy = 0;
  while (guard.Shed(heavy.server, frame)) ++shed_heavy;
  EXPECT_EQ(shed_heavy, (quotas[0].quota_bytes + frame - 1) / frame);
  EXPECT_TRUE(guard.shedding());  // the medium one's quota is left
  int shed_medium = 0;
  while (guard.Shed(medium.server, frame)) ++shed_medium;
  EXPECT_EQ(shed_medium, (quotas[1].quota_bytes + frame - 1) / frame);
  EXPECT_FALSE(guard.shedding());

  // A new plan replaces the old; StopShedding clears it.
  EXPECT_EQ(guard.PlanShedding(budget).size(), 2u);
  guard.StopShedding();
  EXPECT_FALSE(guard.shedding());
  EXPECT_FALSE(guard.Shed(heavy.server, frame));
  // None of them was cut.
  EXPECT_FALSE(heavy.ClosedByServer());
  EXPECT_FALSE(medium.ClosedByServer());
}

// A connection that is cut frees what its quota would have shed: the quota goes with it.
TEST(IngestConnectionGuard, AConnectionThatGoesTakesItsQuotaWithIt) {
  TcpPair heavy;
  IngestConnectionGuard guard(kMaxFrame, /*receive_mark=*/1000);
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check({{heavy.server, 1}}, now, false).empty());
  heavy.Send(50, guard, /*counted=*/false);
  EXPECT_TRUE(guard.Check({{heavy.server, 1}}, now + std::chrono::milliseconds(20), false).empty());
  ASSERT_EQ(guard.PlanShedding(1 << 20).size(), 1u);
  EXPECT_TRUE(guard.shedding());
  // Gone from the monitor's list (closed by its peer).
  EXPECT_TRUE(guard.Check({}, now + std::chrono::milliseconds(40), false).empty());
  EXPECT_FALSE(guard.shedding());
  EXPECT_EQ(guard.last_total_unread_bytes(), 0);
}

TEST(IngestConnectionGuard, AUnixDomainConnectionIsNotChecked) {
  int ends[2];
  ASSERT_EQ(::socketpair(AF_UNIX, SOCK_STREAM, 0, ends), 0);
  IngestConnectionGuard guard(kMaxFrame, kMark);
  auto now = IngestConnectionGuard::Clock::now();
  EXPECT_TRUE(guard.Check({{ends[1], 1}}, now, true).empty());
  // No byte of it counted as read; a socket pair's buffer takes 16 KiB without blocking.
  const std::string bytes(16 << 10, 'x');
  ASSERT_EQ(::send(ends[0], bytes.data(), bytes.size(), 0), static_cast<ssize_t>(bytes.size()));
  EXPECT_TRUE(guard.Check({{ends[1], 1}}, now + std::chrono::milliseconds(100), true).empty());
  ::close(ends[0]);
  ::close(ends[1]);
}

}  // namespace
}  // namespace nuwatch
