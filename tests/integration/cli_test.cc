// The command line never fails silently (issue 11 section 4): one phrasing per kind of mistake in
// every subcommand, a typo named with a suggestion, the last of a repeated flag wins, an endpoint
// without its transport gets the hint to write tcp://, and a range error names what the user set.
// The programs run as a user runs them; each check states the convention it holds them to.
#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <csignal>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <functional>
#include <map>
#include <nlohmann/json.hpp>
#include <regex>
#include <set>
#include <sstream>
#include <string>
#include <thread>
#include <vector>

#include "common/child_daemon.h"
#include "common/program_test.h"

namespace {

using nlohmann::json;
using ::testing::HasSubstr;
using ::testing::Not;

const std::string kNuwatch = NUWATCH_PROGRAM;
const std::string kNuwatchd = NUWATCHD_PROGRAM;

using nuwatch::testing_data::ProgramRun;
using nuwatch::testing_data::ReadWholeFile;

class Cli : public nuwatch::testing_data::ProgramTest {
 protected:
  ProgramRun Nuwatch(const std::string& args) const { return Run(kNuwatch, args); }
};

// A typo is named with the flag it resembles, before CLI11 would complain that the flag it
// misspells is missing (git and cargo answer a mistyped name with "did you mean": common
// practice).
TEST_F(Cli, UnknownFlagIsNamedWithTheClosestFlag) {
  const ProgramRun run = Nuwatch("fit --inptu data.csv --output model.nuw");
  EXPECT_EQ(run.exit_code, 1);
  EXPECT_THAT(run.err, HasSubstr("nuwatch fit: --inptu: unknown flag (did you mean --input?)"));
  EXPECT_THAT(run.err, Not(HasSubstr("required")));

  const ProgramRun send = Nuwatch("send --conect tcp://127.0.0.1:1 --input x.csv");
  EXPECT_EQ(send.exit_code, 1);
  EXPECT_THAT(send.err, HasSubstr("--conect: unknown flag (did you mean --connect?)"));

  // Nothing close: no wild guess, a pointer to --help instead.
  const ProgramRun far = Nuwatch("tail --connect tcp://127.0.0.1:1 --zzzzzzzzzz");
  EXPECT_EQ(far.exit_code, 1);
  EXPECT_THAT(far.err, HasSubstr("--zzzzzzzzzz: unknown flag (see --help)"));

  // --help is known to every subcommand.
  const ProgramRun help = Nuwatch("inspect --help");
  EXPECT_EQ(help.exit_code, 0) << help.err;
}

// The last of a repeated flag wins, as with getopt-based tools (`ls -w 10 -w 20`): common
// practice. Before, CLI11 refused with "At Most 1 required but received 2".
TEST_F(Cli, LastRepeatedFlagWins) {
  const ProgramRun run = Nuwatch(
      "simulate --pumps 2 --pumps 3 --duration 10m --duration 1h "
      "--interval 60s --faults none --output " +
      Path("plant"));
  ASSERT_EQ(run.exit_code, 0) << run.err;
  std::ifstream in(Path("plant") + "/stream.csv");
  std::string line;
  std::getline(in, line);  // header
  std::set<std::string> streams;
  int rows = 0;
  while (std::getline(in, line)) {
    const auto first = line.find(',');
    streams.insert(line.substr(first + 1, line.find(',', first + 1) - first - 1));
    ++rows;
  }
  EXPECT_EQ(streams.size(), 3u);  // --pumps 3
  EXPECT_EQ(rows, 3 * 60);        // --duration 1h at one vector a minute per pump
}

// simulate writes labelled recordings that may be the only copy of a run: an existing file is
// replaced only with --force (cp -i / mv -n; common practice for tools that write into a
// directory the user names).
TEST_F(Cli, SimulateRefusesToOverwriteWithoutForce) {
  const std::string args = "simulate --pumps 1 --duration 1h --interval 60s --output " + Path("p");
  ASSERT_EQ(Nuwatch(args + " --seed 1").exit_code, 0);
  const std::string first = ReadWholeFile(Path("p") + "/stream.csv");
  const ProgramRun again = Nuwatch(args + " --seed 2");
  EXPECT_EQ(again.exit_code, 1);
  EXPECT_EQ(again.err,
            "nuwatch simulate: " + Path("p") + "/stream.csv exists; add --force to replace it\n");
  EXPECT_EQ(ReadWholeFile(Path("p") + "/stream.csv"), first);  // untouched
  const ProgramRun forced = Nuwatch(args + " --seed 2 --force");
  EXPECT_EQ(forced.exit_code, 0) << forced.err;
  EXPECT_NE(ReadWholeFile(Path("p") + "/stream.csv"), first);
}

// A repeatable flag keeps every value (tail --stream A --stream B follows both).
TEST_F(Cli, RepeatableFlagKeepsEveryValue) {
  const ProgramRun run = Nuwatch(
      "tail --connect tcp://127.0.0.1:1 --stream a --stream b --timeout 0.1s --count 0 --json");
  EXPECT_EQ(run.exit_code, 0) << run.err;
}

// One phrasing per kind of mistake, whichever subcommand reads the flag: "FLAG: 'TEXT' is not a
// number", "... is not a whole number", "FLAG: TEXT is out of range (RANGE)", "... is not a
// duration".
TEST_F(Cli, OnePhrasingPerKindOfMistake) {
  const std::string data = Write("data.csv", "a,b\n1,2\n3,4\n");
  const struct {
    std::string args, message;
  } cases[] = {
      {"send --connect tcp://127.0.0.1:1 --input " + data + " --stream s --rate abc",
       "nuwatch send: --rate: 'abc' is not a number"},
      {"fit --input " + data + " --output m --nu abc", "nuwatch fit: --nu: 'abc' is not a number"},
      {"simulate --output x --fault-rate abc",
       "nuwatch simulate: --fault-rate: 'abc' is not a number"},
      {"evaluate --alarms a --incidents b --alpha abc",
       "nuwatch evaluate: --alpha: 'abc' is not a number"},
      {"bench --nu abc", "nuwatch bench: --nu: 'abc' is not a number"},
      {"simulate --output x --pumps abc", "nuwatch simulate: --pumps: 'abc' is not a whole number"},
      {"tail --connect tcp://127.0.0.1:1 --count 1.5",
       "nuwatch tail: --count: '1.5' is not a whole number"},
      {"score --model m --input " + data + " --explain x",
       "nuwatch score: --explain: 'x' is not a whole number"},
      {"bench --dims abc", "nuwatch bench: --dims: 'abc' is not a whole number"},
      {"send --connect tcp://127.0.0.1:1 --input " + data + " --stream s --batch 2.5",
       "nuwatch send: --batch: '2.5' is not a whole number"},
      {"simulate --output x --pumps 120", "nuwatch simulate: --pumps: 120 is out of range (1..99)"},
      {"evaluate --alarms a --incidents b --alpha 2",
       "nuwatch evaluate: --alpha: 2 is out of range (0..1)"},
      {"bench --nu 0", "nuwatch bench: --nu: 0 is out of range (> 0 and <= 1)"},
      {"send --connect tcp://127.0.0.1:1 --input " + data + " --stream s --batch 0",
       "nuwatch send: --batch: 0 is out of range (1..4096)"},
      {"tail --connect tcp://127.0.0.1:1 --count -1",
       "nuwatch tail: --count: -1 is out of range (>= 0)"},
      {"simulate --output x --interval 0",
       "nuwatch simulate: --interval: 0 is out of range (> 0s)"},
      {"send --connect tcp://127.0.0.1:1 --input " + data + " --stream s --linger 2h",
       "nuwatch send: --linger: 2h is out of range (0s..3600s)"},
      {"tail --connect tcp://127.0.0.1:1 --timeout soon",
       "nuwatch tail: --timeout: 'soon' is not a duration (e.g. 90, 90s, 15m, 2h, 7d)"},
      {"evaluate --alarms a --incidents b --grace soon",
       "nuwatch evaluate: --grace: 'soon' is not a duration (e.g. 90, 90s, 15m, 2h, 7d)"},
      {"simulate --output x --duration soon",
       "nuwatch simulate: --duration: 'soon' is not a duration (e.g. 90, 90s, 15m, 2h, 7d)"},
  };
  for (const auto& c : cases) {
    const ProgramRun run = Nuwatch(c.args);
    EXPECT_EQ(run.exit_code, 1) << c.args;
    EXPECT_EQ(run.err, c.message + "\n") << c.args;
  }
}

// ZeroMQ endpoints are TRANSPORT://ADDRESS (zmq_connect(3), zmq_tcp(7)); "127.0.0.1:7601" made
// ZeroMQ answer "Invalid argument". Every flag that takes an endpoint says what to write.
TEST_F(Cli, EndpointWithoutTransportGetsTheHint) {
  const std::string data = Write("data.csv", "time,stream,a\n0,s,1\n");
  const ProgramRun send = Nuwatch("send --connect 127.0.0.1:7601 --input " + data);
  EXPECT_EQ(send.exit_code, 1);
  EXPECT_EQ(send.err,
            "nuwatch send: --connect: \"127.0.0.1:7601\" is not a ZeroMQ endpoint; write "
            "tcp://127.0.0.1:7601\n");
  const ProgramRun tail = Nuwatch("tail --connect 127.0.0.1:7602 --timeout 1s");
  EXPECT_EQ(tail.exit_code, 1);
  EXPECT_THAT(tail.err, HasSubstr("--connect: \"127.0.0.1:7602\" is not a ZeroMQ endpoint; write "
                                  "tcp://127.0.0.1:7602"));
  const ProgramRun daemon = Run(kNuwatchd, "--control 127.0.0.1:7603");
  EXPECT_EQ(daemon.exit_code, 2);
  EXPECT_THAT(daemon.err, HasSubstr("nuwatchd: --control: \"127.0.0.1:7603\" is not a ZeroMQ "
                                    "endpoint; write tcp://127.0.0.1:7603"));
}

// nuwatchd names the flag the user typed, not only the config key it replaces.
TEST_F(Cli, DaemonLogLevelErrorNamesTheFlag) {
  const ProgramRun run = Run(kNuwatchd, "--log-level verbose");
  EXPECT_EQ(run.exit_code, 2);
  EXPECT_THAT(run.err, HasSubstr("nuwatchd: --log-level verbose: "));
  EXPECT_THAT(run.err, HasSubstr("verbose"));
}

// Help names each value by one word per kind (issue 11 found TEXT, FILE, STREAM.csv, N, K and X
// for the same kinds): a fixed vocabulary, or the choices themselves (`json|binary`), the way
// man pages name an argument by what it is (common practice). Every option of every subcommand
// and of nuwatchd is checked, so a new option without a proper name fails here.
TEST_F(Cli, HelpNamesEveryValueFromOneVocabulary) {
  const std::set<std::string> vocabulary = {
      "FILE",    "DIR",    "ENDPOINT", "HOST:PORT", "STREAM",          "TIME",         "DURATION",
      "INTEGER", "NUMBER", "LIST",     "NAME",      "NAME,...",        "INTEGER,...",  "LEVEL",
      "COMMAND", "USER",   "TEMPLATE", "TEXT",      "NAME[=ENDPOINT]", "[=true|false]"};
  const std::vector<std::string> subcommands = {"fit",    "score",    "inspect", "bench",
                                                "replay", "simulate", "tune",    "evaluate",
                                                "send",   "tail",     "control", "keygen"};
  // `  -x,--flag TYPE=default ...` or `  --flag TYPE REQUIRED`: the word after the flag.
  const std::regex option_line(R"(^\s+(?:-[A-Za-z],)?(--[a-z][-a-z]*)\s(\S+))");
  const std::regex choices(R"(^[a-z0-9-]+(\|[a-z0-9-]+)+$)");
  std::map<std::string, std::string> seen;  // "command --flag" -> type name
  auto check = [&](const std::string& command, const std::string& help) {
    std::istringstream lines(help);
    bool in_options = false;  // CLI11's "Options:" block; the footers' prose also starts with --
    for (std::string line; std::getline(lines, line);) {
      if (line == "Options:") {
        in_options = true;
        continue;
      }
      if (!line.empty() && line[0] != ' ') in_options = false;
      if (!in_options) continue;
      std::smatch m;
      if (!std::regex_search(line, m, option_line)) continue;
      std::string type = m[2].str();
      // TYPE=default: cut at the first '=' outside brackets (NAME[=ENDPOINT] keeps its own).
      int depth = 0;
      for (std::size_t i = 0; i < type.size(); ++i) {
        depth += type[i] == '[' ? 1 : type[i] == ']' ? -1 : 0;
        if (type[i] == '=' && depth == 0) {
          type.resize(i);
          break;
        }
      }
      if (type == "REQUIRED" || type == "...") continue;
      const bool is_word = std::all_of(type.begin(), type.end(), [](char c) {
        return (c >= 'A' && c <= 'Z') || c == ':' || c == ',' || c == '.' || c == '[' || c == ']' ||
               c == '=' || c == '|' || (c >= 'a' && c <= 'z');
      });
      if (!is_word || line.find(m[1].str() + " " + m[2].str()) == std::string::npos) continue;
      seen[command + " " + m[1].str()] = type;
      // CLI11 names every string TEXT unless told otherwise: only free text may keep it.
      if (type == "TEXT") {
        EXPECT_EQ(command + " " + m[1].str(), "nuwatch keygen --comment");
      }
      EXPECT_TRUE(vocabulary.count(type) == 1 || std::regex_match(type, choices))
          << command << " " << m[1] << ": type name " << type << " is outside the vocabulary";
    }
  };
  for (const std::string& sub : subcommands) {
    const ProgramRun run = Nuwatch(sub + " --help");
    ASSERT_EQ(run.exit_code, 0) << sub << ": " << run.err;
    check("nuwatch " + sub, run.out);
  }
  const ProgramRun daemon = Run(kNuwatchd, "--help");
  ASSERT_EQ(daemon.exit_code, 0) << daemon.err;
  check("nuwatchd", daemon.out);
  // The kinds issue 11 named, now under one word each.
  EXPECT_EQ(seen["nuwatch fit --input"], "FILE");
  EXPECT_EQ(seen["nuwatch fit --from"], "TIME");
  EXPECT_EQ(seen["nuwatch fit --stream"], "STREAM");
  EXPECT_EQ(seen["nuwatch tune --input"], "FILE");
  EXPECT_EQ(seen["nuwatch tune --incidents"], "FILE");
  EXPECT_EQ(seen["nuwatch send --stream"], "STREAM");
  EXPECT_EQ(seen["nuwatch score --explain"], "INTEGER");
  EXPECT_EQ(seen["nuwatch bench --nu"], "NUMBER");
  EXPECT_EQ(seen["nuwatchd --config"], "FILE");
  EXPECT_EQ(seen["nuwatchd --ingest"], "ENDPOINT");
  // Enough options were read for the checks above to mean something.
  EXPECT_GT(seen.size(), 100u);
}

// `replay --window 10` once broke the rule warmup <= window with a warmup the user never set. A
// rule between two keys, one of them left at its default, names the flag the user set and where
// the other value came from, with the flag that changes it.
TEST_F(Cli, RangeRuleNamesWhatTheUserSet) {
  const ProgramRun run = Nuwatch("replay --input none.csv --open-window 1");
  EXPECT_EQ(run.exit_code, 1);
  EXPECT_THAT(run.err, ::testing::ContainsRegex(
                           "open_after = [0-9]+ must not exceed --open-window = 1 \\(open_after "
                           "= [0-9]+ is the built-in default: set it with --open-after\\)"));
  // Both set: both named as flags, no note about defaults.
  const ProgramRun both = Nuwatch("replay --input none.csv --window 10 --warmup 20");
  EXPECT_EQ(both.exit_code, 1);
  EXPECT_THAT(both.err, HasSubstr("--warmup = 20 must not exceed --window = 10"));
  EXPECT_THAT(both.err, Not(HasSubstr("default")));
}

// ---------------------------------------------------------------------------------------------
// nuwatch control against a real nuwatchd child process.

using nuwatch::testing_data::ChildProcess;

// Polls until `condition` holds, for at most a minute (pacing, not a wait for time).
bool PollUntil(const std::function<bool()>& condition) {
  const auto until = std::chrono::steady_clock::now() + std::chrono::seconds(60);
  while (std::chrono::steady_clock::now() < until) {
    if (condition()) return true;
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  }
  return condition();
}

class Control : public Cli {
 protected:
  void SetUp() override {
    Cli::SetUp();
    const std::string config = Write("nuwatchd.toml", R"([detector]
nu = 0.1
window = 40
warmup = 20
refit_every = 0
)");
    daemon_ = std::make_unique<ChildProcess>(
        std::vector<std::string>{kNuwatchd, "--config", config, "--ingest", "tcp://127.0.0.1:*",
                                 "--publish", "tcp://127.0.0.1:*", "--metrics", "127.0.0.1:0",
                                 "--state-dir", Path("state"), "--ready-file", Path("ready.json")},
        Path("nuwatchd.log"));
    ASSERT_GT(daemon_->pid(), 0);
    ASSERT_TRUE(PollUntil([&] { return std::filesystem::exists(Path("ready.json")); }))
        << ReadWholeFile(Path("nuwatchd.log"));
    const auto ready = nuwatch::testing_data::ReadReadyFile(Path("ready.json"));
    control_ = ready.control;
    ingest_ = ready.ingest.at(0);
  }
  void TearDown() override {
    if (daemon_ && daemon_->pid() > 0) {  // a graceful stop, as a user's would be
      daemon_->Signal(SIGTERM);
      daemon_->Wait();
    }
    daemon_.reset();
    Cli::TearDown();
  }

  // `rows` vectors of `stream`, two features, one a second from t = 1000.
  void SendRows(const std::string& stream, int rows) {
    std::string csv = "time,stream,a,b\n";
    for (int i = 0; i < rows; ++i)
      csv += std::to_string(1000 + i) + "," + stream + "," + std::to_string(i % 7) + "," +
             std::to_string((i * 3) % 5) + "\n";
    const ProgramRun run =
        Nuwatch("send --connect " + ingest_ + " --input " + Write(stream + ".csv", csv));
    ASSERT_EQ(run.exit_code, 0) << run.err;
  }
  json StatusJson() {
    const ProgramRun run = Nuwatch("control status --connect " + control_ + " --output json");
    EXPECT_EQ(run.exit_code, 0) << run.err;
    return json::parse(run.out, nullptr, false);
  }
  int64_t Vectors(const std::string& stream) {
    const json status = StatusJson();
    for (const json& s : status["streams"])
      if (s["stream"] == stream) return s["vectors"].get<int64_t>();
    return -1;
  }

  std::unique_ptr<ChildProcess> daemon_;
  std::string control_, ingest_;
};

// status, snapshot, relearn, reload and forget as PROTOCOL.md §11 defines them; the JSON output
// is the daemon's reply as a third-party client (pyzmq's REQ socket) receives it.
TEST_F(Control, EveryCommandAgainstARealDaemon) {
  SendRows("pump-01", 30);
  ASSERT_TRUE(PollUntil([&] { return Vectors("pump-01") == 30; }))
      << StatusJson().dump() << ReadWholeFile(Path("nuwatchd.log"));

  const std::string script = Write("status.py", R"(import sys, zmq
s = zmq.Context().socket(zmq.REQ)
s.connect(sys.argv[1])
s.send(b'{"command":"status"}')
print(s.recv().decode())
)");
  const ProgramRun python = Run(NUWATCH_PYTHON, script + " " + control_);
  ASSERT_EQ(python.exit_code, 0) << python.err;
  EXPECT_EQ(StatusJson(), json::parse(python.out));

  const ProgramRun table = Nuwatch("control status --connect " + control_);
  EXPECT_EQ(table.exit_code, 0) << table.err;
  EXPECT_THAT(table.out, HasSubstr("1 stream(s)"));
  EXPECT_THAT(table.out, HasSubstr("STREAM"));
  EXPECT_THAT(table.out, ::testing::ContainsRegex("pump-01 +scoring +2 +30 "));

  const ProgramRun snapshot = Nuwatch("control snapshot --connect " + control_);
  EXPECT_EQ(snapshot.exit_code, 0) << snapshot.err;
  EXPECT_THAT(snapshot.out, ::testing::ContainsRegex("written +1"));
  EXPECT_TRUE(std::filesystem::exists(Path("state") + "/pump-01.state"));

  const ProgramRun relearn = Nuwatch("control relearn pump-01 --connect " + control_);
  EXPECT_EQ(relearn.exit_code, 0) << relearn.err;
  EXPECT_EQ(StatusJson()["streams"][0]["state"], "learning");

  // Rereads --config; the unchanged file gives no stream new settings.
  const ProgramRun reload = Nuwatch("control reload --connect " + control_);
  EXPECT_EQ(reload.exit_code, 0) << reload.err;
  EXPECT_THAT(reload.out, ::testing::ContainsRegex("streams_updated +0"));

  const ProgramRun forget = Nuwatch("control forget pump-01 --connect " + control_);
  EXPECT_EQ(forget.exit_code, 0) << forget.err;
  EXPECT_FALSE(std::filesystem::exists(Path("state") + "/pump-01.state"));
  EXPECT_TRUE(StatusJson()["streams"].empty());
  // The key is free again: its next vectors start a new stream from nothing.
  SendRows("pump-01", 5);
  ASSERT_TRUE(PollUntil([&] { return Vectors("pump-01") == 5; }));
}

TEST_F(Control, RefusalsUnknownCommandsAndSilenceAreErrors) {
  const ProgramRun unknown_stream = Nuwatch("control forget nosuch --connect " + control_);
  EXPECT_EQ(unknown_stream.exit_code, 1);
  EXPECT_EQ(unknown_stream.err,
            "nuwatch control: nuwatchd refused forget: unknown stream 'nosuch'\n");

  const ProgramRun unknown = Nuwatch("control stats --connect " + control_);
  EXPECT_EQ(unknown.exit_code, 1);
  EXPECT_THAT(unknown.err, HasSubstr("unknown command 'stats' (known: status, snapshot, relearn "
                                     "STREAM, reload, forget STREAM)"));

  const ProgramRun missing = Nuwatch("control relearn --connect " + control_);
  EXPECT_EQ(missing.exit_code, 1);
  EXPECT_THAT(missing.err, HasSubstr("relearn needs the stream key"));

  // The ingest socket (PULL) never completes a REQ handshake: the client says so instead of
  // waiting for ever. Which of its two reports comes depends on how ZeroMQ ends the handshake,
  // which varies from run to run (client_keys.cc): a protocol error leaves it to the timeout; a
  // close without a reason, seen on a few reconnects, is reported as such, naming the wrong kind
  // of socket as a cause (about 1 run in 10 here).
  const ProgramRun silent = Nuwatch("control status --connect " + ingest_ + " --timeout 0.3s");
  EXPECT_EQ(silent.exit_code, 1);
  EXPECT_THAT(silent.err,
              ::testing::AnyOf(
                  HasSubstr("no reply from " + ingest_ + " within --timeout 0.3s"),
                  HasSubstr(ingest_ + ": the connection closed during the handshake: the daemon "
                                      "may require CURVE (pass --client-key and --server-key), "
                                      "or this is the wrong kind of socket")));
}

// tail pointed at the ingest socket (PULL) used to wait in silence: ZeroMQ's handshake checks
// the socket types (ZMTP 3.1, rfc.zeromq.org/spec/37: SUB talks to PUB and XPUB only), and tail
// reports the refusal instead of waiting for its --timeout.
TEST_F(Control, TailOnANonPublishingSocketSaysSo) {
  const ProgramRun run = Nuwatch("tail --connect " + ingest_ + " --timeout 60s");
  EXPECT_EQ(run.exit_code, 1);
  EXPECT_THAT(run.err, HasSubstr("nuwatch tail: " + ingest_ +
                                 " is not a PUB socket: it refused the subscription"));
}

}  // namespace
