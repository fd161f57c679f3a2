// Command-line flags made from the detector's key table (nuwatch/detector_settings.h): one option
// per key, named as the key with '_' -> '-' (--support-vector-budget for support_vector_budget),
// its help the key's doc line, unit and default. The last of repeated flags wins. `nuwatch fit`,
// `replay` and `tune` use them, so a key added to the table is a flag of each without more code.
#pragma once

#include <CLI/CLI.hpp>
#include <functional>
#include <map>
#include <string>
#include <string_view>

#include "nuwatch/detector_settings.h"
#include "settings/config.h"

namespace nuwatch::cli {

// "--support-vector-budget" for "support_vector_budget".
std::string FlagName(std::string_view key);

// Adds an option that takes one value to `app` with the last-wins policy every nuwatch flag has.
CLI::Option* AddLastWinsOption(CLI::App* app, const std::string& name, std::string& text,
                               const std::string& help);

class DetectorKeyFlags {
 public:
  using Select = std::function<bool(const Setting<DetectorOptions>&)>;

  // Adds the flags of the keys `select` accepts (all by default) to `app`; help shows the
  // defaults of `defaults`. Bool keys are flags that also take a value: --drift-detection,
  // --drift-detection=false. Requires: `app` outlives this object's use.
  void AddTo(CLI::App* app, const DetectorOptions& defaults = {}, const Select& select = {});

  // Whether --KEY was given.
  bool Given(std::string_view key) const;

  // Sets the members of the given flags in `options`. Throws CommandError "--FLAG: REASON" for a
  // value that is not of the key's type (ranges are the table's checks, done on the result).
  void ApplyTo(DetectorOptions& options) const;

  // Throws CommandError for the first rule of the key table `options` breaks, naming a key given
  // on the command line as its flag ("--window = 10") and telling, for a key that was not given,
  // where its value came from (`origin(key)`, e.g. "the built-in default") and which flag sets
  // it: "warmup = 500 must not exceed --window = 10 (warmup = 500 is the built-in default: set
  // it with --warmup)".
  using Origin = std::function<std::string(std::string_view key)>;
  void Validate(const DetectorOptions& options, const Origin& origin) const;

 private:
  struct Flag {
    const Setting<DetectorOptions>* setting;
    CLI::Option* option;
    std::string text;
  };
  std::map<std::string, Flag, std::less<>> flags_;  // by key; nodes keep `text` in place
};

// --config FILE and the detector flags, for the commands that replay a recording (replay, tune).
struct DetectorFlags {
  std::string config_path;
  DetectorKeyFlags keys;

  // Adds --config and the flags of the keys `select` accepts to `sub`.
  void AddTo(CLI::App* sub, const DetectorKeyFlags::Select& select = {});
  // The config (file or defaults) with every given flag applied to [detector] and to every
  // [[stream]] override (a flag beats the file). `validate`: the resulting [detector] must pass
  // the table's checks. Throws CommandError on a bad file or value.
  Config Resolve(bool validate = true) const;
};

}  // namespace nuwatch::cli
