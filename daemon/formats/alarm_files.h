// Reading the files `nuwatch evaluate` scores into the structs of nuwatch/evaluation.h.
//
// Alarms, in one of two forms, told apart by the header:
// - replay output: columns `time` and `anomaly` (`outlier` in files written before 0.2), plus
//   optionally `stream`, `state`, `incident` and any others, which are ignored. Every row is a
//   sample of its stream. What counts as an alarm is the AlarmSource: kAnomaly, the row is flagged
//   when `anomaly` is 1 (or "true"; 0 or "false" is not flagged), unless its `state` is `learning`
//   or `history` (no score: no alarm, whatever the field says); kIncident, the row is flagged while
//   the detector's debounced incident is open: `incident` holds the open incident's id (empty or
//   0: none). Within a stream, times must not decrease.
// - alarm event list: columns `start` and `end` (plus optionally `stream`), no `anomaly` column.
//   Each row is one alarm event, the closed interval [start, end]; sample times are unknown
//   unless given separately (AttachSampleTimes).
// Incidents: columns `start`, `end` (closed interval), optionally `stream` and `kind`.
// Samples (for an event list): a column `time`, optionally `stream` (a replayed feature file
// will do).
// Times are ISO-8601 or seconds since the epoch (ParseTimestamp). A missing `stream` column or an
// empty stream field means the unnamed stream "". Every error is a CsvError naming the file and,
// where there is one, the 1-based line: "alarms.csv:7: column end: '12:00' is not a timestamp".
// Thread safety: reentrant functions on values.
#pragma once

#include <optional>
#include <string>
#include <vector>

#include "formats/csv_table.h"
#include "nuwatch/evaluation.h"

namespace nuwatch {

enum class AlarmFileForm { kReplay, kEventList };

// What counts as an alarm in replay output: the debounced incident (while it is open: when someone
// is paged) or every flagged sample. `nuwatch tune` and `nuwatch evaluate` both default to
// kIncident, so that they score the same thing.
enum class AlarmSource { kIncident, kAnomaly };
std::string_view AlarmSourceName(AlarmSource source);  // "incident", "anomaly"
// "incident" or "anomaly" ("outlier", the older word, too); nullopt otherwise.
std::optional<AlarmSource> ParseAlarmSource(std::string_view name);

struct AlarmFile {
  std::string path;
  AlarmFileForm form = AlarmFileForm::kReplay;
  // In order of first appearance. Replay form: times and flagged filled. Event list: events filled
  // (events_given), times empty until AttachSampleTimes.
  std::vector<StreamAlarms> streams;
};

// Ensures: on return every stream satisfies the requirements of Evaluate.
AlarmFile AlarmsFromTable(const CsvTable& table, AlarmSource source = AlarmSource::kAnomaly);
AlarmFile ReadAlarmFile(const std::string& path,
                        AlarmSource source = AlarmSource::kAnomaly);  // ReadCsv + AlarmsFromTable

// Ensures: start <= end for every incident; a header-only file gives no incidents.
std::vector<Incident> IncidentsFromTable(const CsvTable& table);
std::vector<Incident> ReadIncidentFile(const std::string& path);

// Gives the streams of an event-list AlarmFile their sample times from `samples`, after which
// every metric is defined. Streams of `samples` with no alarm event are added (with no events).
// Requires: alarms->form == kEventList. Throws CsvError when `samples` lacks a `time` column, has
// a bad or decreasing time within a stream, or has no sample of a stream that has alarm events.
void AttachSampleTimes(const CsvTable& samples, AlarmFile* alarms);

}  // namespace nuwatch
