// BLAKE2b (RFC 7693), unkeyed, with a digest of 1 to 64 bytes: the hash that PROTOCOL.md §13 pins
// for stream ownership. A digest length other than 64 is not a truncated 64-byte digest: the length
// enters the parameter block, as RFC 7693 §2.5 specifies (Python's hashlib.blake2b(data,
// digest_size=n) computes the same). Kept here rather than taken from libsodium because libsodium's
// crypto_generichash refuses digests shorter than 16 bytes, and §13 uses 8.
//
// Thread safety: a pure function of its arguments.
#pragma once

#include <cstddef>
#include <cstdint>
#include <span>
#include <string_view>

namespace nuwatch {

inline constexpr std::size_t kBlake2bMaxDigestBytes = 64;

// Requires: 1 <= out.size() <= 64 (else PreconditionError naming the size).
// Ensures: out holds BLAKE2b-(8 * out.size()) of `data`, unkeyed.
void Blake2b(std::string_view data, std::span<std::uint8_t> out);

}  // namespace nuwatch
