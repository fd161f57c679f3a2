// CURVE keys for nuwatchd's sockets (daemon/protocol/PROTOCOL.md §12): reading and writing key
// files, and the list of client keys the daemon admits.
//
// Keys are Curve25519 keys written in Z85 (ZeroMQ RFC 32: 40 characters for 32 bytes), as
// zmq_curve_keypair(3) and pyzmq's zmq.curve_keypair() produce them. A key file is a ZeroMQ
// certificate in the ZPL form that CZMQ's zcert and pyzmq's zmq.auth.create_certificates write:
//
//   #   ZeroMQ CURVE **Secret** Certificate
//   metadata
//   curve
//       public-key = "rq:rM>}U?@Lns47E1%kR.o@n%FcmmsL/@{H8]yf7"
//       secret-key = "JTKVSB%%)wK0E.X)V>+}o?pNmC{O&4W4b!Ni{Lh6"
//
// NAME.key holds the public key only (it may be shared), NAME.key_secret both (0600: it is a
// password). A list of client keys is a file with one key a line (a bare Z85 key, or a
// `public-key = "..."` line, so that a certificate is a list of one; blank lines and `#` comments
// are skipped) or a directory whose `*.key` files are such lists (pyzmq's load_certificates and
// CZMQ's zcertstore read the same layout). Every error names the file (and line) and the
// problem; nothing is silently skipped except files of a directory not named `*.key`.
//
// Thread safety: reentrant functions, value types.
#pragma once

#include <set>
#include <stdexcept>
#include <string>
#include <string_view>

namespace nuwatch {

// A key file or list that cannot be read or is malformed. The message starts with the path.
class CurveKeyError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

inline constexpr std::size_t kZ85KeyLength = 40;

// True when libzmq was built with CURVE (libsodium): zmq_has("curve").
bool CurveAvailable();
// The message to give when it is not: names the library and what to install.
std::string CurveUnavailableMessage();

// "" when `key` is a Z85 encoding of 32 bytes; else what is wrong ("39 characters, a key has
// 40", "'~' is not a Z85 character").
std::string Z85KeyProblem(std::string_view key);

struct CurveKeyPair {
  std::string public_key;  // Z85
  std::string secret_key;  // Z85; empty when only the public key was read
};

// Reads a certificate. Requires nothing of the file; ensures: public_key is a valid Z85 key, and
// when `need_secret` the secret key too and public_key is the one derived from it (a mismatch is
// an error: the file was edited or pieced together). A bare file holding one Z85 key line is
// accepted as a public key. Throws CurveKeyError ("PATH: ...") for an unreadable file, a missing
// or malformed key, or (need_secret) a secret key file whose mode SecretFileModeAllowed refuses
// (settings/secret_file.h: no access for others, group read only for a file root owns).
CurveKeyPair ReadCurveKeyFile(const std::string& path, bool need_secret);

// The public keys of a list (a file, or a directory of *.key files, see above), as Z85 strings.
// Throws CurveKeyError for an unreadable path, a line that is not a key, a secret key in the list
// (it belongs to a client, never to the daemon's configuration), or a list without any key.
std::set<std::string> ReadAllowedCurveKeys(const std::string& path);

// Makes a new key pair (zmq_curve_keypair) and writes `base`.key (0644) and `base`.key_secret
// (0600), refusing to replace an existing file unless `replace`. Returns the pair. Throws
// CurveKeyError when a file exists, cannot be written, or CURVE is unavailable. `comment` goes
// into the files' header (e.g. who made it).
CurveKeyPair WriteCurveKeyPair(const std::string& base, bool replace, const std::string& comment);

}  // namespace nuwatch
