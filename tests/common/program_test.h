// A test fixture that runs the project's programs as a user runs them, from a scratch directory of
// its own (removed after each test): separate stdout and stderr, the exit code read back.
#pragma once

#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "common/read_file.h"

namespace nuwatch::testing_data {

struct ProgramRun {
  int exit_code = -1;  // -1 when the program did not exit normally
  std::string out, err;
};

// Runs `program args` through the shell with stdin from /dev/null (no test waits on a terminal),
// stdout and stderr captured in files of `dir` (overwritten by the next run there).
inline ProgramRun RunProgram(const std::string& program, const std::string& args,
                             const std::string& dir) {
  const std::string out = dir + "/stdout.txt", err = dir + "/stderr.txt";
  const int status =
      std::system((program + " " + args + " </dev/null >" + out + " 2>" + err).c_str());
  return {WIFEXITED(status) ? WEXITSTATUS(status) : -1, ReadWholeFile(out), ReadWholeFile(err)};
}

// Thread safety: one test's fixture, used from the test's thread only.
class ProgramTest : public ::testing::Test {
 protected:
  void SetUp() override {
    const ::testing::TestInfo* test = ::testing::UnitTest::GetInstance()->current_test_info();
    dir_ = std::filesystem::temp_directory_path() /
           ("nuwatch_" + std::string(test->test_suite_name()) + "_" + std::to_string(::getpid()) +
            "_" + test->name());
    std::filesystem::create_directories(dir_);
  }
  void TearDown() override { std::filesystem::remove_all(dir_); }

  std::string Path(const std::string& name) const { return (dir_ / name).string(); }
  std::string Write(const std::string& name, const std::string& text) const {
    std::ofstream(Path(name)) << text;
    return Path(name);
  }
  ProgramRun Run(const std::string& program, const std::string& args) const {
    return RunProgram(program, args, dir_.string());
  }

  std::filesystem::path dir_;
};

}  // namespace nuwatch::testing_data
