// Tests of the streaming CSV reader (formats/csv_reader.h): RFC 4180 quoting, checked against
// Python's csv module (a reader outside the project, /usr/bin/python3), line numbers in messages,
// and push mode fed a byte at a time.
#include "formats/csv_reader.h"

#include <gtest/gtest.h>
#include <unistd.h>

#include <fstream>
#include <functional>
#include <nlohmann/json.hpp>
#include <random>
#include <string>
#include <vector>

#include "common/run_command.h"
#include "formats/csv_table.h"

namespace nuwatch {
namespace {

using Records = std::vector<std::vector<std::string>>;

Records ReadAllRecords(CsvReader reader) {
  Records records{reader.header()};
  while (reader.Next() == CsvReader::Status::kRow)
    records.emplace_back(reader.fields().begin(), reader.fields().end());
  return records;
}

std::string ErrorOf(const std::function<void()>& action) {
  try {
    action();
  } catch (const CsvError& e) {
    return e.what();
  }
  return "(no error)";
}

TEST(CsvReaderTest, QuotedHeaderNamesHaveNoQuotes) {
  // Regression: a header "a","b" gave feature names with the quotes in them.
  const CsvReader reader = CsvReader::FromText("\"a\",\"b\"\n1,2\n", "x.csv");
  EXPECT_EQ(reader.header(), (std::vector<std::string>{"a", "b"}));
}

TEST(CsvReaderTest, QuotedFieldsAsRfc4180Defines) {
  // RFC 4180 section 2, rules 5 to 7: commas, line breaks and doubled quotes inside quotes.
  const Records records =
      ReadAllRecords(CsvReader::FromText("name,note,value\n"
                                         "\"pump, north\",\"say \"\"hi\"\"\",1\n"
                                         "plain , \"two\nlines\" ,2\r\n"
                                         "\n"
                                         "\"\",\"\"\"\",3",
                                         "q.csv"));
  ASSERT_EQ(records.size(), 4u);
  EXPECT_EQ(records[1], (std::vector<std::string>{"pump, north", "say \"hi\"", "1"}));
  EXPECT_EQ(records[2], (std::vector<std::string>{"plain", "two\nlines", "2"}));
  EXPECT_EQ(records[3], (std::vector<std::string>{"", "\"", "3"}));
}

TEST(CsvReaderTest, LineNumbersCountTheLinesInsideQuotes) {
  CsvReader reader = CsvReader::FromText("a,b\n\"x\ny\",1\n\n2,3\n4\n", "lines.csv");
  ASSERT_EQ(reader.Next(), CsvReader::Status::kRow);
  EXPECT_EQ(reader.line(), 2);
  ASSERT_EQ(reader.Next(), CsvReader::Status::kRow);
  EXPECT_EQ(reader.line(), 5);  // line 4 is blank
  EXPECT_EQ(ErrorOf([&] { reader.Next(); }), "lines.csv:6: 1 fields, the header has 2");
}

TEST(CsvReaderTest, ErrorsNameTheFileAndLine) {
  EXPECT_EQ(ErrorOf([] { CsvReader::FromText("", "empty.csv"); }),
            "empty.csv: empty file (no header row)");
  EXPECT_EQ(ErrorOf([] { CsvReader::FromText("\n \n", "blank.csv"); }),
            "blank.csv: empty file (no header row)");
  EXPECT_EQ(ErrorOf([] { CsvReader::FromText("a,,b\n", "h.csv"); }),
            "h.csv:1: column 2 of the header has no name");
  EXPECT_EQ(ErrorOf([] { CsvReader::FromText("a,\"a\"\n", "h.csv"); }),
            "h.csv:1: duplicated column name a");
  EXPECT_EQ(ErrorOf([] { ReadAllRecords(CsvReader::FromText("a,b\n1,\"2\n3,4\n", "open.csv")); }),
            "open.csv:2: a quoted field is not closed before the end");
  EXPECT_EQ(ErrorOf([] { ReadAllRecords(CsvReader::FromText("a,b\n1,\"2\"x\n", "after.csv")); }),
            "after.csv:2: column 2: text after the closing quote of a quoted field");
  EXPECT_EQ(ErrorOf([] { CsvReader::Open("/nonexistent/x.csv"); }),
            "/nonexistent/x.csv: cannot open for reading");
}

TEST(CsvReaderTest, ByteOrderMarkIsNotPartOfTheFirstName) {
  const CsvReader reader = CsvReader::FromText("\xEF\xBB\xBFtime,x\n1,2\n", "bom.csv");
  EXPECT_EQ(reader.header()[0], "time");
}

// Random fields with the characters that matter to quoting, written as RFC 4180 requires
// (AppendCsvField), read back by us and by Python's csv module: both must give the fields.
TEST(CsvReaderTest, AgreesWithPythonsCsvModule) {
  std::mt19937 random(7);
  const std::string alphabet = "ab ,\"\n\r1.-";
  Records written{{"c1", "c2", "c3"}};
  for (int r = 0; r < 300; ++r) {
    std::vector<std::string> record;
    for (int c = 0; c < 3; ++c) {
      std::string field;
      const int length = static_cast<int>(random() % 7);
      for (int i = 0; i < length; ++i) field += alphabet[random() % alphabet.size()];
      // Blanks at the ends of a field are trimmed by us (common practice) and kept by Python
      // when quoted: AppendCsvField quotes them, so both keep them.
      record.push_back(field);
    }
    written.push_back(record);
  }
  std::string text;
  for (std::size_t r = 0; r < written.size(); ++r) {
    for (std::size_t c = 0; c < written[r].size(); ++c) {
      if (c > 0) text += ',';
      AppendCsvField(&text, written[r][c]);
    }
    text += r % 2 ? "\r\n" : "\n";  // both line ends of RFC 4180 and of common practice
  }
  char path[] = "/tmp/nuwatch_csv_XXXXXX";
  const int fd = ::mkstemp(path);
  ASSERT_GE(fd, 0);
  ::close(fd);
  std::ofstream(path, std::ios::binary) << text;
  const auto python = testing_data::RunCommand(
      std::string(NUWATCH_PYTHON) +
      " -c 'import csv, json, sys; print(json.dumps(list(csv.reader(open(sys.argv[1], "
      "newline=\"\")))))' " +
      path);
  ASSERT_EQ(python.exit_code, 0) << python.output;
  const Records theirs = nlohmann::json::parse(python.output).get<Records>();
  const Records ours = ReadAllRecords(CsvReader::Open(path));
  ::unlink(path);
  EXPECT_EQ(theirs, written);
  EXPECT_EQ(ours, written);
}

TEST(CsvReaderTest, PushModeFedAByteAtATimeReadsTheSameRecords) {
  const std::string text = "t,\"s\"\n1,\"a,\nb\"\n\n2,\"c\"\"\"\n3,d";
  const Records whole = ReadAllRecords(CsvReader::FromText(text, "whole"));
  CsvReader reader("standard input");
  Records pushed;
  std::size_t fed = 0;
  while (true) {
    const CsvReader::Status status = reader.Next();
    if (status == CsvReader::Status::kEnd) break;
    if (status == CsvReader::Status::kRow) {
      if (pushed.empty()) pushed.push_back(reader.header());
      pushed.emplace_back(reader.fields().begin(), reader.fields().end());
      continue;
    }
    if (fed < text.size()) {
      reader.Append(text.substr(fed++, 1));
    } else {
      reader.EndInput();
    }
  }
  EXPECT_EQ(pushed, whole);
  ASSERT_EQ(whole.size(), 4u);
  EXPECT_EQ(whole[3], (std::vector<std::string>{"3", "d"}));
}

TEST(CsvReaderTest, NumbersAreStrict) {
  EXPECT_EQ(*ParseFiniteNumber(" +1.5e3 "), 1500.0);
  EXPECT_EQ(*ParseFiniteNumber("-0.125"), -0.125);
  for (const char* bad : {"", "abc", "1,5", "nan", "inf", "1e999", "0x10", "1.5.2"})
    EXPECT_FALSE(ParseFiniteNumber(bad)) << bad;
}

TEST(CsvTableTest, KeepsTheLineOfEachRow) {
  const CsvTable table = ParseCsv("a\n1\n\n\"2\"\n", "t.csv");
  ASSERT_EQ(table.rows.size(), 2u);
  EXPECT_EQ(table.Where(1), "t.csv:4: ");
}

}  // namespace
}  // namespace nuwatch
