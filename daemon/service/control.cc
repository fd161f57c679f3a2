#include "service/control.h"

#include <cmath>
#include <exception>
#include <nlohmann/json.hpp>

namespace nuwatch {
namespace {

using nlohmann::json;

// JSON has no NaN or infinity: such numbers are written as null (PROTOCOL.md §9).
json Number(double value) { return std::isfinite(value) ? json(value) : json(nullptr); }

json StatusJson(const std::vector<StreamStatus>& streams, const ClusterStatus& cluster,
                std::string_view version) {
  json list = json::array();
  for (const StreamStatus& s : streams) {
    json incident = nullptr;
    if (s.incident) {
      incident = {{"id", s.incident->id},
                  {"start", Number(s.incident->start_time)},
                  {"end", Number(s.incident->end_time)},
                  {"peak_decision", Number(s.incident->peak_decision)},
                  {"flagged_vectors", s.incident->flagged_vectors}};
    }
    list.push_back(
        {{"stream", s.stream},
         {"state", s.state},
         {"dims", s.dims},
         {"vectors", s.vectors},
         {"anomalies", s.anomalies},
         {"support_vectors", s.support_vectors},
         {"window", s.window},
         {"model_version", s.model_version},
         {"refits", s.refits},
         {"incident", incident},
         {"memory_bytes", s.memory_bytes},
         {"scoring_thread", s.scoring_thread},
         {"snapshot_vectors", s.snapshot_vectors < 0 ? json(nullptr) : json(s.snapshot_vectors)},
         {"snapshot_error", s.snapshot_error.empty() ? json(nullptr) : json(s.snapshot_error)}});
  }
  return {{"ok", true},
          {"version", std::string(version)},
          {"member", cluster.member.empty() ? json(nullptr) : json(cluster.member)},
          {"members", cluster.members},
          {"departed", cluster.departed},
          {"handoffs_pending", cluster.handoffs_pending},
          {"streams", list}};
}

std::string Dump(const json& reply) {
  return reply.dump(-1, ' ', false, json::error_handler_t::replace);
}

}  // namespace

std::string ControlErrorReply(std::string_view error) {
  return Dump({{"ok", false}, {"error", std::string(error)}});
}

std::string HandleControlRequest(std::string_view request, ControlCommands& commands,
                                 std::string_view version) {
  return HandleControlRequest(request, std::nullopt, commands, version);
}

std::string HandleControlRequest(std::string_view request,
                                 std::optional<std::string_view> attachment,
                                 ControlCommands& commands, std::string_view version) {
  const json parsed = json::parse(request.begin(), request.end(), nullptr, false);
  if (parsed.is_discarded()) return ControlErrorReply("the request is not valid JSON");
  if (!parsed.is_object()) return ControlErrorReply("the request must be a JSON object");
  const auto command_it = parsed.find("command");
  if (command_it == parsed.end()) {
    return ControlErrorReply("the request has no \"command\" member");
  }
  if (!command_it->is_string()) return ControlErrorReply("\"command\" must be a string");
  const std::string command = command_it->get<std::string>();
  if (attachment && command != "adopt") {
    return ControlErrorReply("a control request is a single frame (only adopt takes a second)");
  }
  try {
    if (command == "adopt") {
      const auto stream_it = parsed.find("stream");
      const auto from_it = parsed.find("from");
      if (stream_it == parsed.end() || !stream_it->is_string() || from_it == parsed.end() ||
          !from_it->is_string()) {
        return ControlErrorReply("adopt needs string members \"stream\" and \"from\"");
      }
      if (!attachment) {
        return ControlErrorReply("adopt needs a second frame: the stream's state");
      }
      const std::string stream = stream_it->get<std::string>();
      const AdoptOutcome outcome = commands.Adopt(
          stream, from_it->get<std::string>(),
          std::span(reinterpret_cast<const uint8_t*>(attachment->data()), attachment->size()));
      if (!outcome.ok) {
        return Dump({{"ok", false}, {"error", outcome.error}, {"reason", outcome.reason}});
      }
      return Dump({{"ok", true},
                   {"stream", stream},
                   {"held_vectors", outcome.held_vectors},
                   {"state_written", outcome.state_written}});
    }
    if (command == "status") {
      return Dump(StatusJson(commands.Status(), commands.Cluster(), version));
    }
    if (command == "snapshot") {
      const SnapshotOutcome outcome = commands.Snapshot();
      if (!outcome.ok && !outcome.failed.empty()) {
        return Dump({{"ok", false},
                     {"error", outcome.error},
                     {"written", outcome.written},
                     {"pending", outcome.pending},
                     {"failed", outcome.failed}});
      }
      if (!outcome.ok) return ControlErrorReply(outcome.error);
      return Dump({{"ok", true}, {"written", outcome.written}, {"pending", outcome.pending}});
    }
    if (command == "relearn" || command == "forget") {
      const auto stream_it = parsed.find("stream");
      if (stream_it == parsed.end() || !stream_it->is_string()) {
        return ControlErrorReply(command + " needs a string member \"stream\"");
      }
      const std::string stream = stream_it->get<std::string>();
      const auto error = command == "relearn" ? commands.Relearn(stream) : commands.Forget(stream);
      if (error) return ControlErrorReply(*error);
      return Dump({{"ok", true}, {"stream", stream}});
    }
    if (command == "reload") {
      const ReloadOutcome outcome = commands.Reload();
      if (!outcome.ok) return ControlErrorReply(outcome.error);
      return Dump(
          {{"ok", true}, {"config", outcome.config}, {"streams_updated", outcome.streams_updated}});
    }
  } catch (const std::bad_alloc&) {
    throw;
  } catch (const std::exception& e) {
    return ControlErrorReply("command '" + command + "' failed: " + e.what());
  }
  return ControlErrorReply("unknown command '" + command +
                           "' (known: status, snapshot, relearn, reload, forget, adopt)");
}

}  // namespace nuwatch
