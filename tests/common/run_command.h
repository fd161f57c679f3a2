// Running a program from a test: shell command, stderr joined to stdout, exit code read back.
#pragma once

#include <sys/wait.h>

#include <array>
#include <cstdio>
#include <string>

namespace nuwatch::testing_data {

struct CommandResult {
  int exit_code = -1;  // 128 + signal when the command was killed
  std::string output;  // stdout and stderr together
};

inline CommandResult RunCommand(const std::string& command) {
  CommandResult result;
  std::FILE* pipe = ::popen((command + " 2>&1").c_str(), "r");
  if (pipe == nullptr) return result;
  std::array<char, 4096> buffer;
  std::size_t n;
  while ((n = std::fread(buffer.data(), 1, buffer.size(), pipe)) > 0)
    result.output.append(buffer.data(), n);
  const int status = ::pclose(pipe);
  result.exit_code = WIFEXITED(status) ? WEXITSTATUS(status) : 128 + WTERMSIG(status);
  return result;
}

}  // namespace nuwatch::testing_data
