#include "service/stream_placement.h"

#include <algorithm>

#include "nuwatch/types.h"

namespace nuwatch {

StreamPlacement::StreamPlacement(std::size_t threads, std::size_t capacity)
    : placed_on_(threads, 0), capacity_(capacity) {
  if (threads < 1) throw PreconditionError("StreamPlacement: threads must be at least 1");
}

std::size_t StreamPlacement::Fewest() const {
  return static_cast<std::size_t>(std::min_element(placed_on_.begin(), placed_on_.end()) -
                                  placed_on_.begin());
}

std::size_t StreamPlacement::Add(std::string_view key) {
  const std::size_t thread = Fewest();
  table_.emplace(std::string(key), static_cast<uint32_t>(thread));
  ++placed_on_[thread];
  return thread;
}

std::size_t StreamPlacement::Find(std::string_view key) const {
  if (const auto it = table_.find(key); it != table_.end()) return it->second;
  if (table_.size() >= capacity_) return Hashed(key, placed_on_.size());
  return Fewest();
}

}  // namespace nuwatch
