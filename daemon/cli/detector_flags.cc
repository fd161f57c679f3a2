#include "cli/detector_flags.h"

#include <algorithm>

#include "cli/commands.h"
#include "settings/setting_text.h"

namespace nuwatch::cli {

std::string FlagName(std::string_view key) {
  std::string flag = "--" + std::string(key);
  for (char& c : flag) c = c == '_' ? '-' : c;
  return flag;
}

CLI::Option* AddLastWinsOption(CLI::App* app, const std::string& name, std::string& text,
                               const std::string& help) {
  return app->add_option(name, text, help)->multi_option_policy(CLI::MultiOptionPolicy::TakeLast);
}

void DetectorKeyFlags::AddTo(CLI::App* app, const DetectorOptions& defaults, const Select& select) {
  for (const Setting<DetectorOptions>& setting : DetectorKeys()) {
    if (select && !select(setting)) continue;
    Flag& flag = flags_[std::string(setting.name)];
    flag.setting = &setting;
    std::string help = std::string(setting.doc);
    if (!setting.unit.empty()) help += " [" + std::string(setting.unit) + "]";
    const std::string name = FlagName(setting.name);
    if (std::holds_alternative<bool DetectorOptions::*>(setting.member)) {
      // --learn-from-anomalies alone means true; --learn-from-anomalies=false turns it off.
      help += " (default " + SettingText(setting, defaults) + ")";
      flag.option = app->add_flag(name, flag.text, help)
                        ->multi_option_policy(CLI::MultiOptionPolicy::TakeLast)
                        ->type_name("[=true|false]");
    } else {
      flag.option = AddLastWinsOption(app, name, flag.text, help)
                        ->type_name(SettingTypeName(setting))
                        ->default_str(SettingText(setting, defaults));
    }
  }
}

bool DetectorKeyFlags::Given(std::string_view key) const {
  const auto it = flags_.find(key);
  return it != flags_.end() && it->second.option->count() > 0;
}

void DetectorKeyFlags::ApplyTo(DetectorOptions& options) const {
  for (const auto& [key, flag] : flags_) {
    if (flag.option->count() == 0) continue;
    if (auto error = ParseSettingText(*flag.setting, flag.text, options)) {
      throw CommandError(FlagName(key) + ": " + *error);
    }
  }
}

void DetectorKeyFlags::Validate(const DetectorOptions& options, const Origin& origin) const {
  const auto name = [this](std::string_view, std::string_view key) {
    return Given(key) ? FlagName(key) : std::string(key);
  };
  const std::optional<SettingViolation> violation = FindDetectorViolation(options, name);
  if (!violation) return;
  std::string notes;
  for (const std::string& key : violation->keys) {
    if (Given(key)) continue;
    const auto setting =
        std::find_if(DetectorKeys().begin(), DetectorKeys().end(),
                     [&](const Setting<DetectorOptions>& s) { return s.name == key; });
    if (setting == DetectorKeys().end()) continue;
    const bool is_flag = flags_.count(key) > 0;
    notes += std::string(notes.empty() ? "" : "; ") + key + " = " + SettingText(*setting, options) +
             " is " + origin(key) + (is_flag ? ": set it with " + FlagName(key) : "");
  }
  throw CommandError(violation->message + (notes.empty() ? "" : " (" + notes + ")"));
}

void DetectorFlags::AddTo(CLI::App* sub, const DetectorKeyFlags::Select& select) {
  AddLastWinsOption(
      sub, "--config", config_path,
      "TOML config: its [detector] and [[stream]] sections; the flags below beat it (their "
      "defaults are the built-in ones, which the file replaces)")
      ->type_name("FILE");
  keys.AddTo(sub, DetectorOptions{}, select);
}

Config DetectorFlags::Resolve(bool validate) const {
  Config config;
  try {
    config = config_path.empty() ? DefaultConfig() : LoadConfig(config_path);
  } catch (const std::exception& e) {
    throw CommandError(e.what());
  }
  keys.ApplyTo(config.detector);
  if (validate) {
    const std::string origin =
        config_path.empty() ? "the built-in default" : "from " + config_path + " (or its default)";
    keys.Validate(config.detector, [&](std::string_view) { return origin; });
  }
  for (auto& override_table : config.overrides) keys.ApplyTo(override_table.values);
  return config;
}

}  // namespace nuwatch::cli
