// The pieces shared by nuwatch's binary files (the model file, the daemon's state files): a byte
// writer and a bounds-checked byte reader for little-endian payloads, the checksummed envelope
// around a payload and durable file replacement:
//   magic (4 bytes) | u32 format_version | u64 payload_bytes | payload | u32 CRC-32 (IEEE, as
//   zlib computes it) of the payload.
// Part of core's API on purpose: a program that keeps its own files beside model files (nuwatchd's
// state store) writes them with the same envelope and the same durability, and a model embedded
// in such a file (EncodeModel) keeps its own.
// Values are stored in the machine's byte order; x86-64 and aarch64, the supported targets, are
// little-endian.
//
// Errors: ByteReader and UnwrapChecksummed throw ChecksummedFileError; each file format converts
// it to its own error type (ModelFileError, StateFileError) keeping the message.
// Thread safety: the free functions are reentrant; a ByteWriter or ByteReader is used by one
// thread at a time.
#pragma once

#include <cstddef>
#include <cstdint>
#include <cstring>
#include <stdexcept>
#include <string>
#include <string_view>
#include <type_traits>
#include <vector>

namespace nuwatch {

// A checksummed file or payload that cannot be trusted. The message says why.
class ChecksummedFileError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// Appends values to `bytes`, as they are in memory.
class ByteWriter {
 public:
  template <typename T>
  void Put(T value) {
    static_assert(std::is_trivially_copyable_v<T>);
    PutBytes(&value, sizeof(T));
  }
  // resize + memcpy rather than insert: GCC 12 warns falsely (-Wstringop-overflow) on a small
  // insert into an empty vector.
  void PutBytes(const void* data, std::size_t n) {
    if (n == 0) return;
    const std::size_t at = bytes.size();
    bytes.resize(at + n);
    std::memcpy(bytes.data() + at, data, n);
  }
  // Requires: `data` points to `n` values (may be null when n == 0).
  template <typename T>
  void PutArray(const T* data, std::size_t n) {
    static_assert(std::is_trivially_copyable_v<T>);
    if (n > 0) PutBytes(data, n * sizeof(T));
  }
  // u32 length, then the bytes. Requires: s.size() < 2^32.
  void PutString(std::string_view s) {
    Put<uint32_t>(static_cast<uint32_t>(s.size()));
    PutBytes(s.data(), s.size());
  }

  std::vector<uint8_t> bytes;
};

// Reads values back from a payload. Every read first checks that the bytes are there (without
// overflowing); when they are not it throws ChecksummedFileError "KIND payload ends inside WHAT",
// e.g. "model payload ends inside the scaler". It never reads out of bounds.
class ByteReader {
 public:
  // Requires: `data` points to `size` bytes that outlive the reader. `kind` names the file
  // ("model", "state") in messages.
  ByteReader(const uint8_t* data, std::size_t size, std::string_view kind)
      : data_(data), size_(size), kind_(kind) {}

  template <typename T>
  T Get(std::string_view what) {
    static_assert(std::is_trivially_copyable_v<T>);
    T value;
    Need(1, sizeof(T), what);
    std::memcpy(&value, data_ + pos_, sizeof(T));
    pos_ += sizeof(T);
    return value;
  }
  // Ensures: the returned pointer addresses `n` bytes of the payload.
  const uint8_t* Take(uint64_t n, std::string_view what) {
    Need(n, 1, what);
    const uint8_t* p = data_ + pos_;
    pos_ += n;
    return p;
  }
  // Requires: `out` has room for `count` values.
  template <typename T>
  void GetArray(T* out, uint64_t count, std::string_view what) {
    static_assert(std::is_trivially_copyable_v<T>);
    Need(count, sizeof(T), what);
    if (count > 0) std::memcpy(out, data_ + pos_, count * sizeof(T));
    pos_ += count * sizeof(T);
  }
  // A string written by ByteWriter::PutString.
  std::string GetString(std::string_view what) {
    const uint32_t n = Get<uint32_t>(what);
    const uint8_t* p = Take(n, what);
    return std::string(reinterpret_cast<const char*>(p), n);
  }
  // Throws unless `count` items of `item_bytes` (>= 1) each are left: lets a caller check a size
  // field against the payload before allocating what it announces.
  void Need(uint64_t count, std::size_t item_bytes, std::string_view what) const {
    if (count > (size_ - pos_) / item_bytes) {
      throw ChecksummedFileError(std::string(kind_) + " payload ends inside " + std::string(what));
    }
  }
  std::size_t remaining() const { return size_ - pos_; }

 private:
  const uint8_t* data_;
  std::size_t size_;
  std::string_view kind_;
  std::size_t pos_ = 0;
};

// Bytes of the envelope around a payload: the header (magic, version, payload size) and the CRC.
inline constexpr std::size_t kChecksummedHeaderBytes = 4 + 4 + 8;
inline constexpr std::size_t kChecksummedEnvelopeBytes = kChecksummedHeaderBytes + 4;

// Ensures: the envelope above around `payload`, with `version` in its header.
std::vector<uint8_t> WrapChecksummed(const char (&magic)[4], uint32_t version,
                                     const std::vector<uint8_t>& payload);

// A payload inside the buffer given to UnwrapChecksummed (valid as long as that buffer is).
struct ChecksummedPayload {
  uint32_t version = 0;
  const uint8_t* data = nullptr;
  std::size_t size = 0;
};

// Checks, in this order, and throws ChecksummedFileError with the reason: shorter than the
// envelope ("truncated: ..."), another magic ("not a nuwatch KIND file"), a version above
// `newest_version` ("format version N is newer than this program reads (M)") or 0, a payload size
// above `max_payload_bytes` or other than the bytes there are ("truncated or padded: ..."), a CRC
// that does not match ("checksum mismatch: the file is corrupted").
// Requires: `data` points to `size` bytes. Never reads outside them.
ChecksummedPayload UnwrapChecksummed(const uint8_t* data, std::size_t size, const char (&magic)[4],
                                     uint32_t newest_version, std::string_view kind,
                                     uint64_t max_payload_bytes);

// UnwrapChecksummed, then `decode(ByteReader&)` on the payload; a ChecksummedFileError from either
// is rethrown as `Error` with the same message (other exceptions pass through). Returns what
// `decode` returns.
template <typename Error, typename Decode>
auto DecodeChecksummed(const uint8_t* data, std::size_t size, const char (&magic)[4],
                       uint32_t newest_version, std::string_view kind, uint64_t max_payload_bytes,
                       Decode&& decode) {
  try {
    const ChecksummedPayload payload =
        UnwrapChecksummed(data, size, magic, newest_version, kind, max_payload_bytes);
    ByteReader reader(payload.data, payload.size, kind);
    return decode(reader);
  } catch (const ChecksummedFileError& e) {
    throw Error(e.what());
  }
}

// Durable file replacement of `path` by `bytes`: a temporary file in the same directory, fsync,
// rename over `path`, fsync of the directory. A reader sees the old file or the new one, never
// a mixture, even after a crash. Throws ModelFileError naming the path on failure (the temporary
// file is removed).
void WriteFileAtomically(const std::string& path, const uint8_t* bytes, std::size_t size);

// The durable end of a replacement whose new content was written, by whatever means, to
// `temporary` (a closed file in the same directory as `path`; e.g. a picture drawn by a library,
// or a file streamed row by row): fsync of `temporary`, rename over `path`, fsync of the
// directory. WriteFileAtomically ends with it; it is the one place that does these steps.
// Throws ModelFileError naming `path` on failure (`temporary` is then removed).
void CommitFileDurably(const std::string& temporary, const std::string& path);

}  // namespace nuwatch
