// CRC-32 of the checksummed envelope (nuwatch/checked_file.h). Internal to core; tests that forge
// or check a checksum include it from core/src.
// Thread safety: reentrant.
#pragma once

#include <cstddef>
#include <cstdint>

namespace nuwatch {

// CRC-32 (IEEE 802.3 polynomial, reflected), as zlib computes it; `crc` continues a running one.
uint32_t Crc32(const uint8_t* data, std::size_t size, uint32_t crc = 0);

}  // namespace nuwatch
