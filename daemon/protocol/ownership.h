// Which replica owns a stream (PROTOCOL.md §13): rendezvous (highest-random-weight) hashing of the
// stream key over the member names (Thaler & Ravishankar, IEEE/ACM Transactions on Networking
// 6(1), 1998). Every sender and every replica computes the same owner from the same member list,
// and a change of the list moves only the keys it must: a new member takes about 1/(N+1) of the
// keys, all from the others, and a removed member's keys alone move.
//
// Thread safety: pure functions of their arguments.
#pragma once

#include <cstddef>
#include <cstdint>
#include <span>
#include <string>
#include <string_view>

namespace nuwatch {

// A member name is 1 to kMaxMemberNameBytes bytes of printable ASCII other than space and '='
// (0x21..0x7E without 0x3D): a StatefulSet pod name such as "nuwatchd-0" is one. '=' is excluded
// so that `nuwatch send --member NAME=ENDPOINT` splits unambiguously.
inline constexpr std::size_t kMaxMemberNameBytes = 253;

// Ensures: "" when `name` is a valid member name, else a message saying why, e.g.
// "member name \"a b\" has a byte outside 0x21..0x7E (0x20 at offset 1)".
std::string MemberNameError(std::string_view name);

// Ensures: "" when every name is valid and no two are equal, else the first problem (a bad name,
// or "member name \"x\" appears twice"). An empty list is valid (a lone daemon).
std::string MemberListError(std::span<const std::string> members);

// The §13 weight: BLAKE2b with an 8-byte digest (unkeyed) of member || 0x00 || key, read as an
// unsigned 64-bit big-endian integer. The 0x00 separator cannot occur in a member name or a key,
// so distinct (member, key) pairs hash distinct byte strings.
// Requires nothing (names and keys are not checked here). Never throws.
std::uint64_t RendezvousWeight(std::string_view member, std::string_view key) noexcept;

// Requires: members non-empty (else PreconditionError). Ensures: the index of the member with the
// largest RendezvousWeight(member, key); among equal weights, the member whose name is smallest
// bytewise (std::string_view's comparison), so the owner does not depend on the list's order.
std::size_t OwnerOf(std::string_view key, std::span<const std::string> members);

}  // namespace nuwatch
