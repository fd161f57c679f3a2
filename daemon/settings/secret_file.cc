#include "settings/secret_file.h"

#include <sys/stat.h>

#include <cerrno>
#include <cstring>
#include <fstream>

namespace nuwatch {

std::string ReadSecretFirstLine(const std::string& path) {
  struct stat st {};
  if (::stat(path.c_str(), &st) != 0) {
    throw SecretFileError(path + ": cannot read: " + std::strerror(errno));
  }
  if ((st.st_mode & 077) != 0) {
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
