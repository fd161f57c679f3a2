#include "nuwatch/checked_file.h"

#include "nuwatch/model_file.h"

namespace nuwatch {

std::vector<uint8_t> WrapChecksummed(const char (&magic)[4], uint32_t version,
                                     const std::vector<uint8_t>& payload) {
  ByteWriter file;
  file.bytes.reserve(payload.size() + kChecksummedEnvelopeBytes);
  file.PutBytes(magic, 4);
  file.Put<uint32_t>(version);
  file.Put<uint64_t>(payload.size());
  file.PutBytes(payload.data(), payload.size());
  file.Put<uint32_t>(Crc32(payload.data(), payload.size()));
  return std::move(file.bytes);
}

ChecksummedPayload UnwrapChecksummed(const uint8_t* data, std::size_t size, const char (&magic)[4],
                                     uint32_t newest_version, std::string_view kind,
                                     uint64_t max_payload_bytes) {
  if (size < kChecksummedEnvelopeBytes) {
    throw ChecksummedFileError("truncated: " + std::to_string(size) + " bytes, not even a header");
  }
  if (std::memcmp(data, magic, 4) != 0) {
    throw ChecksummedFileError("not a nuwatch " + std::string(kind) + " file");
  }
  uint32_t version;
  uint64_t payload_bytes;
  std::memcpy(&version, data + 4, 4);
  std::memcpy(&payload_bytes, data + 8, 8);
  if (version > newest_version) {
    throw ChecksummedFileError("format version " + std::to_string(version) +
                               " is newer than this program reads (" +
                               std::to_string(newest_version) + ")");
  }
  if (version == 0) throw ChecksummedFileError("format version 0 is invalid");
  if (payload_bytes > max_payload_bytes || payload_bytes != size - kChecksummedEnvelopeBytes) {
    throw ChecksummedFileError("truncated or padded: header announces " +
                               std::to_string(payload_bytes) + " payload bytes, the file holds " +
                               std::to_string(size) + " bytes");
  }
  const uint8_t* payload = data + kChecksummedHeaderBytes;
  uint32_t stored_crc;
  std::memcpy(&stored_crc, payload + payload_bytes, 4);
  if (Crc32(payload, payload_bytes) != stored_crc) {
    throw ChecksummedFileError("checksum mismatch: the file is corrupted");
  }
  return {version, payload, static_cast<std::size_t>(payload_bytes)};
}

}  // namespace nuwatch
