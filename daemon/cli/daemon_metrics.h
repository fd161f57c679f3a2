// The client side of nuwatchd's metrics endpoint for `nuwatch send --metrics`: one GET /metrics
// over HTTP/1.1 (Boost.Beast), with the optional basic authentication of metrics.basic_auth_user
// (RFC 7617), and the two readings send takes from it: the rejection counters by reason
// (nuwatch_rejected_messages_total, PROTOCOL.md §8) and the vectors processed
// (nuwatch_vectors_total over every stream).
// Thread safety: reentrant; a MetricsClient is used by one thread.
#pragma once

#include <chrono>
#include <map>
#include <string>

namespace nuwatch::cli {

// The daemon's counters at one moment.
struct DaemonCounters {
  std::map<std::string, double> rejected_by_reason;  // every reason the daemon exposes
  double vectors_processed = 0;                      // summed over the streams exposed
  double rejected_total() const;
};

// The per-reason increase from `before` to `after`, only the reasons that grew (a counter that
// went down, as after a daemon restart, counts from 0: Prometheus' reading of a reset).
std::map<std::string, double> RejectedSince(const DaemonCounters& before,
                                            const DaemonCounters& after);

// "bad_json 3, dims_mismatch 1" (reasons in name order); "" when empty.
std::string FormatByReason(const std::map<std::string, double>& by_reason);

class MetricsClient {
 public:
  // `host_port` is HOST:PORT ([V6ADDRESS]:PORT); `user` empty: no authentication, else
  // `password_file`'s first line is the password (as nuwatchd reads metrics.
  // basic_auth_password_file). Throws CommandError naming the flag for a malformed endpoint, a
  // password file that cannot be read or is empty, or one of the two auth flags without the
  // other.
  MetricsClient(std::string host_port, std::string user, const std::string& password_file);

  // One scrape, within `timeout`. Throws CommandError naming the endpoint when it cannot be
  // reached, does not answer in time, answers other than 200 (401 with a hint to the auth flags),
  // or serves a rejection counter that does not read; an exposition without any
  // nuwatch_rejected_messages_total series is not a nuwatchd and is an error too.
  DaemonCounters Read(std::chrono::milliseconds timeout) const;

  const std::string& host_port() const { return host_port_; }

 private:
  std::string host_port_;
  std::string host_;
  std::string port_;
  std::string authorization_;  // "Basic ..." or ""
};

}  // namespace nuwatch::cli
