// ReadSecretFirstLine: the one reader of password files for nuwatchd and `nuwatch send`.
// The mode rule (refuse a secret that group or others may read or write) is the one OpenSSH
// applies to private keys (common practice); the line-end handling follows the files an editor
// on either platform writes ("\n" or "\r\n").
#include "settings/secret_file.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cstdlib>
#include <fstream>
#include <string>

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
using ::testing::StartsWith;

class SecretFileTest : public ::testing::Test {
 protected:
  void SetUp() override {
    char pattern[] = "/tmp/nuwatch-secret-XXXXXX";
    ASSERT_NE(::mkdtemp(pattern), nullptr);
    dir_ = pattern;
  }
  void TearDown() override { std::system(("rm -rf '" + dir_ + "'").c_str()); }

  std::string Write(const std::string& name, const std::string& text, mode_t mode) {
    const std::string path = dir_ + "/" + name;
    std::ofstream(path, std::ios::binary) << text;
    EXPECT_EQ(::chmod(path.c_str(), mode), 0);
    return path;
  }

  // The message of the SecretFileError that reading `path` throws, or "" if it throws none.
  static std::string ErrorOf(const std::string& path) {
    try {
      ReadSecretFirstLine(path);
    } catch (const SecretFileError& error) {
      return error.what();
    }
    return "";
  }

  std::string dir_;
};

TEST_F(SecretFileTest, ReturnsTheFirstLineWithoutItsLineEnd) {
  EXPECT_EQ(ReadSecretFirstLine(Write("unix", "s3cret\nsecond line\n", 0600)), "s3cret");
  EXPECT_EQ(ReadSecretFirstLine(Write("dos", "s3cret\r\nsecond\r\n", 0600)), "s3cret");
  EXPECT_EQ(ReadSecretFirstLine(Write("no-end", "pass word", 0400)), "pass word");
}

TEST_F(SecretFileTest, RefusesAFileOthersMayReadOrWrite) {
  for (const mode_t mode : {0640, 0604, 0620, 0602, 0644}) {
    const std::string path = Write("open-" + std::to_string(mode), "s3cret\n", mode);
    const std::string error = ErrorOf(path);
    EXPECT_THAT(error, StartsWith(path)) << std::oct << mode;
    EXPECT_THAT(error, HasSubstr("chmod 600")) << std::oct << mode;
  }
}

// The rule itself, for owners a test run by one user cannot create files as.
TEST(SecretFileModeAllowed, GroupReadOnlyForARootOwnedFileThatAnotherUserReads) {
  const uid_t root = 0, daemon = 10001, other = 10002;
  // Owner-only modes pass for every owner and reader.
  for (const mode_t mode : {0400, 0600, 0700}) {
    EXPECT_TRUE(SecretFileModeAllowed(mode, daemon, daemon)) << std::oct << mode;
    EXPECT_TRUE(SecretFileModeAllowed(mode, root, daemon)) << std::oct << mode;
    EXPECT_TRUE(SecretFileModeAllowed(mode, root, root)) << std::oct << mode;
  }
  // Kubernetes with fsGroup: root's file, group fsGroup, 0440 (kubernetes/kubernetes#57923).
  EXPECT_TRUE(SecretFileModeAllowed(0440, root, daemon));
  EXPECT_TRUE(SecretFileModeAllowed(0640, root, daemon));
  // Group read of one's own file, or of another user's, or root reading root's: refused (ssh).
  EXPECT_FALSE(SecretFileModeAllowed(0440, daemon, daemon));
  EXPECT_FALSE(SecretFileModeAllowed(0440, other, daemon));
  EXPECT_FALSE(SecretFileModeAllowed(0440, root, root));
  // Group write or execute, and anything for others, are refused for root's files too.
  for (const mode_t mode : {0460, 0420, 0410, 0404, 0402, 0401, 0444}) {
    EXPECT_FALSE(SecretFileModeAllowed(mode, root, daemon)) << std::oct << mode;
  }
}

TEST_F(SecretFileTest, RefusesAMissingFileAndAnEmptyFirstLine) {
  EXPECT_THAT(ErrorOf(dir_ + "/missing"), HasSubstr("cannot read: No such file or directory"));
  EXPECT_THAT(ErrorOf(Write("empty-line", "\nsecond\n", 0600)), HasSubstr("is empty"));
  EXPECT_THAT(ErrorOf(Write("empty-file", "", 0600)), HasSubstr("cannot read the first line"));
}

}  // namespace
}  // namespace nuwatch
