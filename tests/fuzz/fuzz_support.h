// Shared by the fuzz targets of tests/fuzz (see CMakeLists.txt there).
#pragma once

#include <cstddef>
#include <cstdint>
#include <cstring>
#include <vector>

#include "crc32.h"  // core/src: the envelope's checksum

namespace nuwatch::fuzz {

// A broken property of the code under test: a finding, whatever the build (libFuzzer reports a
// trap as a crash with the input; the corpus runner dies with SIGILL, which fails its ctest).
inline void Require(bool condition) {
  if (!condition) __builtin_trap();
}

// The checksummed envelope of nuwatch's binary files (nuwatch/checked_file.h): magic (4) |
// u32 version | u64 payload_bytes | payload | u32 CRC-32 of the payload.
inline constexpr std::size_t kEnvelopeHeaderBytes = 16;
inline constexpr std::size_t kEnvelopeBytes = kEnvelopeHeaderBytes + 4;

// The input with the payload length and the checksum made to agree with the bytes between them.
// Without this a mutation almost never gets past the checksum, and the fuzzer would test only the
// envelope. Empty when the input is too short to hold an envelope.
inline std::vector<uint8_t> WithValidEnvelope(const uint8_t* data, std::size_t size) {
  if (size < kEnvelopeBytes) return {};
  std::vector<uint8_t> bytes(data, data + size);
  const uint64_t payload_bytes = size - kEnvelopeBytes;
  std::memcpy(bytes.data() + 8, &payload_bytes, sizeof payload_bytes);
  const uint32_t crc = Crc32(bytes.data() + kEnvelopeHeaderBytes, payload_bytes);
  std::memcpy(bytes.data() + size - 4, &crc, sizeof crc);
  return bytes;
}

}  // namespace nuwatch::fuzz
