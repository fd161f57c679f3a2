// Tests of the TOML configuration loader. TOML itself is the TOML 1.0 specification
// (https://toml.io/en/v1.0.0), parsed by toml++; the glob semantics of [[stream]] `match` are
// POSIX fnmatch(3) with no flags (The Open Group Base Specifications, "Pattern Matching Notation").
// Expected positions in messages are counted by hand from the test texts: lines and columns are
// 1-based, a value's column is where its first character stands.
#include "settings/config.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>

#include <cctype>
#include <cstdio>
#include <fstream>
#include <set>
#include <sstream>
#include <string>

#include "common/detector_options_samples.h"
#include "settings/setting_text.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
using ::testing::StartsWith;

// The message of the ConfigError that ParseConfig throws for `text`; fails the test when it
// accepts the text.
std::string ErrorOf(const std::string& text) {
  try {
    ParseConfig(text, "t.toml");
  } catch (const ConfigError& error) {
    return error.what();
  }
  ADD_FAILURE() << "accepted:\n" << text;
  return "";
}

Config Parse(const std::string& text) { return ParseConfig(text, "t.toml"); }

std::string ReadText(const std::string& path) {
  std::ifstream in(path);
  std::ostringstream text;
  text << in.rdbuf();
  return text.str();
}

const std::string kSource = NUWATCH_SOURCE_DIR;

// ---------------------------------------------------------------------------------------------
// Defaults

TEST(ConfigDefaults, AreTheSpecifiedValues) {
  // The defaults the daemon's specification fixes (written out in config/REFERENCE.md).
  const Config config = DefaultConfig();
  const DaemonSettings& d = config.daemon;
  EXPECT_EQ(d.ingest_endpoints, std::vector<std::string>{"tcp://127.0.0.1:7601"});
  EXPECT_TRUE(d.subscribe_endpoints.empty());
  EXPECT_EQ(d.publish_endpoint, "tcp://127.0.0.1:7602");
  // Issue 10 §1: control on an ipc socket of the state or runtime directory by default, never
  // TCP without authentication unless the file says so.
  EXPECT_EQ(d.control_endpoint, "");
  EXPECT_FALSE(d.control_allow_unauthenticated_tcp);
  EXPECT_EQ(d.server_secret_key_file, "");
  EXPECT_EQ(d.client_keys, "");
  EXPECT_EQ(d.metrics_listen, "127.0.0.1:9464");
  EXPECT_EQ(d.state_dir, "");
  EXPECT_EQ(d.snapshot_interval_seconds, 300);
  EXPECT_EQ(d.log_level, "info");
  EXPECT_EQ(d.refit_threads, 1);
  EXPECT_EQ(d.scoring_threads, 0);
  EXPECT_EQ(d.max_streams, 1000);
  EXPECT_EQ(d.max_dims, 256);
  EXPECT_EQ(d.max_message_bytes, 4u * 1024 * 1024);
  EXPECT_EQ(d.max_vectors_per_message, 4096);
  EXPECT_EQ(d.receive_high_water_mark, 10000);
  EXPECT_EQ(d.publish_high_water_mark, 10000);
  EXPECT_EQ(d.anomaly_ratio_window, 1000);
  EXPECT_EQ(d.record_dir, "");
  EXPECT_EQ(d.record_rotate_bytes, 64u * 1024 * 1024);
  EXPECT_EQ(d.record_keep_files, 10);
  EXPECT_TRUE(d.publish_learning);
  EXPECT_TRUE(SameDetectorOptions(config.detector, DetectorOptions{}));
  EXPECT_TRUE(config.overrides.empty());
  EXPECT_EQ(config.source_path, "");
}

TEST(ConfigDefaults, DefaultsPassTheirOwnValidation) {
  EXPECT_NO_THROW(ValidateDaemonSettings(DaemonSettings{}, "defaults"));
  EXPECT_NO_THROW(ValidateDetectorOptions(DetectorOptions{}, "defaults"));
}

TEST(ConfigDefaults, AnEmptyFileGivesTheDefaults) {
  const Config config = ParseConfig("", "empty.toml");
  EXPECT_EQ(config.daemon, DefaultConfig().daemon);
  EXPECT_TRUE(SameDetectorOptions(config.detector, DefaultConfig().detector));
  EXPECT_TRUE(config.overrides.empty());
  EXPECT_EQ(config.source_path, "empty.toml");
}

// ---------------------------------------------------------------------------------------------
// Every key

TEST(ConfigParse, ReadsEveryKey) {
  // Every key set to a value other than its default, so that a key that is not read fails.
  const Config config = Parse(R"toml(
[daemon]
log_level = "debug"
refit_threads = 3

[ingest]
endpoints = ["tcp://127.0.0.1:8601", "ipc:///tmp/nuwatch-in"]
subscribe = ["tcp://127.0.0.1:8700"]
receive_high_water_mark = 500

[publish]
endpoint = "tcp://127.0.0.1:8602"
high_water_mark = 0
include_learning = false

[control]
endpoint = "tcp://127.0.0.1:8603"
allow_unauthenticated_tcp = true

[auth]
server_secret_key_file = "/etc/nuwatch/server.key_secret"
client_keys = "/etc/nuwatch/clients"

[metrics]
listen = "0.0.0.0:19464"
anomaly_ratio_window = 50

[state]
dir = "/var/lib/nuwatch"
snapshot_interval_seconds = 12.5

[limits]
max_streams = 7
max_dims = 8
max_message_bytes = 65536
max_vectors_per_message = 9

[recording]
dir = "/var/lib/nuwatch/rec"
rotate_bytes = 1000000
keep_files = 0

[detector]
nu = 0.125
kernel = "poly"
gamma = 0.75
degree = 2
coef0 = 1.5
scaler = "robust"
tolerance = 1e-4
max_iterations = 12345
cache_bytes = 2097152
window = 300
max_age_seconds = 3600.5
warmup = 150
refit_every = 0
max_model_age_seconds = 7200
cold_refit_every = 4
support_vector_budget = 64
learn_from_anomalies = true
drift_detection = true
drift_delta = 0.01
drift_lambda = 2.5
drift_min_samples = 40
open_after = 2
open_window = 4
close_after = 6
feature_names = ["a", "b", "c"]
)toml");
  const DaemonSettings& d = config.daemon;
  EXPECT_EQ(d.log_level, "debug");
  EXPECT_EQ(d.refit_threads, 3);
  EXPECT_EQ(d.ingest_endpoints,
            (std::vector<std::string>{"tcp://127.0.0.1:8601", "ipc:///tmp/nuwatch-in"}));
  EXPECT_EQ(d.subscribe_endpoints, std::vector<std::string>{"tcp://127.0.0.1:8700"});
  EXPECT_EQ(d.receive_high_water_mark, 500);
  EXPECT_EQ(d.publish_endpoint, "tcp://127.0.0.1:8602");
  EXPECT_EQ(d.publish_high_water_mark, 0);
  EXPECT_FALSE(d.publish_learning);
  EXPECT_EQ(d.control_endpoint, "tcp://127.0.0.1:8603");
  EXPECT_TRUE(d.control_allow_unauthenticated_tcp);
  EXPECT_EQ(d.server_secret_key_file, "/etc/nuwatch/server.key_secret");
  EXPECT_EQ(d.client_keys, "/etc/nuwatch/clients");
  EXPECT_EQ(d.metrics_listen, "0.0.0.0:19464");
  EXPECT_EQ(d.anomaly_ratio_window, 50);
  EXPECT_EQ(d.state_dir, "/var/lib/nuwatch");
  EXPECT_EQ(d.snapshot_interval_seconds, 12.5);
  EXPECT_EQ(d.max_streams, 7);
  EXPECT_EQ(d.max_dims, 8);
  EXPECT_EQ(d.max_message_bytes, 65536u);
  EXPECT_EQ(d.max_vectors_per_message, 9);
  EXPECT_EQ(d.record_dir, "/var/lib/nuwatch/rec");
  EXPECT_EQ(d.record_rotate_bytes, 1000000u);
  EXPECT_EQ(d.record_keep_files, 0);

  const DetectorOptions& o = config.detector;
  EXPECT_EQ(o.nu, 0.125);
  EXPECT_EQ(o.kernel, KernelType::kPolynomial);
  EXPECT_EQ(o.gamma.mode, GammaSpec::Mode::kValue);
  EXPECT_EQ(o.gamma.value, 0.75);
  EXPECT_EQ(o.degree, 2);
  EXPECT_EQ(o.coef0, 1.5);
  EXPECT_EQ(o.scaler, ScalerType::kRobust);
  EXPECT_EQ(o.tolerance, 1e-4);
  EXPECT_EQ(o.max_iterations, 12345);
  EXPECT_EQ(o.cache_bytes, 2097152u);
  EXPECT_EQ(o.window, 300);
  EXPECT_EQ(o.max_age_seconds, 3600.5);
  EXPECT_EQ(o.warmup, 150);
  EXPECT_EQ(o.refit_every, 0);
  EXPECT_EQ(o.max_model_age_seconds, 7200);
  EXPECT_EQ(o.cold_refit_every, 4);
  EXPECT_EQ(o.support_vector_budget, 64);
  EXPECT_TRUE(o.learn_from_anomalies);
  EXPECT_TRUE(o.drift_detection);
  EXPECT_EQ(o.drift_delta, 0.01);
  EXPECT_EQ(o.drift_lambda, 2.5);
  EXPECT_EQ(o.drift_min_samples, 40);
  EXPECT_EQ(o.open_after, 2);
  EXPECT_EQ(o.open_window, 4);
  EXPECT_EQ(o.close_after, 6);
  EXPECT_EQ(o.feature_names, (std::vector<std::string>{"a", "b", "c"}));
}

TEST(ConfigParse, GammaTakesAModeNameOrANumber) {
  EXPECT_EQ(Parse("[detector]\ngamma = \"scale\"\n").detector.gamma.mode, GammaSpec::Mode::kScale);
  EXPECT_EQ(Parse("[detector]\ngamma = \"median\"\n").detector.gamma.mode,
            GammaSpec::Mode::kMedian);
  EXPECT_EQ(Parse("[detector]\ngamma = \"min_volume\"\n").detector.gamma.mode,
            GammaSpec::Mode::kMinVolume);
  // And back: the written configuration reads as the same choice.
  DetectorOptions min_volume;
  min_volume.gamma = *GammaSpec::Parse("min_volume");
  const std::string text = DescribeDetectorOptions(min_volume);
  EXPECT_THAT(text, HasSubstr("\ngamma = \"min_volume\"\n"));
  EXPECT_EQ(Parse(text).detector.gamma.mode, GammaSpec::Mode::kMinVolume);
  // Where it has no meaning, the configuration is refused with the keys named.
  EXPECT_THAT(ErrorOf("[detector]\ngamma = \"min_volume\"\nkernel = \"linear\"\n"),
              HasSubstr("gamma = \"min_volume\" needs detector.kernel = \"rbf\""));
  // A TOML integer where a number is expected is that number (TOML keeps 2 and 2.0 apart; a
  // user who writes gamma = 2 means 2).
  const GammaSpec two = Parse("[detector]\ngamma = 2\n").detector.gamma;
  EXPECT_EQ(two.mode, GammaSpec::Mode::kValue);
  EXPECT_EQ(two.value, 2.0);
  EXPECT_EQ(Parse("[detector]\nnu = 1\n").detector.nu, 1.0);
}

TEST(ConfigParse, AcceptsOtherTomlSpellingsOfTheSameTables) {
  // TOML 1.0 §Keys (dotted keys) and §Inline Table: the same table written three ways.
  for (const std::string text :
       {"[detector]\nwindow = 900\n", "detector.window = 900\n", "detector = { window = 900 }\n"}) {
    EXPECT_EQ(Parse(text).detector.window, 900) << text;
  }
  EXPECT_EQ(Parse("stream = [{ match = \"a*\", nu = 0.5 }]\n").overrides.at(0).values.nu, 0.5);
}

// ---------------------------------------------------------------------------------------------
// Unknown keys

TEST(ConfigErrors, UnknownKeyNamesLineAndSuggestsTheClosestKey) {
  // "refit_evry" is one insertion away from "refit_every".
  EXPECT_EQ(ErrorOf("[detector]\nnu = 0.1\nrefit_evry = 10\n"),
            "t.toml:3:1: key 'detector.refit_evry' is not a known key (did you mean "
            "'refit_every'?)");
  // "nuu": one deletion from "nu".
  EXPECT_EQ(ErrorOf("[detector]\n  nuu = 0.1\n"),
            "t.toml:2:3: key 'detector.nuu' is not a known key (did you mean 'nu'?)");
  // "wnidwo" is "window" with two neighbour swaps: 2 edits when swaps count as one (optimal
  // string alignment), 4 for plain Levenshtein; the limit for 6 letters is max(2, 6 / 3) = 2.
  EXPECT_THAT(ErrorOf("[detector]\nwnidwo = 100\n"), HasSubstr("(did you mean 'window'?)"));
  // "winxyz" is 3 substitutions from "window", over that limit: no suggestion.
  EXPECT_EQ(ErrorOf("[detector]\nwinxyz = 100\n"),
            "t.toml:2:1: key 'detector.winxyz' is not a known key");
  // Case is ignored when looking for a suggestion; the key itself is still unknown.
  EXPECT_THAT(ErrorOf("[detector]\nNU = 0.1\n"), HasSubstr("(did you mean 'nu'?)"));
}

TEST(ConfigErrors, UnknownSectionSuggestsTheClosestSection) {
  EXPECT_EQ(ErrorOf("\n[detectr]\nnu = 0.1\n"),
            "t.toml:2:2: section 'detectr' is not a known section (did you mean 'detector'?)");
  EXPECT_EQ(ErrorOf("[[streams]]\nmatch = \"a\"\n"),
            "t.toml:1:3: section 'streams' is not a known section (did you mean 'stream'?)");
}

TEST(ConfigErrors, AKnownKeyInTheWrongPlaceNamesItsSection) {
  EXPECT_EQ(ErrorOf("nu = 0.1\n"),
            "t.toml:1:1: key 'nu' is not a known key at the top level (did you mean "
            "'detector.nu'?)");
  // "receive_high_water_mark" is 8 edits from [publish]'s "high_water_mark", more than
  // max(2, 23 / 3) = 7, so no in-table suggestion; the key exists in [ingest].
  EXPECT_EQ(ErrorOf("[publish]\nreceive_high_water_mark = 5\n"),
            "t.toml:2:1: key 'publish.receive_high_water_mark' is not a known key (did you mean "
            "'ingest.receive_high_water_mark'?)");
}

TEST(ConfigErrors, FarFromEveryKeyThereIsNoSuggestion) {
  EXPECT_EQ(ErrorOf("[detector]\ncolour = 1\n"),
            "t.toml:2:1: key 'detector.colour' is not a known key");
  // A small table lists its keys instead.
  EXPECT_EQ(ErrorOf("[metrics]\ncolour = 1\n"),
            "t.toml:2:1: key 'metrics.colour' is not a known key (known keys here: listen, "
            "basic_auth_user, basic_auth_password_file, anomaly_ratio_window)");
}

TEST(ConfigErrors, TheFirstErrorInTheFileIsReported) {
  // toml++ keeps a table's keys sorted; the report follows the file instead: "zz" comes first.
  EXPECT_THAT(ErrorOf("[detector]\nzz_unknown = 1\naa_unknown = 2\n"),
              StartsWith("t.toml:2:1: key 'detector.zz_unknown'"));
}

// ---------------------------------------------------------------------------------------------
// Types

TEST(ConfigErrors, WrongTypesNameTheExpectedType) {
  EXPECT_EQ(ErrorOf("[detector]\nnu = \"high\"\n"),
            "t.toml:2:6: key 'detector.nu' must be a number, not the string \"high\"");
  EXPECT_EQ(ErrorOf("[detector]\nwindow = 720.5\n"),
            "t.toml:2:10: key 'detector.window' must be an integer, not a floating-point number");
  // TOML tells 720 from 720.0; an integer key does not take a float even when it is whole.
  EXPECT_THAT(ErrorOf("[detector]\nwindow = 720.0\n"), HasSubstr("must be an integer"));
  EXPECT_EQ(ErrorOf("[detector]\nkernel = \"gauss\"\n"),
            "t.toml:2:10: key 'detector.kernel' must be one of \"rbf\", \"linear\", \"poly\", not "
            "the string \"gauss\"");
  EXPECT_THAT(ErrorOf("[detector]\nscaler = 1\n"),
              HasSubstr("key 'detector.scaler' must be one of \"none\", \"standard\", \"robust\", "
                        "not an integer"));
  EXPECT_THAT(ErrorOf("[detector]\ngamma = true\n"),
              HasSubstr("key 'detector.gamma' must be \"scale\", \"median\", \"min_volume\" or a "
                        "positive number, not a boolean"));
  EXPECT_THAT(ErrorOf("[detector]\ngamma = \"wide\"\n"), HasSubstr("not the string \"wide\""));
  EXPECT_EQ(ErrorOf("[detector]\nfeature_names = [\"a\", 3]\n"),
            "t.toml:2:23: key 'detector.feature_names' must be an array of strings; element 2 is "
            "an integer");
  EXPECT_THAT(ErrorOf("[detector]\ndrift_detection = \"yes\"\n"),
              HasSubstr("key 'detector.drift_detection' must be a boolean (true or false), not "
                        "the string \"yes\""));
  EXPECT_THAT(ErrorOf("[publish]\ninclude_learning = 1\n"),
              HasSubstr("key 'publish.include_learning' must be a boolean"));
  EXPECT_THAT(ErrorOf("[ingest]\nendpoints = \"tcp://127.0.0.1:7601\"\n"),
              HasSubstr("key 'ingest.endpoints' must be an array of strings, not the string"));
  EXPECT_THAT(ErrorOf("[state]\nsnapshot_interval_seconds = 1979-05-27\n"),
              HasSubstr("must be a number, not a date"));
}

TEST(ConfigErrors, SectionsMustBeTables) {
  EXPECT_EQ(ErrorOf("detector = 3\n"),
            "t.toml:1:12: key 'detector' must be a table ([detector]), not an integer");
  EXPECT_THAT(ErrorOf("[stream]\nmatch = \"a\"\n"),
              HasSubstr("'stream' must be an array of tables: write [[stream]]"));
  EXPECT_THAT(ErrorOf("stream = [1]\n"), HasSubstr("each 'stream' entry must be a table"));
}

TEST(ConfigErrors, IntegersOutsideTheirTypeAreRejected) {
  EXPECT_EQ(ErrorOf("[detector]\ndegree = 3000000000\n"),
            "t.toml:2:10: detector.degree = 3000000000 is out of range [-2147483648, "
            "2147483647]");
  EXPECT_EQ(ErrorOf("[detector]\ncache_bytes = -1\n"),
            "t.toml:2:15: detector.cache_bytes = -1 must not be negative");
}

// ---------------------------------------------------------------------------------------------
// Ranges

TEST(ConfigErrors, OutOfRangeDetectorValuesNameFileLineAndKey) {
  // nu in (0, 1]: Schölkopf et al. 2001, Prop. 4 (nu bounds fractions, so it lies in (0, 1]).
  EXPECT_EQ(ErrorOf("[detector]\nnu = 1.5\n"), "t.toml:2:6: detector.nu = 1.5 is outside (0, 1]");
  EXPECT_EQ(ErrorOf("[detector]\nnu = 0\n"), "t.toml:2:6: detector.nu = 0 is outside (0, 1]");
  EXPECT_EQ(Parse("[detector]\nnu = 1.0\n").detector.nu, 1.0);  // the closed end
  EXPECT_EQ(ErrorOf("[detector]\nnu = nan\n"), "t.toml:2:6: detector.nu = nan is not finite");

  EXPECT_EQ(ErrorOf("[detector]\nwindow = 1\nwarmup = 1\n"),
            "t.toml:2:10: detector.window = 1 is outside [2, 10000000]");
  EXPECT_EQ(Parse("[detector]\nwarmup = 0\n").detector.warmup, 0);  // the whole window
  // Regression: warmup = 1 loaded but the detector refuses a one-row first fit.
  EXPECT_EQ(ErrorOf("[detector]\nwarmup = 1\n"),
            "t.toml:2:10: detector.warmup = 1 must be at least 2 (0: the whole window)");
  EXPECT_EQ(ErrorOf("[detector]\nrefit_every = -1\n"),
            "t.toml:2:15: detector.refit_every = -1 must not be negative (0: fit once, never "
            "refit)");
  EXPECT_EQ(Parse("[detector]\nrefit_every = 0\n").detector.refit_every, 0);
  EXPECT_EQ(ErrorOf("[detector]\nsupport_vector_budget = 0\n"),
            "t.toml:2:25: detector.support_vector_budget = 0 must be at least 1");
  EXPECT_EQ(ErrorOf("[detector]\ngamma = -0.5\n"),
            "t.toml:2:9: detector.gamma = -0.5 must be positive (or \"scale\", \"median\" or "
            "\"min_volume\")");
  EXPECT_THAT(ErrorOf("[detector]\ngamma = 0\n"), HasSubstr("detector.gamma = 0 must be positive"));
  EXPECT_THAT(ErrorOf("[detector]\ngamma = inf\n"),
              HasSubstr("detector.gamma = inf is not finite"));
  EXPECT_THAT(ErrorOf("[detector]\ndegree = 0\n"),
              HasSubstr("detector.degree = 0 must be at least 1"));
  EXPECT_THAT(ErrorOf("[detector]\ntolerance = 0\n"),
              HasSubstr("detector.tolerance = 0 must be positive"));
  EXPECT_THAT(ErrorOf("[detector]\ncache_bytes = 64\n"),
              HasSubstr("detector.cache_bytes = 64 must be at least 1048576 (1 MiB)"));
  EXPECT_THAT(ErrorOf("[detector]\ncold_refit_every = 0\n"), HasSubstr("must be at least 1"));
  EXPECT_THAT(ErrorOf("[detector]\nmax_age_seconds = -1\n"), HasSubstr("must not be negative"));
  EXPECT_THAT(ErrorOf("[detector]\ndrift_lambda = 0\n"), HasSubstr("must be positive"));
  EXPECT_THAT(ErrorOf("[detector]\nclose_after = 0\n"), HasSubstr("must be at least 1"));
  EXPECT_EQ(ErrorOf("[detector]\nfeature_names = [\"flow\", \"\"]\n"),
            "t.toml:2:17: detector.feature_names has an empty name at position 2");
  EXPECT_EQ(ErrorOf("[detector]\nfeature_names = [\"flow\", \"flow\"]\n"),
            "t.toml:2:17: detector.feature_names names \"flow\" twice");
}

TEST(ConfigErrors, ConstraintsBetweenKeysPointAtTheKeyTheFileSet) {
  // warmup must not exceed window. With the default window (8640) the file set warmup...
  EXPECT_EQ(ErrorOf("[detector]\nwarmup = 9000\n"),
            "t.toml:2:10: detector.warmup = 9000 must not exceed detector.window = 8640");
  // ...and with both set, at the first key of the rule.
  EXPECT_EQ(ErrorOf("[detector]\nwarmup = 500\nwindow = 100\n"),
            "t.toml:2:10: detector.warmup = 500 must not exceed detector.window = 100");
  // The default warmup (0) is the whole window, whatever the window.
  EXPECT_EQ(Parse("[detector]\nwindow = 100\n").detector.warmup, 0);
  const Config equal = Parse("[detector]\nwindow = 100\nwarmup = 100\n");  // the closed end
  EXPECT_EQ(equal.detector.warmup, equal.detector.window);
  // open_after of the last open_window: k of m needs k <= m.
  EXPECT_EQ(ErrorOf("[detector]\nopen_after = 6\n"),
            "t.toml:2:14: detector.open_after = 6 must not exceed detector.open_window = 5");
  EXPECT_NO_THROW(Parse("[detector]\nopen_after = 5\n"));
}

TEST(ConfigErrors, OutOfRangeDaemonValuesNameFileLineAndKey) {
  EXPECT_EQ(ErrorOf("[metrics]\nlisten = \"9464\"\n"),
            "t.toml:2:10: metrics.listen = \"9464\" must be HOST:PORT, e.g. 127.0.0.1:9464 (port "
            "0: any free port)");
  EXPECT_THAT(ErrorOf("[metrics]\nlisten = \"127.0.0.1:70000\"\n"), HasSubstr("HOST:PORT"));
  EXPECT_EQ(Parse("[metrics]\nlisten = \"[::1]:0\"\n").daemon.metrics_listen, "[::1]:0");
  EXPECT_EQ(ErrorOf("[ingest]\nendpoints = []\n"),
            "t.toml:2:13: ingest.endpoints and ingest.subscribe are both empty: the daemon would "
            "receive nothing");
  EXPECT_TRUE(Parse("[ingest]\nendpoints = []\nsubscribe = [\"tcp://127.0.0.1:7700\"]\n")
                  .daemon.ingest_endpoints.empty());
  EXPECT_EQ(ErrorOf("[ingest]\nendpoints = [\"tcp://127.0.0.1:7601\", \"127.0.0.1:7604\"]\n"),
            "t.toml:2:13: ingest.endpoints element 2 = \"127.0.0.1:7604\" is not a ZeroMQ "
            "endpoint (TRANSPORT://ADDRESS, e.g. tcp://127.0.0.1:7601)");
  EXPECT_THAT(ErrorOf("[publish]\nendpoint = \"\"\n"),
              HasSubstr("t.toml:2:12: publish.endpoint = \"\" is not a ZeroMQ endpoint"));
  EXPECT_EQ(ErrorOf("[control]\nendpoint = \"tcp://127.0.0.1:7602\"\n"
                    "allow_unauthenticated_tcp = true\n"),
            "t.toml:2:12: control.endpoint = \"tcp://127.0.0.1:7602\" is also bound by "
            "publish.endpoint; each socket needs its own endpoint");
  // Ephemeral ports may repeat: each bind picks its own port.
  EXPECT_NO_THROW(
      Parse("[ingest]\nendpoints = [\"tcp://127.0.0.1:*\"]\n[publish]\nendpoint = "
            "\"tcp://127.0.0.1:*\"\n[control]\nendpoint = \"tcp://127.0.0.1:*\"\n"
            "allow_unauthenticated_tcp = true\n"));
  EXPECT_THAT(ErrorOf("[daemon]\nlog_level = \"verbose\"\n"),
              HasSubstr("t.toml:2:13: daemon.log_level = \"verbose\" must be one of"));
  EXPECT_THAT(ErrorOf("[daemon]\nrefit_threads = 0\n"), HasSubstr("must be at least 1"));
  // PROTOCOL.md §9.5: the result form is JSON or the binary batch, nothing else.
  EXPECT_EQ(Parse("[publish]\nresult_form = \"binary\"\n").daemon.publish_result_form, "binary");
  EXPECT_THAT(ErrorOf("[publish]\nresult_form = \"msgpack\"\n"),
              HasSubstr("t.toml:2:15: publish.result_form = \"msgpack\" must be one of \"json\", "
                        "\"binary\""));
  EXPECT_THAT(ErrorOf("[state]\nsnapshot_interval_seconds = 0\n"),
              HasSubstr("state.snapshot_interval_seconds = 0 must be positive"));
  // PROTOCOL.md §7: dims 1..65535, a payload of at least 28 bytes.
  EXPECT_THAT(ErrorOf("[limits]\nmax_dims = 65536\n"),
              HasSubstr("limits.max_dims = 65536 is outside [1, 65535]"));
  EXPECT_THAT(ErrorOf("[limits]\nmax_message_bytes = 27\n"),
              HasSubstr("limits.max_message_bytes = 27 is outside [28, 1073741824]"));
  EXPECT_THAT(ErrorOf("[limits]\nmax_streams = 0\n"), HasSubstr("must be at least 1"));
  EXPECT_THAT(ErrorOf("[ingest]\nreceive_high_water_mark = -1\n"), HasSubstr("not be negative"));
  EXPECT_THAT(ErrorOf("[ingest]\nmax_unread_bytes = -1\n"),
              HasSubstr("ingest.max_unread_bytes = -1 is outside [0, 1099511627776]"));
  EXPECT_THAT(ErrorOf("[ingest]\nscoring_queue_bytes = 0\n"),
              HasSubstr("ingest.scoring_queue_bytes = 0 is outside [1, 1099511627776]"));
  EXPECT_THAT(ErrorOf("[recording]\nkeep_files = -1\n"), HasSubstr("not be negative"));
  EXPECT_THAT(ErrorOf("[recording]\nrotate_bytes = 0\n"), HasSubstr("must be at least 1"));
  EXPECT_THAT(ErrorOf("[metrics]\nanomaly_ratio_window = 0\n"),
              HasSubstr("is outside [1, 10000000]"));
}

// Regression, issue 10: a window of 2^63 - 1 passed the checks (window >= 2) and a reload then
// half-applied it: the first learning stream's window (8 x features x window bytes) could not be
// allocated, and the exception escaped the reload. Values that size an allocation made up front
// now have a ceiling, so such a file is refused whole before anything changes.
TEST(ConfigRegression, AWindowOf2To63Minus1IsRefused) {
  EXPECT_THAT(ErrorOf("[detector]\nwindow = 9223372036854775807\n"),
              HasSubstr("detector.window = 9223372036854775807 is outside [2, 10000000]"));
  EXPECT_THAT(ErrorOf("[[stream]]\nmatch = \"pump-*\"\nwindow = 9223372036854775807\n"),
              HasSubstr("window = 9223372036854775807 is outside [2, 10000000]"));
  EXPECT_THAT(ErrorOf("[detector]\nopen_window = 2147483647\n"),
              HasSubstr("is outside [1, 1000000]"));
  EXPECT_THAT(ErrorOf("[metrics]\nanomaly_ratio_window = 9223372036854775807\n"),
              HasSubstr("is outside [1, 10000000]"));
  EXPECT_EQ(Parse("[detector]\nwindow = 10000000\n").detector.window, 10000000);
}

// Regression, issue 10: max_message_bytes = 2^62 made the ZeroMQ frame limit (2 x the value +
// 4096, as int64) overflow to a negative number, which ZeroMQ reads as "no limit".
TEST(ConfigRegression, MaxMessageBytesNear2To62IsRefused) {
  EXPECT_THAT(ErrorOf("[limits]\nmax_message_bytes = 4611686018427387904\n"),
              HasSubstr("limits.max_message_bytes = 4611686018427387904 is outside [28, "
                        "1073741824]"));
  EXPECT_EQ(Parse("[limits]\nmax_message_bytes = 1073741824\n").daemon.max_message_bytes,
            std::size_t{1} << 30);
}

TEST(ConfigErrors, FeatureNamesMustFitTheDimsLimit) {
  EXPECT_EQ(ErrorOf("[limits]\nmax_dims = 2\n[detector]\nfeature_names = [\"a\", \"b\", \"c\"]\n"),
            "t.toml:4:17: detector.feature_names has 3 names but limits.max_dims = 2");
}

TEST(ValidateOptions, NamesTheCallerAndTheValue) {
  DetectorOptions options;
  options.nu = 1.5;
  try {
    ValidateDetectorOptions(options, "nuwatch replay");
    FAIL() << "nu = 1.5 accepted";
  } catch (const ConfigError& error) {
    EXPECT_STREQ(error.what(), "nuwatch replay: nu = 1.5 is outside (0, 1]");
  }
  options = DetectorOptions{};
  options.window = 10;
  options.warmup = 500;
  try {
    ValidateDetectorOptions(options, "nuwatch tune");
    FAIL() << "warmup > window accepted";
  } catch (const ConfigError& error) {
    EXPECT_STREQ(error.what(), "nuwatch tune: warmup = 500 must not exceed window = 10");
  }
  DaemonSettings settings;
  settings.state_dir = "/tmp/x";
  settings.publish_endpoint = settings.ingest_endpoints.front();
  try {
    ValidateDaemonSettings(settings, "nuwatchd");
    FAIL() << "shared endpoint accepted";
  } catch (const ConfigError& error) {
    EXPECT_THAT(error.what(), StartsWith("nuwatchd: publish.endpoint = \"tcp://127.0.0.1:7601\""));
  }
}

// ---------------------------------------------------------------------------------------------
// Per-stream overrides

const char kOverrides[] = R"toml([detector]
nu = 0.05
window = 1000
warmup = 100

[[stream]]
match = "pump-0[1-3]"
nu = 0.01

[[stream]]
match = "pump-0*"
window = 500
nu = 0.02

[[stream]]
match = "pump-?"
nu = 0.03

[[stream]]
match = "site/*"
nu = 0.04
)toml";

TEST(StreamOverrides, TheFirstMatchingTableWinsWhole) {
  const Config config = Parse(kOverrides);
  ASSERT_EQ(config.overrides.size(), 4u);
  // pump-01 matches both "pump-0[1-3]" and "pump-0*"; the first wins, and only its keys apply:
  // window stays at [detector]'s 1000 although the second table sets 500.
  const DetectorOptions pump01 = DetectorOptionsFor(config, "pump-01");
  EXPECT_EQ(pump01.nu, 0.01);
  EXPECT_EQ(pump01.window, 1000);
  EXPECT_EQ(pump01.warmup, 100);
  const DetectorOptions pump05 = DetectorOptionsFor(config, "pump-05");  // outside [1-3]
  EXPECT_EQ(pump05.nu, 0.02);
  EXPECT_EQ(pump05.window, 500);
  EXPECT_EQ(DetectorOptionsFor(config, "pump-0").nu, 0.02);    // '*' matches the empty string
  EXPECT_EQ(DetectorOptionsFor(config, "pump-7").nu, 0.03);    // '?' matches one character...
  EXPECT_EQ(DetectorOptionsFor(config, "pump-77").nu, 0.05);   // ...and not two
  EXPECT_EQ(DetectorOptionsFor(config, "Pump-01").nu, 0.05);   // keys compare case-sensitively
  EXPECT_EQ(DetectorOptionsFor(config, "xpump-01").nu, 0.05);  // patterns match the whole key
  // Without FNM_PATHNAME, '*' also matches '/'.
  EXPECT_EQ(DetectorOptionsFor(config, "site/hall-2/pump-01").nu, 0.04);
}

TEST(StreamOverrides, RecordTheirKeysAndOrigin) {
  const Config config = Parse(kOverrides);
  const auto* second = MatchingOverride(config, "pump-09");
  ASSERT_NE(second, nullptr);
  EXPECT_EQ(second->match, "pump-0*");
  EXPECT_EQ(second->keys, (std::vector<std::string>{"window", "nu"}));  // file order
  EXPECT_EQ(second->origin, "t.toml:10");
  EXPECT_EQ(MatchingOverride(config, "boiler-1"), nullptr);
  EXPECT_TRUE(SameDetectorOptions(DetectorOptionsFor(config, "boiler-1"), config.detector));
}

TEST(StreamOverrides, AnEmptyTableExemptsStreamsFromLaterTables) {
  const Config config =
      Parse("[[stream]]\nmatch = \"pump-01\"\n\n[[stream]]\nmatch = \"pump-*\"\nnu = 0.2\n");
  EXPECT_EQ(DetectorOptionsFor(config, "pump-01").nu, DetectorOptions{}.nu);
  EXPECT_EQ(DetectorOptionsFor(config, "pump-02").nu, 0.2);
}

TEST(StreamOverrides, AreValidatedOnTopOfTheDetectorSection) {
  // The override's window is checked against [detector]'s warmup.
  EXPECT_EQ(ErrorOf("[detector]\nwarmup = 500\n[[stream]]\nmatch = \"x*\"\nwindow = 100\n"),
            "t.toml:5:10: detector.warmup = 500 must not exceed stream.window = 100");
  EXPECT_EQ(ErrorOf("[[stream]]\nmatch = \"x*\"\nnu = 2\n"),
            "t.toml:3:6: stream.nu = 2 is outside (0, 1]");
  EXPECT_EQ(ErrorOf("[[stream]]\nmatch = \"x*\"\nnuu = 0.1\n"),
            "t.toml:3:1: key 'stream.nuu' is not a known key (did you mean 'nu'?)");
  EXPECT_THAT(ErrorOf("[[stream]]\nmatch = \"x*\"\nlog_level = \"debug\"\n"),
              HasSubstr("(did you mean 'daemon.log_level'?)"));
}

TEST(StreamOverrides, NeedAUsefulPattern) {
  EXPECT_EQ(ErrorOf("[[stream]]\nnu = 0.1\n"),
            "t.toml:1:1: [[stream]] has no 'match' key (a glob on the stream key, e.g. match = "
            "\"pump-0*\")");
  EXPECT_THAT(ErrorOf("[[stream]]\nmatch = \"\"\n"),
              StartsWith("t.toml:2:9: stream.match is empty"));
  EXPECT_THAT(ErrorOf("[[stream]]\nmatch = 3\n"),
              HasSubstr("key 'stream.match' must be a string, not an integer"));
  EXPECT_EQ(ErrorOf("[[stream]]\nmatch = \"a*\"\n[[stream]]\nmatch = \"a*\"\nnu = 0.1\n"),
            "t.toml:4:9: stream.match = \"a*\" repeats the [[stream]] at t.toml:1; the first "
            "match wins, so this one would never apply");
}

// ---------------------------------------------------------------------------------------------
// The shipped files

TEST(ShippedConfig, TheDefaultFileEqualsTheDefaults) {
  const std::string path = kSource + "/config/nuwatchd.toml";
  const Config config = LoadConfig(path);
  EXPECT_EQ(config.daemon, DefaultConfig().daemon);
  EXPECT_TRUE(SameDetectorOptions(config.detector, DefaultConfig().detector))
      << DescribeDetectorOptions(config.detector);
  EXPECT_TRUE(config.overrides.empty());
  EXPECT_EQ(config.source_path, path);
}

TEST(ShippedConfig, TheDefaultFileSetsEveryKey) {
  // Read the file's "key = value" lines under their [section] headers: every known key must be
  // there, set (not commented out), so that the equality test above covers it.
  std::istringstream lines(ReadText(kSource + "/config/nuwatchd.toml"));
  std::set<std::string> present;
  std::string section;
  for (std::string line; std::getline(lines, line);) {
    if (line.starts_with("[") && !line.starts_with("[[")) {
      section = line.substr(1, line.find(']') - 1);
    } else if (!line.empty() && std::islower(static_cast<unsigned char>(line[0]))) {
      present.insert(section + "." + line.substr(0, line.find(' ')));
    }
  }
  for (const std::string& key : KnownConfigKeys()) {
    if (key == "stream.match") continue;  // only in the commented [[stream]] example
    EXPECT_TRUE(present.count(key)) << key << " is missing from config/nuwatchd.toml";
  }
  EXPECT_EQ(present.size(), KnownConfigKeys().size() - 1);
}

TEST(ShippedConfig, TheReferenceDocumentsEveryKey) {
  const std::string reference = ReadText(kSource + "/config/REFERENCE.md");
  ASSERT_FALSE(reference.empty());
  for (const std::string& key : KnownConfigKeys()) {
    EXPECT_THAT(reference, HasSubstr("`" + key + "`")) << key << " is not in REFERENCE.md";
  }
}

// config/nuwatchd.toml is generated from the key tables, so its comments, defaults, units, ranges
// and restart marks cannot drift from the code. After adding a key:
//   build/bin/nuwatchd --print-defaults > config/nuwatchd.toml
TEST(ShippedConfig, TheDefaultFileIsTheOneTheTablesGenerate) {
  EXPECT_EQ(ReadText(kSource + "/config/nuwatchd.toml"), DefaultConfigToml())
      << "config/nuwatchd.toml is out of date: build/bin/nuwatchd --print-defaults > "
         "config/nuwatchd.toml";
  const Config config = ParseConfig(DefaultConfigToml(), "generated.toml");
  EXPECT_EQ(config.daemon, DefaultConfig().daemon);
  EXPECT_TRUE(SameDetectorOptions(config.detector, DefaultConfig().detector));
}

// The TOML text of a key's default as REFERENCE.md writes it in each key's header line
// ("integer · default `2000` · vectors · >= 2"): numbers without a forced ".0", strings quoted.
template <class S>
std::string ReferenceDefault(const Setting<S>& setting, const S& defaults) {
  return std::visit(
      [&](auto pointer) -> std::string {
        using T = std::remove_cvref_t<decltype(defaults.*pointer)>;
        const T& value = defaults.*pointer;
        if constexpr (std::is_same_v<T, double>) return SettingNumberText(value);
        if constexpr (std::is_same_v<T, bool>) return value ? "true" : "false";
        if constexpr (std::is_integral_v<T>) return std::to_string(value);
        if constexpr (std::is_same_v<T, std::vector<std::string>> ||
                      std::is_same_v<T, std::vector<int64_t>>) {
          std::string out = "[";
          for (std::size_t i = 0; i < value.size(); ++i) {
            std::string item;
            if constexpr (std::is_same_v<T, std::vector<std::string>>) {
              item = "\"" + value[i] + "\"";
            } else {
              item = std::to_string(value[i]);
            }
            out += (i > 0 ? ", " : "") + item;
          }
          return out + "]";
        }
        std::string quoted = "\"";  // appended, not "\"" + ...: GCC 12 warns falsely on that
        quoted += SettingText(setting, defaults);
        return quoted + "\"";
      },
      setting.member);
}

// Every key has its own "### `section.key`" heading, and the line under it states the default
// the table has, so the reference cannot drift from the code either.
TEST(ShippedConfig, TheReferenceStatesEveryKeysDefault) {
  const std::string reference = ReadText(kSource + "/config/REFERENCE.md");
  const auto check = [&](const auto& setting, const auto& defaults) {
    const std::string key = std::string(setting.section) + "." + std::string(setting.name);
    const std::string heading = "\n### `" + key + "`\n";
    const auto at = reference.find(heading);
    ASSERT_NE(at, std::string::npos) << key << " has no heading in REFERENCE.md";
    const auto line_start = at + heading.size();
    const std::string line =
        reference.substr(line_start, reference.find('\n', line_start) - line_start);
    EXPECT_THAT(line, HasSubstr("default `" + ReferenceDefault(setting, defaults) + "`"))
        << key << ": REFERENCE.md's header line disagrees with the key table";
  };
  for (const auto& setting : DaemonKeys()) check(setting, DaemonSettings{});
  for (const auto& setting : DetectorKeys()) check(setting, DetectorOptions{});
}

TEST(ShippedConfig, TheDemoFileLoads) {
  const Config config = LoadConfig(kSource + "/config/demo.toml");
  const DetectorOptions pump01 = DetectorOptionsFor(config, "pump-01");
  EXPECT_EQ(pump01.nu, 0.05);
  EXPECT_EQ(pump01.false_alarm_rate, 0.001);
  EXPECT_EQ(pump01.false_incidents_per_day, 0.1);
  EXPECT_EQ(pump01.scaler, ScalerType::kWhiten);
  EXPECT_EQ(pump01.window, 1440);
  EXPECT_EQ(pump01.warmup, 0);
  EXPECT_EQ(pump01.refit_every, 60);
  EXPECT_EQ(pump01.support_vector_budget, 128);
  EXPECT_EQ(pump01.feature_names,
            (std::vector<std::string>{"discharge_pressure_bar", "flow_m3h", "motor_current_a",
                                      "vibration_mm_s", "bearing_temp_c", "speed_rpm"}));
  EXPECT_EQ(DetectorOptionsFor(config, "pump-11").open_after, 4);
  EXPECT_EQ(DetectorOptionsFor(config, "pump-11").window, 1440);
}

TEST(LoadConfig, ErrorsNameThePath) {
  EXPECT_THROW(
      {
        try {
          LoadConfig("/nonexistent/nuwatchd.toml");
        } catch (const ConfigError& error) {
          EXPECT_THAT(error.what(), StartsWith("/nonexistent/nuwatchd.toml: cannot open"));
          throw;
        }
      },
      ConfigError);
  EXPECT_THROW(LoadConfig(kSource + "/config"), ConfigError);

  const std::string path = ::testing::TempDir() + "/config_test_bad.toml";
  {
    std::ofstream out(path);
    out << "[detector]\nwindow = 1\nwarmup = 1\n";
  }
  try {
    LoadConfig(path);
    ADD_FAILURE() << "window = 1 accepted";
  } catch (const ConfigError& error) {
    EXPECT_EQ(std::string(error.what()),
              path + ":2:10: detector.window = 1 is outside [2, 10000000]");
  }
  std::remove(path.c_str());
}

// ---------------------------------------------------------------------------------------------
// TOML syntax

TEST(ConfigSyntax, ErrorsGiveFileLineAndColumn) {
  // "nu = = 1": the value that cannot be parsed starts in column 6 of line 2.
  EXPECT_THAT(ErrorOf("[detector]\nnu = = 1\n"), StartsWith("t.toml:2:6: TOML syntax error: "));
  // TOML 1.0 §Keys: "Defining a key multiple times is invalid."
  EXPECT_THAT(ErrorOf("[detector]\nnu = 0.1\nnu = 0.2\n"), StartsWith("t.toml:3:"));
  EXPECT_THAT(ErrorOf("[detector]\nnu = 0.1\nnu = 0.2\n"), HasSubstr("TOML syntax error"));
  // TOML 1.0 §Table: a table may not be defined twice.
  EXPECT_THAT(ErrorOf("[detector]\nnu = 0.1\n[detector]\nwindow = 10\n"), StartsWith("t.toml:3:"));
  EXPECT_THAT(ErrorOf("[detector\n"), StartsWith("t.toml:1:"));
}

// ---------------------------------------------------------------------------------------------
// Describe and parse back

TEST(DescribeDetectorOptions, ParsesBackToTheSameOptions) {
  for (const DetectorOptions& options : {DetectorOptions{}, UnusualDetectorOptions()}) {
    const std::string text = DescribeDetectorOptions(options);
    const Config config = ParseConfig(text, "best.toml");
    EXPECT_TRUE(SameDetectorOptions(config.detector, options)) << text;
  }
  const DetectorOptions back = Parse(DescribeDetectorOptions(UnusualDetectorOptions())).detector;
  EXPECT_EQ(back.nu, 0.1 + 0.2);
  EXPECT_EQ(back.gamma.value, 1.0 / 3.0);
  EXPECT_EQ(back.drift_delta, 1e-300);
  EXPECT_EQ(back.cache_bytes, (3u << 20) + 1);
  EXPECT_EQ(back.feature_names, UnusualDetectorOptions().feature_names);
}

TEST(DescribeDetectorOptions, WritesEveryDetectorKeyOnce) {
  const std::string text = DescribeDetectorOptions(DetectorOptions{});
  EXPECT_THAT(text, StartsWith("[detector]\n"));
  std::size_t lines = 0;
  for (const char c : text) lines += c == '\n';
  std::size_t detector_keys = 0;
  for (const std::string& key : KnownConfigKeys()) {
    if (!key.starts_with("detector.")) continue;
    ++detector_keys;
    std::string line = "\n";  // appended, not "\n" + ...: GCC 12 warns falsely on that
    line += key.substr(9);
    line += " = ";
    EXPECT_THAT(text, HasSubstr(line)) << key;
  }
  EXPECT_EQ(lines, detector_keys + 1);
  // Floats stay floats, so TOML types match on the way back.
  EXPECT_THAT(text, HasSubstr("\ncoef0 = 0.0\n"));
  EXPECT_THAT(text, HasSubstr("\ngamma = \"scale\"\n"));
  EXPECT_THAT(text, HasSubstr("\nkernel = \"rbf\"\n"));
  EXPECT_THAT(text, HasSubstr("\nfeature_names = []\n"));
}

TEST(SameDetectorOptions, TellsOptionsApart) {
  const DetectorOptions base;
  EXPECT_TRUE(SameDetectorOptions(base, base));
  DetectorOptions other = base;
  other.close_after += 1;
  EXPECT_FALSE(SameDetectorOptions(base, other));
  other = base;
  other.feature_names = {"a"};
  EXPECT_FALSE(SameDetectorOptions(base, other));
  // A gamma given by mode ignores the unused value field.
  other = base;
  other.gamma.value = 42;
  EXPECT_TRUE(SameDetectorOptions(base, other));
  other.gamma.mode = GammaSpec::Mode::kValue;
  EXPECT_FALSE(SameDetectorOptions(base, other));
}

// The restart-only keys are the table's (ReloadEffect::kRestart): sockets are bound, the exposer
// listens, the pool has its threads and the state and recording directories are open once.
TEST(DaemonKeys, ARestartOnlyChangeIsReportedAndKeptAtItsRunningValue) {
  const DaemonSettings running;
  DaemonSettings next = running;
  next.publish_endpoint = "tcp://127.0.0.1:7702";
  next.refit_threads = 4;
  next.log_level = "debug";             // applies on reload
  next.max_dims = 12;                   // applies on reload
  next.record_rotate_bytes = 1000;      // applies on reload
  next.publish_result_form = "binary";  // applies on reload (PROTOCOL.md §9.5)
  EXPECT_EQ(RestartOnlyChanges(running, next),
            (std::vector<std::string>{"daemon.refit_threads", "publish.endpoint"}));
  KeepRestartOnly(running, &next);
  EXPECT_EQ(next.publish_endpoint, running.publish_endpoint);
  EXPECT_EQ(next.refit_threads, running.refit_threads);
  EXPECT_EQ(next.log_level, "debug");
  EXPECT_EQ(next.max_dims, 12);
  EXPECT_EQ(next.record_rotate_bytes, 1000u);
  EXPECT_EQ(next.publish_result_form, "binary");
  EXPECT_TRUE(RestartOnlyChanges(running, next).empty());
  std::set<std::string> restart;
  for (const auto& key : DaemonKeys()) {
    if (key.reload == ReloadEffect::kRestart) {
      restart.insert(std::string(key.section) + "." + std::string(key.name));
    }
  }
  EXPECT_EQ(restart, (std::set<std::string>{
                         "daemon.refit_threads", "daemon.scoring_threads", "ingest.endpoints",
                         "ingest.max_senders", "ingest.subscribe", "ingest.receive_high_water_mark",
                         "publish.endpoint", "publish.high_water_mark", "publish.max_subscribers",
                         "control.endpoint", "control.allow_unauthenticated_tcp",
                         "auth.server_secret_key_file", "auth.subscribe_server_key_file",
                         "metrics.listen", "metrics.basic_auth_user",
                         "metrics.basic_auth_password_file", "state.dir", "recording.dir"}));
}

TEST(DaemonKeys, EveryKeyIsDocumented) {
  for (const auto& key : DaemonKeys()) {
    EXPECT_FALSE(key.doc.empty()) << key.section << "." << key.name;
    EXPECT_NE(key.reload, ReloadEffect::kNextRefit) << key.name << ": a daemon key has no refit";
  }
}

TEST(KnownConfigKeys, AreUniqueAndCoverEverySection) {
  const auto keys = KnownConfigKeys();
  const std::set<std::string> unique(keys.begin(), keys.end());
  EXPECT_EQ(unique.size(), keys.size());
  for (const char* key :
       {"daemon.log_level", "ingest.endpoints", "publish.include_learning", "control.endpoint",
        "metrics.listen", "state.dir", "limits.max_dims", "recording.keep_files", "detector.nu",
        "detector.feature_names", "stream.match"}) {
    EXPECT_TRUE(unique.count(key)) << key;
  }
  // 37 daemon settings, 32 DetectorOptions members, and stream.match.
  EXPECT_EQ(keys.size(), 71u);
}

// Issue 10 §1: the control socket relearns, forgets and reloads, so a TCP control socket needs
// CURVE or an explicit key that accepts the exposure; [auth] needs both of its keys.
TEST(ConfigControlSocket, TcpWithoutAuthenticationIsRefusedUnlessTheFileSaysSo) {
  EXPECT_THAT(ErrorOf("[control]\nendpoint = \"tcp://127.0.0.1:7603\"\n"),
              HasSubstr("t.toml:2:12: control.endpoint = \"tcp://127.0.0.1:7603\" is a TCP "
                        "control socket without authentication"));
  EXPECT_THAT(ErrorOf("[control]\nendpoint = \"tcp://127.0.0.1:7603\"\n"),
              HasSubstr("control.allow_unauthenticated_tcp = true"));
  EXPECT_EQ(Parse("[control]\nendpoint = \"tcp://127.0.0.1:7603\"\nallow_unauthenticated_tcp = "
                  "true\n")
                .daemon.control_endpoint,
            "tcp://127.0.0.1:7603");
  EXPECT_NO_THROW(
      Parse("[control]\nendpoint = \"tcp://127.0.0.1:7603\"\n[auth]\n"
            "server_secret_key_file = \"s.key_secret\"\nclient_keys = \"c\"\n"));
  EXPECT_NO_THROW(Parse("[control]\nendpoint = \"ipc:///run/nuwatch/control\"\n"));
  EXPECT_THAT(ErrorOf("[auth]\nserver_secret_key_file = \"s.key_secret\"\n"),
              HasSubstr("t.toml:2:26: auth.server_secret_key_file is set but auth.client_keys "
                        "is not"));
  EXPECT_THAT(ErrorOf("[auth]\nclient_keys = \"c\"\n"),
              HasSubstr("auth.client_keys is set but auth.server_secret_key_file is not"));
  EXPECT_THAT(ErrorOf("[metrics]\nbasic_auth_user = \"prometheus\"\n"),
              HasSubstr("t.toml:2:19: metrics.basic_auth_user is set but "
                        "metrics.basic_auth_password_file is not"));
}

TEST(ConfigControlSocket, DefaultEndpointIsAnIpcSocketOfTheStateOrRuntimeDirectory) {
  EXPECT_EQ(DefaultControlEndpoint("/var/lib/nuwatch/", "/run/nuwatch", "/run/user/7", 7),
            "ipc:///var/lib/nuwatch/nuwatchd.control");
  // systemd's RuntimeDirectory= may list several directories: the first one.
  EXPECT_EQ(DefaultControlEndpoint("", "/run/nuwatch:/run/other", "/run/user/7", 7),
            "ipc:///run/nuwatch/nuwatchd.control");
  EXPECT_EQ(DefaultControlEndpoint("", nullptr, "/run/user/7", 7),
            "ipc:///run/user/7/nuwatchd.control");
  EXPECT_EQ(DefaultControlEndpoint("", "", "", 7), "ipc:///tmp/nuwatchd-7/nuwatchd.control");
}

}  // namespace
}  // namespace nuwatch
