#include "service/daemon.h"

#include <malloc.h>
#include <netdb.h>
#include <prometheus/exposer.h>
#include <pthread.h>
#include <spdlog/spdlog.h>
#include <sys/eventfd.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <sys/un.h>
#include <unistd.h>

#include <algorithm>
#include <array>
#include <atomic>
#include <boost/asio/executor_work_guard.hpp>
#include <boost/asio/io_context.hpp>
#include <boost/asio/post.hpp>
#include <boost/asio/signal_set.hpp>
#include <boost/asio/steady_timer.hpp>
#include <cerrno>
#include <chrono>
#include <csignal>
#include <cstdlib>
#include <cstring>
#include <deque>
#include <filesystem>
#include <fstream>
#include <future>
#include <iterator>
#include <new>
#include <nlohmann/json.hpp>
#include <set>
#include <thread>
#include <unordered_map>
#include <zmq.hpp>

#include "concurrency/thread_pool.h"
#include "nuwatch/checked_file.h"
#include "nuwatch/mutex.h"
#include "protocol/curve_keys.h"
#include "protocol/ownership.h"
#include "protocol/result_batch.h"
#include "protocol/wire_protocol.h"
#include "service/control.h"
#include "service/curve_auth.h"
#include "service/handoff.h"
#include "service/ingest_guard.h"
#include "service/metrics.h"
#include "service/recorder.h"
#include "service/refit_pool.h"
#include "service/state_store.h"
#include "service/stream_placement.h"
#include "service/stream_registry.h"
#include "settings/secret_file.h"
#include "settings/setting_text.h"

namespace nuwatch {

void ApplyOverrides(const CommandLineOverrides& o, DaemonSettings* s) {
  if (o.ingest_endpoints) s->ingest_endpoints = *o.ingest_endpoints;
  if (o.subscribe_endpoints) s->subscribe_endpoints = *o.subscribe_endpoints;
  if (o.publish_endpoint) s->publish_endpoint = *o.publish_endpoint;
  if (o.metrics_listen) s->metrics_listen = *o.metrics_listen;
  if (o.control_endpoint) s->control_endpoint = *o.control_endpoint;
  if (o.state_dir) s->state_dir = *o.state_dir;
  if (o.log_level) s->log_level = *o.log_level;
  if (o.cluster_member) s->cluster_member = *o.cluster_member;
}

namespace {
constexpr std::string_view kMemberPlaceholder = "{member}";

// Whether cluster.member is one of cluster.members.
bool IsMemberOf(const DaemonSettings& settings) {
  const std::vector<std::string>& members = settings.cluster_members;
  return std::find(members.begin(), members.end(), settings.cluster_member) != members.end();
}
}  // namespace

void CheckConfigForDaemon(const Config& config, const Config* running) {
  const std::string file =
      config.source_path.empty() ? std::string("the default configuration") : config.source_path;
  auto check = [](const DetectorOptions& options, const std::string& where) {
    try {
      CheckDetectorOptions(options, where);
    } catch (const PreconditionError& e) {
      throw ConfigError(e.what());
    }
  };
  check(config.detector, file + ": [detector]");
  // [cluster]: the names' syntax is the protocol's (§13.1), which settings cannot see.
  const DaemonSettings& d = config.daemon;
  if (std::string error = MemberListError(d.cluster_members); !error.empty()) {
    throw ConfigError(file + ": cluster.members: " + error);
  }
  if (!d.cluster_member.empty()) {
    if (std::string error = MemberNameError(d.cluster_member); !error.empty()) {
      throw ConfigError(file + ": cluster.member: " + error);
    }
  }
  // A departure: a reload takes a member of a cluster out of the list (scale-down), or keeps
  // a member that has left out of it.
  const bool departs = running != nullptr && !running->daemon.cluster_members.empty() &&
                       running->daemon.cluster_member == d.cluster_member;
  if (!d.cluster_members.empty() && !IsMemberOf(d) && !departs) {
    std::string list;
    for (const std::string& m : d.cluster_members) list += (list.empty() ? "" : ", ") + m;
    throw ConfigError(file + ": cluster.member = \"" + d.cluster_member +
                      "\" is not one of cluster.members (" + list +
                      "): set it in [cluster] or with nuwatchd --member NAME");
  }
  if (!d.cluster_control_endpoint.empty() &&
      d.cluster_control_endpoint.find(kMemberPlaceholder) == std::string::npos) {
    throw ConfigError(file + ": cluster.control_endpoint = \"" + d.cluster_control_endpoint +
                      "\" does not contain {member}, which stands for each member's name");
  }
  for (const auto& override_table : config.overrides) {
    // [detector] with this table applied: the table alone, matching every key.
    Config one = config;
    one.overrides = {override_table};
    one.overrides.front().match = "*";
    check(DetectorOptionsFor(one, "x"),
          override_table.origin + ": [[stream]] match = \"" + override_table.match + "\"");
  }
}

namespace {

using Clock = std::chrono::steady_clock;

constexpr int kMessagesPerTurn = 256;  // then poll again, so control requests are not starved
// A scoring thread's outbox (Shard::outbox) is sent when it holds this many messages or bytes, or
// at the end of the turn, whichever comes first: a result waits at most for a few dozen vectors'
// scoring (about 2 us each).
constexpr std::size_t kOutboxMessages = 32;
constexpr std::size_t kOutboxBytes = 64 * 1024;
// Messages queued for one scoring thread before the socket thread waits for it. Their bytes are
// bounded too, by ingest.scoring_queue_bytes (64 MiB by default), which keeps the daemon's own
// queues at most scoring threads x (that + one message) however large the messages, so that the
// ceiling of ingest memory is set by the configuration (README "Memory under a flood of maximal
// messages"). Small messages meet the message bound first.
constexpr int kShardQueueMessages = 1000;
constexpr int kTrimIntervalSeconds = 5;
// A message is scored in slices of at most this many values (rows x dims: 1024 rows of 16
// features, about a millisecond of scoring), so that a large batch keeps its thread's other
// streams waiting for one slice, not for the whole message (PROTOCOL.md §7).
constexpr int kSliceValues = 16384;
// Messages that may wait behind a stream's sliced message; one more, and the rest of it is scored
// at once. Their bytes stay counted in ingest.scoring_queue_bytes while they wait.
constexpr std::size_t kWaitingPerStream = 64;
// How often the socket thread reads the (un)subscriptions the XPUB socket hands up.
constexpr std::chrono::milliseconds kSubscriptionDrainInterval{200};
// How often the ingest connections are checked for a message that never ends (IngestGuard), when
// the ingest sockets have nothing left to read; also the socket thread's longest wait.
constexpr std::chrono::milliseconds kIngestGuardInterval{100};
// How often they are checked while a message waits for room: then ZeroMQ's queues fill, and what
// they hold is held to ingest.max_unread_bytes (a flood of 4 MiB messages on loopback brings
// 100-300 MB in 100 ms).
constexpr std::chrono::milliseconds kIngestGuardWaitingInterval{20};
// How long after a failed handshake with a publisher of ingest.subscribe the SUB socket connects
// to it again (libzmq itself never does after such a failure): a publisher set right is heard
// within this, and a wrong one is tried, and counted, once per interval.
constexpr std::chrono::seconds kResubscribeDelay{1};
constexpr std::size_t kControlMaxBytes = 1 << 20;
// The second frame of an adopt request (a stream's whole state) may be larger: ZeroMQ drops a
// connection that sends a frame longer than this (PROTOCOL.md §11).
constexpr std::size_t kAdoptMaxBytes = std::size_t{256} << 20;
// Vectors held for streams whose state is on its way (PROTOCOL.md §13.4): payload bytes per
// scoring thread at most, beyond each key's own bound.
constexpr std::size_t kHeldBytesPerShard = std::size_t{64} << 20;
constexpr int kPublishLingerMs = 200;
// At a stop the results of the drained input are still on their way to the subscribers: give them
// this long to leave before the socket closes (a subscriber that is gone only delays the exit).
constexpr int kStopPublishLingerMs = 5000;
constexpr double kFlushIntervalSeconds = 1.0;
constexpr int kTopFeatures = 3;
// At a stop, the ingest sockets are read until they have been quiet this long (what ZeroMQ has
// queued comes in at once; a sender's last messages may still be crossing the kernel), for at
// most kDrainSeconds.
constexpr std::chrono::milliseconds kDrainQuiet{300};
constexpr std::chrono::seconds kDrainSeconds{30};
// The final state files at a stop are written by this many threads at once: measured on this
// project's disk (ext4), 300 files of 170 KB took 0.42 s one after another, 0.17 s by 8 threads
// and 0.18 s by 32. The threads mostly wait for the disk, so more than the cores is right.
constexpr int kFinalWriteThreads = 8;
// Ownership decisions kept (Owns): about 10 MB at most with keys of 32 bytes, and more keys than
// a replica usually sees, so that the cache rarely starts over.
constexpr std::size_t kOwnerCacheKeys = 1 << 17;

void NameThisThread(const char* name) { pthread_setname_np(pthread_self(), name); }

// The file of an ipc:// endpoint ("" for other transports).
std::string IpcPath(const std::string& endpoint) {
  constexpr std::string_view kIpc = "ipc://";
  return endpoint.starts_with(kIpc) ? endpoint.substr(kIpc.size()) : std::string();
}

// libzmq replaces an ipc socket file that exists, so a second daemon would silently take the
// first one's control socket: refuse when something still answers on it.
void RefuseLiveIpcSocket(const std::string& path, const char* key) {
  sockaddr_un address{};
  if (path.empty() || path.size() >= sizeof address.sun_path) return;  // bind reports it
  address.sun_family = AF_UNIX;
  std::memcpy(address.sun_path, path.c_str(), path.size() + 1);
  const int fd = ::socket(AF_UNIX, SOCK_STREAM | SOCK_CLOEXEC, 0);
  if (fd < 0) return;
  const bool live = ::connect(fd, reinterpret_cast<sockaddr*>(&address), sizeof address) == 0;
  ::close(fd);
  if (live) {
    throw DaemonError(std::string(key) + ": " + path +
                      " is in use by another process (another nuwatchd?); stop it, or give this "
                      "one another endpoint or --state-dir");
  }
}

// The runtime directory of the default control endpoint, /tmp/nuwatchd-UID, is created 0700 and
// must belong to this user with no access for others (else another user could have placed a
// socket or a link there).
void PrepareTmpRuntimeDir(const std::string& dir) {
  if (::mkdir(dir.c_str(), 0700) != 0 && errno != EEXIST) {
    throw DaemonError("control.endpoint: cannot create " + dir + ": " + std::strerror(errno));
  }
  struct stat st {};
  if (::lstat(dir.c_str(), &st) != 0 || !S_ISDIR(st.st_mode) || st.st_uid != ::getuid() ||
      (st.st_mode & 077) != 0) {
    throw DaemonError("control.endpoint: " + dir +
                      " is not a directory of this user with mode 0700; remove it, or set "
                      "control.endpoint or state.dir");
  }
}

// Equal strings, in a time that depends on the lengths only.
bool SameSecret(const std::string& a, const std::string& b) {
  unsigned char difference = a.size() == b.size() ? 0 : 1;
  for (std::size_t i = 0; i < a.size(); ++i) {
    difference |= static_cast<unsigned char>(a[i] ^ (i < b.size() ? b[i] : 0));
  }
  return difference == 0;
}

// The first line of metrics.basic_auth_password_file, which only its owner may read.
std::string ReadPasswordFile(const std::string& path) {
  try {
    return ReadSecretFirstLine(path);
  } catch (const SecretFileError& error) {
    throw ConfigError(std::string("metrics.basic_auth_password_file: ") + error.what());
  }
}

spdlog::level::level_enum LogLevel(const std::string& name) {
  return spdlog::level::from_str(name);
}

WireLimits LimitsOf(const DaemonSettings& s) {
  WireLimits limits;
  limits.max_key_bytes = kProtocolMaxKeyBytes;
  limits.max_dims = s.max_dims;
  limits.max_vectors_per_message = s.max_vectors_per_message;
  limits.max_message_bytes = s.max_message_bytes;
  return limits;
}

std::string Join(const std::vector<std::string>& items) {
  std::string out;
  for (const auto& item : items) out += (out.empty() ? "" : ", ") + item;
  return out;
}

// Destroys the exposer promptly. Its HTTP server (civetweb) notices the stop request only when its
// accept loop wakes, which it does every 2 s or on a new connection: so connect to it, repeatedly,
// until the destructor has returned. `host` may be a wildcard address; then loopback is used.
void StopExposer(std::unique_ptr<prometheus::Exposer>& exposer, std::string host, int port) {
  if (!exposer) return;
  if (host.size() >= 2 && host.front() == '[' && host.back() == ']')
    host = host.substr(1, host.size() - 2);
  if (host == "0.0.0.0" || host.empty()) host = "127.0.0.1";
  if (host == "::") host = "::1";
  addrinfo hints{};
  hints.ai_socktype = SOCK_STREAM;
  addrinfo* found = nullptr;
  const std::string service = std::to_string(port);
  if (port <= 0 || ::getaddrinfo(host.c_str(), service.c_str(), &hints, &found) != 0) {
    exposer.reset();
    return;
  }
  std::atomic<bool> stopped{false};
  std::thread waker([&] {
    while (!stopped.load()) {
      const int fd = ::socket(found->ai_family, SOCK_STREAM | SOCK_CLOEXEC, 0);
      if (fd >= 0) {
        ::connect(fd, found->ai_addr, found->ai_addrlen);
        ::close(fd);
      }
      std::this_thread::sleep_for(std::chrono::milliseconds(10));
    }
  });
  exposer.reset();
  stopped = true;
  waker.join();
  ::freeaddrinfo(found);
}

// The state-file write outcomes the io thread reports to a stream's scoring thread.
struct FinishedWrite {
  Stream* stream = nullptr;
  int64_t vectors = 0;         // what the file holds if the write succeeded
  uint64_t model_version = 0;  // likewise
  std::string error;           // "" when the file was written, fsynced and renamed
};

// One scoring thread and what it owns outright: its streams (detector, window, incident state,
// metric handles, recorder), its end of the inproc queue the socket thread hands it messages on,
// and the hot path's reusable buffers. Other threads reach it only through `commands` (the socket
// thread: pauses, periodic work), `finished_refits` (refit threads) and `finished_writes` (the io
// thread), each under its own mutex and followed by a write to `wake_fd`; the per-vector path
// takes none of them.
struct Shard {
  Shard(int shard_index, prometheus::Counter& cpu_seconds) : index(shard_index), cpu(cpu_seconds) {
    // Sized once, so that steady-state publishing does not allocate: the outbox is sent before
    // it passes kOutboxMessages, or kOutboxBytes plus one message under kOutboxBytes.
    outbox.reserve(kOutboxMessages);
    outbox_bytes.reserve(2 * kOutboxBytes + 128);  // 128: the longest key (§3)
  }
  ~Shard() {
    if (wake_fd >= 0) ::close(wake_fd);
  }
  Shard(const Shard&) = delete;
  Shard& operator=(const Shard&) = delete;

  const int index;
  StreamRegistry streams;
  zmq::socket_t input;  // PULL, inproc: the socket thread's feed; two frames a message, or one
                        // empty frame (the stop marker) that ends the thread
  // Bytes of the messages handed to `input` and not handled yet (ingest.scoring_queue_bytes): the
  // socket thread adds before it sends, the shard's thread takes away after each message.
  std::atomic<int64_t> queued_bytes{0};
  int wake_fd = -1;
  std::thread thread;

  Mutex commands_mutex;
  std::vector<std::function<void()>> commands GUARDED_BY(commands_mutex);
  std::vector<std::function<void()>> command_work;  // the shard's thread: swapped with commands

  // Refit threads report finished refits here (Impl::NoteFinishedRefit).
  Mutex finished_mutex;
  std::vector<Stream*> finished_refits GUARDED_BY(finished_mutex);
  std::vector<Stream*> finished_work;  // swapped with finished_refits

  // The io thread reports each state write's outcome here, so that a stream's snapshot
  // bookkeeping has one owner.
  Mutex writes_mutex;
  std::vector<FinishedWrite> finished_writes GUARDED_BY(writes_mutex);
  std::vector<FinishedWrite> finished_write_work;
  // The earliest moment a failed write is due again; none while no write has failed.
  std::optional<Clock::time_point> next_write_retry;
  Clock::time_point turn_time{};  // when the current turn of messages began (Stream::last_seen)
  // nuwatch_score_duration_seconds of this thread's scoring, handed over with each SendOutbox.
  HistogramBatch score_durations{ScoreDurationBounds()};
  ThreadCpuMeter cpu;  // nuwatch_thread_cpu_seconds_total{thread="scoring_<index>"}
  // Streams whose message is being scored in slices (Stream::sliced), in turn order.
  std::deque<Stream*> slicing;

  // Ingest payloads of keys this member has just come to own and whose state is on its way from
  // their previous owner (PROTOCOL.md §13.4), in arrival order; scored once the state is adopted
  // or the wait is over. Each key holds at most `max_vectors`; the shard at most
  // kHeldBytesPerShard bytes.
  struct Held {
    std::vector<std::string> payloads;
    int64_t vectors = 0;
    int64_t max_vectors = 0;
  };
  std::unordered_map<std::string, Held> held;
  std::size_t held_bytes = 0;
  bool ending_holds = false;  // EndHolds is running (it calls HandleIngest, which calls it)

  // Hot-path buffers, reused so that steady-state processing does not allocate.
  zmq::message_t key_message;
  zmq::message_t payload_message;
  JsonScratch scratch;
  std::string result_json;
  std::string batch_json;             // a §9.4 batch of results (publish.batches)
  ResultBatchEncoder binary_results;  // a §9.5 binary batch (publish.result_form = "binary")
  std::string event_json;
  std::array<FeatureShareView, kTopFeatures> top_features;
  // A message of several vectors, scored as one batch: its rows, times and verdicts. Here and not
  // in each stream, since one message is scored at a time: 4 KB a stream for messages of 16
  // vectors of 16 features, against a full window's 144 KB.
  MatrixD batch_rows;
  std::vector<double> batch_times;
  std::vector<Verdict> batch_verdicts;

  // Results and incident events published and not yet sent (Impl::Publish): they go out together
  // at the end of the thread's turn (Impl::SendOutbox), under one lock of the result socket, so
  // that ZeroMQ's I/O thread is woken about once a turn, not once a vector (a wake-up is a system
  // call on each side). Owned by whoever scores the shard's streams: its thread, or the socket
  // thread while the shards are paused or stopped.
  struct Outgoing {
    std::size_t key_end = 0, body_end = 0;  // in outbox_bytes: key, then body, after the last
    PublishedMessage kind = PublishedMessage::kResult;
    int64_t results = 0;
  };
  std::string outbox_bytes;
  std::vector<Outgoing> outbox;

  void Wake() const {
    const uint64_t one = 1;
    // EAGAIN means the counter is saturated: a wake-up is pending anyway.
    [[maybe_unused]] const ssize_t n = ::write(wake_fd, &one, sizeof one);
  }
  // Runs `command` on the shard's thread, between two messages, in the order posted.
  void Post(std::function<void()> command) EXCLUDES(commands_mutex) {
    {
      MutexLock lock(&commands_mutex);
      commands.push_back(std::move(command));
    }
    Wake();
  }
};

// A message's bytes in its shard's ingest.scoring_queue_bytes count: given back once the message
// has been handled, unless Keep() hands them on (to a sliced message, or one that waits behind it).
class QueuedBytes {
 public:
  QueuedBytes(Shard& shard, int64_t bytes) : shard_(shard), bytes_(bytes) {}
  ~QueuedBytes() {
    if (bytes_ != 0) shard_.queued_bytes.fetch_sub(bytes_, std::memory_order_relaxed);
  }
  QueuedBytes(const QueuedBytes&) = delete;
  QueuedBytes& operator=(const QueuedBytes&) = delete;
  int64_t Keep() { return std::exchange(bytes_, 0); }

 private:
  Shard& shard_;
  int64_t bytes_;
};

int ScoringThreads(const DaemonSettings& s) {
  if (s.scoring_threads > 0) return s.scoring_threads;
  return std::max(1, static_cast<int>(std::thread::hardware_concurrency()));
}

// Keys the StreamPlacement table holds before new keys go by hash: four times the streams the
// daemon starts with room for (limits.max_streams), so that streams that expire and come back
// under new keys, and some made-up keys, still find room; at least 4096. Fixed at start: a table
// that grew again once full would move keys that went by hash meanwhile. At most about 200 bytes
// a key (the longest key, 128 bytes, and the table's node).
std::size_t PlacementCapacity(int64_t max_streams) {
  return static_cast<std::size_t>(std::max<int64_t>(4096, 4 * max_streams));
}

}  // namespace

struct Daemon::Impl final : ControlCommands {
  explicit Impl(DaemonOptions daemon_options);
  ~Impl() override;

  // Set-up.
  void SetUpAuth();
  void BindSockets();
  void StartExposer();
  void RestoreStreams();
  std::unique_ptr<Stream> MakeStream(Shard& shard, const std::string& key, int dims,
                                     const DetectorOptions& options);
  // The shard of a stream that exists (placed when it was created), or of a key a control request
  // names; places nothing. Socket thread.
  Shard& ShardFor(std::string_view key) { return *shards[placement.Find(key)]; }
  // The shard a stream about to be created goes to (restored, adopted): placed for good if new.
  // Socket thread.
  Shard& PlaceStream(std::string_view key) { return *shards[placement.Place(key)]; }
  // Every stream of every shard, sorted by key. Only while the shards are paused or stopped.
  std::vector<Stream*> AllStreamsSorted() const;

  // Threads.
  void Start();
  void RunSocketThread();
  void Loop();
  // Takes the input ZeroMQ has already queued on the ingest sockets (scored and published).
  void DrainIngest();
  void Shutdown();
  void Wake();
  void StartTimer(boost::asio::steady_timer& timer, double seconds, std::atomic<bool>& flag);
  // Every kTrimIntervalSeconds on the io thread: hands freed heap memory back to the kernel.
  void StartTrimTimer();
  void WaitForSignal();

  // Scoring threads.
  void StartShards();
  // Hands each shard the stop marker after what is queued for it, and joins the threads.
  void StopShards();
  void RunShard(Shard& shard);
  // Runs the commands posted to the shard, then its finished refits and writes.
  void HandleShardWork(Shard& shard);
  // Takes up to kMessagesPerTurn messages from the shard's queue; false at the stop marker.
  bool ReceiveShardInput(Shard& shard);
  // Holds every scoring thread between two messages while it lives (the socket thread's control
  // requests and reloads read and change every shard's streams and the configuration).
  class ShardsPaused;

  // The hot path: the socket thread receives and hands over (ReceiveFrom), the stream's scoring
  // thread does the rest. Returns true when `socket` had nothing more to read. `curve`: its
  // frames come in CURVE boxes (for the ingest guard's count of the bytes read).
  bool ReceiveFrom(zmq::socket_t& socket, bool curve);
  bool ReceiveFromIngest(std::size_t i) {
    return ReceiveFrom(ingest[i], i < pull_sockets ? PullCurve() : SubscribeCurve());
  }
  // Whether the frames of the PULL sockets, and of the SUB socket of ingest.subscribe, come in
  // CURVE boxes (both set at start, before the sockets are made).
  bool PullCurve() const { return server_keys.has_value(); }
  bool SubscribeCurve() const { return server_keys && !subscribe_server_key.empty(); }
  // Shuts down ingest connections ZeroMQ holds too much of (service/ingest_guard.h), and plans
  // shedding. `drained`: the ingest sockets have nothing left to read.
  void GuardIngestConnections(bool drained);
  // Hands a message to scoring thread `owner` if its queue has room (ingest.scoring_queue_bytes,
  // kShardQueueMessages); the messages are moved only when it had.
  enum class Handed { kYes, kNoBytes, kNoPlace };
  Handed HandTo(std::size_t owner, zmq::message_t& key, zmq::message_t& payload);
  // Hands the parked messages over, in order, while there is room; whether none is parked any
  // more.
  bool HandParked();
  // How many bytes of messages may wait in `parked` while the socket thread reads on to shed.
  int64_t ParkedWhileShedding() const;
  // While messages are parked, whether to read on from the ingest sockets: only to shed,
  // reaching the messages to drop, and only while those parked (a sender within its share may
  // have sent them) are within ParkedWhileShedding().
  bool ReadOnWhileParked() const {
    return ingest_guard && ingest_guard->shedding() && parked_bytes <= ParkedWhileShedding();
  }
  // `queued_bytes`: the message's bytes in the shard's ingest.scoring_queue_bytes count, given
  // back once it has been handled (0 for held vectors, which are bounded apart).
  void HandleIngest(Shard& shard, std::string_view key, std::string_view payload,
                    int64_t queued_bytes = 0);
  void ProcessVector(Shard& shard, Stream& stream, const PayloadView& payload, int index);
  // Rows of `dims` features in one slice of a large message (kSliceValues, or the options').
  int SliceRows(int dims) const {
    return std::max(1, (options.slice_values > 0 ? options.slice_values : kSliceValues) / dims);
  }
  // A message of several vectors, at most one slice (SliceRows): one batched product
  // (Detector::ObserveBatch), the metrics updated once for the message, the flagged rows alone
  // explained.
  void ProcessBatch(Shard& shard, Stream& stream, const PayloadView& payload);
  // Copies the message's times and rows out of its frame into times and rows (resized to the
  // message), recording each row as it goes when the stream records. Shared by whole messages and
  // sliced ones, so that both record the same way.
  void CopyMessageRows(Stream& stream, const PayloadView& payload, MatrixD& rows,
                       std::vector<double>& times);
  // ObserveBatch of the rows at their times, then metrics and results. rows may be a block of a
  // sliced message: taken by Ref, without a copy.
  void ScoreBatchRows(Shard& shard, Stream& stream, std::span<const double> times,
                      const Eigen::Ref<const MatrixD>& rows);
  // A message of more vectors than one slice: copied into stream.sliced, its first slice scored;
  // the shard's turns score the rest (ScoreSlices). Its bytes stay counted until the last slice.
  void StartSliced(Shard& shard, Stream& stream, const PayloadView& payload, QueuedBytes& bytes);
  // Scores the next slice of stream.sliced; after the last, gives back the message's bytes and
  // handles the messages that waited behind it. Whether slices remain.
  bool ScoreSlice(Shard& shard, Stream& stream);
  // One slice of each sliced message, in turn (once per turn of the shard's loop).
  void ScoreSlices(Shard& shard);
  // The rest of `stream`'s sliced message and the messages waiting behind it, at once.
  void FinishSliced(Shard& shard, Stream& stream);
  // Every sliced message of the shard, at once: before a command or the stop sees its streams.
  void FinishAllSliced(Shard& shard);
  // The stream's metrics after `verdicts` (the last of them at data time `last_time`).
  // `now`: when the verdicts' scoring ended (the caller's clock read, so that none is taken here).
  void UpdateStreamMetrics(Stream& stream, std::span<const Verdict> verdicts, double last_time,
                           Clock::time_point now);
  // Publishes the results of one ingest message's vectors (one message each, one §9.4 batch
  // with publish.batches, or one §9.5 binary batch with publish.result_form = "binary"), then
  // their incident events. `batch`: the verdicts came from ObserveBatch (flagged rows are
  // explained by ExplainBatchRow), else from one Observe.
  void PublishResults(Shard& shard, Stream& stream, std::span<const double> times,
                      std::span<const Verdict> verdicts, bool batch);
  // The §9.1 result of one vector into *result, its top features in shard.top_features; false if
  // it is not published (learning, with publish.include_learning off). `batch_row`: its row in
  // the last ObserveBatch, or -1 for the vector the last Observe scored. *explained_by keeps the
  // feature names the result points to alive until it is encoded.
  bool DescribeVerdict(Shard& shard, Stream& stream, double t, const Verdict& v, int batch_row,
                       ScoredVector* result, std::shared_ptr<const Model>* explained_by);
  // DescribeVerdict, then the §9.1 JSON into *out.
  bool EncodeVerdict(Shard& shard, Stream& stream, double t, const Verdict& v, int batch_row,
                     std::string* out);
  void PublishIncidentEvent(Shard& shard, Stream& stream, double t, const Verdict& v);
  void Reject(RejectReason reason, std::string_view detail, std::string_view key);
  // Queues one result message (or incident event) in the shard's outbox; sent by SendOutbox, at
  // once when the outbox is full or the message large. `results`: the results the message holds
  // (a batch, §9.4, holds several), for the drop counts.
  void Publish(Shard& shard, std::string_view key, std::string_view body, PublishedMessage message,
               int64_t results = 1) EXCLUDES(publish_mutex);
  // Sends what the shard's outbox holds, in order; called at the end of every scoring turn and
  // after any scoring the socket thread does for a paused or stopped shard.
  void SendOutbox(Shard& shard) EXCLUDES(publish_mutex);
  void SendNow(std::string_view key, std::string_view body, PublishedMessage message,
               int64_t results) REQUIRES(publish_mutex);
  void DrainSubscriptions() EXCLUDES(publish_mutex);
  // Connects the SUB socket of ingest.subscribe again to each publisher whose handshake failed,
  // kResubscribeDelay after the failure. The socket thread's.
  void ResubscribeAfterFailedHandshakes();
  void Record(Stream& stream, double time);

  // Background work, noticed by the stream's scoring thread (or by the socket thread while the
  // shards are paused or stopped).
  void NoteFinishedRefit(Shard& shard, Stream* stream);  // any thread
  void HandleFinishedRefits(Shard& shard);
  void PeriodicSnapshot(Shard& shard);
  void FlushRecordings(Shard& shard);
  // Forgets the shard's streams that sent nothing for limits.idle_expiry_seconds (a stream with a
  // refit or a state write in flight waits for the next scan).
  void ExpireIdleStreams(Shard& shard);
  // Destroys a stream taken out of `shard`'s registry: drops its refit report, removes its metric
  // series, closes its recording and gives its place under limits.max_streams back.
  // Requires: removed->executor.settled() (nothing of it is in use on a refit thread) and no state
  // write of it queued or reported and not yet taken.
  void DropStream(Shard& shard, std::unique_ptr<Stream> removed);
  // Why a snapshot is taken: a periodic or refit-driven one skips an unchanged stream and waits
  // for a failing stream's backoff; a request writes every stream now; the final one at shutdown
  // writes every changed or failing stream without waiting.
  enum class SnapshotKind { kPeriodic, kRequest, kFinal };
  bool TrySnapshot(Shard& shard, Stream& stream, SnapshotKind kind);
  void WaitForStateWrites();
  void HandleFinishedWrites(Shard& shard);
  void RetryFailedWrites(Shard& shard);
  void HandleControl();

  // ControlCommands (socket thread).
  std::vector<StreamStatus> Status() override;
  ClusterStatus Cluster() override {
    return {config.daemon.cluster_member, config.daemon.cluster_members.size(),
            !config.daemon.cluster_members.empty() && !IsMemberOf(config.daemon),
            handoffs_pending.load(std::memory_order_relaxed)};
  }
  SnapshotOutcome Snapshot() override;
  std::optional<std::string> Relearn(const std::string& stream) override;
  ReloadOutcome Reload() override;
  std::optional<std::string> Forget(const std::string& stream) override;
  AdoptOutcome Adopt(const std::string& stream, const std::string& from,
                     std::span<const uint8_t> state) override {
    return InstallState(stream, from, state, false);
  }
  // Adopt's work: a stream made from `state` (EncodeStreamState bytes) in its shard, its held
  // vectors scored. `taken_back`: the state of this member's own offer, withdrawn because a
  // later reload gave the stream back (ReportHandoff): neither counted as received nor refused
  // for want of a member list.
  AdoptOutcome InstallState(const std::string& key, const std::string& from,
                            std::span<const uint8_t> bytes, bool taken_back);
  // The socket thread's side of taken-back offers: installs each one queued in `taken_back`.
  void InstallTakenBack();

  // Handoff (PROTOCOL.md §13.4). The new owner's side: whether a key without a stream here waits
  // for its state from its previous owner (scoring threads, and the socket thread while they are
  // paused), holding its vectors meanwhile; the held vectors of one key, scored now (by the
  // adopted stream, or by a new one once the wait is over); every held key whose wait is over
  // (`all`: every held key, at a stop).
  bool AwaitsHandoff(std::string_view key) const;
  void Hold(Shard& shard, std::string_view key, std::string_view payload, int64_t vectors);
  int64_t ScoreHeld(Shard& shard, const std::string& key);
  void EndHolds(Shard& shard, bool all);
  // Writes cluster.member and cluster.members to the state directory (StateStore::SaveMembers),
  // read at the next start-up; a failure is logged.
  void RecordMembers();
  bool HandoffEnabled() const {
    return !config.daemon.cluster_control_endpoint.empty() &&
           !config.daemon.cluster_members.empty();
  }
  // The old owner's side: the stream's state offered to its new owner by `handoff_sender`.
  void ReportHandoff(const HandoffOffer& offer, const HandoffReport& report);
  std::string ControlEndpointOf(const std::string& member) const;

  DaemonOptions options;
  Config config;  // in force
  WireLimits limits;
  DaemonMetrics metrics{NUWATCH_VERSION};
  ThreadCpuMeter socket_cpu{metrics.thread_cpu("socket")};  // the socket thread's
  std::unique_ptr<prometheus::Exposer> exposer;
  std::string metrics_host;
  int metrics_port = 0;
  DaemonEndpoints endpoints;

  zmq::context_t context{1};
  // CURVE ([auth]): the daemon's key pair (none without [auth]) and the ZAP handler, which is
  // there either way (it bounds publish.max_subscribers). Declared before the sockets, so that it
  // is destroyed after them: with no handler bound, libzmq would admit any CURVE client.
  std::optional<CurveKeyPair> server_keys;
  std::string subscribe_server_key;  // Z85; "" = the SUB socket is plain
  std::unique_ptr<CurveAuthenticator> auth;
  std::vector<zmq::socket_t> ingest;  // PULL sockets, then the SUB socket if any
  // XPUB with ZMQ_XPUB_NODROP: a full subscriber queue is seen and counted. The scoring threads
  // publish on it in turn: a ZeroMQ socket may change threads behind a full memory barrier, which
  // the mutex provides; the socket thread only drains its subscriptions.
  Mutex publish_mutex;
  zmq::socket_t publish;
  zmq::socket_t control;
  int wake_fd = -1;

  RefitPool pool;
  std::optional<StateStore> store;
  // While Shutdown writes the final state files: the threads that write them side by side
  // (kFinalWriteThreads). Set and cleared by the socket thread while the scoring threads are
  // stopped; null otherwise, when writes go through `io` one after another.
  ThreadPool* final_writers = nullptr;
  StateDirLock state_lock;  // held while the daemon lives
  // The scoring threads (daemon.scoring_threads), and the socket thread's PUSH end of each one's
  // queue (feeds[i] to shards[i]->input).
  std::vector<std::unique_ptr<Shard>> shards;
  std::vector<zmq::socket_t> feeds;
  // Which shard owns each key (socket thread; set up with the shards).
  StreamPlacement placement{1, 0};
  bool shards_running = false;  // socket thread
  // Streams over every shard: a new stream takes a place (TakeStreamPlace) before it is created,
  // so that shards together never exceed limits.max_streams.
  std::atomic<int64_t> stream_count{0};
  bool TakeStreamPlace();
  void ReleaseStreamPlaces(int64_t n);
  int64_t restored_streams = 0;
  // ShardsPaused: how many shards are held, and whether they are to stay.
  Mutex pause_mutex;
  CondVar pause_changed{&pause_mutex};
  int shards_held GUARDED_BY(pause_mutex) = 0;
  bool hold_shards GUARDED_BY(pause_mutex) = false;
  Clock::time_point last_subscription_drain{};
  Clock::time_point next_expiry_scan{};
  // The socket thread's: the ingest guard, over the connections of every socket of `ingest`: the
  // first pull_sockets are PULL sockets, the one after them, if any, the SUB socket of
  // ingest.subscribe.
  std::optional<IngestConnectionGuard> ingest_guard;
  std::size_t pull_sockets = 0;
  bool HasSubscribeSocket() const { return pull_sockets < ingest.size(); }
  Clock::time_point last_guard_check{};
  bool shed_logged = false;
  std::vector<CurveAuthenticator::PeerConnection> guard_listed;
  std::vector<IngestConnectionGuard::Connection> guard_live;
  bool guard_cut_logged = false;
  // The socket thread's: publishers of ingest.subscribe to connect to again, and when.
  std::vector<std::string> failed_subscriptions;
  std::unordered_map<std::string, Clock::time_point> resubscribe_due;
  bool resubscribe_logged = false;

  boost::asio::io_context io;
  boost::asio::executor_work_guard<boost::asio::io_context::executor_type> io_work{
      io.get_executor()};
  std::optional<boost::asio::signal_set> signals;
  boost::asio::steady_timer snapshot_timer{io};
  boost::asio::steady_timer flush_timer{io};
  boost::asio::steady_timer trim_timer{io};
  bool io_stopping = false;  // the io thread's: no timer is armed again once set
  std::atomic<double> snapshot_interval_seconds{300};
  std::thread io_thread;
  std::thread socket_thread;
  bool started = false;
  bool joined = false;

  std::atomic<bool> stop_requested{false};
  std::atomic<bool> reload_requested{false};
  std::atomic<bool> snapshot_due{false};
  std::atomic<bool> flush_due{false};
  std::atomic<int> stop_signals{0};
  // A fatal error stopped the daemon (the socket thread's loop, or the io thread's work).
  std::atomic<bool> fatal_error{false};
  bool final_write_failed = false;  // socket thread; read after it has been joined
  int64_t received_messages = 0;    // socket thread: ingest messages taken, for the stop's log

  // The socket thread's receive buffers, reused.
  zmq::message_t key_message;
  zmq::message_t payload_message;
  zmq::message_t extra_message;
  // Ingest messages taken from their socket whose scoring thread had no room for them yet, in the
  // order read. Until they have gone, the socket thread reads no other ingest (the senders wait
  // in ZeroMQ's queues, and each stream's messages keep their order) but goes on answering
  // control requests, looking for room every millisecond. Usually one; more only while ingest is
  // shed (a message from a sender within its share waits here, at most ParkedWhileShedding() of
  // them and one more).
  struct ParkedMessage {
    std::size_t owner = 0;
    zmq::message_t key;
    zmq::message_t payload;
  };
  std::deque<ParkedMessage> parked;
  int64_t parked_bytes = 0;
  zmq::message_t subscription_message;  // DrainSubscriptions, under publish_mutex
  std::array<std::atomic<bool>, 256> rejection_logged{};

  // [cluster] (PROTOCOL.md §13), socket thread only (it reloads `config`): whether this member
  // owns a key. Deciding costs one BLAKE2b per member: about 2 us for three members, several
  // times the socket thread's whole work on a message (0.02-0.3 us a vector, README), against
  // 60 ns for a lookup here. So decisions are kept per key, at most kOwnerCacheKeys of them (then
  // the cache starts over), and dropped when a reload changes the member list.
  bool Owns(std::string_view key);
  // After a reload that changed the member list (shards paused): writes the state file of every
  // stream this member no longer owns and unloads it (the file stays).
  void ReleaseStreamsNotOwned();
  struct KeyHash {
    using is_transparent = void;
    std::size_t operator()(std::string_view key) const noexcept {
      return std::hash<std::string_view>{}(key);
    }
  };
  std::unordered_map<std::string, bool, KeyHash, std::equal_to<>> owner_cache;

  // Until when keys this member has come to own wait for their state (AwaitsHandoff), and which
  // member owned them before: at start-up nothing is known (every key without a restored stream
  // waits: a new member's keys all come from others), after a reload the previous member list
  // and name. Written by the socket thread while the shards are paused or not yet started.
  Clock::time_point handoff_until{};
  std::optional<std::vector<std::string>> handoff_previous_members;
  std::string handoff_previous_member;
  std::unique_ptr<HandoffSender> handoff_sender;
  // Offers handed to handoff_sender and not yet reported (status, §11.1): the socket thread adds,
  // the handoff thread's reports take away.
  std::atomic<int64_t> handoffs_pending{0};
  // Offers withdrawn because a later reload gave their streams back (HandoffEnd::kWithdrawn): the
  // handoff thread's reports add, the socket thread installs them (InstallTakenBack).
  Mutex taken_back_mutex;
  std::vector<HandoffOffer> taken_back GUARDED_BY(taken_back_mutex);
  std::atomic<bool> taken_back_waiting{false};  // so that the loop takes the mutex only then
};

// Holds every running scoring thread between two messages, from construction to destruction, so
// that the socket thread may read and change any shard's streams and the configuration they read.
// A no-op once the shards have stopped (the socket thread then owns everything). Rare by design:
// control requests and reloads only; periodic work is posted to each shard instead.
class Daemon::Impl::ShardsPaused {
 public:
  explicit ShardsPaused(Impl& impl) : impl_(impl) {
    if (!impl_.shards_running) return;
    {
      MutexLock lock(&impl_.pause_mutex);
      impl_.hold_shards = true;
    }
    for (auto& shard : impl_.shards) {
      shard->Post([this] {
        MutexLock lock(&impl_.pause_mutex);
        ++impl_.shards_held;
        impl_.pause_changed.SignalAll();
        while (impl_.hold_shards) impl_.pause_changed.Wait();
        --impl_.shards_held;
        impl_.pause_changed.SignalAll();
      });
    }
    MutexLock lock(&impl_.pause_mutex);
    while (impl_.shards_held < static_cast<int>(impl_.shards.size())) impl_.pause_changed.Wait();
  }
  ~ShardsPaused() {
    if (!impl_.shards_running) return;
    MutexLock lock(&impl_.pause_mutex);
    impl_.hold_shards = false;
    impl_.pause_changed.SignalAll();
    // Every shard has left before the next pause may begin.
    while (impl_.shards_held > 0) impl_.pause_changed.Wait();
  }
  ShardsPaused(const ShardsPaused&) = delete;
  ShardsPaused& operator=(const ShardsPaused&) = delete;

 private:
  Impl& impl_;
};

Daemon::Impl::Impl(DaemonOptions daemon_options)
    : options(std::move(daemon_options)),
      config(options.config),
      limits(LimitsOf(config.daemon)),
      // The checks come first, before the pool's threads or any socket exist.
      pool((ValidateDaemonSettings(config.daemon, config.source_path), CheckConfigForDaemon(config),
            config.daemon.refit_threads)) {
  spdlog::set_level(LogLevel(config.daemon.log_level));
  snapshot_interval_seconds = config.daemon.snapshot_interval_seconds;
  if (const std::string error = WireLimitsError(limits); !error.empty()) {
    throw ConfigError("limits: " + error);
  }
  wake_fd = ::eventfd(0, EFD_NONBLOCK | EFD_CLOEXEC);
  if (wake_fd < 0) throw DaemonError(std::string("eventfd failed: ") + std::strerror(errno));
  // The state directory first: a second daemon on it is refused before it binds anything.
  if (!config.daemon.state_dir.empty()) {
    long holder = 0;
    try {
      store.emplace(config.daemon.state_dir);
      if (!state_lock.TryLock(store->dir(), &holder)) {
        throw StateDirInUseError("state.dir " + store->dir() + " is in use by another nuwatchd" +
                                 (holder > 0 ? " (pid " + std::to_string(holder) + ")" : "") +
                                 "; stop it first, or give this one another --state-dir");
      }
    } catch (const StateFileError& e) {
      throw DaemonError(e.what());
    }
  }
  SetUpAuth();
  BindSockets();
  StartExposer();
  const int scoring_threads = ScoringThreads(config.daemon);
  placement = StreamPlacement(static_cast<std::size_t>(scoring_threads),
                              PlacementCapacity(config.daemon.max_streams));
  for (int i = 0; i < scoring_threads; ++i) {
    auto shard = std::make_unique<Shard>(i, metrics.thread_cpu("scoring_" + std::to_string(i)));
    shard->wake_fd = ::eventfd(0, EFD_NONBLOCK | EFD_CLOEXEC);
    if (shard->wake_fd < 0)
      throw DaemonError(std::string("eventfd failed: ") + std::strerror(errno));
    // inproc: ZeroMQ's lock-free pipes between two threads of this process; a message moves
    // without being copied. The high-water marks bound what waits for one scoring thread; when
    // it is full, the socket thread waits and the ingest sockets' own queues take the rest.
    const std::string endpoint = "inproc://nuwatchd-shard-" + std::to_string(i);
    shard->input = zmq::socket_t(context, zmq::socket_type::pull);
    shard->input.set(zmq::sockopt::rcvhwm, kShardQueueMessages);
    shard->input.set(zmq::sockopt::linger, 0);
    shard->input.bind(endpoint);
    zmq::socket_t feed(context, zmq::socket_type::push);
    feed.set(zmq::sockopt::sndhwm, kShardQueueMessages);
    feed.set(zmq::sockopt::linger, 0);
    feed.connect(endpoint);
    feeds.push_back(std::move(feed));
    shards.push_back(std::move(shard));
  }
  if (store) {
    try {
      RestoreStreams();
    } catch (const StateFileError& e) {
      throw DaemonError(e.what());
    }
  }
  metrics.streams().Set(static_cast<double>(stream_count.load()));
  if (HandoffEnabled()) {
    // A member that joins owns keys whose state the others will hand over once they reload. One
    // that restarts under the list it last had (its state directory's record) was not given any
    // key meanwhile: it waits only for keys another member owned under that list.
    std::optional<StateStore::MemberRecord> last;
    if (store) {
      try {
        last = store->LoadMembers();
      } catch (const StateFileError& e) {
        spdlog::warn(
            "state: {}; every key this member owns and restored no state for waits for "
            "a handoff",
            e.what());
      }
    }
    if (last && last->member == config.daemon.cluster_member) {
      handoff_previous_members = last->members;
      handoff_previous_member = last->member;
    }
    handoff_until =
        Clock::now() + std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(
                           config.daemon.cluster_handoff_timeout_seconds));
    spdlog::info(
        "handoff: {}",
        !handoff_previous_members
            ? "no member list recorded in the state directory: for " +
                  SettingNumberText(config.daemon.cluster_handoff_timeout_seconds) +
                  " s every key this member owns and has no state file for waits for its state "
                  "from another member"
        : *handoff_previous_members == config.daemon.cluster_members
            ? std::string("the member list is the one recorded at the last start or reload: "
                          "no stream waits for a handoff")
            : "the member list differs from the one recorded: for " +
                  SettingNumberText(config.daemon.cluster_handoff_timeout_seconds) +
                  " s a key another member owned under that list waits for its state");
  }
  RecordMembers();
  handoff_sender = std::make_unique<HandoffSender>(
      context, server_keys, [this](const HandoffOffer& offer, const HandoffReport& report) {
        ReportHandoff(offer, report);
      });
}

Daemon::Impl::~Impl() {
  if (handoff_sender) handoff_sender->Stop();
  // Streams first (each waits for its refit), while the pool and the metrics still exist.
  pool.Join();
  for (auto& shard : shards) shard->streams.Clear();
  StopExposer(exposer, metrics_host, metrics_port);
  if (wake_fd >= 0) ::close(wake_fd);
}

bool Daemon::Impl::TakeStreamPlace() {
  int64_t n = stream_count.load();
  while (n < config.daemon.max_streams) {
    if (stream_count.compare_exchange_weak(n, n + 1)) return true;
  }
  return false;
}

void Daemon::Impl::ReleaseStreamPlaces(int64_t n) { stream_count.fetch_sub(n); }

std::vector<Stream*> Daemon::Impl::AllStreamsSorted() const {
  std::vector<Stream*> all;
  for (const auto& shard : shards) {
    std::vector<Stream*> some = shard->streams.Sorted();
    all.insert(all.end(), some.begin(), some.end());
  }
  std::sort(all.begin(), all.end(),
            [](const Stream* a, const Stream* b) { return a->key < b->key; });
  return all;
}

void Daemon::Impl::SetUpAuth() {
  const DaemonSettings& s = config.daemon;
  if (s.server_secret_key_file.empty()) {
    // No CURVE; the handler still bounds the result socket's connections
    // (publish.max_subscribers).
    try {
      auth = std::make_unique<CurveAuthenticator>(context, std::set<std::string>(), &metrics);
    } catch (const zmq::error_t& e) {
      throw DaemonError(std::string("cannot start the ZAP handler: ") + e.what());
    }
    return;
  }
  if (!CurveAvailable()) throw DaemonError("auth: " + CurveUnavailableMessage());
  std::set<std::string> allowed;
  try {
    server_keys = ReadCurveKeyFile(s.server_secret_key_file, /*need_secret=*/true);
  } catch (const CurveKeyError& e) {
    throw ConfigError(std::string("auth.server_secret_key_file: ") + e.what());
  }
  try {
    allowed = ReadAllowedCurveKeys(s.client_keys);
  } catch (const CurveKeyError& e) {
    throw ConfigError(std::string("auth.client_keys: ") + e.what());
  }
  if (!s.subscribe_server_key_file.empty()) {
    try {
      subscribe_server_key =
          ReadCurveKeyFile(s.subscribe_server_key_file, /*need_secret=*/false).public_key;
    } catch (const CurveKeyError& e) {
      throw ConfigError(std::string("auth.subscribe_server_key_file: ") + e.what());
    }
  }
  const std::size_t count = allowed.size();
  try {
    auth = std::make_unique<CurveAuthenticator>(context, std::move(allowed), &metrics);
  } catch (const zmq::error_t& e) {
    throw DaemonError(std::string("auth: cannot start the ZAP handler: ") + e.what());
  }
  spdlog::info(
      "auth: CURVE on the ingest, publish and control sockets; server key {}; {} client "
      "keys admitted from {}",
      server_keys->public_key, count, s.client_keys);
}

void Daemon::Impl::BindSockets() {
  const DaemonSettings& s = config.daemon;
  // Frames much larger than max_message_bytes are refused by ZeroMQ itself (it drops the
  // connection), so that one huge message cannot take the memory; up to twice the limit they
  // reach the decoder and are counted as message_too_large.
  const int64_t max_frame = static_cast<int64_t>(2 * s.max_message_bytes + 4096);
  auto bind = [&](zmq::socket_t& socket, const std::string& endpoint, const char* key) {
    try {
      socket.bind(endpoint);
    } catch (const zmq::error_t& e) {
      throw DaemonError(std::string(key) + ": cannot bind " + endpoint + ": " + e.what());
    }
    return socket.get(zmq::sockopt::last_endpoint);
  };
  for (const std::string& endpoint : s.ingest_endpoints) {
    zmq::socket_t socket(context, zmq::socket_type::pull);
    socket.set(zmq::sockopt::rcvhwm, s.receive_high_water_mark);
    socket.set(zmq::sockopt::maxmsgsize, max_frame);
    // Not 0: when a sender disconnects, libzmq ends its connection's pipe after as many
    // milliseconds as the receiving socket's linger, dropping what the daemon has not read yet. A
    // sender that sends and closes at once (its messages are in the kernel's hands) lost them
    // whenever the daemon was behind; -1 keeps them until they are read. Closing the socket at
    // the stop still drops at once what is left then (DrainIngest reads it first).
    socket.set(zmq::sockopt::linger, -1);
    // Without CURVE the handler still sees the connections, for the ingest guard.
    if (server_keys) {
      auth->Protect(socket, AuthSocket::kIngest, *server_keys);
    } else {
      auth->Gate(socket, AuthSocket::kIngest);
    }
    endpoints.ingest.push_back(bind(socket, endpoint, "ingest.endpoints"));
    ingest.push_back(std::move(socket));
  }
  pull_sockets = ingest.size();
  auth->SetConnectionLimit(AuthSocket::kIngest, s.ingest_max_senders);
  ingest_guard.emplace(max_frame, s.receive_high_water_mark);
  if (!s.subscribe_endpoints.empty()) {
    zmq::socket_t socket(context, zmq::socket_type::sub);
    socket.set(zmq::sockopt::rcvhwm, s.receive_high_water_mark);
    socket.set(zmq::sockopt::maxmsgsize, max_frame);
    socket.set(zmq::sockopt::linger, -1);  // as the PULL sockets': keep what a peer left
    socket.set(zmq::sockopt::subscribe, "");
    // Watched either way: the ingest guard measures its connections too.
    if (SubscribeCurve()) {
      auth->ProtectClient(socket, AuthSocket::kSubscribe, *server_keys, subscribe_server_key);
      spdlog::info("auth: ingest.subscribe is a CURVE client of publisher key {}",
                   subscribe_server_key);
    } else {
      auth->Track(socket, AuthSocket::kSubscribe);
      if (server_keys) {
        spdlog::warn(
            "auth: ingest.subscribe connects without CURVE (auth.subscribe_server_key_file is "
            "not set): anything that answers at those endpoints is taken as ingest");
      }
    }
    for (const std::string& endpoint : s.subscribe_endpoints) {
      try {
        socket.connect(endpoint);
      } catch (const zmq::error_t& e) {
        throw DaemonError("ingest.subscribe: cannot connect to " + endpoint + ": " + e.what());
      }
      endpoints.subscribe.push_back(endpoint);
    }
    ingest.push_back(std::move(socket));
  }
  // XPUB rather than PUB: with ZMQ_XPUB_NODROP a send that finds some subscriber's queue at its
  // high-water mark fails with EAGAIN instead of being dropped silently for that subscriber, so
  // that every result is either delivered or counted (PROTOCOL.md §9.3). SUB peers see no
  // difference.
  publish = zmq::socket_t(context, zmq::socket_type::xpub);
  publish.set(zmq::sockopt::sndhwm, s.publish_high_water_mark);
  publish.set(zmq::sockopt::xpub_nodrop, true);
  publish.set(zmq::sockopt::linger, kPublishLingerMs);
  if (server_keys) {
    auth->Protect(publish, AuthSocket::kPublish, *server_keys);
  } else {
    auth->Gate(publish, AuthSocket::kPublish);
  }
  auth->SetConnectionLimit(AuthSocket::kPublish, s.publish_max_subscribers);
  endpoints.publish = bind(publish, s.publish_endpoint, "publish.endpoint");
  control = zmq::socket_t(context, zmq::socket_type::rep);
  control.set(zmq::sockopt::maxmsgsize, static_cast<int64_t>(kAdoptMaxBytes));
  control.set(zmq::sockopt::linger, 0);
  if (server_keys) auth->Protect(control, AuthSocket::kControl, *server_keys);
  std::string control_endpoint = s.control_endpoint;
  if (control_endpoint.empty()) {
    control_endpoint = DefaultControlEndpoint(s.state_dir, std::getenv("RUNTIME_DIRECTORY"),
                                              std::getenv("XDG_RUNTIME_DIR"), ::getuid());
    const std::string dir = std::filesystem::path(IpcPath(control_endpoint)).parent_path();
    if (dir == "/tmp/nuwatchd-" + std::to_string(::getuid())) PrepareTmpRuntimeDir(dir);
  }
  const std::string control_path = IpcPath(control_endpoint);
  RefuseLiveIpcSocket(control_path, "control.endpoint");
  endpoints.control = bind(control, control_endpoint, "control.endpoint");
  // Whoever may open the socket file may steer the daemon: its owner only. libzmq creates it
  // with the umask's mode (a directory such as systemd's RuntimeDirectory= is 0755 by default);
  // /tmp/nuwatchd-UID is 0700 besides, so that no one can connect before this chmod.
  if (!control_path.empty() && ::chmod(control_path.c_str(), 0600) != 0) {
    throw DaemonError("control.endpoint: cannot restrict " + control_path +
                      " to mode 0600: " + std::strerror(errno));
  }
  auth->Start();
}

void Daemon::Impl::StartExposer() {
  const std::string& listen = config.daemon.metrics_listen;
  try {
    exposer = std::make_unique<prometheus::Exposer>(listen, 2);
  } catch (const std::exception& e) {
    throw DaemonError("metrics.listen: cannot listen on " + listen + ": " + e.what());
  }
  if (!config.daemon.metrics_basic_auth_user.empty()) {
    const std::string password = ReadPasswordFile(config.daemon.metrics_basic_auth_password_file);
    // Civetweb calls this on its own threads; the strings are copies, compared in constant time
    // so that the time of a refusal says nothing about how much of a guess was right.
    exposer->RegisterAuth(
        [user = config.daemon.metrics_basic_auth_user, password](const std::string& given_user,
                                                                 const std::string& given) {
          // Both compared before either is looked at, so that a wrong user name takes as long
          // as a wrong password (&& would skip the second comparison).
          const bool user_matches = SameSecret(given_user, user);
          const bool password_matches = SameSecret(given, password);
          return user_matches && password_matches;
        },
        "nuwatch", "/metrics");
  }
  exposer->RegisterCollectable(metrics.registry());
  const std::vector<int> ports = exposer->GetListeningPorts();
  metrics_host = listen.substr(0, listen.rfind(':'));
  metrics_port = ports.empty() ? 0 : ports[0];
  endpoints.metrics = metrics_host + ":" + std::to_string(metrics_port);
}

std::unique_ptr<Stream> Daemon::Impl::MakeStream(Shard& shard, const std::string& key, int dims,
                                                 const DetectorOptions& stream_options) {
  auto stream = std::make_unique<Stream>(
      key, dims, stream_options, &pool, &metrics, config.daemon.anomaly_ratio_window,
      [this, &shard](Stream* s) { NoteFinishedRefit(shard, s); });
  if (!config.daemon.record_dir.empty()) {
    stream->recorder = std::make_unique<StreamRecorder>(
        config.daemon.record_dir, key, dims, stream_options.feature_names,
        config.daemon.record_rotate_bytes, config.daemon.record_keep_files);
  }
  return stream;
}

void Daemon::Impl::RestoreStreams() {
  for (const std::string& path : store->RemoveStaleTemporaries()) {
    spdlog::info("state: removed {} (left by an interrupted write)", path);
  }
  int64_t not_owned = 0;
  for (const StateStore::Entry& entry : store->List()) {
    if (!Owns(entry.stream_key)) {
      ++not_owned;  // another member's stream (§13.4): its file stays, unread
      continue;
    }
    if (stream_count.load() >= config.daemon.max_streams) {
      spdlog::warn("state: {} not restored: limits.max_streams = {} streams are restored already",
                   entry.path, config.daemon.max_streams);
      continue;
    }
    std::string reason;
    try {
      StreamStateFile file = store->Load(entry);
      const DetectorOptions stream_options = DetectorOptionsFor(config, file.stream_key);
      if (!stream_options.feature_names.empty() &&
          stream_options.feature_names.size() != static_cast<std::size_t>(file.dims)) {
        throw StateFileError(entry.path + ": holds " + std::to_string(file.dims) +
                             " features but the configuration names " +
                             std::to_string(stream_options.feature_names.size()));
      }
      Shard& shard = PlaceStream(file.stream_key);
      std::unique_ptr<Stream> stream =
          MakeStream(shard, file.stream_key, file.dims, stream_options);
      stream->detector->ImportState(file.state);
      const auto model = stream->detector->model();
      stream->seen_model_version = model ? model->version() : 0;
      stream->model_seen_at = Clock::now();
      stream->seen_coalesced = stream->detector->counters().refits_coalesced;
      stream->snapshot_vectors = stream->detector->counters().vectors;
      stream->snapshot_model_version = stream->seen_model_version;
      stream->RefreshSlowGauges();
      spdlog::info("state: restored stream={} state={} model_version={} window={} from {}",
                   file.stream_key, StreamStateName(stream->detector->state()),
                   stream->seen_model_version, stream->detector->window_size(), entry.path);
      stream->last_seen = Clock::now();  // restored streams get the whole expiry from the start
      shard.streams.Add(std::move(stream));
      ++stream_count;
      ++restored_streams;
      continue;
    } catch (const StateFileError& e) {
      reason = e.what();
    } catch (const PreconditionError& e) {
      reason = entry.path + ": " + e.what();
    }
    try {
      const std::string moved = store->Quarantine(entry.path);
      spdlog::error("state: {}; moved it to {}; stream {} starts afresh", reason, moved,
                    entry.stream_key);
    } catch (const StateFileError& e) {
      spdlog::error("state: {}; {}; stream {} starts afresh", reason, e.what(), entry.stream_key);
    }
  }
  if (not_owned > 0) {
    spdlog::info(
        "state: {} state files are of streams other members of cluster.members own; left on disk "
        "and not loaded",
        not_owned);
  }
}

void Daemon::Impl::Wake() {
  const uint64_t one = 1;
  // EAGAIN means the counter is saturated: a wake-up is pending anyway.
  [[maybe_unused]] const ssize_t n = ::write(wake_fd, &one, sizeof one);
}

void Daemon::Impl::StartTimer(boost::asio::steady_timer& timer, double seconds,
                              std::atomic<bool>& flag) {
  timer.expires_after(
      std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(seconds)));
  timer.async_wait([this, &timer, &flag, seconds](const boost::system::error_code& error) {
    // Cancelled at shutdown; or it expired just before the cancel and was already queued, when
    // arming it again would keep the io thread, and the stop that joins it, waiting for ever.
    if (error || io_stopping) return;
    flag = true;
    Wake();
    const double next = &timer == &snapshot_timer ? snapshot_interval_seconds.load() : seconds;
    StartTimer(timer, next, flag);
  });
}

void Daemon::Impl::StartTrimTimer() {
  trim_timer.expires_after(std::chrono::seconds(kTrimIntervalSeconds));
  trim_timer.async_wait([this](const boost::system::error_code& error) {
    if (error || io_stopping) return;  // cancelled at shutdown (see StartTimer)
    // A burst of large ingest messages is allocated by ZeroMQ's I/O threads and freed by the
    // scoring threads; glibc keeps what was freed in its arenas (its mmap threshold rises to
    // the message size after the first large free), so without this a burst of 300 messages of
    // 4 MiB left the daemon at 1.1 GB for good (issue 10). malloc_trim returns the free pages
    // of every arena (madvise); at this interval it costs nothing measurable. Forcing large
    // blocks to mmap instead (M_MMAP_THRESHOLD) made the same burst take 3 to 4 times as long.
    malloc_trim(0);
    StartTrimTimer();
  });
}

void Daemon::Impl::WaitForSignal() {
  signals->async_wait([this](const boost::system::error_code& error, int signal) {
    if (error || io_stopping) return;  // cancelled at shutdown (see StartTimer)
    if (signal == SIGHUP) {
      // This is the io thread: `config` belongs to the socket thread, whose Reload replaces it
      // (a data race ThreadSanitizer found; issue 10). The file never changes on reload, and
      // options.config is the start-up copy nobody writes.
      const std::string& path = options.config.source_path;
      spdlog::info("SIGHUP: reloading {} (endpoints do not change on reload)",
                   path.empty() ? "(no file)" : path);
      reload_requested = true;
    } else {
      const char* name = signal == SIGTERM ? "SIGTERM" : "SIGINT";
      if (stop_signals.fetch_add(1) > 0) {
        spdlog::critical("{} again: exiting at once, without waiting for refits or writing state",
                         name);
        spdlog::default_logger()->flush();
        std::_Exit(1);
      }
      spdlog::info("{}: stopping", name);
      stop_requested = true;
    }
    Wake();
    WaitForSignal();
  });
}

void Daemon::Impl::Start() {
  for (const auto& e : endpoints.ingest) spdlog::info("listening ingest={}", e);
  for (const auto& e : endpoints.subscribe) spdlog::info("connected subscribe={}", e);
  spdlog::info("listening publish={}", endpoints.publish);
  spdlog::info("listening control={}", endpoints.control);
  spdlog::info("listening metrics={}", endpoints.metrics);
  metrics.cluster_members().Set(static_cast<double>(config.daemon.cluster_members.size()));
  if (!options.ready_file.empty()) {
    const nlohmann::json ready = {{"ingest", endpoints.ingest},
                                  {"publish", endpoints.publish},
                                  {"control", endpoints.control},
                                  {"metrics", endpoints.metrics}};
    const std::string text = ready.dump() + "\n";
    try {
      WriteFileAtomically(options.ready_file, reinterpret_cast<const uint8_t*>(text.data()),
                          text.size());
    } catch (const ModelFileError& e) {
      throw DaemonError(std::string("ready file: ") + e.what());
    }
  }
  if (options.handle_signals) {
    signals.emplace(io, SIGINT, SIGTERM, SIGHUP);
    WaitForSignal();
  }
  if (store) StartTimer(snapshot_timer, snapshot_interval_seconds.load(), snapshot_due);
  StartTrimTimer();
  if (!config.daemon.record_dir.empty()) StartTimer(flush_timer, kFlushIntervalSeconds, flush_due);
  started = true;
  io_thread = std::thread([this] {
    NameThisThread("nuwatchd-io");
    if (options.handle_signals) {
      // The program blocks these signals in every other thread, so that they arrive here.
      sigset_t set;
      sigemptyset(&set);
      sigaddset(&set, SIGINT);
      sigaddset(&set, SIGTERM);
      sigaddset(&set, SIGHUP);
      pthread_sigmask(SIG_UNBLOCK, &set, nullptr);
    }
    // A handler that throws (a bug: every expected failure is caught where it happens) stops
    // the daemon with a failure status; the loop goes on so that the final writes still run.
    while (true) {
      try {
        io.run();
        break;
      } catch (const std::exception& e) {
        fatal_error = true;
        spdlog::critical("io thread: {}; stopping", e.what());
        stop_requested = true;
        Wake();
      }
    }
  });
  StartShards();
  socket_thread = std::thread([this] { RunSocketThread(); });
  spdlog::info("ready streams={} scoring_threads={}", restored_streams, shards.size());
}

void Daemon::Impl::RunSocketThread() {
  NameThisThread("nuwatchd-socket");
  try {
    Loop();
  } catch (const std::exception& e) {
    fatal_error = true;
    spdlog::critical("socket thread failed: {}; stopping", e.what());
  }
  Shutdown();
  socket_cpu.Report(Clock::now());
}

void Daemon::Impl::StartShards() {
  shards_running = true;
  for (auto& shard : shards) {
    Shard* s = shard.get();
    s->thread = std::thread([this, s] { RunShard(*s); });
    // Named here rather than by the thread, so that the name is in place when Start returns.
    const std::string name = ("nuwatchd-score" + std::to_string(s->index)).substr(0, 15);
    pthread_setname_np(s->thread.native_handle(), name.c_str());
  }
}

void Daemon::Impl::StopShards() {
  if (!shards_running) return;
  for (auto& feed : feeds) {
    // After everything queued for the shard: its thread ends when it reaches this.
    try {
      (void)feed.send(zmq::message_t(), zmq::send_flags::none);
    } catch (const zmq::error_t& e) {
      spdlog::error("stopping: cannot reach a scoring thread: {}", e.what());
    }
  }
  for (auto& shard : shards) {
    if (shard->thread.joinable()) shard->thread.join();
  }
  shards_running = false;
}

void Daemon::Impl::RunShard(Shard& shard) {
  std::array<zmq_pollitem_t, 2> items{
      {{nullptr, shard.wake_fd, ZMQ_POLLIN, 0}, {shard.input.handle(), 0, ZMQ_POLLIN, 0}}};
  while (true) {
    try {
      // While a message is being sliced, the loop only looks for other work between slices.
      zmq::poll(items.data(), items.size(),
                std::chrono::milliseconds(shard.slicing.empty() ? 1000 : 0));
      shard.cpu.Tick(Clock::now());
      if (items[0].revents & ZMQ_POLLIN) {
        uint64_t count;
        [[maybe_unused]] const ssize_t n = ::read(shard.wake_fd, &count, sizeof count);
        HandleShardWork(shard);
      }
      if (!shard.slicing.empty()) ScoreSlices(shard);
      if (shard.next_write_retry && Clock::now() >= *shard.next_write_retry) {
        RetryFailedWrites(shard);
      }
      if (!shard.held.empty() && Clock::now() >= handoff_until) EndHolds(shard, false);
      if (items[1].revents & ZMQ_POLLIN) {
        shard.turn_time = Clock::now();
        const bool go_on = ReceiveShardInput(shard);
        SendOutbox(shard);
        if (!go_on) break;
      }
      SendOutbox(shard);
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      if (e.num() == ETERM) break;
      spdlog::error("scoring thread {}: ZeroMQ error: {}", shard.index, e.what());
    } catch (const std::exception& e) {
      // A bug, not bad input (bad input is rejected and counted): log it and keep serving.
      spdlog::error("scoring thread {}: internal error: {}", shard.index, e.what());
    }
  }
  // What was handed over is scored before the thread ends, sliced messages included; commands
  // posted until now still run (a pause the socket thread waits for).
  try {
    FinishAllSliced(shard);
  } catch (const std::exception& e) {
    spdlog::error("scoring thread {}: internal error: {}", shard.index, e.what());
  }
  HandleShardWork(shard);
  SendOutbox(shard);
  shard.cpu.Report(Clock::now());
}

void Daemon::Impl::HandleShardWork(Shard& shard) {
  shard.command_work.clear();
  {
    MutexLock lock(&shard.commands_mutex);
    shard.command_work.swap(shard.commands);
  }
  // A command (a pause, a snapshot, a hand-away) sees each stream between two whole messages.
  if (!shard.command_work.empty()) FinishAllSliced(shard);
  for (auto& command : shard.command_work) command();
  HandleFinishedRefits(shard);
  HandleFinishedWrites(shard);
}

bool Daemon::Impl::ReceiveShardInput(Shard& shard) {
  for (int n = 0; n < kMessagesPerTurn; ++n) {
    if (!shard.input.recv(shard.key_message, zmq::recv_flags::dontwait)) return true;
    if (!shard.key_message.more()) return false;  // the stop marker: nothing follows it
    // The socket thread hands over whole two-frame messages only.
    (void)shard.input.recv(shard.payload_message, zmq::recv_flags::none);
    HandleIngest(shard, shard.key_message.to_string_view(), shard.payload_message.to_string_view(),
                 static_cast<int64_t>(shard.key_message.size() + shard.payload_message.size()));
  }
  return true;
}

void Daemon::Impl::Loop() {
  std::vector<zmq_pollitem_t> items;
  items.push_back({nullptr, wake_fd, ZMQ_POLLIN, 0});
  items.push_back({control.handle(), 0, ZMQ_POLLIN, 0});
  for (auto& socket : ingest) items.push_back({socket.handle(), 0, ZMQ_POLLIN, 0});
  while (true) {
    // While a message is parked, the ingest sockets are left unread (but while ingest is shed,
    // when they are read to drop the excess) and the loop looks for room every millisecond.
    const bool shedding = ingest_guard && ingest_guard->shedding();
    for (std::size_t i = 2; i < items.size(); ++i) {
      items[i].events = parked.empty() || shedding ? ZMQ_POLLIN : 0;
    }
    try {
      zmq::poll(items, parked.empty() ? kIngestGuardInterval : std::chrono::milliseconds(1));
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      throw;
    }
    socket_cpu.Tick(Clock::now());
    if (items[0].revents & ZMQ_POLLIN) {
      uint64_t count;
      [[maybe_unused]] const ssize_t n = ::read(wake_fd, &count, sizeof count);
    }
    if (stop_requested.load()) return;
    metrics.refits_queued().Set(static_cast<double>(pool.queued()));
    {
      int64_t queued = 0;
      for (const auto& shard : shards)
        queued += shard->queued_bytes.load(std::memory_order_relaxed);
      metrics.ingest_queued_bytes().Set(static_cast<double>(queued));
    }
    try {
      if (reload_requested.exchange(false)) Reload();
      if (taken_back_waiting.exchange(false)) InstallTakenBack();
      if (snapshot_due.exchange(false)) {
        for (auto& shard : shards) shard->Post([this, s = shard.get()] { PeriodicSnapshot(*s); });
      }
      if (flush_due.exchange(false)) {
        for (auto& shard : shards) shard->Post([this, s = shard.get()] { FlushRecordings(*s); });
      }
      if (const double expiry = config.daemon.idle_expiry_seconds;
          expiry > 0 && Clock::now() >= next_expiry_scan) {
        // A quarter of the expiry between scans, so a stream goes at most 25 % late.
        next_expiry_scan =
            Clock::now() + std::chrono::duration_cast<Clock::duration>(
                               std::chrono::duration<double>(std::clamp(expiry / 4, 1.0, 60.0)));
        for (auto& shard : shards) shard->Post([this, s = shard.get()] { ExpireIdleStreams(*s); });
      }
      if (items[1].revents & ZMQ_POLLIN) HandleControl();
      HandParked();  // the ingest sockets are read again at the next turn
      // Drained: each ingest socket was polled for input and had none, or was read to the end.
      bool all_drained = parked.empty();
      for (std::size_t i = 0; i < ingest.size(); ++i) {
        bool drained = items[2 + i].events != 0;  // not polled while a message was parked
        if (items[2 + i].revents & ZMQ_POLLIN) drained = ReceiveFromIngest(i);
        all_drained = all_drained && drained;
      }
      if (const Clock::time_point now = Clock::now();
          now - last_guard_check >=
          (parked.empty() ? kIngestGuardInterval : kIngestGuardWaitingInterval)) {
        last_guard_check = now;
        GuardIngestConnections(all_drained);
      }
      if (Clock::now() - last_subscription_drain > kSubscriptionDrainInterval) {
        last_subscription_drain = Clock::now();
        DrainSubscriptions();
      }
      ResubscribeAfterFailedHandshakes();
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      if (e.num() == ETERM) return;
      spdlog::error("ZeroMQ error: {}", e.what());
    } catch (const std::exception& e) {
      // A bug, not bad input (bad input is rejected and counted): log it and keep serving.
      spdlog::error("internal error: {}", e.what());
    }
  }
}

void Daemon::Impl::DrainIngest() {
  // A SUB socket's publisher does not know what we received (PUB/SUB drops by design): stop it
  // at once, keeping what is already queued. A PULL socket's senders count a message as
  // delivered once ZeroMQ took it: take everything until the sockets have been quiet for a
  // moment. Unbinding a PULL socket would drop what its connections have buffered, so new
  // senders can still connect meanwhile; kDrainSeconds bounds the stop for one that never
  // pauses.
  if (!config.daemon.subscribe_endpoints.empty() && !ingest.empty()) {
    // Linger 0 first: a SUB socket holds its subscription for every publisher it has not reached
    // (one that is down, or refused the handshake); a disconnect or close at the linger of -1
    // set at bind would wait for those forever, and zmq_ctx_term with it, so the daemon never
    // exited on SIGTERM. It sends nothing else; what it received stays queued for the loop below.
    ingest.back().set(zmq::sockopt::linger, 0);
    for (const std::string& endpoint : endpoints.subscribe) {
      try {
        ingest.back().disconnect(endpoint);
      } catch (const zmq::error_t&) {
        // already disconnected: nothing more will come from it either way
      }
    }
  }
  // What ZeroMQ took in is all taken now, none of it shed.
  if (ingest_guard) ingest_guard->StopShedding();
  std::vector<zmq_pollitem_t> items;
  for (auto& socket : ingest) items.push_back({socket.handle(), 0, ZMQ_POLLIN, 0});
  const int64_t before = received_messages;
  const Clock::time_point until =
      Clock::now() + std::chrono::duration_cast<Clock::duration>(kDrainSeconds);
  while (!items.empty() && Clock::now() < until) {
    try {
      if (!HandParked()) {
        // The scoring threads go on until the drain is over: room comes.
        std::this_thread::sleep_for(std::chrono::milliseconds(1));
        continue;
      }
      if (zmq::poll(items, kDrainQuiet) == 0) break;  // quiet: nothing more was queued
      for (std::size_t i = 0; i < ingest.size(); ++i) {
        if (items[i].revents & ZMQ_POLLIN) ReceiveFromIngest(i);
      }
    } catch (const zmq::error_t& e) {
      if (e.num() == EINTR) continue;
      spdlog::error("stopping: ZeroMQ error while taking queued input: {}", e.what());
      break;
    } catch (const std::exception& e) {
      spdlog::error("stopping: internal error while taking queued input: {}", e.what());
      break;
    }
  }
  // A message parked when the time ran out was taken from its socket: it is scored too.
  while (!HandParked()) std::this_thread::sleep_for(std::chrono::milliseconds(1));
  if (Clock::now() >= until) {
    spdlog::warn("stopping: input still arriving after {} s; the rest is not taken",
                 kDrainSeconds.count());
  }
  spdlog::info("stopping: took {} queued ingest messages", received_messages - before);
}

void Daemon::Impl::Shutdown() {
  // Offers not adopted yet end here; their streams' state files stay (§13.4).
  handoff_sender->Stop();
  // Taken back just before the stop: installed, so that the final state file is the stream's
  // own and not that of a stream its held vectors would start afresh below.
  InstallTakenBack();
  DrainIngest();
  ingest.clear();  // input stops here
  // The scoring threads finish what was handed to them (scored and published), then end: from
  // here on the socket thread owns every stream.
  StopShards();
  // Vectors still held for a state that has not come are not dropped: they start their streams.
  handoff_until = Clock::time_point{};
  for (auto& shard : shards) {
    EndHolds(*shard, true);
    SendOutbox(*shard);
  }
  const std::vector<Stream*> all = AllStreamsSorted();
  int busy = 0;
  for (Stream* s : all) busy += s->executor.idle() ? 0 : 1;
  if (busy > 0) spdlog::info("stopping: waiting for {} refits in flight", busy);
  pool.Join();
  try {
    for (auto& shard : shards) HandleFinishedRefits(*shard);
    WaitForStateWrites();  // so that no stream's final snapshot is skipped as still queued
    for (auto& shard : shards) HandleFinishedWrites(*shard);
    if (store) {
      // The final writes run side by side, not one after another through `io`: each stream has a
      // file of its own, and fsyncs issued together share the file system's journal commits,
      // where one after another each waits for a commit of its own (1.2-1.4 ms a file here).
      int queued = 0;
      {
        ThreadPool writers(kFinalWriteThreads);
        final_writers = &writers;
        for (auto& shard : shards) {
          for (Stream* s : shard->streams.Sorted()) {
            queued += TrySnapshot(*shard, *s, SnapshotKind::kFinal) ? 1 : 0;
          }
        }
        writers.Join();
        final_writers = nullptr;
      }
      for (auto& shard : shards) HandleFinishedWrites(*shard);
      int failed = 0;
      for (Stream* s : all) {
        if (s->write_failures == 0) continue;
        ++failed;
        spdlog::error("stopping: stream {}: the state file could not be written: {}", s->key,
                      s->write_error);
      }
      if (failed > 0) {
        final_write_failed = true;
        spdlog::error("stopping: {} of {} streams' state files are not up to date", failed,
                      all.size());
      } else {
        spdlog::info("stopping: {} state files written", queued);
      }
    }
    for (auto& shard : shards) FlushRecordings(*shard);
    for (Stream* s : all) s->recorder.reset();
  } catch (const std::exception& e) {
    final_write_failed = true;
    spdlog::error("stopping: {}", e.what());
  }
  boost::asio::post(io, [this] {
    io_stopping = true;
    if (signals) signals->cancel();
    snapshot_timer.cancel();
    flush_timer.cancel();
    trim_timer.cancel();
    io_work.reset();
  });
  if (io_thread.joinable()) io_thread.join();
  MutexLock lock(&publish_mutex);
  try {
    publish.set(zmq::sockopt::linger, kStopPublishLingerMs);
  } catch (const zmq::error_t&) {
    // the socket is closed already: nothing left to send
  }
  publish.close();
  control.close();
  if (auth) auth->Stop();  // every protected socket is closed now
  spdlog::info("stopped");
}

bool Daemon::Impl::ReceiveFrom(zmq::socket_t& socket, bool curve) {
  if (!HandParked() && !ReadOnWhileParked()) return false;
  const bool guarded = ingest_guard.has_value();
  for (int n = 0; n < kMessagesPerTurn; ++n) {
    if (!socket.recv(key_message, zmq::recv_flags::dontwait)) return true;
    ++received_messages;
    // ZMQ_SRCFD: the connection the message came from, for the guard's count of what was read.
    const int source = guarded ? zmq_msg_get(key_message.handle(), ZMQ_SRCFD) : -1;
    int64_t wire_bytes = guarded ? ingest_guard->CountFrame(source, key_message.size(), curve) : 0;
    std::size_t frames = 1;
    std::size_t bytes = key_message.size();
    bool more = key_message.more();
    if (more) {
      // The frames of a multipart message arrive together: these never wait.
      (void)socket.recv(payload_message, zmq::recv_flags::none);
      if (guarded) wire_bytes += ingest_guard->CountFrame(source, payload_message.size(), curve);
      ++frames;
      bytes += payload_message.size();
      more = payload_message.more();
    }
    while (more) {
      (void)socket.recv(extra_message, zmq::recv_flags::none);
      if (guarded) wire_bytes += ingest_guard->CountFrame(source, extra_message.size(), curve);
      ++frames;
      bytes += extra_message.size();
      more = extra_message.more();
    }
    if (guarded && ingest_guard->Shed(source, wire_bytes)) {
      // ZeroMQ holds more than ingest.max_unread_bytes and this sender holds most of it.
      metrics.ingest_shed_messages().Increment();
      metrics.ingest_shed_bytes().Increment(static_cast<double>(bytes));
      continue;
    }
    if (CheckFrameCount(frames) != RejectReason::kNone) {
      Reject(RejectReason::kWrongFrameCount, "the message does not have exactly two frames", {});
      continue;
    }
    // To the thread that owns the stream: the frames move (inproc does not copy them). When
    // that thread's queue is full the message is parked, so that nothing is dropped here, and
    // no other ingest is read until it has gone; the ingest sockets' own queues, then the
    // senders, take up the slack, while control requests are still answered.
    // A key another member owns never reaches a scoring thread, so it never creates a stream
    // (PROTOCOL.md §13.2). An invalid key goes on, to be rejected as bad_stream_key.
    const std::string_view key = key_message.to_string_view();
    if (!config.daemon.cluster_members.empty() &&
        ValidateStreamKey(key, limits) == RejectReason::kNone && !Owns(key)) {
      Reject(RejectReason::kNotOwner, "another member of cluster.members owns the key", key);
      continue;
    }
    // A valid key is placed on the least busy thread when first seen; an invalid one goes by
    // hash, to be rejected there, and takes no place in the table.
    const std::size_t owner = placement.Place(key, [this](std::string_view new_key) {
      return ValidateStreamKey(new_key, limits) == RejectReason::kNone;
    });
    if (parked.empty()) {
      const Handed handed = HandTo(owner, key_message, payload_message);
      if (handed == Handed::kYes) continue;
      metrics.ingest_waits(handed == Handed::kNoBytes ? IngestWait::kBytes : IngestWait::kMessages)
          .Increment();
    }
    // Behind those parked already, whatever its stream: the order stays that of reading.
    parked_bytes += static_cast<int64_t>(key_message.size() + payload_message.size());
    parked.push_back({owner, std::move(key_message), std::move(payload_message)});
    if (!ReadOnWhileParked()) return false;
  }
  return false;  // a full turn: more may be waiting
}

void Daemon::Impl::GuardIngestConnections(bool drained) {
  if (!ingest_guard || !auth || ingest.empty()) return;
  // Kept from check to check, so that a check allocates nothing in the steady state.
  guard_live.clear();
  auth->Connections(AuthSocket::kIngest, &guard_listed);
  for (const CurveAuthenticator::PeerConnection& c : guard_listed) {
    guard_live.push_back({c.fd, c.generation, PullCurve()});
  }
  if (HasSubscribeSocket()) {
    auth->Connections(AuthSocket::kSubscribe, &guard_listed);
    for (const CurveAuthenticator::PeerConnection& c : guard_listed) {
      guard_live.push_back({c.fd, c.generation, SubscribeCurve()});
    }
  }
  const std::vector<IngestConnectionGuard::Cut> cuts =
      ingest_guard->Check(guard_live, Clock::now(), drained);
  metrics.ingest_unread_bytes().Set(static_cast<double>(ingest_guard->last_total_unread_bytes()));
  // Shed only while a message waits for room: when the daemon keeps up, what ZeroMQ holds is
  // being read anyway.
  if (drained) {
    ingest_guard->StopShedding();
  } else {
    // Planned afresh at each check, from what ZeroMQ holds now.
    const int64_t budget = config.daemon.ingest_max_unread_bytes;
    // The messages parked here came out of ZeroMQ's queues: they count against the budget too.
    const std::vector<IngestConnectionGuard::Quota> quotas =
        ingest_guard->PlanShedding(budget, parked_bytes);
    if (!quotas.empty()) {
      const auto level = shed_logged ? spdlog::level::debug : spdlog::level::warn;
      spdlog::log(level,
                  "ingest: ZeroMQ holds {} bytes not read yet, over ingest.max_unread_bytes = {}; "
                  "dropping {} bytes of messages from {} (holding {}){}, counted in "
                  "nuwatch_ingest_shed_messages_total{}",
                  ingest_guard->last_total_unread_bytes(), budget, quotas.front().quota_bytes,
                  quotas.front().peer, quotas.front().unread_bytes,
                  quotas.size() > 1 ? fmt::format(" and {} other senders", quotas.size() - 1)
                                    : std::string(),
                  shed_logged ? "" : "; further shedding is logged at debug level");
      shed_logged = true;
    }
  }
  for (const IngestConnectionGuard::Cut& cut : cuts) {
    metrics.ingest_connections_cut().Increment();
    const auto level = guard_cut_logged ? spdlog::level::debug : spdlog::level::warn;
    spdlog::log(level,
                "ingest: shut down the connection from {}: ZeroMQ held {} bytes of it that no "
                "whole message explains (allowed {}), a message whose frames do not end; counted "
                "in nuwatch_ingest_connections_cut_total{}",
                cut.peer, cut.unread_bytes, cut.allowance_bytes,
                guard_cut_logged ? "" : "; further cuts are logged at debug level");
    guard_cut_logged = true;
  }
}

Daemon::Impl::Handed Daemon::Impl::HandTo(std::size_t owner, zmq::message_t& key,
                                          zmq::message_t& payload) {
  const auto bytes = static_cast<int64_t>(key.size() + payload.size());
  std::atomic<int64_t>& queued = shards[owner]->queued_bytes;
  // One message always goes to an empty queue, however large.
  if (const int64_t now = queued.load(std::memory_order_relaxed);
      now > 0 && now + bytes > config.daemon.scoring_queue_bytes) {
    return Handed::kNoBytes;
  }
  queued.fetch_add(bytes, std::memory_order_relaxed);
  zmq::socket_t& feed = feeds[owner];
  // The first frame decides: once it is queued, ZeroMQ takes the rest of the message.
  if (!feed.send(key, zmq::send_flags::sndmore | zmq::send_flags::dontwait)) {
    queued.fetch_sub(bytes, std::memory_order_relaxed);
    return Handed::kNoPlace;
  }
  (void)feed.send(payload, zmq::send_flags::none);
  return Handed::kYes;
}

int64_t Daemon::Impl::ParkedWhileShedding() const {
  // Half the budget, the level shedding aims for: these bytes were in ZeroMQ's queues and are
  // counted against the budget at the next check. Less would stop the reading that sheds each
  // time two senders' quotas ran out before the others' (a flood from many senders).
  return std::max(static_cast<int64_t>(limits.max_message_bytes),
                  config.daemon.ingest_max_unread_bytes / 2);
}

bool Daemon::Impl::HandParked() {
  while (!parked.empty()) {
    ParkedMessage& message = parked.front();
    const auto bytes = static_cast<int64_t>(message.key.size() + message.payload.size());
    if (HandTo(message.owner, message.key, message.payload) != Handed::kYes) return false;
    parked_bytes -= bytes;
    parked.pop_front();
  }
  return true;
}

void Daemon::Impl::HandleIngest(Shard& shard, std::string_view key, std::string_view payload,
                                int64_t queued_bytes) {
  QueuedBytes bytes(shard, queued_bytes);
  if (!shard.held.empty() && !shard.ending_holds && Clock::now() >= handoff_until) {
    // The wait is over, but RunShard (once a second) has not taken the held vectors yet: they
    // come first, so that each stream sees its vectors in order. Before this message is
    // decoded: scoring them reuses the shard's decoding scratch.
    EndHolds(shard, false);
  }
  if (!shard.slicing.empty()) {
    // A stream whose message is being sliced takes its next messages after it, in order.
    if (Stream* s = shard.streams.Find(key); s != nullptr && s->sliced) {
      s->sliced->waiting.push_back({std::string(payload), bytes.Keep()});
      if (s->sliced->waiting.size() > kWaitingPerStream) FinishSliced(shard, *s);
      return;
    }
  }
  const DecodeResult decoded = DecodeIngest(key, payload, limits, &shard.scratch);
  if (!decoded.ok()) {
    Reject(decoded.reason, decoded.detail,
           decoded.reason == RejectReason::kBadStreamKey ? std::string_view() : key);
    return;
  }
  const PayloadView& p = decoded.payload;
  Stream* stream = shard.streams.Find(key);
  if (stream == nullptr) {
    // The socket thread checked the owner, but a reload may have changed it while this message
    // waited in the shard's queue (a released stream must not come back here).
    const std::vector<std::string>& members = config.daemon.cluster_members;
    if (!members.empty() && members[OwnerOf(key, members)] != config.daemon.cluster_member) {
      Reject(RejectReason::kNotOwner, "another member of cluster.members owns the key", key);
      return;
    }
    // A key already held stays held until its wait is over, even if a reload meanwhile says
    // it would not wait now, so that its vectors keep their order.
    const bool waiting = Clock::now() < handoff_until;
    if ((waiting && !shard.held.empty() && shard.held.count(std::string(key)) > 0) ||
        AwaitsHandoff(key)) {
      Hold(shard, key, payload, p.count);
      return;
    }
  }
  if (stream == nullptr) {
    const std::string stream_key(key);
    const DetectorOptions stream_options = DetectorOptionsFor(config, stream_key);
    if (!stream_options.feature_names.empty() &&
        stream_options.feature_names.size() != static_cast<std::size_t>(p.dims)) {
      Reject(RejectReason::kDimsMismatch, "the configured feature_names fix another length", key);
      return;
    }
    if (!TakeStreamPlace()) {
      Reject(RejectReason::kStreamLimit, "a new stream, and limits.max_streams are tracked", key);
      return;
    }
    try {
      stream = shard.streams.Add(MakeStream(shard, stream_key, p.dims, stream_options));
    } catch (const std::exception& e) {
      // PreconditionError, or memory for the detector's first buffers (bad_alloc): this stream
      // is refused, the others carry on.
      ReleaseStreamPlaces(1);
      spdlog::error("stream {}: cannot create its detector: {}", stream_key, e.what());
      return;
    }
    metrics.streams().Set(static_cast<double>(stream_count.load()));
    spdlog::info("new stream={} dims={}", stream_key, p.dims);
    stream->last_seen = shard.turn_time;
  } else if (p.dims != stream->dims) {
    Reject(RejectReason::kDimsMismatch, "the stream has vectors of another length", key);
    return;
  }
  stream->last_seen = shard.turn_time;
  try {
    if (p.count == 1) {
      ProcessVector(shard, *stream, p, 0);
    } else if (p.count <= SliceRows(stream->dims)) {
      ProcessBatch(shard, *stream, p);
    } else {
      StartSliced(shard, *stream, p, bytes);
    }
  } catch (const std::bad_alloc&) {
    // The stream's training window grows as it fills (SampleWindow): with a window x features
    // beyond the memory left, this message is refused and counted; the others carry on.
    Reject(RejectReason::kStreamLimit, "not enough memory to grow the stream's training window",
           key);
  }
}

void Daemon::Impl::ProcessVector(Shard& shard, Stream& stream, const PayloadView& payload,
                                 int index) {
  const double t = payload.time(index);
  payload.CopyRow(index, stream.row);
  if (stream.recorder) Record(stream, t);
  Detector& detector = *stream.detector;
  const Clock::time_point started_at = Clock::now();
  const Verdict v = detector.Observe(t, stream.row);
  const Clock::time_point scored_at = Clock::now();
  shard.score_durations.Observe(std::chrono::duration<double>(scored_at - started_at).count());
  UpdateStreamMetrics(stream, std::span<const Verdict>(&v, 1), t, scored_at);
  PublishResults(shard, stream, std::span<const double>(&t, 1), std::span<const Verdict>(&v, 1),
                 /*batch=*/false);
}

void Daemon::Impl::ProcessBatch(Shard& shard, Stream& stream, const PayloadView& payload) {
  CopyMessageRows(stream, payload, shard.batch_rows, shard.batch_times);
  ScoreBatchRows(shard, stream, shard.batch_times, shard.batch_rows);
}

void Daemon::Impl::CopyMessageRows(Stream& stream, const PayloadView& payload, MatrixD& rows,
                                   std::vector<double>& times) {
  const int n = payload.count;
  if (rows.rows() != n || rows.cols() != stream.dims) rows.resize(n, stream.dims);
  times.resize(static_cast<std::size_t>(n));
  for (int i = 0; i < n; ++i) {
    const double t = payload.time(i);
    times[i] = t;
    const std::span<double> row(&rows(i, 0), static_cast<std::size_t>(stream.dims));
    payload.CopyRow(i, row);
    if (stream.recorder) {
      std::copy(row.begin(), row.end(), stream.row.begin());
      Record(stream, t);
    }
  }
}

void Daemon::Impl::ScoreBatchRows(Shard& shard, Stream& stream, std::span<const double> times,
                                  const Eigen::Ref<const MatrixD>& rows) {
  Detector& detector = *stream.detector;
  const Clock::time_point started_at = Clock::now();
  detector.ObserveBatch(times, rows, &shard.batch_verdicts);
  // One observation per message (or slice), of the time per vector, so that the histogram keeps
  // measuring what one vector costs (metrics.h) without a mutex-taking Observe per row.
  const Clock::time_point scored_at = Clock::now();
  shard.score_durations.Observe(std::chrono::duration<double>(scored_at - started_at).count() /
                                static_cast<double>(times.size()));
  UpdateStreamMetrics(stream, shard.batch_verdicts, times.back(), scored_at);
  PublishResults(shard, stream, times, shard.batch_verdicts, /*batch=*/true);
}

void Daemon::Impl::StartSliced(Shard& shard, Stream& stream, const PayloadView& payload,
                               QueuedBytes& bytes) {
  auto sliced = std::make_unique<SlicedMessage>();
  CopyMessageRows(stream, payload, sliced->rows, sliced->times);
  sliced->queued_bytes = bytes.Keep();  // after the copies, which may throw bad_alloc
  stream.sliced = std::move(sliced);
  // The first slice at once, as an unsliced message would be; the rest in the shard's turns.
  if (ScoreSlice(shard, stream)) shard.slicing.push_back(&stream);
}

bool Daemon::Impl::ScoreSlice(Shard& shard, Stream& stream) {
  SlicedMessage& sliced = *stream.sliced;
  const int total = static_cast<int>(sliced.times.size());
  const int begin = sliced.next;
  const int rows = std::min(SliceRows(stream.dims), total - begin);
  // Advanced first, so that a slice that throws is not scored again.
  sliced.next = begin + rows;
  try {
    ScoreBatchRows(shard, stream,
                   std::span<const double>(sliced.times)
                       .subspan(static_cast<std::size_t>(begin), static_cast<std::size_t>(rows)),
                   sliced.rows.middleRows(begin, rows));
  } catch (const std::bad_alloc&) {
    // As for a whole message (HandleIngest): the rest of this one is refused and counted.
    Reject(RejectReason::kStreamLimit, "not enough memory to grow the stream's training window",
           stream.key);
    sliced.next = total;
  } catch (const std::exception& e) {
    // A bug, not bad input: logged, as RunShard logs one in a whole message, and the rest of
    // the message dropped rather than retried.
    spdlog::error("stream={}: internal error scoring rows {} to {} of a message: {}", stream.key,
                  begin, total, e.what());
    sliced.next = total;
  }
  if (sliced.next < total) return true;
  shard.queued_bytes.fetch_sub(sliced.queued_bytes, std::memory_order_relaxed);
  std::deque<SlicedMessage::Waiting> waiting = std::move(sliced.waiting);
  stream.sliced.reset();
  // In their order. Once one of them is sliced in turn, those after it wait behind it again:
  // moved there, not handed to HandleIngest, which would copy each one again (a flood of large
  // batches to one stream then copied every waiting message once per message ahead of it).
  while (!waiting.empty()) {
    if (stream.sliced) {
      std::move(waiting.begin(), waiting.end(), std::back_inserter(stream.sliced->waiting));
      break;
    }
    SlicedMessage::Waiting message = std::move(waiting.front());
    waiting.pop_front();
    HandleIngest(shard, stream.key, message.payload, message.queued_bytes);
  }
  return false;
}

void Daemon::Impl::ScoreSlices(Shard& shard) {
  for (std::size_t turn = shard.slicing.size(); turn > 0 && !shard.slicing.empty(); --turn) {
    Stream* stream = shard.slicing.front();
    shard.slicing.pop_front();
    // A stream whose message is sliced again by a message that waited behind it is back in
    // the queue already (StartSliced).
    if (stream->sliced && ScoreSlice(shard, *stream)) shard.slicing.push_back(stream);
  }
}

void Daemon::Impl::FinishSliced(Shard& shard, Stream& stream) {
  while (stream.sliced) (void)ScoreSlice(shard, stream);
  std::erase(shard.slicing, &stream);
}

void Daemon::Impl::FinishAllSliced(Shard& shard) {
  while (!shard.slicing.empty()) {
    Stream* stream = shard.slicing.front();
    FinishSliced(shard, *stream);
  }
}

void Daemon::Impl::UpdateStreamMetrics(Stream& stream, std::span<const Verdict> verdicts,
                                       double last_time, Clock::time_point now) {
  Detector& detector = *stream.detector;
  const StreamMetrics& m = stream.metrics;
  m.vectors->Increment(static_cast<double>(verdicts.size()));
  int64_t flagged = 0;
  bool scored = false;
  uint64_t model_version = stream.seen_model_version;
  for (const Verdict& v : verdicts) {
    if (v.state != StreamState::kScoring) continue;
    scored = true;
    stream.ratio.Push(v.outlier);
    flagged += v.outlier ? 1 : 0;
    model_version = v.model_version;
  }
  if (scored) {
    const double ratio = stream.ratio.Ratio();
    m.anomaly_ratio->Set(ratio);
    if (!stream.flooding && ratio > 0.5 && stream.ratio.size() == stream.ratio.capacity()) {
      stream.flooding = true;
      spdlog::warn(
          "stream={} flags {:.0f}% of its last {} scored vectors: a lasting fault, or a setting "
          "that is not usable (does detector.window span the process's normal cycle? see the "
          "calibration warnings)",
          stream.key, 100 * ratio, config.daemon.anomaly_ratio_window);
    } else if (stream.flooding && ratio < 0.25) {
      stream.flooding = false;
    }
    if (flagged > 0) m.anomalies->Increment(static_cast<double>(flagged));
    m.model_data_age_seconds->Set(last_time - detector.model_time());
    if (model_version != stream.seen_model_version) {
      stream.seen_model_version = model_version;
      stream.model_seen_at = now;
      stream.RefreshSlowGauges();
    }
    m.model_age_seconds->Set(std::chrono::duration<double>(now - stream.model_seen_at).count());
  }
  m.window_vectors->Set(static_cast<double>(detector.window_size()));
  const int64_t coalesced = detector.counters().refits_coalesced;
  if (coalesced != stream.seen_coalesced) {
    m.refit(RefitResult::kCoalesced)
        .Increment(static_cast<double>(coalesced - stream.seen_coalesced));
    stream.seen_coalesced = coalesced;
  }
  for (auto v = verdicts.rbegin(); v != verdicts.rend(); ++v) {
    if (v->transition.type == IncidentTransitionType::kNone) continue;
    m.incidents_open->Set(v->transition.type == IncidentTransitionType::kOpened ? 1 : 0);
    break;
  }
}

void Daemon::Impl::PublishResults(Shard& shard, Stream& stream, std::span<const double> times,
                                  std::span<const Verdict> verdicts, bool batch) {
  const int n = static_cast<int>(verdicts.size());
  std::string& batch_json = shard.batch_json;
  std::string& result_json = shard.result_json;
  if (config.daemon.publish_result_form == "binary") {
    // §9.5: one binary batch with the message's results in order, then its incident events.
    ResultBatchEncoder& encoder = shard.binary_results;
    encoder.Begin();
    for (int i = 0; i < n; ++i) {
      ScoredVector result;
      std::shared_ptr<const Model> explained_by;
      if (DescribeVerdict(shard, stream, times[i], verdicts[i], batch ? i : -1, &result,
                          &explained_by))
        encoder.Add(result);
    }
    if (encoder.rows() > 0)
      Publish(shard, stream.key, encoder.Finish(), PublishedMessage::kResult, encoder.rows());
    for (int i = 0; i < n; ++i) PublishIncidentEvent(shard, stream, times[i], verdicts[i]);
    return;
  }
  if (config.daemon.publish_batches) {
    // §9.4: one message with the message's results in order, then its incident events in order.
    batch_json.assign("{\"results\":[");
    int64_t results = 0;
    for (int i = 0; i < n; ++i) {
      if (!EncodeVerdict(shard, stream, times[i], verdicts[i], batch ? i : -1, &result_json))
        continue;
      if (results++ > 0) batch_json.push_back(',');
      batch_json.append(result_json);
    }
    batch_json.append("]}");
    if (results > 0) Publish(shard, stream.key, batch_json, PublishedMessage::kResult, results);
    for (int i = 0; i < n; ++i) PublishIncidentEvent(shard, stream, times[i], verdicts[i]);
    return;
  }
  // §9: each result, then the event of the vector that opened or closed an incident.
  for (int i = 0; i < n; ++i) {
    if (EncodeVerdict(shard, stream, times[i], verdicts[i], batch ? i : -1, &result_json))
      Publish(shard, stream.key, result_json, PublishedMessage::kResult);
    PublishIncidentEvent(shard, stream, times[i], verdicts[i]);
  }
}

bool Daemon::Impl::EncodeVerdict(Shard& shard, Stream& stream, double t, const Verdict& v,
                                 int batch_row, std::string* out) {
  ScoredVector result;
  std::shared_ptr<const Model> explained_by;
  if (!DescribeVerdict(shard, stream, t, v, batch_row, &result, &explained_by)) return false;
  EncodeResultJson(result, out);
  return true;
}

bool Daemon::Impl::DescribeVerdict(Shard& shard, Stream& stream, double t, const Verdict& v,
                                   int batch_row, ScoredVector* out,
                                   std::shared_ptr<const Model>* explained_by) {
  auto& top_features = shard.top_features;
  const bool scoring = v.state == StreamState::kScoring;
  if (!scoring && !config.daemon.publish_learning) return false;
  ScoredVector& result = *out;
  result.t = t;
  result.learning = !scoring;
  result.history = v.state == StreamState::kHistory;
  result.decision = v.decision;
  result.p_value = v.p_value;
  result.anomaly = v.outlier;
  result.incident_id = v.incident_id == 0 ? -1 : static_cast<int64_t>(v.incident_id);
  result.model_version = v.model_version;
  result.support_vectors = v.support_vectors;
  std::size_t top = 0;
  if (scoring && v.outlier) {
    if ((*explained_by = stream.detector->model())) {
      // Explain allocates its result; only flagged vectors pay for it. It works in the model's
      // (transformed) features, which the model names ("flow_m3h, mean of 6").
      const Detector& detector = *stream.detector;
      const std::vector<FeatureShare> shares =
          batch_row < 0
              ? detector.ExplainLast(kTopFeatures)
              : detector.ExplainBatchRow(static_cast<std::size_t>(batch_row), kTopFeatures);
      const auto& names = (*explained_by)->parts().feature_names;
      for (const FeatureShare& share : shares) {
        FeatureShareView& view = top_features[top++];
        view.index = share.feature;
        view.share = share.share;
        view.name = static_cast<std::size_t>(share.feature) < names.size()
                        ? std::string_view(names[share.feature])
                        : std::string_view();
        if (top == top_features.size()) break;
      }
    }
  }
  result.top_features = std::span<const FeatureShareView>(top_features.data(), top);
  return true;
}

void Daemon::Impl::PublishIncidentEvent(Shard& shard, Stream& stream, double t, const Verdict& v) {
  std::string& event_json = shard.event_json;
  if (v.transition.type != IncidentTransitionType::kNone) {
    const TrackedIncident& incident = v.transition.incident;
    IncidentEvent event;
    event.kind = v.transition.type == IncidentTransitionType::kOpened ? IncidentEventKind::kOpen
                                                                      : IncidentEventKind::kClose;
    event.incident_id = static_cast<int64_t>(incident.id);
    event.t = t;
    event.start = incident.start_time;
    event.end = incident.end_time;
    event.peak_decision = incident.peak_decision;
    EncodeIncidentEventJson(event, &event_json);
    Publish(shard, stream.key, event_json, PublishedMessage::kIncidentEvent);
    spdlog::info("stream={} incident {} id={} start={} peak_decision={}", stream.key,
                 event.kind == IncidentEventKind::kOpen ? "opened" : "closed", incident.id,
                 incident.start_time, incident.peak_decision);
  }
}

void Daemon::Impl::Reject(RejectReason reason, std::string_view detail, std::string_view key) {
  metrics.CountRejected(reason);
  const bool logged = rejection_logged[static_cast<std::size_t>(reason)].exchange(true);
  const std::string_view label = RejectReasonLabel(reason);
  if (!logged) {
    spdlog::warn(
        "rejected an ingest message{}{}: {} ({}); further {} rejections are logged at "
        "debug level",
        key.empty() ? "" : " for stream=", key, label, detail, label);
  } else {
    spdlog::debug("rejected an ingest message{}{}: {} ({})", key.empty() ? "" : " for stream=", key,
                  label, detail);
  }
}

void Daemon::Impl::Publish(Shard& shard, std::string_view key, std::string_view body,
                           PublishedMessage message, int64_t results) {
  if (body.size() > kOutboxBytes) {  // not worth a copy: what waits goes first, then this
    SendOutbox(shard);
    MutexLock lock(&publish_mutex);
    SendNow(key, body, message, results);
    return;
  }
  shard.outbox_bytes.append(key);
  const std::size_t key_end = shard.outbox_bytes.size();
  shard.outbox_bytes.append(body);
  shard.outbox.push_back({key_end, shard.outbox_bytes.size(), message, results});
  if (shard.outbox.size() >= kOutboxMessages || shard.outbox_bytes.size() >= kOutboxBytes)
    SendOutbox(shard);
}

void Daemon::Impl::SendOutbox(Shard& shard) {
  // Before the results go: a subscriber that then reads /metrics finds their scoring counted.
  shard.score_durations.FlushTo(metrics.score_duration());
  if (shard.outbox.empty()) return;
  {
    MutexLock lock(&publish_mutex);
    const std::string_view bytes = shard.outbox_bytes;
    std::size_t begin = 0;
    for (const Shard::Outgoing& m : shard.outbox) {
      SendNow(bytes.substr(begin, m.key_end - begin),
              bytes.substr(m.key_end, m.body_end - m.key_end), m.kind, m.results);
      begin = m.body_end;
    }
  }
  shard.outbox.clear();
  shard.outbox_bytes.clear();
}

void Daemon::Impl::SendNow(std::string_view key, std::string_view body, PublishedMessage message,
                           int64_t results) {
  try {
    // Never blocks. XPUB_NODROP checks every matching subscriber's queue before the first frame
    // and counts whole messages, so a message goes to every matching subscriber or to none, and
    // the second frame of a message whose first was taken is never refused.
    if (!publish.send(zmq::const_buffer(key.data(), key.size()),
                      zmq::send_flags::sndmore | zmq::send_flags::dontwait)) {
      metrics.publish_dropped(message, PublishDropReason::kSubscriberSlow)
          .Increment(static_cast<double>(results));
      return;
    }
    if (!publish.send(zmq::const_buffer(body.data(), body.size()), zmq::send_flags::dontwait)) {
      metrics.publish_dropped(message, PublishDropReason::kSubscriberSlow)
          .Increment(static_cast<double>(results));
    }
  } catch (const zmq::error_t& e) {
    metrics.publish_dropped(message, PublishDropReason::kSendError)
        .Increment(static_cast<double>(results));
    spdlog::debug("publish failed: {}", e.what());
  }
}

void Daemon::Impl::ResubscribeAfterFailedHandshakes() {
  if (!auth || !HasSubscribeSocket()) return;
  auth->TakeFailedHandshakes(AuthSocket::kSubscribe, &failed_subscriptions);
  if (failed_subscriptions.empty() && resubscribe_due.empty()) return;
  const Clock::time_point now = Clock::now();
  for (std::string& endpoint : failed_subscriptions) {
    resubscribe_due.try_emplace(std::move(endpoint), now + kResubscribeDelay);
  }
  zmq::socket_t& socket = ingest[pull_sockets];
  for (auto it = resubscribe_due.begin(); it != resubscribe_due.end();) {
    if (it->second > now) {
      ++it;
      continue;
    }
    const std::string& endpoint = it->first;
    try {
      // At the linger of -1 a connection ended here would hold its unsent subscription for ever,
      // and zmq_ctx_term with it at the stop; libzmq reads the linger when the connection ends.
      socket.set(zmq::sockopt::linger, 0);
      try {
        socket.disconnect(endpoint);
      } catch (const zmq::error_t&) {
        // ENOENT: libzmq ended that connection itself after the failure (the usual case).
      }
      socket.set(zmq::sockopt::linger, -1);
      socket.connect(endpoint);
      const auto level = resubscribe_logged ? spdlog::level::debug : spdlog::level::info;
      spdlog::log(level,
                  "ingest.subscribe: connecting to {} again after its failed handshake (libzmq "
                  "does not retry one); once a second while it fails{}",
                  endpoint,
                  resubscribe_logged ? "" : "; further attempts are logged at debug level");
      resubscribe_logged = true;
    } catch (const zmq::error_t& e) {
      spdlog::error("ingest.subscribe: cannot connect to {} again: {}", endpoint, e.what());
    }
    it = resubscribe_due.erase(it);
  }
}

// XPUB hands the subscribers' (un)subscriptions to the application; nuwatchd needs none of them,
// but unread ones would pile up in the socket for as long as subscribers come and go.
void Daemon::Impl::DrainSubscriptions() {
  MutexLock lock(&publish_mutex);
  while (publish.recv(subscription_message, zmq::recv_flags::dontwait)) {
  }
}

void Daemon::Impl::Record(Stream& stream, double time) {
  if (stream.recording_failed) {  // paused until the next flush tick
    ++stream.recording_skipped;
    return;
  }
  const std::string error = stream.recorder->Append(time, stream.row);
  if (!error.empty()) {
    spdlog::error("recording: stream {}: {}; retrying in {} s", stream.key, error,
                  kFlushIntervalSeconds);
    stream.recording_failed = true;
  }
}

void Daemon::Impl::FlushRecordings(Shard& shard) {
  for (Stream* s : shard.streams.Sorted()) {
    if (!s->recorder) continue;
    if (s->recording_skipped > 0) {
      spdlog::warn("recording: stream {}: {} rows not recorded while writes failed", s->key,
                   s->recording_skipped);
      s->recording_skipped = 0;
    }
    s->recording_failed = false;
    const std::string error = s->recorder->Flush();
    if (!error.empty()) {
      spdlog::error("recording: stream {}: {}", s->key, error);
      s->recording_failed = true;
    }
  }
}

void Daemon::Impl::NoteFinishedRefit(Shard& shard, Stream* stream) {
  {
    MutexLock lock(&shard.finished_mutex);
    shard.finished_refits.push_back(stream);
  }
  shard.Wake();
}

void Daemon::Impl::HandleFinishedRefits(Shard& shard) {
  std::vector<Stream*>& finished_work = shard.finished_work;
  finished_work.clear();
  {
    MutexLock lock(&shard.finished_mutex);
    finished_work.swap(shard.finished_refits);
  }
  for (Stream* s : finished_work) {
    const auto model = s->detector->model();
    const uint64_t version = model ? model->version() : 0;
    if (version != s->seen_model_version) s->model_seen_at = Clock::now();
    s->seen_model_version = version;
    s->RefreshSlowGauges();
    const RefitReport report = s->detector->last_refit();
    if (report.ok && !report.discarded) {
      spdlog::debug("stream={} refit {} ({}): model_version={} support_vectors={} {:.3f} s", s->key,
                    RefitReasonName(report.reason), report.warm ? "warm" : "cold",
                    report.model_version, report.support_vectors, report.total_seconds);
    } else if (!report.ok && !report.discarded) {
      spdlog::warn("stream={} refit failed, the old model stays: {}", s->key, report.error);
    }
    // Why the alarms may not mean what was set (calibration.h, FitWindow): once per stream and
    // warning, so that a condition that lasts does not flood the log.
    for (const std::string& warning : report.warnings) {
      if (s->warned.insert(warning).second) spdlog::warn("stream={} {}", s->key, warning);
    }
    if (store) s->snapshot_wanted = true;
  }
  for (Stream* s : finished_work) {
    if (s->snapshot_wanted) TrySnapshot(shard, *s, SnapshotKind::kPeriodic);
  }
}

bool Daemon::Impl::TrySnapshot(Shard& shard, Stream& stream, SnapshotKind kind) {
  if (!store) return false;
  if (!stream.executor.idle() || stream.write_queued) {
    stream.snapshot_wanted = true;  // taken when the refit has finished, or at the next tick
    return false;
  }
  if (kind == SnapshotKind::kPeriodic && stream.write_failures > 0 &&
      Clock::now() < stream.retry_at) {
    stream.snapshot_wanted = true;  // backing off (RetryFailedWrites takes it when due)
    return false;
  }
  stream.snapshot_wanted = false;
  const DetectorCounters counters = stream.detector->counters();
  const auto model = stream.detector->model();
  const uint64_t version = model ? model->version() : 0;
  if (kind != SnapshotKind::kRequest && stream.write_failures == 0 &&
      counters.vectors == stream.snapshot_vectors && version == stream.snapshot_model_version) {
    return false;  // the file holds this already
  }
  auto state = std::make_shared<const DetectorState>(stream.detector->ExportState());
  stream.write_queued = true;
  const int64_t vectors = counters.vectors;
  auto write = [this, &shard, &stream, state, vectors, version] {
    FinishedWrite outcome{&stream, vectors, version, {}};
    try {
      store->Save(stream.key, stream.dims, *state);
    } catch (const std::exception& e) {
      // StateFileError (the file system refused: full, read-only, gone), or bad_alloc encoding.
      outcome.error = e.what();
    }
    {
      MutexLock lock(&shard.writes_mutex);
      shard.finished_writes.push_back(std::move(outcome));
    }
    shard.Wake();
  };
  if (final_writers != nullptr) {
    final_writers->Post(std::move(write));  // Shutdown: one file a stream, no order among them
  } else {
    boost::asio::post(io, std::move(write));
  }
  return true;
}

void Daemon::Impl::HandleFinishedWrites(Shard& shard) {
  std::vector<FinishedWrite>& finished_write_work = shard.finished_write_work;
  finished_write_work.clear();
  {
    MutexLock lock(&shard.writes_mutex);
    finished_write_work.swap(shard.finished_writes);
  }
  std::optional<Clock::time_point>& next_write_retry = shard.next_write_retry;
  for (FinishedWrite& w : finished_write_work) {
    Stream& s = *w.stream;
    s.write_queued = false;
    if (w.error.empty()) {
      if (s.write_failures > 0) {
        spdlog::info("state: stream {} written again after {} failed writes ({} vectors)", s.key,
                     s.write_failures, w.vectors);
      }
      s.snapshot_vectors = w.vectors;
      s.snapshot_model_version = w.model_version;
      s.write_failures = 0;
      s.write_error.clear();
      continue;
    }
    metrics.state_write_failures().Increment();
    ++s.write_failures;
    const double delay = StateWriteRetrySeconds(s.write_failures);
    s.retry_at = Clock::now() +
                 std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(delay));
    s.write_error = std::move(w.error);
    s.snapshot_wanted = true;
    if (!next_write_retry || s.retry_at < *next_write_retry) next_write_retry = s.retry_at;
    spdlog::error(
        "state: stream {}: write failed ({} in a row): {}; its file keeps {}; retrying in {} s",
        s.key, s.write_failures, s.write_error,
        s.snapshot_vectors < 0
            ? std::string("no snapshot")
            : "the snapshot of " + std::to_string(s.snapshot_vectors) + " vectors",
        delay);
  }
}

void Daemon::Impl::RetryFailedWrites(Shard& shard) {
  std::optional<Clock::time_point>& next_write_retry = shard.next_write_retry;
  next_write_retry.reset();
  const Clock::time_point now = Clock::now();
  for (Stream* s : shard.streams.Sorted()) {
    if (s->write_failures == 0) continue;
    TrySnapshot(shard, *s, SnapshotKind::kPeriodic);
    if (s->write_queued) continue;  // its outcome sets the next retry if it fails again
    // Not due yet, or a refit is running (HandleFinishedRefits takes it then): look again
    // later, at most once a second.
    const Clock::time_point again = std::max(s->retry_at, now + std::chrono::seconds(1));
    if (!next_write_retry || again < *next_write_retry) next_write_retry = again;
  }
}

void Daemon::Impl::PeriodicSnapshot(Shard& shard) {
  int written = 0;
  for (Stream* s : shard.streams.Sorted()) {
    written += TrySnapshot(shard, *s, SnapshotKind::kPeriodic) ? 1 : 0;
    s->metrics.memory_bytes->Set(static_cast<double>(s->detector->MemoryBytes()));
  }
  if (written > 0) spdlog::debug("state: snapshot of {} streams queued", written);
}

void Daemon::Impl::ExpireIdleStreams(Shard& shard) {
  const double expiry = config.daemon.idle_expiry_seconds;
  if (expiry <= 0) return;
  // Reports first, so that a stream whose write or refit has just finished can go now.
  HandleFinishedRefits(shard);
  HandleFinishedWrites(shard);
  const Clock::time_point now = Clock::now();
  const auto limit =
      std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(expiry));
  std::vector<std::string> idle;
  for (Stream* s : shard.streams.Sorted()) {
    // A refit in flight or a write queued still uses the stream: the next scan takes it.
    if (now - s->last_seen >= limit && s->executor.settled() && !s->write_queued) {
      idle.push_back(s->key);
    }
  }
  for (const std::string& key : idle) {
    DropStream(shard, shard.streams.Remove(key));
    metrics.streams_expired().Increment();
    if (store) {
      // On the io thread, in order with the writes: a write of a new stream with this key,
      // queued later, is not undone.
      boost::asio::post(io, [path = store->PathFor(key), key] {
        std::error_code error;
        std::filesystem::remove(path, error);
        if (error)
          spdlog::error("expired: stream {}: its state file stays: {}", key, error.message());
      });
    }
    spdlog::info("expired: stream={} sent no vector for {} s; forgotten with its state", key,
                 expiry);
  }
}

void Daemon::Impl::DropStream(Shard& shard, std::unique_ptr<Stream> removed) {
  {
    MutexLock lock(&shard.finished_mutex);
    std::erase(shard.finished_refits, removed.get());
  }
  removed.reset();  // removes its metric series and closes its recording
  ReleaseStreamPlaces(1);
  metrics.streams().Set(static_cast<double>(stream_count.load()));
}

void Daemon::Impl::WaitForStateWrites() {
  std::promise<void> done;
  std::future<void> future = done.get_future();
  boost::asio::post(io, [&done] { done.set_value(); });  // after every write queued before it
  future.wait();
}

void Daemon::Impl::HandleControl() {
  zmq::message_t request;
  if (!control.recv(request, zmq::recv_flags::dontwait)) return;
  // One frame, or two for adopt (its second frame is the stream's state).
  int frames = 1;
  zmq::message_t attachment;
  for (bool more = request.more(); more; ++frames) {
    zmq::message_t extra;
    (void)control.recv(extra, zmq::recv_flags::none);
    more = extra.more();
    if (frames == 1) attachment = std::move(extra);
  }
  std::string reply;
  if (frames > 2) {
    reply = ControlErrorReply("a control request is a single frame (adopt takes two)");
  } else if (request.size() > kControlMaxBytes) {
    reply = ControlErrorReply("the request frame is longer than 1 MiB");
  } else {
    reply = HandleControlRequest(
        request.to_string_view(),
        frames == 2 ? std::optional<std::string_view>(attachment.to_string_view()) : std::nullopt,
        *this, NUWATCH_VERSION);
  }
  (void)control.send(zmq::buffer(reply), zmq::send_flags::dontwait);
}

std::vector<StreamStatus> Daemon::Impl::Status() {
  ShardsPaused paused(*this);
  std::vector<StreamStatus> out;
  for (Stream* s : AllStreamsSorted()) {
    const Detector& d = *s->detector;
    const auto model = d.model();
    const DetectorCounters c = d.counters();
    StreamStatus st;
    st.stream = s->key;
    st.state = std::string(StreamStateName(d.state()));
    st.dims = s->dims;
    st.vectors = c.vectors;
    st.anomalies = c.anomalies;
    st.support_vectors = model ? model->num_support() : 0;
    st.window = d.window_size();
    st.model_version = model ? model->version() : 0;
    st.refits = c.refits_started;
    st.incident = d.open_incident();
    st.memory_bytes = d.MemoryBytes();
    // What routes the stream's messages, so that this is the thread that scores them.
    st.scoring_thread = static_cast<int>(placement.Find(s->key));
    st.snapshot_vectors = s->snapshot_vectors;
    st.snapshot_error = s->write_error;
    out.push_back(std::move(st));
  }
  return out;
}

SnapshotOutcome Daemon::Impl::Snapshot() {
  SnapshotOutcome outcome;
  if (!store) {
    outcome.ok = false;
    outcome.error = "no state directory is configured (state.dir or --state-dir)";
    return outcome;
  }
  ShardsPaused paused(*this);
  WaitForStateWrites();
  for (auto& shard : shards) HandleFinishedWrites(*shard);  // no write_queued is set now
  std::vector<Stream*> queued;
  for (auto& shard : shards) {
    for (Stream* s : shard->streams.Sorted()) {
      if (!s->executor.idle()) {
        s->snapshot_wanted = true;
        ++outcome.pending;
      } else if (TrySnapshot(*shard, *s, SnapshotKind::kRequest)) {
        queued.push_back(s);
      }
    }
  }
  WaitForStateWrites();
  for (auto& shard : shards) HandleFinishedWrites(*shard);
  std::string failures;
  for (Stream* s : queued) {
    if (s->write_failures == 0) {
      ++outcome.written;
      continue;
    }
    outcome.failed.push_back(s->key);
    if (outcome.failed.size() <= 3) {
      failures += (failures.empty() ? "" : "; ") + s->key + ": " + s->write_error;
    }
  }
  if (!outcome.failed.empty()) {
    outcome.ok = false;
    const std::size_t more = outcome.failed.size() > 3 ? outcome.failed.size() - 3 : 0;
    outcome.error = "the state file of " + std::to_string(outcome.failed.size()) + " of " +
                    std::to_string(queued.size()) + " streams could not be written (" + failures +
                    (more > 0 ? "; and " + std::to_string(more) + " more" : "") +
                    "); each keeps its last snapshot and is retried";
    spdlog::error("state: snapshot on request: {} written, {} failed, {} pending a refit",
                  outcome.written, outcome.failed.size(), outcome.pending);
    return outcome;
  }
  spdlog::info("state: snapshot on request: {} written, {} pending a refit", outcome.written,
               outcome.pending);
  return outcome;
}

std::optional<std::string> Daemon::Impl::Relearn(const std::string& key) {
  ShardsPaused paused(*this);
  Stream* s = ShardFor(key).streams.Find(key);
  if (s == nullptr) return "unknown stream '" + key + "'";
  s->detector->Relearn();
  s->ratio = AnomalyRatioRing(config.daemon.anomaly_ratio_window);
  s->metrics.anomaly_ratio->Set(0);
  s->seen_model_version = 0;
  s->RefreshSlowGauges();
  s->snapshot_wanted = true;
  spdlog::info(
      "relearn: stream={} dropped its model and window; it learns from the next {} "
      "vectors",
      key, EffectiveWarmup(s->options));
  return std::nullopt;
}

std::optional<std::string> Daemon::Impl::Forget(const std::string& key) {
  ShardsPaused paused(*this);
  Shard& shard = ShardFor(key);
  Stream* s = shard.streams.Find(key);
  if (s == nullptr) return "unknown stream '" + key + "'";
  // No state write of the stream may be queued or running (it holds a reference to it) or
  // reported and not yet taken, and its refit in flight must have finished and reported back
  // (its listener and callback use the stream) before the stream goes; its report is then
  // dropped from the shard's list. Like a snapshot, this holds up scoring for as long as that
  // refit takes.
  WaitForStateWrites();
  HandleFinishedWrites(shard);
  std::unique_ptr<Stream> removed = shard.streams.Remove(key);
  while (!removed->executor.settled()) std::this_thread::sleep_for(std::chrono::milliseconds(1));
  DropStream(shard, std::move(removed));
  if (store) {
    std::error_code error;
    std::filesystem::remove(store->PathFor(key), error);
    if (error)
      return "stream '" + key + "' forgotten, but its state file stays: " + error.message();
  }
  spdlog::info("forget: stream={} dropped with its state; its next vector starts it afresh", key);
  return std::nullopt;
}

ReloadOutcome Daemon::Impl::Reload() {
  ReloadOutcome outcome;
  outcome.config = config.source_path;
  if (config.source_path.empty()) {
    outcome.ok = false;
    outcome.error = "started without --config: there is no file to reload";
    spdlog::error("reload rejected: {}", outcome.error);
    return outcome;
  }
  Config next;
  std::set<std::string> next_allowed;
  try {
    next = LoadConfig(config.source_path);
    ApplyOverrides(options.overrides, &next.daemon);
    ValidateDaemonSettings(next.daemon, config.source_path + " (with the command-line flags)");
    CheckConfigForDaemon(next, &config);
    if (const std::string error = WireLimitsError(LimitsOf(next.daemon)); !error.empty()) {
      throw ConfigError(config.source_path + ": limits: " + error);
    }
    if (server_keys) {
      // Keys are added and revoked by editing the list and reloading (README, "Keys").
      if (next.daemon.client_keys.empty()) {
        throw ConfigError(config.source_path +
                          ": auth.client_keys is empty, but authentication is on; turning it off "
                          "takes a restart");
      }
      try {
        next_allowed = ReadAllowedCurveKeys(next.daemon.client_keys);
      } catch (const CurveKeyError& e) {
        throw ConfigError(std::string("auth.client_keys: ") + e.what());
      }
    }
  } catch (const ConfigError& e) {
    outcome.ok = false;
    outcome.error = e.what();
    spdlog::error("reload rejected, the current configuration stays in force: {}", e.what());
    return outcome;
  }
  const std::vector<std::string> ignored = RestartOnlyChanges(config.daemon, next.daemon);
  if (!ignored.empty()) {
    spdlog::warn(
        "reload: {} changed but take effect only at a restart (the keys marked restart in "
        "config/nuwatchd.toml never change on reload)",
        Join(ignored));
  }
  KeepRestartOnly(config.daemon, &next.daemon);
  next.source_path = config.source_path;

  ShardsPaused paused(*this);  // they read `config`, `limits` and their streams' settings

  spdlog::set_level(LogLevel(next.daemon.log_level));
  if (server_keys) {
    spdlog::info("reload: {} client keys admitted from {}", next_allowed.size(),
                 next.daemon.client_keys);
    auth->ReplaceAllowed(std::move(next_allowed));
  }
  limits = LimitsOf(next.daemon);
  snapshot_interval_seconds = next.daemon.snapshot_interval_seconds;
  const bool new_ratio_window =
      next.daemon.anomaly_ratio_window != config.daemon.anomaly_ratio_window;
  const std::vector<Stream*> all = AllStreamsSorted();
  for (Stream* s : all) {
    if (new_ratio_window) {
      s->ratio = AnomalyRatioRing(next.daemon.anomaly_ratio_window);
      s->metrics.anomaly_ratio->Set(0);
    }
    if (s->recorder) {
      s->recorder->set_rotation(next.daemon.record_rotate_bytes, next.daemon.record_keep_files);
    }
    const DetectorOptions stream_options = DetectorOptionsFor(next, s->key);
    if (SameDetectorOptions(stream_options, s->options)) continue;
    if (!stream_options.feature_names.empty() &&
        stream_options.feature_names.size() != static_cast<std::size_t>(s->dims)) {
      spdlog::warn(
          "reload: stream={} keeps its settings: the new feature_names have {} names, "
          "the stream {} features",
          s->key, stream_options.feature_names.size(), s->dims);
      continue;
    }
    try {
      s->detector->UpdateOptions(stream_options);
    } catch (const std::exception& e) {
      // PreconditionError, or a learning stream's new window that cannot be allocated
      // (UpdateOptions applies at once then): this stream keeps its settings.
      spdlog::warn("reload: stream={} keeps its settings: {}", s->key, e.what());
      continue;
    }
    s->options = stream_options;
    s->metrics.support_vector_budget->Set(
        static_cast<double>(stream_options.support_vector_budget));
    ++outcome.streams_updated;
  }
  const bool new_members = next.daemon.cluster_members != config.daemon.cluster_members ||
                           next.daemon.cluster_member != config.daemon.cluster_member;
  if (new_members) {
    handoff_previous_members = config.daemon.cluster_members;
    handoff_previous_member = config.daemon.cluster_member;
  }
  config = std::move(next);
  spdlog::info(
      "reload: applied {}: {} of {} streams take new detector settings at their next "
      "refit",
      config.source_path, outcome.streams_updated, all.size());
  if (new_members) {
    owner_cache.clear();
    metrics.cluster_members().Set(static_cast<double>(config.daemon.cluster_members.size()));
    handoff_until =
        HandoffEnabled()
            ? Clock::now() +
                  std::chrono::duration_cast<Clock::duration>(
                      std::chrono::duration<double>(config.daemon.cluster_handoff_timeout_seconds))
            : Clock::time_point{};
    RecordMembers();
    if (handoff_sender) {
      // Offers still pending for streams this member owns again (the change was taken back
      // before they were adopted) come back with their state: the streams resume here as they
      // were released, not afresh (PROTOCOL.md §13.4 "A change taken back").
      handoff_sender->Withdraw([members = config.daemon.cluster_members,
                                me = config.daemon.cluster_member](const std::string& key) {
        return members.empty() || members[OwnerOf(key, members)] == me;
      });
    }
    spdlog::info("reload: cluster.member = {}, cluster.members has {} members",
                 config.daemon.cluster_member.empty() ? "(none)" : config.daemon.cluster_member,
                 config.daemon.cluster_members.size());
    if (!config.daemon.cluster_members.empty() && !IsMemberOf(config.daemon)) {
      spdlog::warn(
          "reload: {} is not one of cluster.members any more: it owns no key from now on and "
          "rejects every message as not_owner; {} (PROTOCOL.md §13.4). Stop it when that is "
          "done; it would not start again with this file",
          config.daemon.cluster_member,
          HandoffEnabled() ? "its streams are handed to their new owners"
                           : "its streams start afresh at their new owners");
    }
    ReleaseStreamsNotOwned();
  }
  return outcome;
}

void Daemon::Impl::RecordMembers() {
  if (!store) return;
  try {
    store->SaveMembers({config.daemon.cluster_member, config.daemon.cluster_members});
  } catch (const StateFileError& e) {
    spdlog::error(
        "state: {}: at its next start this member cannot tell whether the member list changed, "
        "and waits for the state of every new key",
        e.what());
  }
}

bool Daemon::Impl::Owns(std::string_view key) {
  const std::vector<std::string>& members = config.daemon.cluster_members;
  if (members.empty()) return true;
  if (const auto it = owner_cache.find(key); it != owner_cache.end()) return it->second;
  const bool owned = members[OwnerOf(key, members)] == config.daemon.cluster_member;
  if (owner_cache.size() >= kOwnerCacheKeys) owner_cache.clear();
  owner_cache.emplace(std::string(key), owned);
  return owned;
}

void Daemon::Impl::ReleaseStreamsNotOwned() {
  std::vector<std::pair<Shard*, std::string>> leaving;
  for (auto& shard : shards) {
    for (Stream* s : shard->streams.Sorted()) {
      if (!Owns(s->key)) leaving.emplace_back(shard.get(), s->key);
    }
  }
  if (leaving.empty()) return;
  // A refit in flight finishes and its model is taken first, so that the state file holds it
  // (like forget, this holds up scoring for as long as that refit takes).
  for (const auto& entry : leaving) {
    const Stream* s = entry.first->streams.Find(entry.second);
    while (!s->executor.settled()) std::this_thread::sleep_for(std::chrono::milliseconds(1));
  }
  for (auto& shard : shards) HandleFinishedRefits(*shard);
  WaitForStateWrites();
  for (auto& shard : shards) HandleFinishedWrites(*shard);
  for (const auto& entry : leaving) {
    TrySnapshot(*entry.first, *entry.first->streams.Find(entry.second), SnapshotKind::kFinal);
  }
  WaitForStateWrites();
  for (auto& shard : shards) HandleFinishedWrites(*shard);
  // With cluster.control_endpoint, each stream's state as it is now goes to its new owner, from
  // the handoff thread (a new owner that has not reloaded yet refuses it for a while).
  std::vector<HandoffOffer> offers;
  if (HandoffEnabled()) {
    const std::vector<std::string>& members = config.daemon.cluster_members;
    for (const auto& entry : leaving) {
      const Stream* s = entry.first->streams.Find(entry.second);
      const std::string& to = members[OwnerOf(s->key, members)];
      try {
        offers.push_back({s->key, to, ControlEndpointOf(to),
                          EncodeStreamState(s->key, s->dims, s->detector->ExportState())});
      } catch (const std::exception& e) {
        metrics.handoffs(HandoffDirection::kSent, HandoffOutcome::kRefused).Increment();
        spdlog::error("handoff: stream {} cannot be encoded ({}); it starts afresh at {}", s->key,
                      e.what(), to);
      }
    }
  }
  int64_t failed = 0;
  for (const auto& entry : leaving) {
    std::unique_ptr<Stream> removed = entry.first->streams.Remove(entry.second);
    if (removed->write_failures > 0) {
      ++failed;
      spdlog::error(
          "reload: stream {} released, but its state file could not be written: {}; the file "
          "keeps its last snapshot",
          removed->key, removed->write_error);
    }
    DropStream(*entry.first, std::move(removed));
    metrics.streams_released().Increment();
  }
  spdlog::info(
      "reload: released {} streams that other members now own ({}); {} (PROTOCOL.md §13.4)",
      leaving.size(),
      store ? (failed == 0 ? std::string("state files written and kept")
                           : std::to_string(failed) + " state files not up to date")
            : std::string("no state directory"),
      HandoffEnabled() ? "handing " + std::to_string(offers.size()) +
                             " of them to their new owners for at most " +
                             SettingNumberText(config.daemon.cluster_handoff_timeout_seconds) + " s"
                       : std::string("they start afresh at their new owners"));
  if (!offers.empty()) {
    handoffs_pending.fetch_add(static_cast<int64_t>(offers.size()), std::memory_order_relaxed);
    handoff_sender->Offer(config.daemon.cluster_member, std::move(offers), handoff_until);
  }
}

std::string Daemon::Impl::ControlEndpointOf(const std::string& member) const {
  std::string endpoint = config.daemon.cluster_control_endpoint;
  for (std::size_t at = endpoint.find(kMemberPlaceholder); at != std::string::npos;
       at = endpoint.find(kMemberPlaceholder, at + member.size())) {
    endpoint.replace(at, kMemberPlaceholder.size(), member);
  }
  return endpoint;
}

void Daemon::Impl::ReportHandoff(const HandoffOffer& offer, const HandoffReport& report) {
  handoffs_pending.fetch_sub(1, std::memory_order_relaxed);
  switch (report.end) {
    case HandoffEnd::kAdopted:
      metrics.handoffs(HandoffDirection::kSent, HandoffOutcome::kOk).Increment();
      spdlog::debug("handoff: stream={} adopted by {} ({} attempts, {} vectors held there)",
                    offer.stream, offer.to_member, report.attempts, report.held_vectors);
      if (store && report.state_written) {
        // The new owner has it on its disk: this copy would only be read if the stream came
        // back, older than the one it would bring. On the io thread, in order with the writes.
        boost::asio::post(io, [path = store->PathFor(offer.stream), key = offer.stream] {
          std::error_code error;
          std::filesystem::remove(path, error);
          if (error)
            spdlog::error("handoff: stream {}: its state file stays: {}", key, error.message());
        });
      }
      return;
    case HandoffEnd::kRefused:
      metrics.handoffs(HandoffDirection::kSent, HandoffOutcome::kRefused).Increment();
      spdlog::warn("handoff: {} refused stream={} ({}: {}); it starts afresh there{}",
                   offer.to_member, offer.stream, report.reason, report.detail,
                   store ? "; its state file stays here" : "");
      return;
    case HandoffEnd::kTimedOut:
      metrics.handoffs(HandoffDirection::kSent, HandoffOutcome::kTimeout).Increment();
      spdlog::warn(
          "handoff: stream={} not adopted by {} within cluster.handoff_timeout_seconds ({} "
          "attempts; last: {} {}); it starts afresh there{}",
          offer.stream, offer.to_member, report.attempts, report.reason, report.detail,
          store ? "; its state file stays here" : "");
      return;
    case HandoffEnd::kStopped:
      spdlog::info("handoff: stream={} not handed to {} before the stop{}", offer.stream,
                   offer.to_member, store ? "; its state file stays here" : "");
      return;
    case HandoffEnd::kWithdrawn:
      metrics.handoffs(HandoffDirection::kSent, HandoffOutcome::kWithdrawn).Increment();
      {
        MutexLock lock(&taken_back_mutex);
        taken_back.push_back(offer);
      }
      taken_back_waiting = true;
      Wake();
      return;
  }
}

void Daemon::Impl::InstallTakenBack() {
  std::vector<HandoffOffer> offers;
  {
    MutexLock lock(&taken_back_mutex);
    offers.swap(taken_back);
  }
  for (const HandoffOffer& offer : offers) {
    const AdoptOutcome outcome =
        InstallState(offer.stream, config.daemon.cluster_member, offer.state, true);
    if (!outcome.ok) {
      spdlog::warn(
          "handoff: stream={} was offered to {}, and this member owns it again, but its state "
          "was not installed ({}: {}){}",
          offer.stream, offer.to_member, outcome.reason, outcome.error,
          store ? "; its state file stays here" : "");
    }
  }
}

bool Daemon::Impl::AwaitsHandoff(std::string_view key) const {
  if (!HandoffEnabled() || Clock::now() >= handoff_until) return false;
  if (!handoff_previous_members) return true;  // since the start-up: every key not restored
  const std::vector<std::string>& before = *handoff_previous_members;
  if (before.empty()) return false;  // a lone daemon before, which owned every key itself
  const std::string& previous_owner = before[OwnerOf(key, before)];
  // Another member owned it: one still in the list hands it over when it reloads; one that
  // has left it hands it over as it departs (a scale-down), or never if it was lost (then the
  // held vectors start the stream afresh when the wait is over, a delay but no loss).
  return previous_owner != handoff_previous_member;
}

void Daemon::Impl::Hold(Shard& shard, std::string_view key, std::string_view payload,
                        int64_t vectors) {
  auto it = shard.held.find(std::string(key));
  if (it == shard.held.end()) {
    const DetectorOptions stream_options = DetectorOptionsFor(config, std::string(key));
    Shard::Held held;
    // A window's worth: more would push the whole handed window out before it is scored.
    held.max_vectors = std::max(stream_options.window, EffectiveWarmup(stream_options));
    it = shard.held.emplace(std::string(key), std::move(held)).first;
  }
  Shard::Held& held = it->second;
  if (held.vectors + vectors > held.max_vectors ||
      shard.held_bytes + payload.size() > kHeldBytesPerShard) {
    Reject(RejectReason::kAwaitingHandoff,
           "the stream's state is on its way from its previous owner and the vectors held for it "
           "meanwhile are at their bound",
           key);
    if (held.payloads.empty()) shard.held.erase(it);
    return;
  }
  held.payloads.emplace_back(payload);
  held.vectors += vectors;
  shard.held_bytes += payload.size();
}

int64_t Daemon::Impl::ScoreHeld(Shard& shard, const std::string& key) {
  const auto it = shard.held.find(key);
  if (it == shard.held.end()) return 0;
  Shard::Held held = std::move(it->second);
  shard.held.erase(it);
  for (const std::string& payload : held.payloads) shard.held_bytes -= payload.size();
  shard.turn_time = Clock::now();
  for (const std::string& payload : held.payloads) HandleIngest(shard, key, payload);
  // Whole, here: at the stop no scoring thread is left to score the rest.
  if (Stream* stream = shard.streams.Find(key); stream != nullptr && stream->sliced)
    FinishSliced(shard, *stream);
  SendOutbox(shard);
  return held.vectors;
}

void Daemon::Impl::EndHolds(Shard& shard, bool all) {
  shard.ending_holds = true;
  struct Reset {
    bool& flag;
    ~Reset() { flag = false; }
  } reset{shard.ending_holds};
  std::vector<std::string> keys;
  for (const auto& entry : shard.held) keys.push_back(entry.first);
  std::sort(keys.begin(), keys.end());
  for (const std::string& key : keys) {
    metrics.handoffs(HandoffDirection::kReceived, HandoffOutcome::kTimeout).Increment();
    const int64_t vectors = ScoreHeld(shard, key);
    spdlog::warn(
        "handoff: no state came for stream={} {}; it starts afresh with the {} vectors held for it",
        key, all ? "before the stop" : "within cluster.handoff_timeout_seconds", vectors);
  }
}

AdoptOutcome Daemon::Impl::InstallState(const std::string& key, const std::string& from,
                                        std::span<const uint8_t> bytes, bool taken_back) {
  AdoptOutcome outcome;
  auto refuse = [&outcome, &key, &from, taken_back](HandoffOutcome counted, const char* reason,
                                                    std::string error, DaemonMetrics& m) {
    outcome.ok = false;
    outcome.reason = reason;
    outcome.error = std::move(error);
    // not_owner is the expected answer until this member has reloaded: the sender retries. A
    // state taken back was never received: the caller logs its refusal.
    if (std::string_view(reason) != "not_owner" && !taken_back) {
      m.handoffs(HandoffDirection::kReceived, counted).Increment();
      spdlog::warn("handoff: stream {} from {} refused ({}): {}", key, from, reason, outcome.error);
    }
    return outcome;
  };
  constexpr HandoffOutcome kRefused = HandoffOutcome::kRefused;
  if (ValidateStreamKey(key, limits) != RejectReason::kNone) {
    return refuse(kRefused, "bad_stream_key", "'" + key + "' is not a valid stream key", metrics);
  }
  const std::vector<std::string>& members = config.daemon.cluster_members;
  if (members.empty() && !taken_back) {
    return refuse(kRefused, "not_owner", "this daemon is not a member of a cluster", metrics);
  }
  if (!Owns(key)) {
    return refuse(kRefused, "not_owner",
                  "member " + config.daemon.cluster_member + " does not own '" + key +
                      "' under its cluster.members (" + std::to_string(members.size()) +
                      " members)",
                  metrics);
  }
  StreamStateFile file;
  try {
    file = DecodeStreamState(bytes.data(), bytes.size());
    if (file.stream_key != key) {
      throw StateFileError("it is the state of stream '" + file.stream_key + "'");
    }
  } catch (const StateFileError& e) {
    return refuse(HandoffOutcome::kCorrupt, "corrupt_state", e.what(), metrics);
  }
  const DetectorOptions stream_options = DetectorOptionsFor(config, key);
  if (!stream_options.feature_names.empty() &&
      stream_options.feature_names.size() != static_cast<std::size_t>(file.dims)) {
    return refuse(kRefused, "dims_mismatch",
                  "the state has " + std::to_string(file.dims) +
                      " features but the configuration names " +
                      std::to_string(stream_options.feature_names.size()),
                  metrics);
  }
  ShardsPaused paused(*this);
  // Placed already if vectors of the key came in and wait for this handoff (Hold).
  Shard& shard = PlaceStream(key);
  const std::size_t digest = std::hash<std::string_view>{}(
      std::string_view(reinterpret_cast<const char*>(bytes.data()), bytes.size()));
  if (const Stream* tracked = shard.streams.Find(key); tracked != nullptr) {
    if (tracked->adopted_from == from && tracked->adopted_state_digest == digest) {
      // The same offer again: the sender did not get the first reply (lost, or later than its
      // wait). Answered as the first was, and not counted again.
      outcome.state_written = store && tracked->snapshot_vectors >= 0 &&
                              tracked->write_failures == 0 && !tracked->write_queued;
      spdlog::info("handoff: stream={} from {} again: adopted already, answered ok", key, from);
      return outcome;
    }
    return refuse(kRefused, "stream_exists",
                  "stream '" + key + "' is tracked here already (it started afresh here)", metrics);
  }
  if (!TakeStreamPlace()) {
    return refuse(kRefused, "stream_limit",
                  "limits.max_streams = " + std::to_string(config.daemon.max_streams) +
                      " streams are tracked",
                  metrics);
  }
  std::unique_ptr<Stream> stream;
  try {
    stream = MakeStream(shard, key, file.dims, stream_options);
    stream->detector->ImportState(file.state);
  } catch (const std::bad_alloc&) {
    ReleaseStreamPlaces(1);
    return refuse(kRefused, "stream_limit", "not enough memory for the stream", metrics);
  } catch (const std::exception& e) {
    // PreconditionError: the contents contradict themselves or the stream's settings.
    ReleaseStreamPlaces(1);
    return refuse(HandoffOutcome::kCorrupt, "corrupt_state", e.what(), metrics);
  }
  const auto model = stream->detector->model();
  stream->seen_model_version = model ? model->version() : 0;
  stream->model_seen_at = Clock::now();
  stream->seen_coalesced = stream->detector->counters().refits_coalesced;
  stream->RefreshSlowGauges();
  stream->last_seen = Clock::now();
  stream->adopted_from = from;
  stream->adopted_state_digest = digest;
  Stream* s = shard.streams.Add(std::move(stream));
  ++stream_count;
  metrics.streams().Set(static_cast<double>(stream_count.load()));
  // On this member's disk before the reply, so that the old owner may delete its copy.
  const bool write_queued = TrySnapshot(shard, *s, SnapshotKind::kRequest);
  outcome.held_vectors = ScoreHeld(shard, key);
  if (write_queued) {
    WaitForStateWrites();
    HandleFinishedWrites(shard);
    outcome.state_written = s->write_failures == 0;
  }
  if (!taken_back) metrics.handoffs(HandoffDirection::kReceived, HandoffOutcome::kOk).Increment();
  spdlog::info(
      "handoff: {} stream={} {}: state={} model_version={} window={}; {} vectors held "
      "for it scored now{}",
      taken_back ? "took back" : "adopted", key,
      taken_back ? "(its offer was withdrawn: this member owns it again)" : "from " + from,
      StreamStateName(s->detector->state()), s->seen_model_version, s->detector->window_size(),
      outcome.held_vectors,
      store && !outcome.state_written ? "; its state file could not be written" : "");
  return outcome;
}

Daemon::Daemon(DaemonOptions options) : impl_(std::make_unique<Impl>(std::move(options))) {}

Daemon::~Daemon() {
  if (impl_->started) {
    RequestStop();
    Wait();
  }
}

void Daemon::Start() {
  if (impl_->started) throw std::logic_error("Daemon::Start called twice");
  impl_->Start();
}

void Daemon::RequestStop() {
  impl_->stop_requested = true;
  impl_->Wake();
}

void Daemon::RequestReload() {
  impl_->reload_requested = true;
  impl_->Wake();
}

void Daemon::Wait() {
  if (!impl_->started || impl_->joined) return;
  impl_->socket_thread.join();
  impl_->joined = true;
}

bool Daemon::failed() const {
  return impl_->joined && (impl_->fatal_error.load() || impl_->final_write_failed);
}

const DaemonEndpoints& Daemon::endpoints() const { return impl_->endpoints; }

std::string Daemon::MetricsText() const { return impl_->metrics.Serialize(); }

}  // namespace nuwatch
