// Reading a secret that a config key or a command-line flag names by path (today the password of
// the metrics endpoint's basic authentication, for nuwatchd and for `nuwatch send --metrics`).
// Thread safety: reentrant; no state.
#pragma once

#include <sys/types.h>

#include <stdexcept>
#include <string>

namespace nuwatch {

class SecretFileError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// Whether a file that holds a secret (a password, a CURVE secret key) is private enough to use,
// from its permission bits, its owner and the reading process's effective uid. Refused: any
// permission for others; for the group, write or execute, and read too unless root owns the file
// and another user reads it. The rule is OpenSSH's for private keys (mode & 077 == 0: common
// practice) with one exception, for Kubernetes: when a pod sets securityContext.fsGroup, the
// kubelet mounts Secret files as root's, group fsGroup, with group read added whatever
// defaultMode says (mode 0440; kubernetes/kubernetes#57923, open). PostgreSQL accepts 0640 for a
// root-owned key file on the same grounds (from memory).
// Thread safety: pure.
bool SecretFileModeAllowed(mode_t mode, uid_t owner_uid, uid_t reader_uid);

// Returns the first line of `path` without its line end ("\n" or "\r\n").
// Requires: nothing. Ensures: the result is not empty.
// Throws SecretFileError, whose message starts with `path`, when the file cannot be read, when
// SecretFileModeAllowed refuses its mode, or when its first line is empty.
std::string ReadSecretFirstLine(const std::string& path);

}  // namespace nuwatch
