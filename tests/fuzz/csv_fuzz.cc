// Fuzz target for the CSV readers: daemon/formats (ParseCsv over the streaming
// CsvReader, AlarmsFromTable, IncidentsFromTable, the timestamps) and daemon/offline
// (ReadStreamRecording), on the same text. Build and run: DEVELOPERS.md, "Sanitizers and fuzzing";
// seeds in corpus/csv_fuzz/.
//
// Besides the sanitizers' checks it traps when a reader throws anything but CsvError, or when what
// it accepts breaks its contract: alarms or incidents that Evaluate refuses, a recording whose
// parts differ in length or hold a non-finite value, or a time that FormatTimestamp writes and
// ParseTimestamp reads back differently (by more than the millisecond FormatTimestamp keeps).
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <optional>
#include <sstream>
#include <string>
#include <string_view>
#include <vector>

#include "formats/alarm_files.h"
#include "formats/csv_table.h"
#include "formats/timestamps.h"
#include "fuzz_support.h"
#include "nuwatch/evaluation.h"
#include "offline/replay.h"

using nuwatch::fuzz::Require;

namespace {

void RequireTimestampRoundTrip(double t) {
  const std::optional<double> back = nuwatch::ParseTimestamp(nuwatch::FormatTimestamp(t));
  Require(back.has_value());
  Require(std::fabs(*back - t) <= 1e-3 + 1e-12 * std::fabs(t));
}

void CheckTable(const nuwatch::CsvTable& table) {
  for (std::size_t r = 0; r < table.rows.size(); ++r) {
    Require(table.rows[r].size() == table.header.size());
  }
  std::vector<nuwatch::Incident> incidents;
  try {
    incidents = nuwatch::IncidentsFromTable(table);
    for (const nuwatch::Incident& incident : incidents) {
      Require(incident.start_seconds <= incident.end_seconds);
      RequireTimestampRoundTrip(incident.start_seconds);
    }
  } catch (const nuwatch::CsvError&) {
  }
  try {
    const nuwatch::AlarmFile alarms = nuwatch::AlarmsFromTable(table);
    for (const nuwatch::StreamAlarms& stream : alarms.streams) {
      for (double t : stream.times) RequireTimestampRoundTrip(t);
    }
    try {
      (void)nuwatch::Evaluate(alarms.streams, incidents, nuwatch::EvaluationOptions{});
    } catch (const nuwatch::PreconditionError&) {
      Require(false);  // AlarmsFromTable ensures Evaluate's requirements
    }
  } catch (const nuwatch::CsvError&) {
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string text(reinterpret_cast<const char*>(data), size);
  try {
    CheckTable(nuwatch::ParseCsv(text, "fuzz.csv"));
  } catch (const nuwatch::CsvError&) {
  }
  try {
    std::istringstream in(text);
    const nuwatch::StreamRecording recording = nuwatch::ReadStreamRecording(in, "fuzz.csv");
    const auto rows = static_cast<std::size_t>(recording.rows());
    Require(recording.times.size() == rows && recording.time_text.size() == rows &&
            recording.stream_of_row.size() == rows);
    Require(static_cast<std::size_t>(recording.values.cols()) == recording.feature_names.size());
    Require(recording.values.allFinite());
    for (std::size_t i = 0; i < rows; ++i) {
      Require(recording.stream_of_row[i] >= 0 &&
              static_cast<std::size_t>(recording.stream_of_row[i]) < recording.streams.size());
      RequireTimestampRoundTrip(recording.times[i]);
    }
  } catch (const nuwatch::CsvError&) {
  }
  return 0;
}
