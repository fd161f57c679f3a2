#include "settings/secret_file.h"

#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstring>
#include <fstream>

namespace nuwatch {

bool SecretFileModeAllowed(mode_t mode, uid_t owner_uid, uid_t reader_uid) {
  const bool group_may_read = owner_uid == 0 && reader_uid != 0;
  return (mode & (group_may_read ? 037 : 077)) == 0;
}

std::string ReadSecretFirstLine(const std::string& path) {
  struct stat st {};
  if (::stat(path.c_str(), &st) != 0) {
    throw SecretFileError(path + ": cannot read: " + std::strerror(errno));
  }
  if (!SecretFileModeAllowed(st.st_mode, st.st_uid, ::geteuid())) {
    throw SecretFileError(path + ": readable by others; chmod 600 " + path);
  }
  std::ifstream in(path);
  std::string line;
  if (!in || !std::getline(in, line)) throw SecretFileError(path + ": cannot read the first line");
  if (!line.empty() && line.back() == '\r') line.pop_back();
  if (line.empty()) throw SecretFileError(path + ": the first line, the password, is empty");
  return line;
}

}  // namespace nuwatch
