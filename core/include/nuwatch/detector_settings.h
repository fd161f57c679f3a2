// The detector's key table: one Setting per member of DetectorOptions (nuwatch/setting.h says what
// an entry holds and what follows from it). The daemon's [detector] section and [[stream]] tables,
// the command-line flags of `nuwatch fit`, `replay` and `tune`, and the detector's own checks all
// read this one table, so there is one set of rules.
// Thread safety: the table is immutable; the functions are reentrant.
#pragma once

#include <optional>
#include <span>
#include <string_view>

#include "nuwatch/detector_options.h"
#include "nuwatch/setting.h"

namespace nuwatch {

// Every detector key, in the order config/nuwatchd.toml lists them.
std::span<const Setting<DetectorOptions>> DetectorKeys();

// The first rule `options` breaks (CheckSettings on DetectorKeys()), keys named by `name`.
std::optional<SettingViolation> FindDetectorViolation(const DetectorOptions& options,
                                                      const SettingNamer& name);

// Throws PreconditionError "WHERE: MESSAGE" naming the key and the value, e.g.
// "Detector: nu = 1.5 is outside (0, 1]", for the first rule `options` breaks.
void CheckDetectorOptions(const DetectorOptions& options, std::string_view where);

}  // namespace nuwatch
