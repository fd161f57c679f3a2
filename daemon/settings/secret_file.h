// Reading a secret that a config key or a command-line flag names by path (today the password of
// the metrics endpoint's basic authentication, for nuwatchd and for `nuwatch send --metrics`).
// Thread safety: reentrant; no state.
#pragma once

#include <stdexcept>
#include <string>

namespace nuwatch {

class SecretFileError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// Returns the first line of `path` without its line end ("\n" or "\r\n").
// Requires: nothing. Ensures: the result is not empty.
// Throws SecretFileError, whose message starts with `path`, when the file cannot be read, when
// its group or others may read or write it (mode & 077, the rule ssh applies to private keys:
// common practice), or when its first line is empty.
std::string ReadSecretFirstLine(const std::string& path);

}  // namespace nuwatch
