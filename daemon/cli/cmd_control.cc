// nuwatch control: the client of nuwatchd's control socket (daemon/protocol/PROTOCOL.md §11):
// status, snapshot, relearn STREAM, reload, forget STREAM. One request, one reply, printed as a
// table or as the daemon's JSON; a refused request, an unknown command or a daemon that does not
// answer in time is an error (exit 1), never a silent wait.
#include <algorithm>
#include <chrono>
#include <cstdio>
#include <iostream>
#include <memory>
#include <nlohmann/json.hpp>
#include <string>
#include <string_view>
#include <vector>
#include <zmq.hpp>

#include "cli/cli_util.h"
#include "cli/client_keys.h"
#include "cli/commands.h"

namespace nuwatch::cli {
namespace {

using nlohmann::json;

struct ControlArguments {
  std::string command;
  std::string stream;
  std::string connect;
  std::string output = "table";
  std::string timeout = "5s";
  ClientKeyFlags keys;
};

struct KnownCommand {
  std::string_view name;
  bool takes_stream;
};
constexpr KnownCommand kCommands[] = {
    {"status", false}, {"snapshot", false}, {"relearn", true}, {"reload", false}, {"forget", true}};

std::string KnownList() {
  std::string list;
  for (const KnownCommand& c : kCommands)
    list += (list.empty() ? "" : ", ") + std::string(c.name) + (c.takes_stream ? " STREAM" : "");
  return list;
}

// Sends `request` on a REQ socket and waits at most `timeout` seconds for the reply. Throws
// CommandError when the endpoint cannot be used or nothing answers in time.
std::string Exchange(const std::string& endpoint, const std::string& request, double timeout,
                     const std::string& timeout_text, const ClientKeyFlags& keys) {
  zmq::context_t context(1);
  zmq::socket_t socket(context, zmq::socket_type::req);
  socket.set(zmq::sockopt::linger, 0);
  ApplyClientKeys(keys, socket);
  HandshakeWatch watch(context, socket, keys);
  const auto deadline = std::chrono::steady_clock::now() +
                        std::chrono::milliseconds(static_cast<int64_t>(timeout * 1000));
  // Waits for `events` on the socket until the deadline, in slices, so that a refused handshake
  // is reported at once rather than at the timeout.
  const auto wait_for = [&](short events) {
    zmq::pollitem_t item{socket.handle(), 0, events, 0};
    while (zmq::poll(&item, 1, std::chrono::milliseconds(100)) == 0) {
      if (const auto failure = watch.Failure()) throw CommandError(endpoint + ": " + *failure);
      if (std::chrono::steady_clock::now() >= deadline) {
        throw CommandError("no reply from " + endpoint + " within --timeout " + timeout_text +
                           " (is nuwatchd running, and is this its control socket?)");
      }
    }
  };
  try {
    socket.connect(endpoint);
  } catch (const zmq::error_t& e) {
    throw CommandError("--connect: cannot use '" + endpoint + "': " + e.what());
  }
  // A REQ socket queues the request on the connection being made, so it can normally send at
  // once. But a handshake that failed for good (ZeroMQ does not reconnect after a protocol error
  // such as a CURVE/plain mismatch) leaves it no connection, and a blocking send would then wait
  // for ever, past --timeout: so the send waits for the socket to be writable, bounded like the
  // reply. A peer of another socket type (the ingest PULL, the PUB) takes the request but never
  // answers: the wait for the reply is what reports it.
  wait_for(ZMQ_POLLOUT);
  if (!socket.send(zmq::buffer(request), zmq::send_flags::dontwait)) {
    throw CommandError("--connect: '" + endpoint + "' did not take the request");
  }
  wait_for(ZMQ_POLLIN);
  zmq::message_t reply;
  (void)socket.recv(reply, zmq::recv_flags::none);
  return reply.to_string();
}

std::string Text(const json& value) {
  if (value.is_null()) return "-";
  if (value.is_string()) return value.get<std::string>();
  return value.dump();
}

// The status reply as one row per stream.
void PrintStatusTable(const json& reply) {
  const json& streams = reply.value("streams", json::array());
  std::printf("nuwatchd %s: %zu stream(s)", Text(reply.value("version", json())).c_str(),
              streams.size());
  // A replica among several (PROTOCOL.md §13) says which one it is.
  const json& member = reply.value("member", json());
  const json& members = reply.value("members", json());
  if (member.is_string() && members.is_number_integer() && members.get<int64_t>() > 0) {
    if (reply.value("departed", false)) {
      // §13.4: taken out of the list; an operator stops it once nothing is pending.
      std::printf(", %s departed from the %lld members", member.get<std::string>().c_str(),
                  static_cast<long long>(members.get<int64_t>()));
    } else {
      std::printf(", member %s of %lld", member.get<std::string>().c_str(),
                  static_cast<long long>(members.get<int64_t>()));
    }
  }
  if (const json& pending = reply.value("handoffs_pending", json());
      pending.is_number_integer() && pending.get<int64_t>() > 0) {
    std::printf(", %lld handoff(s) pending", static_cast<long long>(pending.get<int64_t>()));
  }
  std::printf("\n");
  if (streams.empty()) return;
  std::size_t width = 6;
  for (const json& s : streams) width = std::max(width, Text(s.value("stream", json())).size());
  std::printf("%-*s  %-8s  %4s  %10s  %9s  %6s  %6s  %5s  %6s  %-8s  %10s  %6s\n",
              static_cast<int>(width), "STREAM", "STATE", "DIMS", "VECTORS", "ANOMALIES", "SV",
              "WINDOW", "MODEL", "REFITS", "INCIDENT", "MEMORY", "THREAD");
  for (const json& s : streams) {
    const json& incident = s.value("incident", json());
    const std::string incident_text =
        incident.is_object() ? std::to_string(incident.value("id", int64_t{0})) : "-";
    std::printf(
        "%-*s  %-8s  %4s  %10s  %9s  %6s  %6s  %5s  %6s  %-8s  %10s  %6s\n",
        static_cast<int>(width), Text(s.value("stream", json())).c_str(),
        Text(s.value("state", json())).c_str(), Text(s.value("dims", json())).c_str(),
        Text(s.value("vectors", json())).c_str(), Text(s.value("anomalies", json())).c_str(),
        Text(s.value("support_vectors", json())).c_str(), Text(s.value("window", json())).c_str(),
        Text(s.value("model_version", json())).c_str(), Text(s.value("refits", json())).c_str(),
        incident_text.c_str(), Text(s.value("memory_bytes", json())).c_str(),
        Text(s.value("scoring_thread", json())).c_str());
  }
}

void RunControl(const ControlArguments& args) {
  const auto known = std::find_if(std::begin(kCommands), std::end(kCommands),
                                  [&](const KnownCommand& c) { return c.name == args.command; });
  if (known == std::end(kCommands))
    throw CommandError("unknown command '" + args.command + "' (known: " + KnownList() + ")");
  if (known->takes_stream && args.stream.empty())
    throw CommandError(args.command + " needs the stream key: nuwatch control " + args.command +
                       " STREAM");
  if (!known->takes_stream && !args.stream.empty())
    throw CommandError(args.command + " takes no stream (got '" + args.stream + "')");
  CheckEndpoint("--connect", args.connect);
  if (args.output != "table" && args.output != "json")
    throw CommandError("--output: '" + args.output + "' is not one of: table, json");
  const double timeout = DurationFlag("--timeout", args.timeout, 3600, LowBound::kExclusive);

  json request = {{"command", args.command}};
  if (known->takes_stream) request["stream"] = args.stream;
  const std::string text = Exchange(args.connect, request.dump(), timeout, args.timeout, args.keys);
  const json reply = json::parse(text, nullptr, /*allow_exceptions=*/false);
  if (!reply.is_object() || !reply.contains("ok") || !reply["ok"].is_boolean())
    throw CommandError(args.connect +
                       " answered something that is not a control reply: " + text.substr(0, 200));
  if (!reply["ok"].get<bool>()) {
    if (args.output == "json") std::cout << text << "\n";
    throw CommandError("nuwatchd refused " + args.command + ": " +
                       Text(reply.value("error", json("no reason given"))));
  }
  if (args.output == "json") {
    std::cout << text << "\n";
    return;
  }
  if (args.command == "status") {
    PrintStatusTable(reply);
    return;
  }
  for (const auto& [key, value] : reply.items()) {
    if (key == "ok") continue;
    std::printf("%-16s %s\n", key.c_str(), Text(value).c_str());
  }
}

void AddControlCommand(CLI::App& app) {
  auto args = std::make_shared<ControlArguments>();
  CLI::App* command = app.add_subcommand(
      "control",
      "Ask nuwatchd over its control socket: status, snapshot, relearn STREAM, reload, "
      "forget STREAM (PROTOCOL.md §11)");
  command->add_option("command", args->command, "status, snapshot, relearn, reload or forget")
      ->type_name("COMMAND")
      ->required();
  command->add_option("stream", args->stream, "The stream key, for relearn and forget")
      ->type_name("STREAM");
  command
      ->add_option("--connect", args->connect,
                   "ZeroMQ endpoint of nuwatchd's control socket (REQ connects to it)")
      ->type_name("ENDPOINT")
      ->required();
  command->add_option("--output", args->output, "table, or json: the daemon's reply as it is")
      ->type_name("table|json")
      ->capture_default_str();
  command->add_option("--timeout", args->timeout, "How long to wait for the reply")
      ->type_name("DURATION")
      ->capture_default_str();
  AddClientKeyFlags(command, &args->keys);
  command->callback([args] { RunControl(*args); });
}

}  // namespace

NUWATCH_REGISTER_COMMAND(110, AddControlCommand);

}  // namespace nuwatch::cli
