// The JSON form of an evaluation, shared by `nuwatch evaluate --json` and `nuwatch tune`'s
// results.json, so both name and fill the metrics the same way. Undefined figures are null.
// Thread safety: pure functions.
#pragma once

#include <nlohmann/json.hpp>
#include <optional>

#include "nuwatch/evaluation.h"

namespace nuwatch {

nlohmann::json OptionalNumber(const std::optional<double>& value);  // null when undefined
nlohmann::json EvaluationJson(const StreamEvaluation& evaluation);

}  // namespace nuwatch
