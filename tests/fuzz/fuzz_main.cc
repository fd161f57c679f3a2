// The corpus runner: the main() of a fuzz target built without libFuzzer (gcc, or clang without
// NUWATCH_FUZZ). It feeds every file named on the command line, and every regular file below a
// directory named there, to LLVMFuzzerTestOneInput once, so that any compiler's CI checks that the
// seed corpus runs without a finding. Arguments starting with '-' are libFuzzer's options and are
// ignored, so that one ctest command line serves both builds. A finding traps or aborts (the test
// fails); an empty corpus is an error too (exit 1), as it would check nothing.
#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <string>
#include <vector>

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size);

int main(int argc, char** argv) {
  namespace fs = std::filesystem;
  std::vector<fs::path> inputs;
  for (int i = 1; i < argc; ++i) {
    const std::string argument = argv[i];
    if (argument.starts_with("-")) continue;
    if (fs::is_directory(argument)) {
      for (const auto& entry : fs::recursive_directory_iterator(argument)) {
        if (entry.is_regular_file()) inputs.push_back(entry.path());
      }
    } else if (fs::is_regular_file(argument)) {
      inputs.emplace_back(argument);
    } else {
      std::fprintf(stderr, "%s: %s is neither a file nor a directory\n", argv[0], argv[i]);
      return 1;
    }
  }
  if (inputs.empty()) {
    std::fprintf(stderr, "%s: no inputs (give corpus files or directories)\n", argv[0]);
    return 1;
  }
  std::sort(inputs.begin(), inputs.end());
  for (const fs::path& path : inputs) {
    std::ifstream in(path, std::ios::binary);
    const std::vector<char> bytes((std::istreambuf_iterator<char>(in)),
                                  std::istreambuf_iterator<char>());
    if (!in.eof() && in.fail()) {
      std::fprintf(stderr, "%s: cannot read %s\n", argv[0], path.c_str());
      return 1;
    }
    LLVMFuzzerTestOneInput(reinterpret_cast<const std::uint8_t*>(bytes.data()), bytes.size());
  }
  std::printf("%zu inputs ran without a finding\n", inputs.size());
  return 0;
}
