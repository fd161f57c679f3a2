#include "nuwatch/checked_file.h"

#include <fcntl.h>
#include <unistd.h>

#include <array>
#include <cerrno>
#include <cstring>

#include "crc32.h"
#include "nuwatch/types.h"

namespace nuwatch {
namespace {

std::array<uint32_t, 256> MakeCrcTable() {
  std::array<uint32_t, 256> table{};
  for (uint32_t i = 0; i < 256; ++i) {
    uint32_t c = i;
    for (int k = 0; k < 8; ++k) c = (c & 1) ? 0xEDB88320u ^ (c >> 1) : c >> 1;
    table[i] = c;
  }
  return table;
}

}  // namespace

uint32_t Crc32(const uint8_t* data, std::size_t size, uint32_t crc) {
  static const std::array<uint32_t, 256> table = MakeCrcTable();
  crc = ~crc;
  for (std::size_t i = 0; i < size; ++i) crc = table[(crc ^ data[i]) & 0xFF] ^ (crc >> 8);
  return ~crc;
}

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

namespace {

[[noreturn]] void FailReplacing(const std::string& temp, const std::string& path,
                                const std::string& what) {
  const std::string reason = std::strerror(errno);
  ::unlink(temp.c_str());
  throw ModelFileError(path + ": " + what + ": " + reason);
}

}  // namespace

void CommitFileDurably(const std::string& temp, const std::string& path) {
  const int fd = ::open(temp.c_str(), O_RDONLY | O_CLOEXEC);
  if (fd < 0) FailReplacing(temp, path, "cannot open the temporary file");
  if (::fsync(fd) != 0) {
    ::close(fd);
    FailReplacing(temp, path, "fsync failed");
  }
  ::close(fd);
  if (::rename(temp.c_str(), path.c_str()) != 0) FailReplacing(temp, path, "rename failed");
  const auto slash = path.find_last_of('/');
  const std::string directory = slash == std::string::npos ? "." : path.substr(0, slash + 1);
  const int dir_fd = ::open(directory.c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC);
  if (dir_fd >= 0) {
    ::fsync(dir_fd);  // makes the rename durable
    ::close(dir_fd);
  }
}

void WriteFileAtomically(const std::string& path, const uint8_t* bytes, std::size_t size) {
  const std::string temp = path + ".tmp." + std::to_string(::getpid());
  auto fail = [&](const std::string& what) { FailReplacing(temp, path, what); };
  int fd = ::open(temp.c_str(), O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0644);
  if (fd < 0) fail("cannot create temporary file");
  std::size_t written = 0;
  while (written < size) {
    ssize_t n = ::write(fd, bytes + written, size - written);
    if (n < 0) {
      if (errno == EINTR) continue;
      ::close(fd);
      fail("write failed");
    }
    written += static_cast<std::size_t>(n);
  }
  if (::close(fd) != 0) fail("close failed");
  CommitFileDurably(temp, path);
}

}  // namespace nuwatch
