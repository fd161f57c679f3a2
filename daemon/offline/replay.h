// Replaying a recorded stream file through the detectors, as `nuwatch replay` and `nuwatch tune`
// do: one Detector per stream key, refits inline, so a replay is deterministic.
// Thread safety: ReadStreamRecording and ReplayRecording are reentrant; a StreamRecording may be
// shared read-only by several replays at once (tune runs settings in parallel).
#pragma once

#include <cstdint>
#include <functional>
#include <istream>
#include <string>
#include <vector>

#include "formats/stream_file.h"
#include "nuwatch/detector.h"

namespace nuwatch {

// A stream file: header with a `time` column (ISO-8601 or seconds since the epoch), an optional
// `stream` column, and numeric feature columns.
struct StreamRecording {
  std::string path;
  std::vector<std::string> feature_names;
  std::vector<std::string> streams;    // distinct keys, in order of first appearance
  std::vector<int32_t> stream_of_row;  // index into streams
  std::vector<double> times;           // seconds since the epoch
  PackedStrings time_text;             // as written in the file
  MatrixD values;                      // rows x features
  // "" or a warning: the last line had no line end and did not read (a recording cut by a crash
  // or a full disk), so it was skipped; the message names the file, the line and why.
  std::string cut_last_line;
  int64_t rows() const { return values.rows(); }
};

// Reads the file row by row (CsvReader, StreamFileColumns): memory is that of the values kept, not
// of the text. Throws CsvError naming the file and line: no `time` column, an unreadable time, a
// non-numeric or non-finite value, a ragged row, no feature columns, no data rows. Except: a last
// line without a line end that does not read is skipped and reported in cut_last_line (a row cut
// by a writer that stopped); a last line without a line end that reads is kept, as hand-written
// files often end so.
StreamRecording ReadStreamRecording(const std::string& path);
// The same from an open stream; `path` names it in messages (the fuzz target reads from memory).
StreamRecording ReadStreamRecording(std::istream& in, const std::string& path);

struct ReplayRow {
  double decision = 0;  // NaN unless scored
  double p_value = 0;   // NaN unless scored by a calibrated model
  uint64_t incident = 0;
  uint64_t model_version = 0;
  int32_t support_vectors = 0;
  bool learning = true;  // not scored: learning, or a transform refilling its history
  bool history = false;  // not scored because a transform's history is refilling
  bool anomaly = false;
};

// The options for each stream key (e.g. a config's [detector] with overrides and flags applied).
using StreamOptions = std::function<DetectorOptions(const std::string& stream)>;
// progress(rows_done) is called every few thousand rows (may be empty). warnings, if given,
// receives each distinct refit warning once, as "STREAM: WARNING" (calibration and nu notes,
// detector.h's RefitReport::warnings, and failed refits), in the order they first occurred.
std::vector<ReplayRow> ReplayRecording(const StreamRecording& recording,
                                       const StreamOptions& options_for_stream,
                                       const std::function<void(int64_t)>& progress = {},
                                       std::vector<std::string>* warnings = nullptr);

// The line the tools print when a run flags more than half of the scored vectors, or "" when it
// does not: such a setting is not usable, whatever else it scores.
std::string UnusableSettingNote(int64_t flagged, int64_t scored);

}  // namespace nuwatch
