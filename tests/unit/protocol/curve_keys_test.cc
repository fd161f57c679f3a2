// Tests of the CURVE key files (daemon/protocol/curve_keys.h, PROTOCOL.md §12) against the test
// key pairs published in the zmq_curve(7) manual page of libzmq ("TEST KEY VALUES"), the
// certificate layout pyzmq's zmq.auth.create_certificates writes (copied below), and, for the
// pairs nuwatch writes, pyzmq's own reader (zmq.auth.load_certificate, through /usr/bin/python3).
#include "protocol/curve_keys.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cstdio>
#include <filesystem>
#include <fstream>
#include <functional>
#include <set>
#include <string>

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
namespace fs = std::filesystem;

// zmq_curve(7), "TEST KEY VALUES": the server's and the client's long-term pairs in Z85.
constexpr const char* kServerPublic = "rq:rM>}U?@Lns47E1%kR.o@n%FcmmsL/@{H8]yf7";
constexpr const char* kServerSecret = "JTKVSB%%)wK0E.X)V>+}o?pNmC{O&4W4b!Ni{Lh6";
constexpr const char* kClientPublic = "Yne@$w-vo<fVvi]a<NY6T1ed:M$fCG*[IaLV{hID";
constexpr const char* kClientSecret = "D:)Q[IlAW!ahhC2ac:9*A}h:p?([4%wOTJ%JR%cs";

// A certificate as pyzmq 24's zmq/auth/certs.py (_write_key_file) writes it.
std::string PyzmqCertificate(const std::string& public_key, const std::string& secret_key) {
  std::string text =
      "#   ****  Generated on 2026-12-02 14:00:00.000000 by pyzmq  ****\n"
      "#   ZeroMQ CURVE **Secret** Certificate\n"
      "#   DO NOT PROVIDE THIS FILE TO OTHER USERS nor change its permissions.\n\n"
      "metadata\n"
      "curve\n"
      "    public-key = \"" +
      public_key + "\"\n";
  if (!secret_key.empty()) text += "    secret-key = \"" + secret_key + "\"\n";
  return text;
}

class CurveKeys : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = fs::temp_directory_path() /
           ("nuwatch-curve-keys-" + std::to_string(::getpid()) + "-" +
            ::testing::UnitTest::GetInstance()->current_test_info()->name());
    fs::remove_all(dir_);
    fs::create_directories(dir_);
  }
  void TearDown() override { fs::remove_all(dir_); }

  std::string Write(const std::string& name, const std::string& text, mode_t mode = 0600) {
    const std::string path = (dir_ / name).string();
    fs::create_directories(fs::path(path).parent_path());
    std::ofstream(path) << text;
    ::chmod(path.c_str(), mode);
    return path;
  }
  std::string ErrorOf(const std::function<void()>& call) {
    try {
      call();
    } catch (const CurveKeyError& e) {
      return e.what();
    }
    ADD_FAILURE() << "no CurveKeyError";
    return "";
  }

  fs::path dir_;
};

TEST_F(CurveKeys, CurveIsAvailableInDebiansLibzmq) {
  // Debian 12's libzmq5 is built with libsodium; the daemon refuses [auth] otherwise.
  EXPECT_TRUE(CurveAvailable()) << CurveUnavailableMessage();
}

TEST_F(CurveKeys, Z85KeysAreCheckedAsRfc32DefinesThem) {
  EXPECT_EQ(Z85KeyProblem(kServerPublic), "");
  EXPECT_EQ(Z85KeyProblem(kClientSecret), "");
  EXPECT_EQ(Z85KeyProblem(std::string(kServerPublic).substr(1)), "39 characters; a Z85 key has 40");
  EXPECT_EQ(Z85KeyProblem(std::string(39, 'a') + "~"), "'~' is not a Z85 character");
  // '%' is digit 82 of RFC 32's alphabet: "%%%%%" is 82 x (85^4 + 85^3 + 85^2 + 85 + 1), about
  // 4.37e9, above 2^32 - 1, so no 32-bit word encodes to it.
  EXPECT_EQ(Z85KeyProblem(std::string(40, '%')), "not a valid Z85 encoding");
}

TEST_F(CurveKeys, ReadsASecretCertificateInPyzmqsFormat) {
  const std::string path =
      Write("server.key_secret", PyzmqCertificate(kServerPublic, kServerSecret));
  const CurveKeyPair pair = ReadCurveKeyFile(path, /*need_secret=*/true);
  EXPECT_EQ(pair.public_key, kServerPublic);
  EXPECT_EQ(pair.secret_key, kServerSecret);
  const CurveKeyPair public_only =
      ReadCurveKeyFile(Write("server.key", PyzmqCertificate(kServerPublic, ""), 0644), false);
  EXPECT_EQ(public_only.public_key, kServerPublic);
  EXPECT_EQ(public_only.secret_key, "");
}

TEST_F(CurveKeys, RefusesBadSecretKeyFilesWithTheReason) {
  // The public key of the zmq_curve(7) client with the server's secret: not a pair.
  const std::string mixed = Write("mixed", PyzmqCertificate(kClientPublic, kServerSecret));
  EXPECT_EQ(ErrorOf([&] { ReadCurveKeyFile(mixed, true); }),
            mixed + ": the public key does not belong to the secret key");
  const std::string open = Write("open", PyzmqCertificate(kClientPublic, kClientSecret), 0644);
  EXPECT_EQ(ErrorOf([&] { ReadCurveKeyFile(open, true); }),
            open + ": holds a secret key but is readable by others (mode 0644); chmod 600 " + open);
  const std::string public_only = Write("public", PyzmqCertificate(kClientPublic, ""));
  EXPECT_THAT(ErrorOf([&] { ReadCurveKeyFile(public_only, true); }),
              HasSubstr(public_only + ": holds no secret-key line"));
  const std::string broken =
      Write("broken", PyzmqCertificate(std::string(kClientPublic).substr(0, 39), kClientSecret));
  EXPECT_EQ(ErrorOf([&] { ReadCurveKeyFile(broken, true); }),
            broken + ":7: not a CURVE key: 39 characters; a Z85 key has 40");
  const std::string missing = (dir_ / "missing").string();
  EXPECT_THAT(ErrorOf([&] { ReadCurveKeyFile(missing, true); }),
              HasSubstr(missing + ": cannot open the key file: No such file or directory"));
}

TEST_F(CurveKeys, AllowedKeysComeFromAListFileOrADirectoryOfCertificates) {
  const std::string list =
      Write("clients.txt", std::string("# admitted senders\n\n") + kClientPublic +
                               " pump-fleet sender\n" + kServerPublic + "\n");
  EXPECT_EQ(ReadAllowedCurveKeys(list), (std::set<std::string>{kClientPublic, kServerPublic}));
  Write("clients/alice.key", PyzmqCertificate(kClientPublic, ""), 0644);
  Write("clients/README", "not a key: ignored, as pyzmq's load_certificates ignores it\n");
  EXPECT_EQ(ReadAllowedCurveKeys((dir_ / "clients").string()),
            std::set<std::string>{kClientPublic});
}

TEST_F(CurveKeys, AListWithASecretKeyOrAStrayLineOrNoKeyIsAnError) {
  const std::string secret = Write("dir/alice.key", PyzmqCertificate(kClientPublic, kClientSecret));
  EXPECT_THAT(ErrorOf([&] { ReadAllowedCurveKeys((dir_ / "dir").string()); }),
              HasSubstr(secret + ":8: holds a secret key"));
  const std::string stray = Write("stray", std::string(kClientPublic) + "\nnot-a-key\n");
  EXPECT_EQ(ErrorOf([&] { ReadAllowedCurveKeys(stray); }),
            stray + ":2: not a CURVE public key: 9 characters; a Z85 key has 40");
  const std::string empty = Write("empty", "# nobody yet\n");
  EXPECT_EQ(ErrorOf([&] { ReadAllowedCurveKeys(empty); }), empty + ": lists no client key");
  fs::create_directories(dir_ / "none");
  EXPECT_THAT(ErrorOf([&] { ReadAllowedCurveKeys((dir_ / "none").string()); }),
              HasSubstr("no client key in the directory"));
}

TEST_F(CurveKeys, WrittenPairsArePrivateReadableByPyzmqAndNeverReplacedByAccident) {
  const std::string base = (dir_ / "sender").string();
  const CurveKeyPair pair = WriteCurveKeyPair(base, /*replace=*/false, "sender of pump-01");
  struct stat st {};
  ASSERT_EQ(::stat((base + ".key_secret").c_str(), &st), 0);
  EXPECT_EQ(st.st_mode & 0777, 0600u);
  const CurveKeyPair read = ReadCurveKeyFile(base + ".key_secret", true);
  EXPECT_EQ(read.public_key, pair.public_key);
  EXPECT_EQ(read.secret_key, pair.secret_key);
  EXPECT_EQ(ReadAllowedCurveKeys(base + ".key"), std::set<std::string>{pair.public_key});
  // pyzmq's reader, the third party: both files give the same pair.
  const std::string command =
      std::string(NUWATCH_PYTHON) +
      " -c 'import sys, zmq.auth; p, s = zmq.auth.load_certificate(sys.argv[1]);"
      " q, n = zmq.auth.load_certificate(sys.argv[2]);"
      " print(p.decode(), s.decode(), q == p and n is None)' " +
      base + ".key_secret " + base + ".key";
  FILE* pipe = ::popen(command.c_str(), "r");
  ASSERT_NE(pipe, nullptr);
  char buffer[256] = {};
  const std::size_t n = std::fread(buffer, 1, sizeof buffer - 1, pipe);
  EXPECT_EQ(::pclose(pipe), 0);
  EXPECT_EQ(std::string(buffer, n), pair.public_key + " " + pair.secret_key + " True\n");
  EXPECT_THAT(ErrorOf([&] { WriteCurveKeyPair(base, false, ""); }),
              HasSubstr(base + ".key_secret: exists already"));
  const CurveKeyPair replaced = WriteCurveKeyPair(base, /*replace=*/true, "");
  EXPECT_NE(replaced.public_key, pair.public_key);
  EXPECT_EQ(ReadCurveKeyFile(base + ".key_secret", true).public_key, replaced.public_key);
}

}  // namespace
}  // namespace nuwatch
