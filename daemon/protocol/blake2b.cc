#include "protocol/blake2b.h"

#include <array>
#include <cstring>
#include <string>

#include "nuwatch/types.h"

namespace nuwatch {
namespace {

// RFC 7693 §2.6: the initialisation vector (SHA-512's) and §2.7: the message word schedule.
constexpr std::array<std::uint64_t, 8> kIv = {
    0x6A09E667F3BCC908ULL, 0xBB67AE8584CAA73BULL, 0x3C6EF372FE94F82BULL, 0xA54FF53A5F1D36F1ULL,
    0x510E527FADE682D1ULL, 0x9B05688C2B3E6C1FULL, 0x1F83D9ABFB41BD6BULL, 0x5BE0CD19137E2179ULL};

constexpr std::uint8_t kSigma[12][16] = {{0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15},
                                         {14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3},
                                         {11, 8, 12, 0, 5, 2, 15, 13, 10, 14, 3, 6, 7, 1, 9, 4},
                                         {7, 9, 3, 1, 13, 12, 11, 14, 2, 6, 5, 10, 4, 0, 15, 8},
                                         {9, 0, 5, 7, 2, 4, 10, 15, 14, 1, 11, 12, 6, 8, 3, 13},
                                         {2, 12, 6, 10, 0, 11, 8, 3, 4, 13, 7, 5, 15, 14, 1, 9},
                                         {12, 5, 1, 15, 14, 13, 4, 10, 0, 7, 6, 3, 9, 2, 8, 11},
                                         {13, 11, 7, 14, 12, 1, 3, 9, 5, 0, 15, 4, 8, 6, 2, 10},
                                         {6, 15, 14, 9, 11, 3, 0, 8, 12, 2, 13, 7, 1, 4, 10, 5},
                                         {10, 2, 8, 4, 7, 6, 1, 5, 15, 11, 9, 14, 3, 12, 13, 0},
                                         {0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15},
                                         {14, 10, 4, 8, 9, 15, 13, 6, 1, 12, 0, 2, 11, 7, 5, 3}};

constexpr std::size_t kBlockBytes = 128;

std::uint64_t RotateRight(std::uint64_t x, int n) { return (x >> n) | (x << (64 - n)); }

std::uint64_t LoadLittleEndian64(const std::uint8_t* p) {
  std::uint64_t v = 0;
  for (int i = 7; i >= 0; --i) v = (v << 8) | p[i];
  return v;
}

// RFC 7693 §3.1, the mixing function G.
void Mix(std::uint64_t* v, int a, int b, int c, int d, std::uint64_t x, std::uint64_t y) {
  v[a] = v[a] + v[b] + x;
  v[d] = RotateRight(v[d] ^ v[a], 32);
  v[c] = v[c] + v[d];
  v[b] = RotateRight(v[b] ^ v[c], 24);
  v[a] = v[a] + v[b] + y;
  v[d] = RotateRight(v[d] ^ v[a], 16);
  v[c] = v[c] + v[d];
  v[b] = RotateRight(v[b] ^ v[c], 63);
}

// RFC 7693 §3.2, the compression function F. `bytes_so_far`: the offset counter t (messages here
// are far below 2^64 bytes, so its high word is 0).
void Compress(std::array<std::uint64_t, 8>& h, const std::uint8_t* block,
              std::uint64_t bytes_so_far, bool last) {
  std::uint64_t m[16];
  for (int i = 0; i < 16; ++i) m[i] = LoadLittleEndian64(block + 8 * i);
  std::uint64_t v[16];
  for (int i = 0; i < 8; ++i) {
    v[i] = h[i];
    v[i + 8] = kIv[i];
  }
  v[12] ^= bytes_so_far;
  if (last) v[14] = ~v[14];
  for (const auto& s : kSigma) {
    Mix(v, 0, 4, 8, 12, m[s[0]], m[s[1]]);
    Mix(v, 1, 5, 9, 13, m[s[2]], m[s[3]]);
    Mix(v, 2, 6, 10, 14, m[s[4]], m[s[5]]);
    Mix(v, 3, 7, 11, 15, m[s[6]], m[s[7]]);
    Mix(v, 0, 5, 10, 15, m[s[8]], m[s[9]]);
    Mix(v, 1, 6, 11, 12, m[s[10]], m[s[11]]);
    Mix(v, 2, 7, 8, 13, m[s[12]], m[s[13]]);
    Mix(v, 3, 4, 9, 14, m[s[14]], m[s[15]]);
  }
  for (int i = 0; i < 8; ++i) h[i] ^= v[i] ^ v[i + 8];
}

}  // namespace

void Blake2b(std::string_view data, std::span<std::uint8_t> out) {
  if (out.empty() || out.size() > kBlake2bMaxDigestBytes) {
    throw PreconditionError("Blake2b: digest of " + std::to_string(out.size()) +
                            " bytes; BLAKE2b digests are 1 to 64 bytes");
  }
  std::array<std::uint64_t, 8> h = kIv;
  // Parameter block word 0 (RFC 7693 §2.5): digest length, key length 0, fanout 1, depth 1.
  h[0] ^= 0x01010000ULL ^ static_cast<std::uint64_t>(out.size());
  const auto* bytes = reinterpret_cast<const std::uint8_t*>(data.data());
  std::size_t remaining = data.size();
  std::uint64_t offset = 0;
  // Every full block but the last is compressed as it comes; the last block (full or not, and an
  // empty message's one zero block) is padded with zeros and flagged as last.
  while (remaining > kBlockBytes) {
    offset += kBlockBytes;
    Compress(h, bytes, offset, false);
    bytes += kBlockBytes;
    remaining -= kBlockBytes;
  }
  std::uint8_t last[kBlockBytes] = {};
  if (remaining > 0) std::memcpy(last, bytes, remaining);
  offset += remaining;
  Compress(h, last, offset, true);
  for (std::size_t i = 0; i < out.size(); ++i) {
    out[i] = static_cast<std::uint8_t>(h[i / 8] >> (8 * (i % 8)));
  }
}

}  // namespace nuwatch
