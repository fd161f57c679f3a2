// State files: one per stream, so that a restarted nuwatchd resumes each stream where it was
// (window, model, last solution, incident and drift state, counters) instead of learning anew.
//
// File name: `<dir>/<escaped key>.state`. A stream key (daemon/protocol/PROTOCOL.md §3) is made of
// [A-Za-z0-9._:/-]; the escaped key keeps every byte except `/`, written `%`, and `:`, written `+`
// (neither is a key byte, so the mapping is one to one and keeps the length: a file name is at
// most 128 + 6 bytes). Keys starting with `.` give hidden files; keys that differ only in case
// need a case-sensitive file system.
//
// Format (little-endian, our own): magic "NUWS" | u32 format_version | u64 payload_bytes |
// payload | u32 CRC-32 (IEEE, as zlib) of the payload. The payload, field by field:
//   key: u32 length + bytes | u32 dims | u64 next_sample_id |
//   window: u64 rows n | n*dims f64 values (row-major, oldest first) | n u64 ids | n f64 times |
//   model: u8 present | if 1: u64 bytes + a model file (nuwatch/model_file.h, its own CRC) |
//   solution: u64 m | m u64 sample ids | m f64 alphas |
//   incidents: u64 next_id | u32 r | r u8 flags | r f64 times | r f64 decisions | u8 open |
//              if 1: u64 id, f64 start, f64 end, f64 peak_decision, i64 flagged_vectors |
//              i64 clean_run |
//   drift: i64 count, f64 mean, up_sum, up_min, down_sum, down_max |
//   i64 accepted_since_refit | i64 refits_since_cold | f64 model_time |
//   counters: i64 vectors, anomalies, accepted, refits_started, refits_coalesced, drift_alarms.
// Files are replaced durably (WriteFileAtomically: temp file, fsync, rename, fsync of the dir).
//
// Thread safety: the free functions are reentrant. A StateStore holds only its directory name;
// its methods may run on any thread, but two Saves of the same key must not run at the same time
// (they share a temporary file name).
#pragma once

#include <cstdint>
#include <optional>
#include <stdexcept>
#include <string>
#include <string_view>
#include <vector>

#include "nuwatch/detector.h"

namespace nuwatch {

// Version 2: the window's column count (a transform widens the features), the transform's history
// and the history counters. Version 1 files are still read.
inline constexpr uint32_t kStateFormatVersion = 2;

// A state file that cannot be read, written or trusted. The message says why (and names the file
// where one is involved).
class StateFileError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// Requires: a valid stream key (PROTOCOL.md §3; not checked). Ensures: a file name component
// without `/`, of the same length, that UnescapeStreamKey maps back to `key`.
std::string EscapeStreamKey(std::string_view key);
// The key of an escaped name; nullopt when `escaped` is not the escape of a valid key.
std::optional<std::string> UnescapeStreamKey(std::string_view escaped);

struct StreamStateFile {
  std::string stream_key;
  int dims = 0;
  DetectorState state;
};

// Requires: dims >= 1; state.window_rows has dims columns (or no rows); ids and times as long as
// the window; solution ids and alphas of equal length. Throws StateFileError otherwise.
std::vector<uint8_t> EncodeStreamState(std::string_view stream_key, int dims,
                                       const DetectorState& state);
// Throws StateFileError with the reason: truncated or padded, checksum mismatch, not a state file,
// a newer (or invalid) format version, sizes that do not fit the payload, an invalid key or dims,
// a corrupt embedded model. Never reads out of bounds and checks every count against the bytes
// left before allocating. The contents' own consistency (ids increasing, ...) is checked by
// Detector::ImportState.
StreamStateFile DecodeStreamState(const uint8_t* data, std::size_t size);

// The wait before retrying a state write that has failed `failures` times in a row: 1 s, doubled at
// each further failure, at most 60 s (exponential backoff with a ceiling, common practice), so
// that a disk that has just filled up is probed soon and one that stays full is not hammered.
// Requires: failures >= 1 (smaller values give 1 s).
double StateWriteRetrySeconds(int failures);

class StateStore {
 public:
  // Creates `dir` (and its parents) if needed. Throws StateFileError naming the directory.
  explicit StateStore(std::string dir);

  const std::string& dir() const { return dir_; }
  std::string PathFor(std::string_view stream_key) const;

  // Encodes and replaces the stream's file durably. Throws StateFileError naming the file.
  void Save(std::string_view stream_key, int dims, const DetectorState& state) const;

  struct Entry {
    std::string path;
    std::string stream_key;  // from the file name
  };
  // The files named `<escaped key>.state` for a valid key, sorted by key. Other files are ignored.
  std::vector<Entry> List() const;

  // Reads and decodes one file and checks that it holds the stream its name says. Throws
  // StateFileError "PATH: REASON".
  StreamStateFile Load(const Entry& entry) const;

  // Moves a rejected file aside to `<path>.corrupt-<unix seconds>` (a further suffix `-N` if that
  // exists) and returns the new path. Throws StateFileError when the rename fails.
  std::string Quarantine(const std::string& path) const;

  // Deletes leftovers of interrupted writes (`*.state.tmp.*`); returns their paths.
  std::vector<std::string> RemoveStaleTemporaries() const;

  // The member list in force when this replica last started or reloaded (PROTOCOL.md §13.4), so
  // that a restart under the same list knows that no stream is on its way to it. File
  // `<dir>/nuwatchd.members`, text: a comment line, `member NAME` (empty name: none), then one
  // `members NAME` line per member in order. Replaced durably. Throws StateFileError naming the
  // file.
  static constexpr const char* kMembersFileName = "nuwatchd.members";
  struct MemberRecord {
    std::string member;
    std::vector<std::string> members;
  };
  void SaveMembers(const MemberRecord& record) const;
  // nullopt when there is no file. Throws StateFileError naming the file when it cannot be read
  // or is not such a record.
  std::optional<MemberRecord> LoadMembers() const;

 private:
  std::string dir_;
};

// An exclusive lock on a state directory, so that two daemons never write the same state files
// (each would overwrite the other's snapshots). flock(2) on `<dir>/nuwatchd.lock`, held while the
// object lives; the kernel releases it when the process ends, even by kill -9, so a stale lock
// never blocks a restart. The file holds the holder's pid, for the message of the one refused.
// Thread safety: not thread-safe; one owner.
class StateDirLock {
 public:
  static constexpr const char* kFileName = "nuwatchd.lock";

  StateDirLock() = default;
  ~StateDirLock();
  StateDirLock(const StateDirLock&) = delete;
  StateDirLock& operator=(const StateDirLock&) = delete;

  // Takes the lock without waiting. Requires: `dir` exists and nothing is held yet. Returns true
  // when taken; false when another process holds it, with `holder` set to the pid it wrote (0 if
  // unknown). Throws StateFileError naming the lock file when it cannot be opened or locked for
  // another reason (permissions, a file system without locks).
  bool TryLock(const std::string& dir, long* holder);
  const std::string& path() const { return path_; }

 private:
  int fd_ = -1;
  std::string path_;
};

}  // namespace nuwatch
