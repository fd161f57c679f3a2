// nuwatchd as a child process, for tests and benchmarks that drive the real program: spawning it
// with its stderr in a log file, reading its ready file (PROTOCOL.md §11.5), scraping /metrics
// over plain HTTP and reading values from the text exposition, and the CPU time it (or one of its
// threads) used, from /proc.
//
// Thread safety: none of these share state; a ChildProcess belongs to the thread that made it.
#pragma once

#include <fcntl.h>
#include <netinet/in.h>
#include <signal.h>
#include <spawn.h>
#include <sys/socket.h>
#include <sys/wait.h>
#include <unistd.h>

#include <filesystem>
#include <fstream>
#include <nlohmann/json.hpp>
#include <optional>
#include <sstream>
#include <string>
#include <vector>

#include "common/read_file.h"

extern char** environ;

namespace nuwatch::testing_data {

// A program started with posix_spawn: stdout to /dev/null, stderr to `log_path`. Killed (SIGKILL)
// and reaped by the destructor unless Wait() reaped it already.
class ChildProcess {
 public:
  ChildProcess(const std::vector<std::string>& args, const std::string& log_path) {
    std::vector<char*> argv;
    for (const auto& a : args) argv.push_back(const_cast<char*>(a.c_str()));
    argv.push_back(nullptr);
    posix_spawn_file_actions_t actions;
    posix_spawn_file_actions_init(&actions);
    posix_spawn_file_actions_addopen(&actions, 2, log_path.c_str(), O_WRONLY | O_CREAT | O_TRUNC,
                                     0644);
    posix_spawn_file_actions_addopen(&actions, 1, "/dev/null", O_WRONLY, 0);
    const int rc = posix_spawn(&pid_, argv[0], &actions, nullptr, argv.data(), environ);
    posix_spawn_file_actions_destroy(&actions);
    if (rc != 0) pid_ = -1;
  }
  ~ChildProcess() {
    if (pid_ > 0 && !exited_) {
      ::kill(pid_, SIGKILL);
      Wait();
    }
  }
  ChildProcess(const ChildProcess&) = delete;
  ChildProcess& operator=(const ChildProcess&) = delete;

  pid_t pid() const { return pid_; }  // -1: it could not be started
  void Signal(int signal) const { ::kill(pid_, signal); }
  // Blocks until it exits: its exit status, or -signal when a signal ended it.
  int Wait() {
    int status = 0;
    ::waitpid(pid_, &status, 0);
    exited_ = true;
    return WIFEXITED(status) ? WEXITSTATUS(status) : -WTERMSIG(status);
  }

 private:
  pid_t pid_ = -1;
  bool exited_ = false;
};

// The endpoints of a ready file (PROTOCOL.md §11.5). Throws nlohmann::json::exception when the
// file is not (yet) a complete one.
struct ReadyEndpoints {
  std::vector<std::string> ingest;
  std::string publish;
  std::string control;
  std::string metrics;  // HOST:PORT
};
inline ReadyEndpoints ReadReadyFile(const std::string& path) {
  const nlohmann::json ready = nlohmann::json::parse(ReadWholeFile(path));
  return {ready.at("ingest").get<std::vector<std::string>>(), ready.at("publish"),
          ready.at("control"), ready.at("metrics")};
}

// A minimal HTTP/1.0 GET on loopback: the body, or "" on failure.
inline std::string HttpGet(const std::string& host_port, const std::string& path) {
  const auto colon = host_port.rfind(':');
  const int port = std::stoi(host_port.substr(colon + 1));
  const int fd = ::socket(AF_INET, SOCK_STREAM, 0);
  if (fd < 0) return "";
  sockaddr_in address{};
  address.sin_family = AF_INET;
  address.sin_port = htons(static_cast<uint16_t>(port));
  address.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
  if (::connect(fd, reinterpret_cast<sockaddr*>(&address), sizeof address) != 0) {
    ::close(fd);
    return "";
  }
  const std::string request = "GET " + path + " HTTP/1.0\r\nHost: " + host_port + "\r\n\r\n";
  if (::send(fd, request.data(), request.size(), 0) != static_cast<ssize_t>(request.size())) {
    ::close(fd);
    return "";
  }
  std::string response;
  char buffer[4096];
  for (ssize_t n; (n = ::recv(fd, buffer, sizeof buffer, 0)) > 0;) response.append(buffer, n);
  ::close(fd);
  const auto body = response.find("\r\n\r\n");
  return body == std::string::npos ? "" : response.substr(body + 4);
}

// The value of the series `series` (name and labels exactly as exposed, e.g.
// nuwatch_rejected_messages_total{reason="bad_json"}) in a text exposition; nullopt if absent.
inline std::optional<double> SeriesValue(const std::string& text, const std::string& series) {
  std::istringstream lines(text);
  for (std::string line; std::getline(lines, line);) {
    if (line.rfind(series + " ", 0) == 0) return std::stod(line.substr(series.size() + 1));
  }
  return std::nullopt;
}

// The sum of every series of metric `name` (any labels) in a text exposition; 0 if none.
inline double SumOfSeries(const std::string& text, const std::string& name) {
  std::istringstream lines(text);
  double sum = 0;
  for (std::string line; std::getline(lines, line);) {
    if (line.rfind(name, 0) != 0 || line.size() <= name.size()) continue;
    const char next = line[name.size()];
    if (next != ' ' && next != '{') continue;  // another metric whose name starts alike
    sum += std::stod(line.substr(line.rfind(' ') + 1));
  }
  return sum;
}

// CPU seconds (user + system) used so far by process `pid`, or by its thread `tid` when given,
// from fields 14 and 15 of /proc/PID[/task/TID]/stat (proc(5)); clock ticks of _SC_CLK_TCK
// (10 ms at the usual 100 Hz). -1 when it cannot be read.
inline double CpuSeconds(pid_t pid, pid_t tid = 0) {
  const std::string path = "/proc/" + std::to_string(pid) +
                           (tid > 0 ? "/task/" + std::to_string(tid) : std::string()) + "/stat";
  const std::string text = ReadWholeFile(path);
  const auto close = text.rfind(')');  // the command name may hold spaces and parentheses
  if (close == std::string::npos) return -1;
  std::istringstream fields(text.substr(close + 2));
  std::string field;
  // Fields from 3 (state) on: utime is field 14, stime field 15.
  for (int i = 3; i < 14 && fields >> field; ++i) {
  }
  long long utime = 0, stime = 0;
  if (!(fields >> utime >> stime)) return -1;
  return static_cast<double>(utime + stime) / static_cast<double>(::sysconf(_SC_CLK_TCK));
}

// The id of the thread of process `pid` whose name (comm, as pthread_setname_np set it) is
// `name`; 0 if there is none.
inline pid_t ThreadNamed(pid_t pid, const std::string& name) {
  const std::filesystem::path tasks = "/proc/" + std::to_string(pid) + "/task";
  std::error_code error;
  for (const auto& entry : std::filesystem::directory_iterator(tasks, error)) {
    std::string comm = ReadWholeFile((entry.path() / "comm").string());
    while (!comm.empty() && comm.back() == '\n') comm.pop_back();
    if (comm == name) return static_cast<pid_t>(std::stol(entry.path().filename().string()));
  }
  return 0;
}

}  // namespace nuwatch::testing_data
