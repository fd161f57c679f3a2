// Reading samples out of the Prometheus text exposition format (version 0.0.4, what a /metrics
// endpoint serves with Content-Type text/plain; version=0.0.4): `nuwatch send --metrics` reads
// the daemon's rejection counters with it.
// Thread safety: reentrant.
#pragma once

#include <map>
#include <stdexcept>
#include <string>
#include <string_view>

namespace nuwatch {

class ExpositionError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// The samples of metric `metric` in `exposition`, by the value of their label `label`: a line
//   metric{label="value",other="..."} 12 [timestamp]
// adds 12 under "value" (samples of the same label value, differing in other labels, are
// summed; a sample without `label` counts under ""). Comments (# HELP, # TYPE), blank lines and
// the samples of every other metric, including those whose names merely start alike
// (metric_created), are skipped. Label values are unescaped (\\, \", \n).
// Throws ExpositionError naming the line number for a sample line of `metric` that does not read:
// an unterminated label set or value, an unknown escape, a missing or non-numeric value.
std::map<std::string, double> SamplesByLabel(std::string_view exposition, std::string_view metric,
                                             std::string_view label);

}  // namespace nuwatch
