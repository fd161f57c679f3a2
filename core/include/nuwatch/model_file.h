// The model file: our own versioned binary format with a checksum.
//
// Layout (little-endian): magic "NUWM" | u32 format_version | u64 payload_bytes | payload |
// u32 CRC-32 (IEEE) of the payload. The payload holds the ModelParts field by field.
// Writes are atomic (WriteFileAtomically in nuwatch/checked_file.h).
// Thread safety: reentrant.
#pragma once

#include <cstdint>
#include <string>
#include <vector>

#include "nuwatch/model.h"

namespace nuwatch {

// Version 2 adds the whitening matrix, the feature transform and the calibration; version 1 files
// are still read (as uncalibrated models without a transform). Version 3 adds gamma mode 3
// (min_volume) and the table it chose the width by; version 2 files are still read.
inline constexpr uint32_t kModelFormatVersion = 3;

// Serialises to bytes and back. Decode throws ModelFileError with a clear reason (truncated,
// checksum mismatch, newer format version, inconsistent sizes); it never reads out of bounds.
std::vector<uint8_t> EncodeModel(const Model& model);
Model DecodeModel(const uint8_t* data, std::size_t size);

// Throws ModelFileError naming the path on any I/O failure.
void SaveModel(const Model& model, const std::string& path);
Model LoadModel(const std::string& path);

}  // namespace nuwatch
