#include "protocol/ownership.h"

#include <array>
#include <cstdio>

#include "nuwatch/types.h"
#include "protocol/blake2b.h"

namespace nuwatch {
namespace {

std::string Quoted(std::string_view s) {
  std::string out = "\"";
  for (const char c : s) {
    const auto byte = static_cast<unsigned char>(c);
    if (byte >= 0x20 && byte < 0x7F && c != '"' && c != '\\') {
      out += c;
    } else {
      char escaped[8];
      std::snprintf(escaped, sizeof escaped, "\\x%02X", byte);
      out += escaped;
    }
  }
  return out + "\"";
}

}  // namespace

std::string MemberNameError(std::string_view name) {
  if (name.empty()) return "a member name is empty";
  if (name.size() > kMaxMemberNameBytes) {
    return "member name " + Quoted(name.substr(0, 32)) + "... is " + std::to_string(name.size()) +
           " bytes long; at most " + std::to_string(kMaxMemberNameBytes);
  }
  for (std::size_t i = 0; i < name.size(); ++i) {
    const auto byte = static_cast<unsigned char>(name[i]);
    if (byte < 0x21 || byte > 0x7E || byte == '=') {
      char hex[8];
      std::snprintf(hex, sizeof hex, "0x%02X", byte);
      return "member name " + Quoted(name) + " has a byte that is whitespace, '=' or not " +
             "printable ASCII (" + hex + " at offset " + std::to_string(i) + ")";
    }
  }
  return "";
}

std::string MemberListError(std::span<const std::string> members) {
  for (std::size_t i = 0; i < members.size(); ++i) {
    if (std::string error = MemberNameError(members[i]); !error.empty()) return error;
    for (std::size_t j = 0; j < i; ++j) {
      if (members[i] == members[j]) return "member name " + Quoted(members[i]) + " appears twice";
    }
  }
  return "";
}

std::uint64_t RendezvousWeight(std::string_view member, std::string_view key) noexcept {
  // Short names and keys (the usual case) are hashed from the stack.
  std::array<char, 512> local;
  std::string heap;
  const std::size_t size = member.size() + 1 + key.size();
  char* buffer = local.data();
  if (size > local.size()) {
    heap.resize(size);  // an allocation failure terminates, as noexcept says
    buffer = heap.data();
  }
  member.copy(buffer, member.size());
  buffer[member.size()] = '\0';
  key.copy(buffer + member.size() + 1, key.size());
  std::array<std::uint8_t, 8> digest;
  Blake2b(std::string_view(buffer, size), digest);
  std::uint64_t weight = 0;
  for (const std::uint8_t byte : digest) weight = (weight << 8) | byte;
  return weight;
}

std::size_t OwnerOf(std::string_view key, std::span<const std::string> members) {
  if (members.empty()) throw PreconditionError("OwnerOf: the member list is empty");
  std::size_t owner = 0;
  std::uint64_t best = RendezvousWeight(members[0], key);
  for (std::size_t i = 1; i < members.size(); ++i) {
    const std::uint64_t weight = RendezvousWeight(members[i], key);
    if (weight > best ||
        (weight == best && std::string_view(members[i]) < std::string_view(members[owner]))) {
      best = weight;
      owner = i;
    }
  }
  return owner;
}

}  // namespace nuwatch
