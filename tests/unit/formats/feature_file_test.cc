// Tests of the feature-file reader (formats/feature_file.h): a file read block by block gives what
// it gives read whole, whatever the block size, and an error in a later block names its line. The
// values are checked against numpy's own reading of the same file (numpy.loadtxt, Debian's
// python3-numpy, /usr/bin/python3): a reader outside the project.
#include "formats/feature_file.h"

#include <gtest/gtest.h>
#include <unistd.h>

#include <cstdio>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>

#include "common/run_command.h"

namespace nuwatch {
namespace {

class FeatureFileTest : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = std::filesystem::temp_directory_path() /
           ("feature_file_test." + std::to_string(::getpid()));
    std::filesystem::create_directories(dir_);
  }
  void TearDown() override { std::filesystem::remove_all(dir_); }
  std::string Write(const std::string& name, const std::string& text) const {
    const std::string path = (dir_ / name).string();
    std::ofstream(path) << text;
    return path;
  }
  std::filesystem::path dir_;
};

// 1000 rows: time, stream (quoted, with a comma) and three features, numbers of every shape.
std::string SampleFile() {
  std::mt19937_64 generator(11);
  std::normal_distribution<double> normal;
  std::ostringstream csv;
  csv.precision(17);
  csv << "time,stream,a,b,c\n";
  for (int i = 0; i < 1000; ++i) {
    csv << 1767225600 + 60 * i << ",\"line " << i % 3 << ", pump\"," << normal(generator) * 1e-5
        << "," << 300 + 5 * normal(generator) << "," << (i % 7 == 0 ? "-0" : "12") << "\n";
  }
  return csv.str();
}

TEST_F(FeatureFileTest, BlocksOfAnySizeGiveTheWholeFile) {
  const std::string path = Write("sample.csv", SampleFile());
  const FeatureFile whole = ReadFeatureFile(path);
  ASSERT_EQ(whole.rows(), 1000);
  EXPECT_EQ(whole.names, (std::vector<std::string>{"a", "b", "c"}));
  EXPECT_TRUE(whole.has_time);
  EXPECT_TRUE(whole.has_stream);
  for (const int64_t block_rows : {1, 7, 999, 1000, 1001, 4096}) {
    FeatureFileReader reader(path);
    int64_t row = 0;
    for (FeatureFile block = reader.Next(block_rows); block.rows() > 0;
         block = reader.Next(block_rows)) {
      ASSERT_LE(block.rows(), block_rows);
      EXPECT_EQ(block.names, whole.names);
      for (int64_t i = 0; i < block.rows(); ++i, ++row) {
        ASSERT_LT(row, whole.rows());
        EXPECT_EQ(block.values.row(i), whole.values.row(row)) << "row " << row;
        EXPECT_EQ(block.times[i], whole.times[row]);
        EXPECT_EQ(block.time_text[i], whole.time_text[row]);
        EXPECT_EQ(block.streams[i], whole.streams[row]);
      }
    }
    EXPECT_EQ(row, 1000) << "blocks of " << block_rows;
    // At the end, and on every call after.
    EXPECT_EQ(reader.Next(block_rows).rows(), 0);
  }
  EXPECT_EQ(whole.streams[4], "line 1, pump");
  EXPECT_EQ(whole.time_text[2], "1767225720");

  // The values against numpy's reading of the same columns, to the last bit.
  const std::string numpy_path = Write("numpy.txt", "");
  const std::string script = Write("read.py",
                                   "import sys, numpy\n"
                                   "x = numpy.loadtxt(sys.argv[1], delimiter=',', skiprows=1,\n"
                                   "                  usecols=(2, 3, 4), quotechar='\"')\n"
                                   "numpy.savetxt(sys.argv[2], x, fmt='%.17g')\n");
  const testing_data::CommandResult numpy = testing_data::RunCommand(
      std::string(NUWATCH_PYTHON) + " " + script + " " + path + " " + numpy_path);
  ASSERT_EQ(numpy.exit_code, 0) << numpy.output;
  std::ifstream numpy_values(numpy_path);
  for (int64_t r = 0; r < whole.rows(); ++r) {
    for (int c = 0; c < 3; ++c) {
      double expected = 0;
      ASSERT_TRUE(numpy_values >> expected) << "numpy gave fewer values";
      EXPECT_EQ(whole.values(r, c), expected) << "row " << r << " column " << c;
    }
  }
}

TEST_F(FeatureFileTest, AnErrorInALaterBlockNamesItsLineAfterTheBlocksBefore) {
  std::string text = "a,b\n";
  for (int i = 0; i < 50; ++i) text += i == 30 ? "1,inf\n" : "1,2\n";
  const std::string path = Write("bad.csv", text);
  FeatureFileReader reader(path);
  EXPECT_EQ(reader.Next(10).rows(), 10);
  EXPECT_EQ(reader.Next(10).rows(), 10);
  EXPECT_EQ(reader.Next(10).rows(), 10);
  try {
    reader.Next(10);
    FAIL() << "no error for the row of inf";
  } catch (const CsvError& e) {
    EXPECT_EQ(std::string(e.what()), path + ":32: column b: 'inf' is not a finite number");
  }
}

TEST_F(FeatureFileTest, AFileWithoutRowsOrFeaturesIsRefused) {
  try {
    ReadFeatureFile(Write("header.csv", "time,a\n"));
    FAIL() << "no error for a file without rows";
  } catch (const CsvError& e) {
    EXPECT_NE(std::string(e.what()).find("header.csv: no data rows"), std::string::npos);
  }
  try {
    FeatureFileReader reader(Write("times.csv", "time,stream\n1,a\n"));
    FAIL() << "no error for a file without feature columns";
  } catch (const CsvError& e) {
    EXPECT_NE(std::string(e.what()).find("times.csv: no feature columns"), std::string::npos);
  }
}

}  // namespace
}  // namespace nuwatch
