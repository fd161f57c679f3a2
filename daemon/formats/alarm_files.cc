// Reading alarm, incident and sample files for `nuwatch evaluate`; formats in alarm_files.h.
#include "formats/alarm_files.h"

#include <map>

#include "formats/timestamps.h"

namespace nuwatch {
namespace {

double TimeField(const CsvTable& table, std::size_t row, int column) {
  const std::string& text = table.rows[row][column];
  const std::optional<double> seconds = ParseTimestamp(text);
  if (!seconds) {
    throw CsvError(table.Where(row) + "column " + table.header[column] + ": '" + text +
                   "' is not a timestamp (ISO-8601 or seconds since the epoch)");
  }
  return *seconds;
}

std::string StreamField(const CsvTable& table, std::size_t row, int column) {
  return column < 0 ? std::string() : table.rows[row][column];
}

std::string Quote(const std::string& stream) { return "'" + stream + "'"; }

// Streams in order of first appearance, with the line of each stream's last time for messages.
class StreamIndex {
 public:
  explicit StreamIndex(std::vector<StreamAlarms>* streams) : streams_(streams) {
    for (std::size_t k = 0; k < streams->size(); ++k) index_[(*streams)[k].stream] = k;
  }
  StreamAlarms& Get(const std::string& name) {
    auto [it, added] = index_.emplace(name, streams_->size());
    if (added) {
      streams_->emplace_back();
      streams_->back().stream = name;
    }
    return (*streams_)[it->second];
  }
  bool Contains(const std::string& name) const { return index_.count(name) > 0; }

  // Appends `time` to the stream's samples; throws when it is before the previous one.
  void AddTime(const CsvTable& table, std::size_t row, const std::string& name, double time) {
    StreamAlarms& stream = Get(name);
    if (!stream.times.empty() && time < stream.times.back()) {
      throw CsvError(table.Where(row) + "time " + table.rows[row][table.Column("time")] +
                     " is before the previous sample of stream " + Quote(name) + " (line " +
                     std::to_string(last_line_[name]) + "); samples must be in time order");
    }
    stream.times.push_back(time);
    last_line_[name] = table.line_numbers[row];
  }

 private:
  std::vector<StreamAlarms>* streams_;
  std::map<std::string, std::size_t> index_;
  std::map<std::string, int> last_line_;
};

// The column of the per-sample flag: `anomaly`, or `outlier` in older replay output.
int AnomalyColumn(const CsvTable& table) {
  const int column = table.Column("anomaly");
  return column >= 0 ? column : table.Column("outlier");
}

bool AnomalyFlag(const CsvTable& table, std::size_t row, int column) {
  const std::string& text = table.rows[row][column];
  if (text == "1" || text == "true") return true;
  if (text == "0" || text == "false") return false;
  throw CsvError(table.Where(row) + "column " + table.header[column] + ": '" + text +
                 "' is not 0 or 1");
}

bool IncidentOpen(const CsvTable& table, std::size_t row, int column) {
  const std::string_view text = TrimField(table.rows[row][column]);
  if (text.empty() || text == "0") return false;
  for (const char c : text) {
    if (c < '0' || c > '9') {
      throw CsvError(table.Where(row) + "column incident: '" + std::string(text) +
                     "' is not an incident id");
    }
  }
  return true;
}

AlarmFile ReplayFromTable(const CsvTable& table, AlarmSource source) {
  AlarmFile file;
  file.path = table.path;
  file.form = AlarmFileForm::kReplay;
  const int time_column = table.RequireColumn("time");
  const int flag_column =
      source == AlarmSource::kIncident ? table.RequireColumn("incident") : AnomalyColumn(table);
  const int stream_column = table.Column("stream");
  const int state_column = table.Column("state");
  StreamIndex index(&file.streams);
  for (std::size_t row = 0; row < table.rows.size(); ++row) {
    const std::string stream = StreamField(table, row, stream_column);
    const double time = TimeField(table, row, time_column);
    const bool unscored = state_column >= 0 && table.rows[row][state_column] != "scoring";
    const bool flagged = source == AlarmSource::kIncident
                             ? IncidentOpen(table, row, flag_column)
                             : !unscored && AnomalyFlag(table, row, flag_column);
    index.AddTime(table, row, stream, time);
    index.Get(stream).flagged.push_back(flagged);
  }
  return file;
}

AlarmFile EventListFromTable(const CsvTable& table) {
  AlarmFile file;
  file.path = table.path;
  file.form = AlarmFileForm::kEventList;
  const int start_column = table.RequireColumn("start");
  const int end_column = table.RequireColumn("end");
  const int stream_column = table.Column("stream");
  StreamIndex index(&file.streams);
  for (std::size_t row = 0; row < table.rows.size(); ++row) {
    const double start = TimeField(table, row, start_column);
    const double end = TimeField(table, row, end_column);
    if (end < start) {
      throw CsvError(table.Where(row) + "end " + table.rows[row][end_column] + " is before start " +
                     table.rows[row][start_column]);
    }
    StreamAlarms& stream = index.Get(StreamField(table, row, stream_column));
    stream.events_given = true;
    stream.events.push_back({start, end});
  }
  return file;
}

}  // namespace

std::string_view AlarmSourceName(AlarmSource source) {
  return source == AlarmSource::kIncident ? "incident" : "anomaly";
}

std::optional<AlarmSource> ParseAlarmSource(std::string_view name) {
  if (name == "incident") return AlarmSource::kIncident;
  if (name == "anomaly" || name == "outlier") return AlarmSource::kAnomaly;
  return std::nullopt;
}

AlarmFile AlarmsFromTable(const CsvTable& table, AlarmSource source) {
  if (AnomalyColumn(table) >= 0) return ReplayFromTable(table, source);
  if (table.Column("start") >= 0 && table.Column("end") >= 0) return EventListFromTable(table);
  throw CsvError(table.path +
                 ": neither replay output (columns time, anomaly) nor an alarm event list "
                 "(columns start, end)");
}

AlarmFile ReadAlarmFile(const std::string& path, AlarmSource source) {
  return AlarmsFromTable(ReadCsv(path), source);
}

std::vector<Incident> IncidentsFromTable(const CsvTable& table) {
  const int start_column = table.RequireColumn("start");
  const int end_column = table.RequireColumn("end");
  const int stream_column = table.Column("stream");
  const int kind_column = table.Column("kind");
  std::vector<Incident> incidents;
  for (std::size_t row = 0; row < table.rows.size(); ++row) {
    Incident incident;
    incident.stream = StreamField(table, row, stream_column);
    incident.start_seconds = TimeField(table, row, start_column);
    incident.end_seconds = TimeField(table, row, end_column);
    if (kind_column >= 0) incident.kind = table.rows[row][kind_column];
    if (incident.end_seconds < incident.start_seconds) {
      throw CsvError(table.Where(row) + "end " + table.rows[row][end_column] + " is before start " +
                     table.rows[row][start_column]);
    }
    incidents.push_back(std::move(incident));
  }
  return incidents;
}

std::vector<Incident> ReadIncidentFile(const std::string& path) {
  return IncidentsFromTable(ReadCsv(path));
}

void AttachSampleTimes(const CsvTable& samples, AlarmFile* alarms) {
  if (alarms->form != AlarmFileForm::kEventList) {
    throw CsvError(samples.path + ": sample times apply to an alarm event list only; " +
                   alarms->path + " is replay output, whose rows are the samples");
  }
  const int time_column = samples.RequireColumn("time");
  const int stream_column = samples.Column("stream");
  for (StreamAlarms& stream : alarms->streams) stream.times.clear();
  StreamIndex index(&alarms->streams);
  for (std::size_t row = 0; row < samples.rows.size(); ++row) {
    const std::string stream = StreamField(samples, row, stream_column);
    const double time = TimeField(samples, row, time_column);
    index.AddTime(samples, row, stream, time);
    index.Get(stream).events_given = true;
  }
  for (const StreamAlarms& stream : alarms->streams) {
    if (stream.times.empty()) {
      throw CsvError(samples.path + ": no samples of stream " + Quote(stream.stream) +
                     ", which has alarm events in " + alarms->path);
    }
  }
}

}  // namespace nuwatch
