// State files: exact round trips of a real detector's state (and a restored detector that goes on
// exactly as the original), rejection of every truncation, every single-byte corruption, newer
// and invalid versions, crafted sizes; the key escaping; the store's listing, key check,
// quarantine and clean-up of interrupted writes.
#include "service/state_store.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <random>
#include <string>
#include <vector>

#include "crc32.h"
#include "nuwatch/model_file.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
namespace fs = std::filesystem;

DetectorOptions SmallOptions() {
  DetectorOptions o;
  o.nu = 0.1;
  o.window = 40;
  o.warmup = 20;
  o.refit_every = 10;
  o.cold_refit_every = 3;
  o.support_vector_budget = 8;
  o.drift_detection = true;
  o.drift_min_samples = 5;
  o.open_after = 2;
  o.open_window = 3;
  o.close_after = 4;
  o.feature_names = {"pressure", "flow"};
  return o;
}

// Gaussian vectors around (5, 100), then a few far outside so that an incident is open at the end.
std::vector<std::vector<double>> Vectors(int normal, int outliers, uint64_t seed) {
  std::mt19937_64 generator(seed);
  std::normal_distribution<double> noise(0.0, 1.0);
  std::vector<std::vector<double>> out;
  for (int i = 0; i < normal; ++i)
    out.push_back({5 + noise(generator), 100 + 3 * noise(generator)});
  for (int i = 0; i < outliers; ++i) out.push_back({25.0 + i, 100.0});
  return out;
}

// A detector (inline refits) fed 70 normal vectors, 3 outliers and 2 normal ones: it has a
// compressed model, a warm-start solution, drift statistics (the outliers raise a drift alarm,
// which restarts the test; the last two vectors start it again), an open incident (2 clean
// vectors do not close it: close_after = 4) and a full incident ring.
std::unique_ptr<Detector> BusyDetector() {
  auto detector = std::make_unique<Detector>(SmallOptions(), 2);
  auto vectors = Vectors(70, 3, 7);
  for (const auto& v : Vectors(2, 0, 8)) vectors.push_back(v);
  for (std::size_t i = 0; i < vectors.size(); ++i) {
    detector->Observe(1000.0 + 10.0 * static_cast<double>(i), vectors[i]);
  }
  return detector;
}

template <typename T>
bool SameBytes(const T& a, const T& b) {
  return std::memcmp(&a, &b, sizeof(T)) == 0;
}

bool SameDoubles(const double* a, const double* b, std::size_t n) {
  return n == 0 || std::memcmp(a, b, n * sizeof(double)) == 0;
}

void ExpectIdenticalStates(const DetectorState& a, const DetectorState& b) {
  ASSERT_EQ(a.window_rows.rows(), b.window_rows.rows());
  EXPECT_TRUE(SameDoubles(a.window_rows.data(), b.window_rows.data(),
                          static_cast<std::size_t>(a.window_rows.size())));
  EXPECT_EQ(a.window_ids, b.window_ids);
  ASSERT_EQ(a.window_times.size(), b.window_times.size());
  EXPECT_TRUE(SameDoubles(a.window_times.data(), b.window_times.data(), a.window_times.size()));
  EXPECT_EQ(a.next_sample_id, b.next_sample_id);
  ASSERT_EQ(a.model == nullptr, b.model == nullptr);
  if (a.model) {
    EXPECT_EQ(EncodeModel(*a.model), EncodeModel(*b.model));  // model_file_test: exact
  }
  EXPECT_EQ(a.solution_ids, b.solution_ids);
  ASSERT_EQ(a.solution_alpha.size(), b.solution_alpha.size());
  EXPECT_TRUE(SameDoubles(a.solution_alpha.data(), b.solution_alpha.data(),
                          static_cast<std::size_t>(a.solution_alpha.size())));
  EXPECT_EQ(a.incidents.next_id, b.incidents.next_id);
  EXPECT_EQ(a.incidents.recent_flags, b.incidents.recent_flags);
  EXPECT_EQ(a.incidents.recent_times, b.incidents.recent_times);
  EXPECT_EQ(a.incidents.recent_decisions, b.incidents.recent_decisions);
  ASSERT_EQ(a.incidents.open_incident.has_value(), b.incidents.open_incident.has_value());
  if (a.incidents.open_incident) {
    EXPECT_EQ(a.incidents.open_incident->id, b.incidents.open_incident->id);
    EXPECT_TRUE(
        SameBytes(a.incidents.open_incident->start_time, b.incidents.open_incident->start_time));
    EXPECT_TRUE(
        SameBytes(a.incidents.open_incident->end_time, b.incidents.open_incident->end_time));
    EXPECT_TRUE(SameBytes(a.incidents.open_incident->peak_decision,
                          b.incidents.open_incident->peak_decision));
    EXPECT_EQ(a.incidents.open_incident->flagged_vectors,
              b.incidents.open_incident->flagged_vectors);
  }
  EXPECT_EQ(a.incidents.clean_run, b.incidents.clean_run);
  EXPECT_EQ(a.drift.count, b.drift.count);
  EXPECT_TRUE(SameBytes(a.drift.mean, b.drift.mean));
  EXPECT_TRUE(SameBytes(a.drift.up_sum, b.drift.up_sum));
  EXPECT_TRUE(SameBytes(a.drift.up_min, b.drift.up_min));
  EXPECT_TRUE(SameBytes(a.drift.down_sum, b.drift.down_sum));
  EXPECT_TRUE(SameBytes(a.drift.down_max, b.drift.down_max));
  EXPECT_EQ(a.accepted_since_refit, b.accepted_since_refit);
  EXPECT_EQ(a.refits_since_cold, b.refits_since_cold);
  EXPECT_TRUE(SameBytes(a.model_time, b.model_time));
  EXPECT_EQ(a.counters.vectors, b.counters.vectors);
  EXPECT_EQ(a.counters.anomalies, b.counters.anomalies);
  EXPECT_EQ(a.counters.accepted, b.counters.accepted);
  EXPECT_EQ(a.counters.refits_started, b.counters.refits_started);
  EXPECT_EQ(a.counters.refits_coalesced, b.counters.refits_coalesced);
  EXPECT_EQ(a.counters.drift_alarms, b.counters.drift_alarms);
  EXPECT_EQ(a.counters.history_vectors, b.counters.history_vectors);
  EXPECT_EQ(a.counters.history_resets, b.counters.history_resets);
  EXPECT_TRUE(a.transform == b.transform);
}

std::string DecodeError(const std::vector<uint8_t>& bytes) {
  try {
    DecodeStreamState(bytes.data(), bytes.size());
  } catch (const StateFileError& e) {
    return e.what();
  }
  return "";
}

// The CRC-32 of the payload, rewritten after a deliberate change, so that the change reaches the
// field checks behind the checksum.
void Reseal(std::vector<uint8_t>& bytes) {
  const std::size_t payload = bytes.size() - 16 - 4;
  const uint32_t crc = Crc32(bytes.data() + 16, payload);
  std::memcpy(bytes.data() + 16 + payload, &crc, 4);
}

class TempDir {
 public:
  TempDir() {
    path_ = fs::temp_directory_path() / ("nuwatch_state_store_test_" + std::to_string(::getpid()) +
                                         "_" + std::to_string(counter_++));
    fs::remove_all(path_);
    fs::create_directories(path_);
  }
  ~TempDir() { fs::remove_all(path_); }
  std::string path() const { return path_.string(); }

 private:
  static inline int counter_ = 0;
  fs::path path_;
};

// ---------------------------------------------------------------------------------------------
// Key escaping

TEST(StreamKeyEscape, MapsSlashAndColonOneToOneAndKeepsTheLength) {
  EXPECT_EQ(EscapeStreamKey("plant-a/pump-01:bearing"), "plant-a%pump-01+bearing");
  EXPECT_EQ(EscapeStreamKey("pump_01.v2"), "pump_01.v2");
  EXPECT_EQ(UnescapeStreamKey("plant-a%pump-01+bearing"), "plant-a/pump-01:bearing");
  // Every key byte of PROTOCOL.md §3, at the longest key length (128).
  const std::string all = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789._:/-";
  const std::string longest = (all + all).substr(0, 128);
  const std::string escaped = EscapeStreamKey(longest);
  EXPECT_EQ(escaped.size(), longest.size());
  EXPECT_EQ(escaped.find('/'), std::string::npos);
  EXPECT_EQ(UnescapeStreamKey(escaped), longest);
}

TEST(StreamKeyEscape, RejectsNamesNoKeyEscapesTo) {
  EXPECT_EQ(UnescapeStreamKey(""), std::nullopt);
  EXPECT_EQ(UnescapeStreamKey("a/b"), std::nullopt);                  // '/' is written '%'
  EXPECT_EQ(UnescapeStreamKey("a:b"), std::nullopt);                  // ':' is written '+'
  EXPECT_EQ(UnescapeStreamKey("a b"), std::nullopt);                  // not a key byte
  EXPECT_EQ(UnescapeStreamKey(std::string(129, 'a')), std::nullopt);  // longer than 128
}

// ---------------------------------------------------------------------------------------------
// Encoding

TEST(StreamStateFile, RoundTripsEveryFieldExactly) {
  const auto detector = BusyDetector();
  const DetectorState state = detector->ExportState();
  ASSERT_TRUE(state.model);  // the fixture is what it claims to be
  ASSERT_TRUE(state.incidents.open_incident);
  ASSERT_FALSE(state.solution_ids.empty());
  ASSERT_GT(state.drift.count, 0);
  const std::vector<uint8_t> bytes = EncodeStreamState("plant/pump-01", 2, state);
  const StreamStateFile file = DecodeStreamState(bytes.data(), bytes.size());
  EXPECT_EQ(file.stream_key, "plant/pump-01");
  EXPECT_EQ(file.dims, 2);
  ExpectIdenticalStates(state, file.state);
}

TEST(StreamStateFile, ARestoredDetectorGoesOnExactlyAsTheOriginal) {
  // The point of a state file: the restored stream scores, refits and tracks incidents as the
  // original would have. Both are fed the same 40 further vectors (which span several refits and
  // the incident's close) and must agree bit for bit.
  auto original = BusyDetector();
  const std::vector<uint8_t> bytes = EncodeStreamState("k", 2, original->ExportState());
  Detector restored(SmallOptions(), 2);
  restored.ImportState(DecodeStreamState(bytes.data(), bytes.size()).state);
  const auto more = Vectors(40, 0, 99);
  for (std::size_t i = 0; i < more.size(); ++i) {
    const double t = 2000.0 + 10.0 * static_cast<double>(i);
    const Verdict a = original->Observe(t, more[i]);
    const Verdict b = restored.Observe(t, more[i]);
    ASSERT_TRUE(SameBytes(a.decision, b.decision)) << "vector " << i;
    ASSERT_EQ(a.model_version, b.model_version) << "vector " << i;
    ASSERT_EQ(a.incident_id, b.incident_id) << "vector " << i;
    ASSERT_EQ(a.transition.type, b.transition.type) << "vector " << i;
  }
  EXPECT_GT(restored.model()->version(), DecodeStreamState(bytes.data(), bytes.size())
                                             .state.model->version());  // it did refit meanwhile
}

// With temporal context the window holds wider vectors (2 features x (1 + 1 lag + 1 window x 2
// statistics) = 8 columns) and the transform's history must travel too: a stream restored from
// its file goes on as the original, with no vector spent refilling the history.
TEST(StreamStateFile, AStreamWithATransformGoesOnExactlyAsTheOriginal) {
  DetectorOptions o = SmallOptions();
  o.lags = 1;
  o.rolling_windows = {4};
  o.rolling_statistics = {"mean", "slope"};
  Detector original(o, 2);
  const auto vectors = Vectors(80, 2, 17);
  for (std::size_t i = 0; i < vectors.size(); ++i)
    original.Observe(1000.0 + 10.0 * static_cast<double>(i), vectors[i]);
  ASSERT_NE(original.model(), nullptr);
  const DetectorState state = original.ExportState();
  ASSERT_EQ(state.window_rows.cols(), 8);
  ASSERT_EQ(state.transform.history.rows(), 3);
  const std::vector<uint8_t> bytes = EncodeStreamState("k", 2, state);
  const StreamStateFile file = DecodeStreamState(bytes.data(), bytes.size());
  ExpectIdenticalStates(state, file.state);
  Detector restored(o, 2);
  restored.ImportState(file.state);
  const auto more = Vectors(30, 0, 18);
  for (std::size_t i = 0; i < more.size(); ++i) {
    const double t = 2000.0 + 10.0 * static_cast<double>(i);
    const Verdict a = original.Observe(t, more[i]);
    const Verdict b = restored.Observe(t, more[i]);
    ASSERT_EQ(b.state, StreamState::kScoring) << "vector " << i;
    ASSERT_TRUE(SameBytes(a.decision, b.decision)) << "vector " << i;
    ASSERT_TRUE(SameBytes(a.p_value, b.p_value)) << "vector " << i;
  }
}

TEST(StreamStateFile, RoundTripsALearningStream) {
  Detector detector(SmallOptions(), 2);
  const auto vectors = Vectors(5, 0, 3);
  for (std::size_t i = 0; i < vectors.size(); ++i) detector.Observe(10.0 * i, vectors[i]);
  const DetectorState state = detector.ExportState();
  ASSERT_FALSE(state.model);
  const std::vector<uint8_t> bytes = EncodeStreamState("learning", 2, state);
  const StreamStateFile file = DecodeStreamState(bytes.data(), bytes.size());
  ExpectIdenticalStates(state, file.state);
}

TEST(StreamStateFile, EncodeRefusesInconsistentStates) {
  DetectorState state = BusyDetector()->ExportState();
  EXPECT_THROW(EncodeStreamState("k", 3, state), StateFileError);  // window has 2 columns
  EXPECT_THROW(EncodeStreamState("k", 0, state), StateFileError);
  state.window_ids.pop_back();
  EXPECT_THROW(EncodeStreamState("k", 2, state), StateFileError);
}

// ---------------------------------------------------------------------------------------------
// Rejection

TEST(StreamStateFile, RejectsEveryTruncationAndPadding) {
  const std::vector<uint8_t> bytes = EncodeStreamState("k", 2, BusyDetector()->ExportState());
  for (std::size_t n = 0; n < bytes.size(); ++n) {
    const std::vector<uint8_t> prefix(bytes.begin(), bytes.begin() + n);
    ASSERT_NE(DecodeError(prefix), "") << "a prefix of " << n << " bytes was accepted";
  }
  std::vector<uint8_t> padded = bytes;
  padded.push_back(0);
  EXPECT_THAT(DecodeError(padded), HasSubstr("truncated or padded"));
}

TEST(StreamStateFile, RejectsEverySingleByteCorruption) {
  // Flips in the payload or the stored CRC: a CRC with a generator polynomial of degree 32 and a
  // non-zero constant term detects every error burst of at most 32 bits (Peterson and Brown,
  // "Cyclic Codes for Error Detection", Proc. IRE 49(1), 1961), so every one-byte change is
  // caught. Flips in the header break the magic, the version or the announced length.
  const std::vector<uint8_t> bytes = EncodeStreamState("k", 2, BusyDetector()->ExportState());
  for (std::size_t i = 0; i < bytes.size(); ++i) {
    for (uint8_t mask : {uint8_t{0x01}, uint8_t{0x80}, uint8_t{0xFF}}) {
      std::vector<uint8_t> corrupt = bytes;
      corrupt[i] ^= mask;
      ASSERT_NE(DecodeError(corrupt), "") << "byte " << i << " ^ " << int{mask} << " accepted";
    }
  }
}

TEST(StreamStateFile, RejectsANewerAndAnInvalidVersion) {
  std::vector<uint8_t> bytes = EncodeStreamState("k", 2, BusyDetector()->ExportState());
  const uint32_t newer = kStateFormatVersion + 1;
  std::memcpy(bytes.data() + 4, &newer, 4);  // the CRC covers the payload only: still valid
  EXPECT_THAT(DecodeError(bytes), HasSubstr("newer than this program reads"));
  const uint32_t zero = 0;
  std::memcpy(bytes.data() + 4, &zero, 4);
  EXPECT_THAT(DecodeError(bytes), HasSubstr("version 0"));
}

TEST(StreamStateFile, RejectsAModelFileOrOtherBytes) {
  const auto detector = BusyDetector();
  const std::vector<uint8_t> model = EncodeModel(*detector->model());
  EXPECT_THAT(DecodeError(model), HasSubstr("not a nuwatch state file"));
}

TEST(StreamStateFile, ChecksCountsAgainstThePayloadBeforeAllocating) {
  // A window row count of 2^60 behind a valid checksum: rejected as not fitting, not allocated.
  // The count sits after the key (4 + 1 bytes for "k"), dims (4) and next_sample_id (8).
  std::vector<uint8_t> bytes = EncodeStreamState("k", 2, BusyDetector()->ExportState());
  const uint64_t huge = uint64_t{1} << 60;
  std::memcpy(bytes.data() + 16 + 5 + 4 + 8, &huge, 8);
  Reseal(bytes);
  EXPECT_THAT(DecodeError(bytes), HasSubstr("ends inside the window"));
}

TEST(StreamStateFile, RejectsAnInvalidStoredKeyOrDims) {
  std::vector<uint8_t> bytes = EncodeStreamState("k", 2, BusyDetector()->ExportState());
  std::vector<uint8_t> bad_key = bytes;
  bad_key[16 + 4] = ' ';  // the key's one byte
  Reseal(bad_key);
  EXPECT_THAT(DecodeError(bad_key), HasSubstr("not a valid key"));
  std::vector<uint8_t> bad_dims = bytes;
  const uint32_t zero = 0;
  std::memcpy(bad_dims.data() + 16 + 5, &zero, 4);
  Reseal(bad_dims);
  EXPECT_THAT(DecodeError(bad_dims), HasSubstr("dims = 0"));
}

// ---------------------------------------------------------------------------------------------
// The store

TEST(StateStore, SavesListsAndLoadsByKey) {
  TempDir dir;
  const StateStore store(dir.path() + "/nested/state");
  const DetectorState state = BusyDetector()->ExportState();
  store.Save("plant/pump-02", 2, state);
  store.Save("pump-01", 2, state);
  std::ofstream(store.dir() + "/notes.txt") << "not a state file\n";
  std::ofstream(store.dir() + "/a b.state") << "not a key\n";
  const std::vector<StateStore::Entry> entries = store.List();
  ASSERT_EQ(entries.size(), 2u);
  EXPECT_EQ(entries[0].stream_key, "plant/pump-02");
  EXPECT_EQ(entries[0].path, store.dir() + "/plant%pump-02.state");
  EXPECT_EQ(entries[1].stream_key, "pump-01");
  const StreamStateFile file = store.Load(entries[0]);
  EXPECT_EQ(file.stream_key, "plant/pump-02");
  ExpectIdenticalStates(state, file.state);
}

TEST(StateStore, RefusesAFileThatHoldsAnotherStream) {
  TempDir dir;
  const StateStore store(dir.path());
  store.Save("pump-01", 2, BusyDetector()->ExportState());
  fs::rename(store.PathFor("pump-01"), store.PathFor("pump-07"));
  const std::vector<StateStore::Entry> entries = store.List();
  ASSERT_EQ(entries.size(), 1u);
  try {
    store.Load(entries[0]);
    FAIL() << "a renamed state file was accepted";
  } catch (const StateFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr("holds stream 'pump-01', its name says 'pump-07'"));
  }
}

TEST(StateStore, QuarantineMovesTheFileAsideUnderANewName) {
  TempDir dir;
  const StateStore store(dir.path());
  store.Save("pump-01", 2, BusyDetector()->ExportState());
  const std::string path = store.PathFor("pump-01");
  const std::string first = store.Quarantine(path);
  EXPECT_THAT(first, HasSubstr(path + ".corrupt-"));
  EXPECT_FALSE(fs::exists(path));
  EXPECT_TRUE(fs::exists(first));
  store.Save("pump-01", 2, BusyDetector()->ExportState());
  const std::string second = store.Quarantine(path);  // same second: gets a further suffix
  EXPECT_NE(second, first);
  EXPECT_TRUE(fs::exists(first));
  EXPECT_TRUE(fs::exists(second));
  EXPECT_TRUE(store.List().empty());
}

TEST(StateStore, RemovesLeftoversOfInterruptedWrites) {
  TempDir dir;
  const StateStore store(dir.path());
  store.Save("pump-01", 2, BusyDetector()->ExportState());
  // WriteFileAtomically's temporary name (core/src/checked_file.cc): the path, ".tmp.", the
  // writer's pid.
  const std::string leftover = store.PathFor("pump-01") + ".tmp.12345";
  std::ofstream(leftover) << "half a file";
  EXPECT_EQ(store.RemoveStaleTemporaries(), std::vector<std::string>{leftover});
  EXPECT_FALSE(fs::exists(leftover));
  EXPECT_TRUE(fs::exists(store.PathFor("pump-01")));
}

// The member record (PROTOCOL.md §13.4): what a restart compares its member list with.
TEST(StateStore, RecordsTheMemberListAndRefusesAFileThatIsNotARecord) {
  TempDir dir;
  const StateStore store(dir.path());
  EXPECT_EQ(store.LoadMembers(), std::nullopt);  // a first start
  store.SaveMembers({"nuwatchd-1", {"nuwatchd-0", "nuwatchd-1", "nuwatchd-2"}});
  std::optional<StateStore::MemberRecord> record = store.LoadMembers();
  ASSERT_TRUE(record.has_value());
  EXPECT_EQ(record->member, "nuwatchd-1");
  EXPECT_EQ(record->members, (std::vector<std::string>{"nuwatchd-0", "nuwatchd-1", "nuwatchd-2"}));
  store.SaveMembers({"", {}});  // a lone daemon
  record = store.LoadMembers();
  ASSERT_TRUE(record.has_value());
  EXPECT_EQ(record->member, "");
  EXPECT_TRUE(record->members.empty());
  // Not a stream's state file, so List does not see it.
  EXPECT_TRUE(store.List().empty());

  const std::string path = dir.path() + "/" + StateStore::kMembersFileName;
  for (const std::string& text :
       {std::string("members nuwatchd-0\n"),  // no member line first
        std::string("member a\nsomething else\n"), std::string("# only a comment\n")}) {
    std::ofstream(path, std::ios::trunc) << text;
    try {
      store.LoadMembers();
      FAIL() << "accepted: " << text;
    } catch (const StateFileError& e) {
      EXPECT_THAT(e.what(), HasSubstr(path)) << text;
    }
  }
}

TEST(StateStore, NamesADirectoryItCannotCreate) {
  TempDir dir;
  std::ofstream(dir.path() + "/file") << "x";
  try {
    StateStore store(dir.path() + "/file/sub");
    FAIL() << "a directory under a file was accepted";
  } catch (const StateFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr(dir.path() + "/file/sub"));
  }
}

// ---------------------------------------------------------------------------------------------
// Retries and the directory lock

TEST(StateWriteRetrySeconds, DoublesFromOneSecondUpToAMinute) {
  // Exponential backoff with a ceiling (common practice): 1, 2, 4, ... s, never above 60 s.
  EXPECT_EQ(StateWriteRetrySeconds(1), 1.0);
  EXPECT_EQ(StateWriteRetrySeconds(2), 2.0);
  EXPECT_EQ(StateWriteRetrySeconds(3), 4.0);
  EXPECT_EQ(StateWriteRetrySeconds(6), 32.0);
  EXPECT_EQ(StateWriteRetrySeconds(7), 60.0);
  EXPECT_EQ(StateWriteRetrySeconds(1000000), 60.0);
  EXPECT_EQ(StateWriteRetrySeconds(0), 1.0);
}

// util-linux's flock(1) (a third-party client of the same flock(2) lock): exit status 0 when it
// could take the lock at once, 1 when another holds it (-n: fail rather than wait).
int ShellFlock(const std::string& path) {
  const std::string command = "flock -n '" + path + "' true";
  const int status = std::system(command.c_str());
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

TEST(StateDirLock, RefusesASecondHolderAndNamesTheFirst) {
  TempDir dir;
  const std::string path = dir.path() + "/" + StateDirLock::kFileName;
  long holder = -1;
  {
    StateDirLock first;
    ASSERT_TRUE(first.TryLock(dir.path(), &holder));
    EXPECT_EQ(first.path(), path);
    EXPECT_EQ(ShellFlock(path), 1) << "flock(1) took a lock nuwatchd holds";
    StateDirLock second;  // another open file description: flock(2) locks conflict between them
    EXPECT_FALSE(second.TryLock(dir.path(), &holder));
    EXPECT_EQ(holder, static_cast<long>(::getpid()));
  }
  // Released with its holder; a file left behind by a holder that died is no obstacle.
  EXPECT_TRUE(fs::exists(path));
  EXPECT_EQ(ShellFlock(path), 0);
  StateDirLock again;
  EXPECT_TRUE(again.TryLock(dir.path(), &holder));
}

TEST(StateDirLock, NamesALockFileItCannotOpen) {
  TempDir dir;
  StateDirLock lock;
  long holder = 0;
  try {
    lock.TryLock(dir.path() + "/missing", &holder);
    FAIL() << "a lock in a directory that does not exist was taken";
  } catch (const StateFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr(dir.path() + "/missing/nuwatchd.lock: cannot open"));
  }
}

}  // namespace
}  // namespace nuwatch
