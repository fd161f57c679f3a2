#include "cli/daemon_metrics.h"

#include <boost/archive/iterators/base64_from_binary.hpp>
#include <boost/archive/iterators/transform_width.hpp>
#include <boost/asio/connect.hpp>
#include <boost/asio/io_context.hpp>
#include <boost/asio/ip/tcp.hpp>
#include <boost/beast/core/flat_buffer.hpp>
#include <boost/beast/core/tcp_stream.hpp>
#include <boost/beast/http.hpp>
#include <cmath>

#include "cli/cli_util.h"
#include "cli/commands.h"
#include "formats/prometheus_text.h"
#include "settings/secret_file.h"

namespace nuwatch::cli {
namespace {

namespace asio = boost::asio;
namespace beast = boost::beast;
namespace http = beast::http;

// RFC 4648 base64 with padding, as RFC 7617's credentials need. Boost.Serialization's
// header-only iterators do the encoding (6 bits per output character); they leave the padding to
// the caller.
std::string Base64(const std::string& bytes) {
  using Encoder = boost::archive::iterators::base64_from_binary<
      boost::archive::iterators::transform_width<std::string::const_iterator, 6, 8>>;
  std::string out(Encoder(bytes.begin()), Encoder(bytes.end()));
  out.append((3 - bytes.size() % 3) % 3, '=');
  return out;
}

// A /metrics page grows with the streams tracked (limits.max_streams bounds it); Beast's default
// limit of 8 MB for a response body could be reached by a large daemon.
constexpr std::uint64_t kMaxExpositionBytes = std::uint64_t{256} << 20;

}  // namespace

double DaemonCounters::rejected_total() const {
  double total = 0;
  for (const auto& [reason, count] : rejected_by_reason) total += count;
  return total;
}

std::map<std::string, double> RejectedSince(const DaemonCounters& before,
                                            const DaemonCounters& after) {
  std::map<std::string, double> grown;
  for (const auto& [reason, now] : after.rejected_by_reason) {
    const auto it = before.rejected_by_reason.find(reason);
    const double then = it == before.rejected_by_reason.end() ? 0 : it->second;
    const double delta = now >= then ? now - then : now;
    if (delta > 0) grown[reason] = delta;
  }
  return grown;
}

std::string FormatByReason(const std::map<std::string, double>& by_reason) {
  std::string text;
  for (const auto& [reason, count] : by_reason) {
    if (!text.empty()) text += ", ";
    text += reason + " " + FormatNumber(count);
  }
  return text;
}

MetricsClient::MetricsClient(std::string host_port, std::string user,
                             const std::string& password_file)
    : host_port_(std::move(host_port)) {
  const std::size_t colon = host_port_.rfind(':');
  if (colon == std::string::npos || colon == 0 || colon + 1 == host_port_.size() ||
      host_port_.find("://") != std::string::npos) {
    throw CommandError("--metrics: '" + host_port_ +
                       "' is not HOST:PORT (the daemon's metrics.listen, e.g. 127.0.0.1:9464)");
  }
  host_ = host_port_.substr(0, colon);
  port_ = host_port_.substr(colon + 1);
  if (host_.size() > 2 && host_.front() == '[' && host_.back() == ']')
    host_ = host_.substr(1, host_.size() - 2);
  if (user.empty() != password_file.empty()) {
    throw CommandError(std::string(user.empty() ? "--metrics-password-file" : "--metrics-user") +
                       " needs " + (user.empty() ? "--metrics-user" : "--metrics-password-file") +
                       " too: basic authentication needs the user and the password");
  }
  if (user.empty()) return;
  if (user.find(':') != std::string::npos)
    throw CommandError("--metrics-user: a user name may not hold ':' (RFC 7617)");
  std::string password;
  try {
    password = ReadSecretFirstLine(password_file);
  } catch (const SecretFileError& error) {
    throw CommandError(std::string("--metrics-password-file: ") + error.what());
  }
  authorization_ = "Basic " + Base64(user + ":" + password);
}

DaemonCounters MetricsClient::Read(std::chrono::milliseconds timeout) const {
  asio::io_context io;
  asio::ip::tcp::resolver resolver(io);
  beast::tcp_stream stream(io);
  beast::flat_buffer buffer;
  http::request<http::empty_body> request(http::verb::get, "/metrics", 11);
  request.set(http::field::host, host_port_);
  request.set(http::field::user_agent, "nuwatch-send");
  if (!authorization_.empty()) request.set(http::field::authorization, authorization_);
  http::response_parser<http::string_body> parser;
  parser.body_limit(kMaxExpositionBytes);

  // Asynchronous steps run to completion here: only they honour tcp_stream's deadline, which
  // covers connecting, writing and reading together.
  beast::error_code failure;
  std::string failed_step;
  const auto fail = [&](const beast::error_code& error, const char* step) {
    failure = error;
    failed_step = step;
  };
  resolver.async_resolve(
      host_, port_, [&](beast::error_code error, asio::ip::tcp::resolver::results_type results) {
        if (error) return fail(error, "resolving the host");
        stream.expires_after(timeout);
        stream.async_connect(results, [&](beast::error_code error, const auto&) {
          if (error) return fail(error, "connecting");
          http::async_write(stream, request, [&](beast::error_code error, std::size_t) {
            if (error) return fail(error, "sending the request");
            http::async_read(stream, buffer, parser, [&](beast::error_code error, std::size_t) {
              if (error) return fail(error, "reading the answer");
            });
          });
        });
      });
  io.run();
  beast::error_code ignored;
  stream.socket().shutdown(asio::ip::tcp::socket::shutdown_both, ignored);
  if (failure) {
    const bool timed_out = failure == beast::error::timeout;
    throw CommandError(
        "--metrics: " + host_port_ + ": " + failed_step +
        " failed: " + (timed_out ? "no answer within the time allowed" : failure.message()) +
        (failed_step == "connecting" ? " (is nuwatchd's metrics.listen this?)" : ""));
  }
  const auto& response = parser.get();
  if (response.result() == http::status::unauthorized) {
    throw CommandError("--metrics: " + host_port_ + " answered 401 Unauthorized: " +
                       (authorization_.empty()
                            ? "it requires basic authentication; give --metrics-user and "
                              "--metrics-password-file"
                            : "the daemon refused --metrics-user and the password"));
  }
  if (response.result() != http::status::ok) {
    throw CommandError("--metrics: " + host_port_ + "/metrics answered " +
                       std::to_string(response.result_int()) + " " +
                       std::string(response.reason()));
  }
  DaemonCounters counters;
  try {
    counters.rejected_by_reason =
        SamplesByLabel(response.body(), "nuwatch_rejected_messages_total", "reason");
    for (const auto& [stream_key, vectors] :
         SamplesByLabel(response.body(), "nuwatch_vectors_total", "stream"))
      counters.vectors_processed += vectors;
  } catch (const ExpositionError& e) {
    throw CommandError("--metrics: " + host_port_ + "/metrics: " + e.what());
  }
  if (counters.rejected_by_reason.empty()) {
    throw CommandError("--metrics: " + host_port_ +
                       "/metrics has no nuwatch_rejected_messages_total: is it nuwatchd's?");
  }
  return counters;
}

}  // namespace nuwatch::cli
