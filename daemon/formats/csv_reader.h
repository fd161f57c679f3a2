// The one CSV reader of every nuwatch command: streaming, RFC 4180 quoting, memory bounded by the
// longest record (plus a read buffer), not by the file.
//
// The format (RFC 4180, with the leniencies of common practice noted):
// - Records end at "\n" or "\r\n"; fields are separated by ','. The first record is the header.
// - A field may be quoted: "a,b" is one field a,b; "say ""hi""" is say "hi"; a quoted field may
//   span lines. Blanks (spaces, tabs) around a field, quoted or not, are not part of it (common
//   practice: spreadsheets pad columns). After a closing quote only blanks may follow before the
//   ',' or the end of the record.
// - A quote inside an unquoted field is an ordinary character (as Python's csv module reads it).
// - Blank lines are skipped; a UTF-8 byte order mark at the start is skipped.
// - Every data record has as many fields as the header.
// Errors are CsvError "NAME:LINE: WHAT" with the 1-based line where the record starts, or
// "NAME: WHAT" for the file as a whole.
//
// Two ways in: a file (Open, FromText) pulls its bytes as it goes; push mode (the constructor,
// Append, EndInput) takes bytes as they arrive, e.g. from a pipe, and Next says when it needs more.
// Thread safety: one thread uses a reader at a time.
#pragma once

#include <cstdio>
#include <deque>
#include <memory>
#include <optional>
#include <stdexcept>
#include <string>
#include <string_view>
#include <vector>

namespace nuwatch {

class CsvError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

class CsvReader {
 public:
  enum class Status {
    kRow,        // fields() hold the next data record
    kNeedInput,  // push mode: no complete record is buffered; Append more (or EndInput)
    kEnd,        // no more records
  };

  // Reads the file at `path` and its header. Throws CsvError "PATH: cannot open for reading", and
  // the header errors of Next.
  static CsvReader Open(const std::string& path);
  // Reads `text` (named `name` in messages) and its header, as Open does.
  static CsvReader FromText(std::string_view text, std::string name);

  // Push mode: no bytes yet; `name` names the input in messages ("standard input").
  explicit CsvReader(std::string name);
  ~CsvReader();
  CsvReader(CsvReader&&) noexcept;
  CsvReader& operator=(CsvReader&&) noexcept;

  // Push mode: more bytes of the input / the end of the input.
  void Append(std::string_view bytes);
  void EndInput();

  // The next data record; the first call in push mode reads the header first. Throws CsvError for
  // an empty input ("NAME: empty file (no header row)"), a header name that is empty or repeated,
  // a record with another number of fields than the header ("NAME:LINE: 3 fields, the header has
  // 4"), a quoted field that is not closed, text after a closing quote, and a read error.
  Status Next();

  bool has_header() const { return has_header_; }
  const std::vector<std::string>& header() const { return header_; }
  // Index of the column named `name`, or -1. RequireColumn throws "NAME: no column named X".
  int Column(std::string_view name) const;
  int RequireColumn(std::string_view name) const;

  // The current record's fields, unquoted and trimmed. Valid until the next Next or Append.
  std::size_t size() const { return fields_.size(); }
  std::string_view operator[](std::size_t i) const { return fields_[i]; }
  const std::vector<std::string_view>& fields() const { return fields_; }
  // Whether the current record (or the one Next just refused) ends at the end of the input
  // without a line end: the sign of a file cut mid-record (a writer stopped by a crash or a full
  // disk), which a caller may skip rather than refuse the whole file.
  bool record_is_unterminated() const { return unterminated_; }
  // 1-based line where the current record starts, and "NAME:LINE: " for messages about it.
  int line() const { return line_; }
  std::string Where() const;
  const std::string& name() const { return name_; }

 private:
  enum class Parse { kRecord, kNeedInput, kEnd };

  Parse ParseRecord();
  bool SplitSimpleLine(std::size_t end);
  Parse SplitQuoted();
  void ReadHeader();
  bool Refill();  // file mode: reads more; false when nothing more can come
  [[noreturn]] void Fail(int line, const std::string& what) const;

  std::string name_;
  std::FILE* file_ = nullptr;  // file mode; null in push mode and for FromText
  bool end_of_input_ = false;
  std::string buffer_;
  std::size_t pos_ = 0;   // start of the unread bytes in buffer_
  int next_line_ = 1;     // line number of buffer_[pos_]
  bool at_start_ = true;  // nothing read yet (for the byte order mark)
  bool has_header_ = false;
  std::vector<std::string> header_;
  std::vector<std::string_view> fields_;
  std::deque<std::string> unescaped_;  // fields with doubled quotes; a deque keeps them in place
  int line_ = 0;
  bool unterminated_ = false;
};

// Appends `field` to `out` as one CSV field: as it is, or quoted (with its quotes doubled) when it
// holds a comma, a quote, a line break or blanks at either end, so that CsvReader reads it back
// unchanged (RFC 4180).
void AppendCsvField(std::string* out, std::string_view field);

// The field without surrounding blanks, tabs and a trailing '\r'.
std::string_view TrimField(std::string_view field);

// A strict finite number (std::from_chars, an optional leading '+', blanks around ignored);
// nullopt for text, empty, NaN, Inf.
std::optional<double> ParseFiniteNumber(std::string_view text);

}  // namespace nuwatch
