#include "formats/csv_reader.h"

#include <algorithm>
#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstring>
#include <unordered_set>
#include <utility>

namespace nuwatch {
namespace {

// Bytes asked of the file at a time. A record longer than this grows the buffer to hold it.
constexpr std::size_t kReadChunk = 256 << 10;

bool IsBlank(char c) { return c == ' ' || c == '\t'; }

}  // namespace

std::string_view TrimField(std::string_view s) {
  while (!s.empty() && IsBlank(s.front())) s.remove_prefix(1);
  while (!s.empty() && (IsBlank(s.back()) || s.back() == '\r')) s.remove_suffix(1);
  return s;
}

void AppendCsvField(std::string* out, std::string_view field) {
  const bool quote = field.find_first_of(",\"\r\n") != std::string_view::npos ||
                     (!field.empty() && (IsBlank(field.front()) || IsBlank(field.back())));
  if (!quote) {
    out->append(field);
    return;
  }
  out->push_back('"');
  for (const char c : field) {
    if (c == '"') out->push_back('"');
    out->push_back(c);
  }
  out->push_back('"');
}

std::optional<double> ParseFiniteNumber(std::string_view text) {
  text = TrimField(text);
  if (!text.empty() && text.front() == '+') text.remove_prefix(1);
  if (text.empty()) return std::nullopt;
  double value = 0;
  const char* end = text.data() + text.size();
  const auto [ptr, ec] = std::from_chars(text.data(), end, value);
  if (ec != std::errc() || ptr != end || !std::isfinite(value)) return std::nullopt;
  return value;
}

CsvReader::CsvReader(std::string name) : name_(std::move(name)) {}

CsvReader::~CsvReader() {
  if (file_ != nullptr) std::fclose(file_);
}

CsvReader::CsvReader(CsvReader&& other) noexcept { *this = std::move(other); }

CsvReader& CsvReader::operator=(CsvReader&& other) noexcept {
  if (this == &other) return *this;
  if (file_ != nullptr) std::fclose(file_);
  name_ = std::move(other.name_);
  file_ = std::exchange(other.file_, nullptr);
  end_of_input_ = other.end_of_input_;
  buffer_ = std::move(other.buffer_);
  pos_ = other.pos_;
  next_line_ = other.next_line_;
  at_start_ = other.at_start_;
  has_header_ = other.has_header_;
  header_ = std::move(other.header_);
  fields_.clear();  // views into the other's buffer
  unescaped_.clear();
  line_ = other.line_;
  unterminated_ = other.unterminated_;
  return *this;
}

CsvReader CsvReader::Open(const std::string& path) {
  CsvReader reader(path);
  reader.file_ = std::fopen(path.c_str(), "rb");
  if (reader.file_ == nullptr) throw CsvError(path + ": cannot open for reading");
  reader.ReadHeader();
  return reader;
}

CsvReader CsvReader::FromText(std::string_view text, std::string name) {
  CsvReader reader(std::move(name));
  reader.Append(text);
  reader.EndInput();
  reader.ReadHeader();
  return reader;
}

void CsvReader::Append(std::string_view bytes) {
  if (pos_ > 0 && pos_ >= buffer_.size() / 2) {  // keep the buffer to the unread bytes
    buffer_.erase(0, pos_);
    pos_ = 0;
  }
  buffer_.append(bytes);
}

void CsvReader::EndInput() { end_of_input_ = true; }

bool CsvReader::Refill() {
  if (file_ == nullptr || end_of_input_) return false;
  // Returns true when anything changed: bytes arrived, or the end of the file was reached.
  if (pos_ > 0) {
    buffer_.erase(0, pos_);
    pos_ = 0;
  }
  const std::size_t old_size = buffer_.size();
  buffer_.resize(old_size + kReadChunk);
  const std::size_t n = std::fread(buffer_.data() + old_size, 1, kReadChunk, file_);
  buffer_.resize(old_size + n);
  if (n < kReadChunk) {
    if (std::ferror(file_)) throw CsvError(name_ + ": read error: " + std::strerror(errno));
    end_of_input_ = true;
  }
  return true;
}

void CsvReader::Fail(int line, const std::string& what) const {
  throw CsvError(name_ + ":" + std::to_string(line) + ": " + what);
}

std::string CsvReader::Where() const { return name_ + ":" + std::to_string(line_) + ": "; }

int CsvReader::Column(std::string_view name) const {
  for (std::size_t i = 0; i < header_.size(); ++i)
    if (header_[i] == name) return static_cast<int>(i);
  return -1;
}

int CsvReader::RequireColumn(std::string_view name) const {
  const int column = Column(name);
  if (column < 0) throw CsvError(name_ + ": no column named " + std::string(name));
  return column;
}

// A record on one line without quotes, the common case: split at the commas. `end` is the
// position of its '\n' (or of the end of the buffer for the last line).
bool CsvReader::SplitSimpleLine(std::size_t end) {
  const char* const data = buffer_.data();
  std::size_t start = pos_;
  while (true) {
    const void* comma = std::memchr(data + start, ',', end - start);
    const std::size_t stop = comma ? static_cast<const char*>(comma) - data : end;
    fields_.push_back(TrimField(std::string_view(data + start, stop - start)));
    if (comma == nullptr) break;
    start = stop + 1;
  }
  const bool blank = fields_.size() == 1 && fields_[0].empty();
  line_ = next_line_;
  ++next_line_;
  pos_ = end < buffer_.size() ? end + 1 : end;
  return !blank;
}

// A record with quotes: field by field, possibly over several lines.
CsvReader::Parse CsvReader::SplitQuoted() {
  const char* const data = buffer_.data();
  const std::size_t size = buffer_.size();
  std::size_t p = pos_;
  int lines_inside = 0;  // newlines inside quoted fields
  std::size_t escaped = 0;
  const auto need_more = [&] {  // only while the input may go on
    fields_.clear();
    return Parse::kNeedInput;
  };
  while (true) {
    while (p < size && IsBlank(data[p])) ++p;
    if (p < size && data[p] == '"') {
      const std::size_t open = p;
      bool doubled = false;
      std::size_t q = p + 1;
      std::size_t close = 0;
      while (true) {
        const void* quote = std::memchr(data + q, '"', size - q);
        if (quote == nullptr) {
          if (end_of_input_) {
            unterminated_ = true;
            Fail(next_line_, "a quoted field is not closed before the end");
          }
          return need_more();
        }
        const std::size_t at = static_cast<const char*>(quote) - data;
        if (at + 1 < size && data[at + 1] == '"') {
          doubled = true;
          q = at + 2;
          continue;
        }
        if (at + 1 == size && !end_of_input_) return need_more();
        close = at;
        break;
      }
      const std::string_view inside(data + open + 1, close - open - 1);
      lines_inside += static_cast<int>(std::count(inside.begin(), inside.end(), '\n'));
      if (doubled) {
        if (escaped == unescaped_.size()) unescaped_.emplace_back();
        std::string& text = unescaped_[escaped++];
        text.clear();
        for (std::size_t i = 0; i < inside.size(); ++i) {
          text += inside[i];
          if (inside[i] == '"') ++i;  // the second of a doubled quote
        }
        fields_.push_back(text);
      } else {
        fields_.push_back(inside);
      }
      p = close + 1;
      while (p < size && (IsBlank(data[p]) || data[p] == '\r')) ++p;
      if (p < size && data[p] != ',' && data[p] != '\n') {
        Fail(next_line_ + lines_inside, "column " + std::to_string(fields_.size()) +
                                            ": text after the closing quote of a quoted field");
      }
    } else {
      std::size_t stop = p;
      while (stop < size && data[stop] != ',' && data[stop] != '\n') ++stop;
      fields_.push_back(TrimField(std::string_view(data + p, stop - p)));
      p = stop;
    }
    if (p < size && data[p] == ',') {
      ++p;
      continue;
    }
    if (p < size) {  // '\n'
      ++p;
      break;
    }
    if (!end_of_input_) return need_more();
    unterminated_ = true;
    break;
  }
  line_ = next_line_;
  next_line_ += 1 + lines_inside;
  pos_ = p;
  return Parse::kRecord;
}

CsvReader::Parse CsvReader::ParseRecord() {
  fields_.clear();
  unterminated_ = false;
  while (true) {
    if (at_start_) {
      if (buffer_.size() - pos_ < 3 && !end_of_input_ && Refill()) continue;
      if (buffer_.compare(pos_, 3, "\xEF\xBB\xBF") == 0) pos_ += 3;
      at_start_ = false;
    }
    const char* const data = buffer_.data();
    const std::size_t size = buffer_.size();
    if (pos_ == size) {
      if (Refill()) continue;
      return end_of_input_ ? Parse::kEnd : Parse::kNeedInput;
    }
    const void* newline = std::memchr(data + pos_, '\n', size - pos_);
    const std::size_t end = newline ? static_cast<const char*>(newline) - data : size;
    if (newline == nullptr && !end_of_input_) {
      if (Refill()) continue;  // more bytes, or the end: then the last line has no '\n'
      return Parse::kNeedInput;
    }
    if (std::memchr(data + pos_, '"', end - pos_) == nullptr) {
      unterminated_ = newline == nullptr;
      if (!SplitSimpleLine(end)) {
        fields_.clear();
        unterminated_ = false;
        continue;  // a blank line
      }
      return Parse::kRecord;
    }
    const Parse parse = SplitQuoted();
    if (parse == Parse::kNeedInput && Refill()) continue;
    return parse;
  }
}

void CsvReader::ReadHeader() {
  const Parse parse = ParseRecord();
  if (parse == Parse::kNeedInput) return;  // push mode: later
  if (parse == Parse::kEnd) throw CsvError(name_ + ": empty file (no header row)");
  std::unordered_set<std::string_view> seen;
  for (std::size_t i = 0; i < fields_.size(); ++i) {
    if (fields_[i].empty())
      Fail(line_, "column " + std::to_string(i + 1) + " of the header has no name");
    if (!seen.insert(fields_[i]).second)
      Fail(line_, "duplicated column name " + std::string(fields_[i]));
  }
  header_.assign(fields_.begin(), fields_.end());
  fields_.clear();
  has_header_ = true;
}

CsvReader::Status CsvReader::Next() {
  if (!has_header_) {
    ReadHeader();
    if (!has_header_) return Status::kNeedInput;
  }
  const Parse parse = ParseRecord();
  if (parse == Parse::kNeedInput) return Status::kNeedInput;
  if (parse == Parse::kEnd) return Status::kEnd;
  if (fields_.size() != header_.size()) {
    Fail(line_, std::to_string(fields_.size()) + " fields, the header has " +
                    std::to_string(header_.size()));
  }
  return Status::kRow;
}

}  // namespace nuwatch
