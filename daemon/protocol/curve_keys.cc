#include "protocol/curve_keys.h"

#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>
#include <zmq.h>

#include <algorithm>
#include <array>
#include <cerrno>
#include <cstring>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <vector>

#include "settings/secret_file.h"

namespace nuwatch {
namespace {

// ZeroMQ RFC 32's alphabet.
constexpr std::string_view kZ85Alphabet =
    "0123456789abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ.-:+=^!/*?&<>()[]{}@%$#";

std::string_view Trim(std::string_view s) {
  while (!s.empty() && (s.front() == ' ' || s.front() == '\t' || s.front() == '\r')) {
    s.remove_prefix(1);
  }
  while (!s.empty() && (s.back() == ' ' || s.back() == '\t' || s.back() == '\r'))
    s.remove_suffix(1);
  return s;
}

std::string Errno() { return std::strerror(errno); }

std::vector<std::string> ReadLines(const std::string& path) {
  std::error_code error;
  if (std::filesystem::is_directory(path, error)) {
    throw CurveKeyError(path + ": is a directory, not a key file");
  }
  std::ifstream in(path, std::ios::binary);
  if (!in) throw CurveKeyError(path + ": cannot open the key file: " + Errno());
  std::vector<std::string> lines;
  for (std::string line; std::getline(in, line);) {
    lines.push_back(std::move(line));
    if (lines.size() > 100000) throw CurveKeyError(path + ": too many lines for a key file");
  }
  if (in.bad()) throw CurveKeyError(path + ": cannot read the key file: " + Errno());
  return lines;
}

// One line of a certificate or key list.
struct KeyLine {
  enum class Kind { kNothing, kPublic, kSecret, kBare } kind = Kind::kNothing;
  std::string key;
};

// `public-key = "KEY"`, `secret-key = "KEY"` (quotes optional, as ZPL allows), a bare key, or a
// line that carries none (blank, comment, section names, other metadata `name = value`).
KeyLine ParseKeyLine(std::string_view raw) {
  const std::string_view line = Trim(raw);
  if (line.empty() || line.front() == '#') return {};
  // A bare key is a 40-character first token, optionally followed by a comment ("KEY alice's
  // laptop"). A Z85 key may itself hold '=', hence the token test before the `name = value` one.
  const auto space = line.find_first_of(" \t");
  const std::string_view token = line.substr(0, space);
  if (token.size() == kZ85KeyLength) {
    const std::string_view rest =
        space == std::string_view::npos ? std::string_view() : Trim(line.substr(space));
    if (rest.empty() || rest.front() != '=') return {KeyLine::Kind::kBare, std::string(token)};
  }
  const auto equals = line.find('=');
  if (equals == std::string_view::npos) {
    if (line == "metadata" || line == "curve") return {};
    return {KeyLine::Kind::kBare, std::string(line)};  // checked by the caller: not a key
  }
  const std::string_view name = Trim(line.substr(0, equals));
  std::string_view value = Trim(line.substr(equals + 1));
  if (value.size() >= 2 && (value.front() == '"' || value.front() == '\'') &&
      value.back() == value.front()) {
    value = value.substr(1, value.size() - 2);
  }
  if (name == "public-key") return {KeyLine::Kind::kPublic, std::string(value)};
  if (name == "secret-key") return {KeyLine::Kind::kSecret, std::string(value)};
  return {};  // metadata
}

std::string Where(const std::string& path, std::size_t line_index) {
  return path + ":" + std::to_string(line_index + 1) + ": ";
}

std::string DerivedPublicKey(const std::string& secret) {
  std::array<char, kZ85KeyLength + 1> derived{};
  if (zmq_curve_public(derived.data(), secret.c_str()) != 0) return "";
  return std::string(derived.data(), kZ85KeyLength);
}

// The public keys listed in one file (see ReadAllowedCurveKeys).
void ReadKeyList(const std::string& path, std::set<std::string>* keys) {
  const std::vector<std::string> lines = ReadLines(path);
  for (std::size_t i = 0; i < lines.size(); ++i) {
    const KeyLine line = ParseKeyLine(lines[i]);
    switch (line.kind) {
      case KeyLine::Kind::kNothing:
        continue;
      case KeyLine::Kind::kSecret:
        throw CurveKeyError(Where(path, i) +
                            "holds a secret key: a list of client keys holds public keys only "
                            "(give the daemon NAME.key, and keep NAME.key_secret with the client)");
      case KeyLine::Kind::kPublic:
      case KeyLine::Kind::kBare:
        if (const std::string problem = Z85KeyProblem(line.key); !problem.empty()) {
          throw CurveKeyError(Where(path, i) + "not a CURVE public key: " + problem);
        }
        keys->insert(line.key);
    }
  }
}

void WriteNewFile(const std::string& path, const std::string& text, mode_t mode, bool replace) {
  const std::string temporary = path + ".tmp-" + std::to_string(::getpid());
  const int fd = ::open(temporary.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, mode);
  if (fd < 0) throw CurveKeyError(temporary + ": cannot create: " + Errno());
  bool ok = ::fchmod(fd, mode) == 0 &&
            ::write(fd, text.data(), text.size()) == static_cast<ssize_t>(text.size()) &&
            ::fsync(fd) == 0;
  const std::string write_error = ok ? "" : Errno();
  ok = ::close(fd) == 0 && ok;
  if (!ok) {
    ::unlink(temporary.c_str());
    throw CurveKeyError(path + ": cannot write: " + (write_error.empty() ? Errno() : write_error));
  }
  // link(2) fails if the name exists, so a key is never replaced by accident, even by a race.
  const int placed =
      replace ? ::rename(temporary.c_str(), path.c_str()) : ::link(temporary.c_str(), path.c_str());
  const int placed_errno = errno;
  if (!replace) ::unlink(temporary.c_str());
  if (placed != 0) {
    if (replace) ::unlink(temporary.c_str());
    if (placed_errno == EEXIST) {
      throw CurveKeyError(path + ": exists already; remove it first, or pass --force");
    }
    throw CurveKeyError(path + ": cannot create: " + std::strerror(placed_errno));
  }
}

std::string Certificate(std::string_view banner, const std::string& comment,
                        const CurveKeyPair& keys, bool with_secret) {
  char stamp[32] = "";
  const std::time_t now = std::time(nullptr);
  std::tm utc{};
  if (::gmtime_r(&now, &utc) != nullptr)
    std::strftime(stamp, sizeof stamp, "%Y-%m-%dT%H:%M:%SZ", &utc);
  std::ostringstream out;
  out << "#   ****  Generated on " << stamp << " by nuwatch keygen  ****\n";
  out << "#   ZeroMQ CURVE " << banner << " Certificate\n";
  if (with_secret) {
    out << "#   DO NOT PROVIDE THIS FILE TO OTHER USERS nor change its permissions.\n";
  } else {
    out << "#   Exchange securely, or use a secure mechanism to verify the contents\n";
    out << "#   of this file after exchange.\n";
  }
  if (!comment.empty()) out << "#   " << comment << "\n";
  out << "\nmetadata\ncurve\n";
  out << "    public-key = \"" << keys.public_key << "\"\n";
  if (with_secret) out << "    secret-key = \"" << keys.secret_key << "\"\n";
  return out.str();
}

}  // namespace

bool CurveAvailable() { return zmq_has("curve") != 0; }

std::string CurveUnavailableMessage() {
  int major = 0, minor = 0, patch = 0;
  zmq_version(&major, &minor, &patch);
  return "this libzmq (" + std::to_string(major) + "." + std::to_string(minor) + "." +
         std::to_string(patch) +
         ") was built without CURVE (zmq_has(\"curve\") is false): install Debian's libzmq5, "
         "which is built with libsodium";
}

std::string Z85KeyProblem(std::string_view key) {
  if (key.size() != kZ85KeyLength) {
    return std::to_string(key.size()) + " characters; a Z85 key has " +
           std::to_string(kZ85KeyLength);
  }
  for (const char c : key) {
    if (kZ85Alphabet.find(c) == std::string_view::npos) {
      std::string message = "'";  // appended, not "'" + ...: GCC 12 warns falsely on that
      message += c;
      return message + "' is not a Z85 character";
    }
  }
  std::array<uint8_t, 32> bytes{};
  const std::string text(key);
  // Every 5 characters encode a 32-bit word; some 5-character groups exceed 2^32 and decode to
  // nothing.
  if (zmq_z85_decode(bytes.data(), text.c_str()) == nullptr) return "not a valid Z85 encoding";
  return "";
}

CurveKeyPair ReadCurveKeyFile(const std::string& path, bool need_secret) {
  const std::vector<std::string> lines = ReadLines(path);
  CurveKeyPair pair;
  for (std::size_t i = 0; i < lines.size(); ++i) {
    const KeyLine line = ParseKeyLine(lines[i]);
    if (line.kind == KeyLine::Kind::kNothing) continue;
    if (const std::string problem = Z85KeyProblem(line.key); !problem.empty()) {
      throw CurveKeyError(Where(path, i) + "not a CURVE key: " + problem);
    }
    std::string& slot = line.kind == KeyLine::Kind::kSecret ? pair.secret_key : pair.public_key;
    if (!slot.empty()) throw CurveKeyError(Where(path, i) + "a second key of the same kind");
    slot = line.key;
  }
  if (need_secret) {
    if (pair.secret_key.empty()) {
      throw CurveKeyError(path +
                          ": holds no secret-key line: give the secret certificate "
                          "(NAME.key_secret), not the public one");
    }
    struct stat st {};
    if (::stat(path.c_str(), &st) == 0 &&
        !SecretFileModeAllowed(st.st_mode, st.st_uid, ::geteuid())) {
      char mode[8];
      std::snprintf(mode, sizeof mode, "%04o", static_cast<unsigned>(st.st_mode & 07777));
      throw CurveKeyError(path + ": holds a secret key but is readable by others (mode " + mode +
                          "); chmod 600 " + path);
    }
    const std::string derived = DerivedPublicKey(pair.secret_key);
    if (derived.empty()) throw CurveKeyError(path + ": the secret key cannot be used");
    if (pair.public_key.empty()) {
      pair.public_key = derived;
    } else if (pair.public_key != derived) {
      throw CurveKeyError(path + ": the public key does not belong to the secret key");
    }
  } else if (pair.public_key.empty()) {
    throw CurveKeyError(path + ": holds no public key");
  }
  return pair;
}

std::set<std::string> ReadAllowedCurveKeys(const std::string& path) {
  std::set<std::string> keys;
  std::error_code error;
  if (std::filesystem::is_directory(path, error)) {
    std::vector<std::string> files;
    for (const auto& entry : std::filesystem::directory_iterator(path, error)) {
      if (entry.path().extension() == ".key" && entry.is_regular_file(error)) {
        files.push_back(entry.path().string());
      }
    }
    if (error) throw CurveKeyError(path + ": cannot list the directory: " + error.message());
    std::sort(files.begin(), files.end());
    for (const std::string& file : files) ReadKeyList(file, &keys);
    if (keys.empty()) {
      throw CurveKeyError(path + ": no client key in the directory (its NAME.key files are read)");
    }
    return keys;
  }
  if (!std::filesystem::exists(path, error)) {
    throw CurveKeyError(path + ": no such file or directory");
  }
  ReadKeyList(path, &keys);
  if (keys.empty()) throw CurveKeyError(path + ": lists no client key");
  return keys;
}

CurveKeyPair WriteCurveKeyPair(const std::string& base, bool replace, const std::string& comment) {
  if (!CurveAvailable()) throw CurveKeyError(CurveUnavailableMessage());
  std::array<char, kZ85KeyLength + 1> public_key{};
  std::array<char, kZ85KeyLength + 1> secret_key{};
  if (zmq_curve_keypair(public_key.data(), secret_key.data()) != 0) {
    throw CurveKeyError(std::string("zmq_curve_keypair failed: ") + zmq_strerror(zmq_errno()));
  }
  const CurveKeyPair pair{std::string(public_key.data(), kZ85KeyLength),
                          std::string(secret_key.data(), kZ85KeyLength)};
  // The secret file first: a public key without its secret would be of no use.
  WriteNewFile(base + ".key_secret", Certificate("**Secret**", comment, pair, true), 0600, replace);
  WriteNewFile(base + ".key", Certificate("Public", comment, pair, false), 0644, replace);
  return pair;
}

}  // namespace nuwatch
