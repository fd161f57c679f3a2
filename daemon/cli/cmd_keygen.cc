// nuwatch keygen: a new CURVE key pair for nuwatchd or one of its clients (daemon/protocol/
// PROTOCOL.md §12), as ZeroMQ certificates: NAME.key (the public key, to hand to the other side)
// and NAME.key_secret (mode 0600, stays where it was made). An existing file is never replaced
// unless --force.
#include <cstdio>
#include <memory>
#include <string>

#include "cli/cli_util.h"
#include "cli/commands.h"
#include "protocol/curve_keys.h"

namespace nuwatch::cli {
namespace {

struct KeygenArguments {
  std::string output;
  std::string comment;
  bool force = false;
};

void RunKeygen(const KeygenArguments& args) {
  if (args.output.empty()) throw CommandError("--output: the name is empty");
  if (args.comment.find('\n') != std::string::npos)
    throw CommandError("--comment: one line, please");
  CurveKeyPair pair;
  try {
    pair = WriteCurveKeyPair(args.output, args.force, args.comment);
  } catch (const CurveKeyError& e) {
    throw CommandError(e.what());
  }
  std::printf(
      "public key %s\nwrote %s.key (public: give it to the other side)\n"
      "wrote %s.key_secret (secret, mode 0600: keep it here)\n",
      pair.public_key.c_str(), args.output.c_str(), args.output.c_str());
}

void AddKeygenCommand(CLI::App& app) {
  auto args = std::make_shared<KeygenArguments>();
  CLI::App* command = app.add_subcommand(
      "keygen",
      "Make a CURVE key pair for nuwatchd ([auth]) or a client (--client-key): NAME.key and "
      "NAME.key_secret");
  command
      ->add_option("--output", args->output,
                   "Path and name of the pair, without extension (writes NAME.key and "
                   "NAME.key_secret)")
      ->type_name("NAME")
      ->required();
  command->add_option("--comment", args->comment, "A line for the files' header (whose key)")
      ->type_name("TEXT");
  command->add_flag("--force", args->force, "Replace existing files");
  command->callback([args] { RunKeygen(*args); });
}

}  // namespace

NUWATCH_REGISTER_COMMAND(120, AddKeygenCommand);

}  // namespace nuwatch::cli
