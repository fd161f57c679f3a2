// Which scoring thread owns each stream.
//
// Why not a hash of the key: with few streams a hash leaves threads idle. Two streams on two
// threads share one thread half the time, and four fell three to one in the daemon bench, where
// the busy thread set the pace for the whole daemon. A stream placed when its key is first seen,
// on the thread with the fewest streams placed so far, gives each thread an equal share, the
// small deployments included.
//
// A key keeps its thread for the life of the process: a message must never reach another thread
// than the one that may still hold the stream's earlier messages (their order, PROTOCOL.md §9),
// even after the stream was forgotten or expired there. So a placement is never taken back, and
// the table is bounded instead: once it holds `capacity` keys, further new keys go by a hash of
// the key. That too is for good, since a full table never takes another key, so no key ever
// changes its thread. A flood of made-up keys thus costs at most `capacity` entries and the
// balance of later streams, never the order of any.
//
// Thread safety: none. One thread uses it: nuwatchd's socket thread (and its start-up before).
#pragma once

#include <cstddef>
#include <cstdint>
#include <functional>
#include <string>
#include <string_view>
#include <unordered_map>
#include <vector>

namespace nuwatch {

class StreamPlacement {
 public:
  // Requires: threads >= 1 (PreconditionError otherwise).
  StreamPlacement(std::size_t threads, std::size_t capacity);

  // The thread of `key`. A key not placed yet is placed, on the thread with the fewest keys placed
  // (the lowest index among equals), when the table has room and admit(key) is true; otherwise it
  // goes by Hashed. `admit` is called only for keys not placed yet, so that checking a key costs
  // nothing on the per-message path. Allocates only when it places a key.
  template <typename Admit>
  std::size_t Place(std::string_view key, Admit&& admit) {
    if (const auto it = table_.find(key); it != table_.end()) return it->second;
    if (table_.size() >= capacity_ || !admit(key)) return Hashed(key, placed_on_.size());
    return Add(key);
  }
  std::size_t Place(std::string_view key) {
    return Place(key, [](std::string_view) { return true; });
  }

  // Without placing anything: the thread of a key placed already, else the one Place would give
  // it now if it admitted the key. For looking up streams that exist (each was placed when it was
  // created), and for control requests about keys that may not, which must not take up the table.
  std::size_t Find(std::string_view key) const;

  // The thread a key goes to when the table is full or the key was not admitted.
  static std::size_t Hashed(std::string_view key, std::size_t threads) {
    return std::hash<std::string_view>{}(key) % threads;
  }

  std::size_t placed() const { return table_.size(); }
  // Keys placed on `thread` (std::out_of_range unless it is one of the threads).
  std::size_t placed_on(std::size_t thread) const { return placed_on_.at(thread); }

 private:
  struct KeyHash {
    using is_transparent = void;  // find() by string_view, without building a std::string
    std::size_t operator()(std::string_view key) const {
      return std::hash<std::string_view>{}(key);
    }
  };
  std::size_t Add(std::string_view key);
  std::size_t Fewest() const;

  std::unordered_map<std::string, uint32_t, KeyHash, std::equal_to<>> table_;
  std::vector<std::size_t> placed_on_;
  std::size_t capacity_;
};

}  // namespace nuwatch
