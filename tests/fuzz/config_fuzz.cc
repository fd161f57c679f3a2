// Fuzz target for the config loader (daemon/settings/config.h): TOML text -> ParseConfig.
// Build and run: DEVELOPERS.md, "Sanitizers and fuzzing"; seeds in corpus/config_fuzz/.
//
// Besides the sanitizers' checks it traps when ParseConfig throws anything but ConfigError, when
// an accepted config breaks ParseConfig's contract (the daemon's and the detector's checks hold
// for [detector] and for every override applied), or when [detector] written back as TOML
// (DescribeDetectorOptions, what `nuwatch tune` writes to best.toml) reads back to other settings.
#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>

#include "fuzz_support.h"
#include "settings/config.h"

using nuwatch::fuzz::Require;

namespace {

// True when `check` throws nothing, false when it throws ConfigError; anything else escapes and
// is a finding (libFuzzer reports an uncaught exception as a crash).
template <typename F>
bool Accepts(F check) {
  try {
    check();
    return true;
  } catch (const nuwatch::ConfigError&) {
    return false;
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  nuwatch::Config config;
  if (!Accepts([&] { config = nuwatch::ParseConfig(text, "fuzz.toml"); })) return 0;

  Require(Accepts([&] { nuwatch::ValidateDaemonSettings(config.daemon, "fuzz.toml"); }));
  Require(Accepts([&] { nuwatch::ValidateDetectorOptions(config.detector, "fuzz.toml"); }));
  for (const auto& stream_override : config.overrides) {
    // The pattern itself is a key the override matches whenever it holds no wildcard.
    const nuwatch::DetectorOptions options =
        nuwatch::DetectorOptionsFor(config, stream_override.match);
    Require(Accepts([&] { nuwatch::ValidateDetectorOptions(options, "fuzz.toml"); }));
  }

  const std::string written = nuwatch::DescribeDetectorOptions(config.detector);
  nuwatch::Config again;
  Require(Accepts([&] { again = nuwatch::ParseConfig(written, "written.toml"); }));
  Require(nuwatch::SameDetectorOptions(again.detector, config.detector));
  return 0;
}
