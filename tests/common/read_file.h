// The whole content of a file, shared by the helpers of tests/common (so that a test may include
// several of them).
#pragma once

#include <fstream>
#include <sstream>
#include <string>

namespace nuwatch::testing_data {

// The bytes of `path`; "" when it cannot be read.
inline std::string ReadWholeFile(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  std::ostringstream text;
  text << in.rdbuf();
  return text.str();
}

}  // namespace nuwatch::testing_data
