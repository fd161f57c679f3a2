// Subcommands of the `nuwatch` program register themselves here: each daemon/cli/cmd_*.cc file
// defines a function that adds its subcommand to the CLI11 app and registers it with
// NUWATCH_REGISTER_COMMAND, so adding a subcommand touches no shared file.
#pragma once

#include <CLI/CLI.hpp>
#include <stdexcept>
#include <string>
#include <vector>

namespace nuwatch::cli {

// Thrown by a subcommand for bad input or a failed operation. main prints
// "nuwatch <subcommand>: <message>" as one line on stderr and exits with code 1.
class CommandError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// A failure that has its own exit status, so that a script can tell it from bad input (1):
// `nuwatch send --metrics` exits 3 when the daemon rejected messages (kExitDaemonRejected).
// main prints the message as for CommandError and exits with `exit_status`.
class CommandStatusError : public CommandError {
 public:
  CommandStatusError(int exit_status, const std::string& message)
      : CommandError(message), exit_status_(exit_status) {}
  int exit_status() const { return exit_status_; }

 private:
  int exit_status_;
};

// The exit statuses of `nuwatch`: 0 success, 1 bad input or a failed operation (CommandError),
// 3 the daemon rejected messages a `send --metrics` sent (2 stays unused: nuwatchd's status for
// a configuration it refuses).
inline constexpr int kExitDaemonRejected = 3;

using CommandAdder = void (*)(CLI::App& app);

struct CommandRegistration {
  // `order` sorts the subcommands in --help (fit 10, score 20, inspect 30, bench 40, replay 50,
  // simulate 60, tune 70, evaluate 80, send 90, tail 100, control 110, keygen 120).
  CommandRegistration(int order, CommandAdder adder);
};

struct RegisteredCommand {
  int order;
  CommandAdder adder;
};
std::vector<RegisteredCommand>& RegisteredCommands();

}  // namespace nuwatch::cli

#define NUWATCH_REGISTER_COMMAND(order, adder) \
  static const ::nuwatch::cli::CommandRegistration nuwatch_registration_##adder(order, adder)
