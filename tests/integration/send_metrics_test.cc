// nuwatch send --metrics against a real nuwatchd (issue 11 section 4: a command line that never
// fails silently): send reports, by reason, what the daemon rejected of its messages and exits 3
// when that is anything. The outside reference is the daemon's own /metrics page, scraped by the
// test over plain HTTP independently of send (tests/common/child_daemon.h), and the rejection
// rules of daemon/protocol/PROTOCOL.md §8 (dims_mismatch, stream_limit) that decide which of the
// rows the test constructs must be rejected.
#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/stat.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cstdlib>
#include <filesystem>
#include <memory>
#include <string>
#include <thread>
#include <vector>

#include "common/child_daemon.h"
#include "common/program_test.h"

namespace {

using nuwatch::testing_data::ChildProcess;
using nuwatch::testing_data::HttpGet;
using nuwatch::testing_data::ProgramRun;
using nuwatch::testing_data::ReadReadyFile;
using nuwatch::testing_data::ReadWholeFile;
using nuwatch::testing_data::SeriesValue;
using nuwatch::testing_data::SumOfSeries;
using ::testing::HasSubstr;
using ::testing::Not;

const std::string kNuwatch = NUWATCH_PROGRAM;
const std::string kNuwatchd = NUWATCHD_PROGRAM;

// An ipc endpoint for the control socket, which the test does not use: under the test's long
// scratch directory name the path would not fit a socket address (108 bytes, unix(7)).
std::string ShortIpcEndpoint() {
  static int made = 0;
  return "ipc://" + std::filesystem::temp_directory_path().string() + "/nwsend-" +
         std::to_string(::getpid()) + "-" + std::to_string(made++);
}

// nuwatchd with at most two streams, on loopback wildcard ports read back from its ready file.
class SendMetrics : public nuwatch::testing_data::ProgramTest {
 protected:
  void StartDaemon(const std::string& extra_config = "") {
    control_ = ShortIpcEndpoint();
    const std::string config = Write("nuwatchd.toml", R"([detector]
nu = 0.1
window = 40
warmup = 20
refit_every = 0

[limits]
max_streams = 2

[daemon]
# One scoring thread: which new stream takes the last place under max_streams follows the order
# of sending only on one thread (PROTOCOL.md §8, stream_limit). With two, "wide" and "third"
# are placed on two threads and either may take the place.
scoring_threads = 1
)" + extra_config);
    daemon_ = std::make_unique<ChildProcess>(
        std::vector<std::string>{kNuwatchd, "--config", config, "--ingest", "tcp://127.0.0.1:*",
                                 "--publish", "tcp://127.0.0.1:*", "--control", control_,
                                 "--metrics", "127.0.0.1:0", "--state-dir", Path("state"),
                                 "--ready-file", Path("ready.json")},
        Path("nuwatchd.log"));
    ASSERT_GT(daemon_->pid(), 0);
    // Polled, not slept: the ready file appears once every socket is bound.
    const auto until = std::chrono::steady_clock::now() + std::chrono::seconds(60);
    while (!std::filesystem::exists(Path("ready.json")) && std::chrono::steady_clock::now() < until)
      std::this_thread::sleep_for(std::chrono::milliseconds(20));
    ASSERT_TRUE(std::filesystem::exists(Path("ready.json"))) << ReadWholeFile(Path("nuwatchd.log"));
    const auto endpoints = ReadReadyFile(Path("ready.json"));
    ingest_ = endpoints.ingest.at(0);
    metrics_ = endpoints.metrics;
  }
  void TearDown() override {
    daemon_.reset();  // SIGKILL: the daemon cannot remove its ipc socket file itself
    if (!control_.empty()) std::filesystem::remove(control_.substr(std::string("ipc://").size()));
    ProgramTest::TearDown();
  }

  // `rows` of each (stream, count) in turn, `dims` features, one a second.
  std::string StreamFile(const std::string& name,
                         const std::vector<std::pair<std::string, int>>& rows, int dims) {
    // Appended piece by piece: GCC 12 warns falsely (-Wrestrict) on "," + std::to_string(...).
    std::string csv = "time,stream";
    for (int j = 0; j < dims; ++j) csv.append(",f").append(std::to_string(j));
    csv += '\n';
    int t = 1000;
    for (const auto& [stream, count] : rows) {
      for (int i = 0; i < count; ++i) {
        csv.append(std::to_string(t++)).append(",").append(stream);
        for (int j = 0; j < dims; ++j) csv.append(",").append(std::to_string((i * (j + 3)) % 7));
        csv += '\n';
      }
    }
    return Write(name, csv);
  }
  ProgramRun Send(const std::string& input, const std::string& flags = "") {
    return Run(kNuwatch, "send --connect " + ingest_ + " --input " + input + " " + flags);
  }
  // The daemon's rejection counter of `reason`, read by the test itself.
  double Rejected(const std::string& reason) {
    const std::string page = HttpGet(metrics_, "/metrics");
    EXPECT_FALSE(page.empty()) << "no /metrics page from " << metrics_;
    return SeriesValue(page, "nuwatch_rejected_messages_total{reason=\"" + reason + "\"}")
        .value_or(-1);
  }
  double AllRejected() {
    return SumOfSeries(HttpGet(metrics_, "/metrics"), "nuwatch_rejected_messages_total");
  }

  std::unique_ptr<ChildProcess> daemon_;
  std::string ingest_, metrics_, control_;
};

TEST_F(SendMetrics, ReportsWhatTheDaemonRejectedByReasonAndExits3) {
  StartDaemon();
  // "narrow" has two features from its first vector on (PROTOCOL.md §8, dims_mismatch).
  const ProgramRun first = Send(StreamFile("narrow.csv", {{"narrow", 5}}, 2));
  ASSERT_EQ(first.exit_code, 0) << first.err;

  const double dims_before = Rejected("dims_mismatch");
  const double streams_before = Rejected("stream_limit");
  const double all_before = AllRejected();
  // Three features: "wide" is new and becomes the second stream (accepted); "narrow" has two
  // (3 messages rejected: dims_mismatch); "third" would be a third stream beyond max_streams = 2
  // (2 messages rejected: stream_limit). --batch 1: one message per row, sent in file order.
  const std::string mixed = StreamFile("mixed.csv", {{"wide", 4}, {"narrow", 3}, {"third", 2}}, 3);
  const ProgramRun run = Send(mixed, "--metrics " + metrics_);
  EXPECT_EQ(run.exit_code, 3) << run.err;
  EXPECT_THAT(run.err, HasSubstr("rejected 5 message(s) during this send: dims_mismatch 3, "
                                 "stream_limit 2"));
  EXPECT_THAT(run.err, HasSubstr("daemon-wide"));
  // The daemon's own counters, scraped by the test: the same increases, and no other reason.
  EXPECT_EQ(Rejected("dims_mismatch") - dims_before, 3);
  EXPECT_EQ(Rejected("stream_limit") - streams_before, 2);
  EXPECT_EQ(AllRejected() - all_before, 5);

  // A clean input afterwards: nothing rejected, exit 0, and the counters unchanged.
  const ProgramRun clean = Send(StreamFile("wide.csv", {{"wide", 6}}, 3), "--metrics " + metrics_);
  EXPECT_EQ(clean.exit_code, 0) << clean.err;
  EXPECT_THAT(clean.err, HasSubstr(metrics_ + " rejected no messages during this send"));
  EXPECT_THAT(clean.err, Not(HasSubstr("daemon-wide")));
  EXPECT_EQ(AllRejected() - all_before, 5);
  // The same rows piped in on standard input (send's other path) are reported the same way.
  const std::string command = "cat " + mixed + " | " + kNuwatch + " send --connect " + ingest_ +
                              " --input - --metrics " + metrics_ + " 2>" + Path("piped.err");
  const int status = std::system(command.c_str());
  const std::string piped = ReadWholeFile(Path("piped.err"));
  EXPECT_TRUE(WIFEXITED(status) && WEXITSTATUS(status) == 3) << piped;
  EXPECT_THAT(piped, HasSubstr("rejected 5 message(s) during this send: dims_mismatch 3, "
                               "stream_limit 2"));
  EXPECT_EQ(AllRejected() - all_before, 10);
}

TEST_F(SendMetrics, UnchangedWithoutMetricsAndMetricsFlagErrorsAreOneLine) {
  StartDaemon();
  ASSERT_EQ(Send(StreamFile("narrow.csv", {{"narrow", 5}}, 2)).exit_code, 0);
  // Without --metrics, rejections stay invisible to send (ZeroMQ PUSH has no reply): exit 0, as
  // before; the daemon did count them.
  const double before = AllRejected();
  const ProgramRun blind = Send(StreamFile("wide.csv", {{"narrow", 2}}, 3));
  EXPECT_EQ(blind.exit_code, 0) << blind.err;
  EXPECT_THAT(blind.err, Not(HasSubstr("rejected")));
  const auto until = std::chrono::steady_clock::now() + std::chrono::seconds(60);
  while (AllRejected() - before < 2 && std::chrono::steady_clock::now() < until)
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  EXPECT_EQ(AllRejected() - before, 2);

  const std::string input = Path("wide.csv");
  const ProgramRun user_only = Send(input, "--metrics-user u");
  EXPECT_EQ(user_only.exit_code, 1);
  EXPECT_EQ(user_only.err, "nuwatch send: --metrics-user needs --metrics HOST:PORT\n");
  const ProgramRun url = Send(input, "--metrics http://" + metrics_);
  EXPECT_EQ(url.exit_code, 1);
  EXPECT_THAT(url.err, HasSubstr("is not HOST:PORT"));
  // Nothing listens on port 1: the error comes before any message is sent, so the daemon
  // processes nothing new.
  const double vectors = SumOfSeries(HttpGet(metrics_, "/metrics"), "nuwatch_vectors_total");
  const ProgramRun closed = Send(input, "--metrics 127.0.0.1:1");
  EXPECT_EQ(closed.exit_code, 1);
  EXPECT_THAT(closed.err, HasSubstr("--metrics: 127.0.0.1:1: connecting failed"));
  EXPECT_EQ(std::count(closed.err.begin(), closed.err.end(), '\n'), 1) << closed.err;
  EXPECT_EQ(SumOfSeries(HttpGet(metrics_, "/metrics"), "nuwatch_vectors_total"), vectors);
}

// With metrics.basic_auth_user, send needs the user and the password file, and says so on a 401
// (RFC 7617 basic authentication, as the daemon's exposer checks it).
TEST_F(SendMetrics, BasicAuthenticationIsAskedForAndUsed) {
  const std::string password = Write("password", "s3cret\n");
  ::chmod(password.c_str(), 0600);
  StartDaemon("\n[metrics]\nbasic_auth_user = \"scraper\"\nbasic_auth_password_file = \"" +
              password + "\"\n");
  const std::string input = StreamFile("a.csv", {{"a", 3}}, 2);
  const ProgramRun anonymous = Send(input, "--metrics " + metrics_);
  EXPECT_EQ(anonymous.exit_code, 1);
  EXPECT_THAT(anonymous.err, HasSubstr("401 Unauthorized: it requires basic authentication"));
  const std::string wrong = Write("wrong", "guess\n");
  ::chmod(wrong.c_str(), 0600);
  const ProgramRun refused = Send(
      input, "--metrics " + metrics_ + " --metrics-user scraper --metrics-password-file " + wrong);
  EXPECT_EQ(refused.exit_code, 1);
  EXPECT_THAT(refused.err, HasSubstr("the daemon refused --metrics-user and the password"));
  // The same reader as the daemon's: a password file others may read is refused before sending.
  const std::string open_file = Write("open", "s3cret\n");
  ::chmod(open_file.c_str(), 0644);
  const ProgramRun open_refused =
      Send(input, "--metrics " + metrics_ + " --metrics-user scraper --metrics-password-file " +
                      open_file);
  EXPECT_EQ(open_refused.exit_code, 1);
  EXPECT_THAT(open_refused.err, HasSubstr("readable by others; chmod 600"));
  const ProgramRun admitted =
      Send(input,
           "--metrics " + metrics_ + " --metrics-user scraper --metrics-password-file " + password);
  EXPECT_EQ(admitted.exit_code, 0) << admitted.err;
  EXPECT_THAT(admitted.err, HasSubstr("rejected no messages during this send"));
}

}  // namespace
