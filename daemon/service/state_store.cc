#include "service/state_store.h"

#include <fcntl.h>
#include <sys/file.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <cstdlib>
#include <cstring>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <system_error>

#include "nuwatch/checked_file.h"
#include "nuwatch/model_file.h"
#include "protocol/wire_protocol.h"

namespace nuwatch {
namespace {

namespace fs = std::filesystem;

constexpr char kMagic[4] = {'N', 'U', 'W', 'S'};
constexpr uint64_t kMaxPayloadBytes = uint64_t{1} << 36;  // 64 GiB: larger is corruption
constexpr std::string_view kSuffix = ".state";

}  // namespace

std::string EscapeStreamKey(std::string_view key) {
  std::string out(key);
  for (char& c : out) {
    if (c == '/') c = '%';
    if (c == ':') c = '+';
  }
  return out;
}

std::optional<std::string> UnescapeStreamKey(std::string_view escaped) {
  std::string key(escaped);
  for (char& c : key) {
    if (c == '%') {
      c = '/';
    } else if (c == '+') {
      c = ':';
    } else if (c == '/' || c == ':') {
      return std::nullopt;  // never written by EscapeStreamKey
    }
  }
  if (ValidateStreamKey(key, WireLimits{}) != RejectReason::kNone) return std::nullopt;
  return key;
}

std::vector<uint8_t> EncodeStreamState(std::string_view stream_key, int dims,
                                       const DetectorState& s) {
  auto fail = [](const std::string& what) { throw StateFileError("EncodeStreamState: " + what); };
  if (dims < 1) fail("dims = " + std::to_string(dims) + " must be >= 1");
  const uint64_t rows = static_cast<uint64_t>(s.window_rows.rows());
  // The window holds the transformed features: dims columns times the transform's factor.
  const uint64_t columns = rows > 0 ? static_cast<uint64_t>(s.window_rows.cols()) : 0;
  if (rows > 0 && (columns < static_cast<uint64_t>(dims) || columns % dims != 0)) {
    fail("window has " + std::to_string(columns) +
         " columns, not a multiple of dims = " + std::to_string(dims));
  }
  const auto& t = s.transform;
  if (t.history.rows() > 0 && t.history.cols() != dims) {
    fail("transform history has " + std::to_string(t.history.cols()) +
         " columns, dims = " + std::to_string(dims));
  }
  if (t.times.size() != static_cast<std::size_t>(t.history.rows())) {
    fail("transform history of " + std::to_string(t.history.rows()) + " rows has " +
         std::to_string(t.times.size()) + " times");
  }
  if (s.window_ids.size() != rows || s.window_times.size() != rows) {
    fail("window of " + std::to_string(rows) + " rows has " + std::to_string(s.window_ids.size()) +
         " ids and " + std::to_string(s.window_times.size()) + " times");
  }
  if (static_cast<int64_t>(s.solution_ids.size()) != s.solution_alpha.size()) {
    fail(std::to_string(s.solution_ids.size()) + " solution ids but " +
         std::to_string(s.solution_alpha.size()) + " alphas");
  }
  const auto& inc = s.incidents;
  if (inc.recent_times.size() != inc.recent_flags.size() ||
      inc.recent_decisions.size() != inc.recent_flags.size()) {
    fail("incident ring fields of different lengths");
  }

  ByteWriter w;
  w.PutString(stream_key);
  w.Put<uint32_t>(static_cast<uint32_t>(dims));
  w.Put<uint64_t>(s.next_sample_id);
  w.Put<uint64_t>(rows);
  w.Put<uint32_t>(static_cast<uint32_t>(columns));
  if (rows > 0) w.PutArray(s.window_rows.data(), rows * columns);
  w.PutArray(s.window_ids.data(), rows);
  w.PutArray(s.window_times.data(), rows);
  w.Put<uint8_t>(s.model ? 1 : 0);
  if (s.model) {
    const std::vector<uint8_t> model = EncodeModel(*s.model);
    w.Put<uint64_t>(model.size());
    w.PutBytes(model.data(), model.size());
  }
  w.Put<uint64_t>(s.solution_ids.size());
  w.PutArray(s.solution_ids.data(), s.solution_ids.size());
  w.PutArray(s.solution_alpha.data(), static_cast<std::size_t>(s.solution_alpha.size()));

  w.Put<uint64_t>(inc.next_id);
  w.Put<uint32_t>(static_cast<uint32_t>(inc.recent_flags.size()));
  for (bool flag : inc.recent_flags) w.Put<uint8_t>(flag ? 1 : 0);
  w.PutArray(inc.recent_times.data(), inc.recent_times.size());
  w.PutArray(inc.recent_decisions.data(), inc.recent_decisions.size());
  w.Put<uint8_t>(inc.open_incident ? 1 : 0);
  if (inc.open_incident) {
    w.Put<uint64_t>(inc.open_incident->id);
    w.Put<double>(inc.open_incident->start_time);
    w.Put<double>(inc.open_incident->end_time);
    w.Put<double>(inc.open_incident->peak_decision);
    w.Put<int64_t>(inc.open_incident->flagged_vectors);
  }
  w.Put<int64_t>(inc.clean_run);

  w.Put<int64_t>(s.drift.count);
  w.Put<double>(s.drift.mean);
  w.Put<double>(s.drift.up_sum);
  w.Put<double>(s.drift.up_min);
  w.Put<double>(s.drift.down_sum);
  w.Put<double>(s.drift.down_max);

  w.Put<int64_t>(s.accepted_since_refit);
  w.Put<int64_t>(s.refits_since_cold);
  w.Put<double>(s.model_time);

  w.Put<int64_t>(s.counters.vectors);
  w.Put<int64_t>(s.counters.anomalies);
  w.Put<int64_t>(s.counters.accepted);
  w.Put<int64_t>(s.counters.refits_started);
  w.Put<int64_t>(s.counters.refits_coalesced);
  w.Put<int64_t>(s.counters.drift_alarms);
  w.Put<int64_t>(s.counters.history_vectors);
  w.Put<int64_t>(s.counters.history_resets);

  w.Put<uint64_t>(static_cast<uint64_t>(t.history.rows()));
  w.PutArray(t.history.data(), static_cast<std::size_t>(t.history.size()));
  w.PutArray(t.times.data(), t.times.size());
  w.Put<uint32_t>(static_cast<uint32_t>(t.running_windows.size()));
  for (const int window : t.running_windows) w.Put<int32_t>(window);
  w.Put<uint64_t>(t.running.size());
  w.PutArray(t.running.data(), t.running.size());
  w.Put<int64_t>(t.running_outputs);

  return WrapChecksummed(kMagic, kStateFormatVersion, w.bytes);
}

namespace {

// Requires: a payload whose checksum matched.
StreamStateFile DecodeStatePayload(ByteReader& r, uint32_t version) {
  StreamStateFile out;
  out.stream_key = r.GetString("the stream key");
  if (ValidateStreamKey(out.stream_key, WireLimits{}) != RejectReason::kNone) {
    throw StateFileError("the stored stream key is not a valid key");
  }
  const uint32_t dims = r.Get<uint32_t>("dims");
  if (dims < 1 || dims > 65535) {
    throw StateFileError("dims = " + std::to_string(dims) + " is outside [1, 65535]");
  }
  out.dims = static_cast<int>(dims);
  DetectorState& s = out.state;
  s.next_sample_id = r.Get<uint64_t>("the window");
  const uint64_t rows = r.Get<uint64_t>("the window");
  uint64_t columns = dims;
  if (version >= 2) {
    columns = r.Get<uint32_t>("the window");
    if (rows > 0 && (columns < dims || columns % dims != 0)) {
      throw StateFileError("the window has " + std::to_string(columns) +
                           " columns, not a multiple of dims = " + std::to_string(dims));
    }
    if (rows == 0) columns = dims;
  }
  // Each row takes its values, an id and a time: check the whole window fits before allocating.
  r.Need(rows, (static_cast<std::size_t>(columns) + 2) * 8, "the window");
  s.window_rows.resize(static_cast<Eigen::Index>(rows), static_cast<Eigen::Index>(columns));
  r.GetArray(s.window_rows.data(), rows * columns, "the window");
  s.window_ids.resize(rows);
  r.GetArray(s.window_ids.data(), rows, "the window ids");
  s.window_times.resize(rows);
  r.GetArray(s.window_times.data(), rows, "the window times");

  const uint8_t has_model = r.Get<uint8_t>("the model");
  if (has_model > 1) throw StateFileError("invalid model flag " + std::to_string(has_model));
  if (has_model == 1) {
    const uint64_t model_bytes = r.Get<uint64_t>("the model");
    const uint8_t* model = r.Take(model_bytes, "the model");
    try {
      s.model = std::make_shared<const Model>(DecodeModel(model, model_bytes));
    } catch (const ModelFileError& e) {
      throw StateFileError(std::string("embedded model: ") + e.what());
    }
    if (s.model->input_dims() != out.dims) {
      throw StateFileError("the model has " + std::to_string(s.model->input_dims()) +
                           " input dimensions, the stream " + std::to_string(out.dims));
    }
  }
  const uint64_t solution = r.Get<uint64_t>("the solution");
  r.Need(solution, 16, "the solution");
  s.solution_ids.resize(solution);
  r.GetArray(s.solution_ids.data(), solution, "the solution");
  s.solution_alpha.resize(static_cast<Eigen::Index>(solution));
  r.GetArray(s.solution_alpha.data(), solution, "the solution");

  auto& inc = s.incidents;
  inc.next_id = r.Get<uint64_t>("the incident state");
  const uint32_t recent = r.Get<uint32_t>("the incident state");
  r.Need(recent, 17, "the incident state");
  inc.recent_flags.resize(recent);
  for (uint32_t i = 0; i < recent; ++i) {
    const uint8_t flag = r.Get<uint8_t>("the incident state");
    if (flag > 1) throw StateFileError("invalid incident flag " + std::to_string(flag));
    inc.recent_flags[i] = flag == 1;
  }
  inc.recent_times.resize(recent);
  r.GetArray(inc.recent_times.data(), recent, "the incident state");
  inc.recent_decisions.resize(recent);
  r.GetArray(inc.recent_decisions.data(), recent, "the incident state");
  const uint8_t open = r.Get<uint8_t>("the incident state");
  if (open > 1) throw StateFileError("invalid open-incident flag " + std::to_string(open));
  if (open == 1) {
    TrackedIncident incident;
    incident.id = r.Get<uint64_t>("the open incident");
    incident.start_time = r.Get<double>("the open incident");
    incident.end_time = r.Get<double>("the open incident");
    incident.peak_decision = r.Get<double>("the open incident");
    incident.flagged_vectors = r.Get<int64_t>("the open incident");
    inc.open_incident = incident;
  }
  inc.clean_run = r.Get<int64_t>("the incident state");

  s.drift.count = r.Get<int64_t>("the drift state");
  s.drift.mean = r.Get<double>("the drift state");
  s.drift.up_sum = r.Get<double>("the drift state");
  s.drift.up_min = r.Get<double>("the drift state");
  s.drift.down_sum = r.Get<double>("the drift state");
  s.drift.down_max = r.Get<double>("the drift state");

  s.accepted_since_refit = r.Get<int64_t>("the refit schedule");
  s.refits_since_cold = r.Get<int64_t>("the refit schedule");
  s.model_time = r.Get<double>("the refit schedule");

  s.counters.vectors = r.Get<int64_t>("the counters");
  s.counters.anomalies = r.Get<int64_t>("the counters");
  s.counters.accepted = r.Get<int64_t>("the counters");
  s.counters.refits_started = r.Get<int64_t>("the counters");
  s.counters.refits_coalesced = r.Get<int64_t>("the counters");
  s.counters.drift_alarms = r.Get<int64_t>("the counters");
  if (version >= 2) {
    s.counters.history_vectors = r.Get<int64_t>("the counters");
    s.counters.history_resets = r.Get<int64_t>("the counters");
    auto& t = s.transform;
    const uint64_t history = r.Get<uint64_t>("the transform history");
    r.Need(history, (static_cast<std::size_t>(dims) + 1) * 8, "the transform history");
    if (history > 0) t.history.resize(static_cast<Eigen::Index>(history), dims);
    r.GetArray(t.history.data(), history * dims, "the transform history");
    t.times.resize(history);
    r.GetArray(t.times.data(), history, "the transform history");
    const uint32_t windows = r.Get<uint32_t>("the transform statistics");
    r.Need(windows, sizeof(int32_t), "the transform statistics");
    t.running_windows.resize(windows);
    for (int& window : t.running_windows) window = r.Get<int32_t>("the transform statistics");
    const uint64_t running = r.Get<uint64_t>("the transform statistics");
    r.Need(running, sizeof(double), "the transform statistics");
    t.running.resize(running);
    r.GetArray(t.running.data(), running, "the transform statistics");
    t.running_outputs = r.Get<int64_t>("the transform statistics");
  }
  if (r.remaining() != 0) throw StateFileError("trailing bytes after the state");
  return out;
}

}  // namespace

StreamStateFile DecodeStreamState(const uint8_t* data, std::size_t size) {
  try {
    const ChecksummedPayload payload =
        UnwrapChecksummed(data, size, kMagic, kStateFormatVersion, "state", kMaxPayloadBytes);
    ByteReader reader(payload.data, payload.size, "state");
    return DecodeStatePayload(reader, payload.version);
  } catch (const ChecksummedFileError& e) {
    throw StateFileError(e.what());
  }
}

StateStore::StateStore(std::string dir) : dir_(std::move(dir)) {
  if (dir_.empty()) throw StateFileError("state directory: the name is empty");
  std::error_code error;
  fs::create_directories(dir_, error);
  if (error) {
    throw StateFileError(dir_ + ": cannot create the state directory: " + error.message());
  }
  if (!fs::is_directory(dir_, error)) throw StateFileError(dir_ + ": not a directory");
}

double StateWriteRetrySeconds(int failures) {
  constexpr double kFirst = 1.0, kLongest = 60.0;
  double seconds = kFirst;
  for (int i = 1; i < failures && seconds < kLongest; ++i) seconds *= 2;
  return std::min(seconds, kLongest);
}

std::string StateStore::PathFor(std::string_view stream_key) const {
  return (fs::path(dir_) / (EscapeStreamKey(stream_key) + std::string(kSuffix))).string();
}

void StateStore::Save(std::string_view stream_key, int dims, const DetectorState& state) const {
  const std::vector<uint8_t> bytes = EncodeStreamState(stream_key, dims, state);
  try {
    WriteFileAtomically(PathFor(stream_key), bytes.data(), bytes.size());
  } catch (const ModelFileError& e) {
    throw StateFileError(e.what());
  }
}

void StateStore::SaveMembers(const MemberRecord& record) const {
  std::string text =
      "# nuwatchd: cluster.member and cluster.members as of the last start or reload "
      "(PROTOCOL.md 13.4)\nmember " +
      record.member + "\n";
  for (const std::string& m : record.members) text += "members " + m + "\n";
  const std::string path = (fs::path(dir_) / kMembersFileName).string();
  try {
    WriteFileAtomically(path, reinterpret_cast<const uint8_t*>(text.data()), text.size());
  } catch (const ModelFileError& e) {
    throw StateFileError(e.what());
  }
}

std::optional<StateStore::MemberRecord> StateStore::LoadMembers() const {
  const std::string path = (fs::path(dir_) / kMembersFileName).string();
  std::ifstream in(path);
  if (!in) {
    std::error_code error;
    if (!fs::exists(path, error) && !error) return std::nullopt;
    throw StateFileError(path + ": cannot be read");
  }
  MemberRecord record;
  bool named = false;
  std::string line;
  for (int number = 1; std::getline(in, line); ++number) {
    if (line.empty() || line[0] == '#') continue;
    if (line.rfind("member ", 0) == 0 && !named) {
      record.member = line.substr(7);
      named = true;
    } else if (line.rfind("members ", 0) == 0 && named && line.size() > 8) {
      record.members.push_back(line.substr(8));
    } else {
      throw StateFileError(path + ":" + std::to_string(number) + ": not a member record line");
    }
  }
  if (!named) throw StateFileError(path + ": names no member");
  return record;
}

std::vector<StateStore::Entry> StateStore::List() const {
  std::vector<Entry> entries;
  std::error_code error;
  for (fs::directory_iterator it(dir_, error), end; !error && it != end; it.increment(error)) {
    const std::string name = it->path().filename().string();
    if (!name.ends_with(kSuffix) || name.size() == kSuffix.size()) continue;
    const auto key =
        UnescapeStreamKey(std::string_view(name).substr(0, name.size() - kSuffix.size()));
    if (!key) continue;
    std::error_code type_error;
    if (!it->is_regular_file(type_error)) continue;
    entries.push_back({it->path().string(), *key});
  }
  if (error) throw StateFileError(dir_ + ": cannot list the state directory: " + error.message());
  std::sort(entries.begin(), entries.end(),
            [](const Entry& a, const Entry& b) { return a.stream_key < b.stream_key; });
  return entries;
}

StreamStateFile StateStore::Load(const Entry& entry) const {
  std::ifstream in(entry.path, std::ios::binary);
  if (!in) throw StateFileError(entry.path + ": cannot open for reading: " + std::strerror(errno));
  std::vector<uint8_t> bytes((std::istreambuf_iterator<char>(in)),
                             std::istreambuf_iterator<char>());
  if (in.bad()) throw StateFileError(entry.path + ": read error");
  StreamStateFile file;
  try {
    file = DecodeStreamState(bytes.data(), bytes.size());
  } catch (const StateFileError& e) {
    throw StateFileError(entry.path + ": " + e.what());
  }
  if (file.stream_key != entry.stream_key) {
    throw StateFileError(entry.path + ": holds stream '" + file.stream_key + "', its name says '" +
                         entry.stream_key + "'");
  }
  return file;
}

std::string StateStore::Quarantine(const std::string& path) const {
  const std::string base = path + ".corrupt-" + std::to_string(std::time(nullptr));
  std::string target = base;
  std::error_code error;
  for (int n = 1; fs::exists(target, error); ++n) target = base + "-" + std::to_string(n);
  fs::rename(path, target, error);
  if (error) {
    throw StateFileError(path + ": cannot move it aside to " + target + ": " + error.message());
  }
  return target;
}

std::vector<std::string> StateStore::RemoveStaleTemporaries() const {
  std::vector<fs::path> stale;
  std::error_code error;
  for (fs::directory_iterator it(dir_, error), end; !error && it != end; it.increment(error)) {
    if (it->path().filename().string().find(".state.tmp.") != std::string::npos) {
      stale.push_back(it->path());
    }
  }
  std::vector<std::string> removed;
  for (const fs::path& path : stale) {
    std::error_code remove_error;
    if (fs::remove(path, remove_error)) removed.push_back(path.string());
  }
  return removed;
}

StateDirLock::~StateDirLock() {
  if (fd_ >= 0) ::close(fd_);  // releases the lock
}

bool StateDirLock::TryLock(const std::string& dir, long* holder) {
  path_ = (fs::path(dir) / kFileName).string();
  fd_ = ::open(path_.c_str(), O_RDWR | O_CREAT | O_CLOEXEC, 0644);
  if (fd_ < 0) throw StateFileError(path_ + ": cannot open the lock file: " + std::strerror(errno));
  if (::flock(fd_, LOCK_EX | LOCK_NB) != 0) {
    const int error = errno;
    if (error != EWOULDBLOCK) {
      ::close(fd_);
      fd_ = -1;
      throw StateFileError(path_ + ": cannot lock: " + std::strerror(error));
    }
    char text[32] = {};
    const ssize_t n = ::pread(fd_, text, sizeof text - 1, 0);
    *holder = n > 0 ? std::strtol(text, nullptr, 10) : 0;
    ::close(fd_);
    fd_ = -1;
    return false;
  }
  // Our pid, for the message of a daemon refused later. The lock is what counts, so a failure
  // to write it (a full disk) is not an error.
  const std::string pid = std::to_string(::getpid()) + "\n";
  if (::ftruncate(fd_, 0) == 0) {
    [[maybe_unused]] const ssize_t n = ::pwrite(fd_, pid.data(), pid.size(), 0);
  }
  return true;
}

}  // namespace nuwatch
