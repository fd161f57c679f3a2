// The text of a number in a precondition message (PreconditionError). Internal to core.
// Thread safety: reentrant.
#pragma once

#include <cstdint>
#include <cstdio>
#include <string>

namespace nuwatch {

// All 17 significant digits, so that the value a message names reads back as the very double
// that was refused (a shorter form can print two different values alike).
inline std::string RoundTripText(double value) {
  char buffer[32];
  std::snprintf(buffer, sizeof buffer, "%.17g", value);
  return buffer;
}
inline std::string RoundTripText(int64_t value) { return std::to_string(value); }
inline std::string RoundTripText(uint64_t value) { return std::to_string(value); }

}  // namespace nuwatch
