// Writes the binary seeds of the model and state fuzz targets from the current encoders:
//
//   make_seeds DIR     # writes DIR/model_fuzz/*.bin and DIR/state_fuzz/*.bin
//
// The binary formats change (a new field is a new format version), so their seeds are made, not
// kept by hand: regenerate the committed ones after a format change with
//   build/tests/fuzz/make_seeds tests/fuzz/corpus
// The ctest fuzz_make_seeds writes them into the build directory too, and the corpus tests of
// model_fuzz and state_fuzz run over both, so the current encoders' output is always checked.
//
// Valid files (small models of each kind, streams learning and scoring, with and without an open
// incident and a transform) and nearly valid ones (truncated, a newer version, one flipped payload
// byte with the checksum left wrong), all deterministic (seeded data, no clock).
#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <random>
#include <string>
#include <vector>

#include "nuwatch/detector.h"
#include "nuwatch/model_file.h"
#include "service/state_store.h"

namespace {

namespace fs = std::filesystem;
using Bytes = std::vector<uint8_t>;

void Write(const fs::path& path, const Bytes& bytes) {
  std::ofstream out(path, std::ios::binary | std::ios::trunc);
  out.write(reinterpret_cast<const char*>(bytes.data()),
            static_cast<std::streamsize>(bytes.size()));
  if (!out) throw std::runtime_error("make_seeds: cannot write " + path.string());
}

// The file and its nearly valid variants.
void WriteWithVariants(const fs::path& dir, const std::string& name, const Bytes& bytes) {
  Write(dir / (name + ".bin"), bytes);
  Write(dir / (name + "-truncated.bin"), Bytes(bytes.begin(), bytes.end() - 5));
  Bytes newer = bytes;
  newer[4] += 1;  // the u32 format version after the 4-byte magic
  Write(dir / (name + "-newer-version.bin"), newer);
  Bytes flipped = bytes;
  flipped[bytes.size() / 2] ^= 0x10;  // inside the payload; the checksum no longer matches
  Write(dir / (name + "-bad-checksum.bin"), flipped);
}

// A detector that has seen `vectors` seeded vectors of `dims` features (a slow daily-like cycle
// plus noise), with a burst of outliers near the end so that an incident is open.
std::unique_ptr<nuwatch::Detector> Feed(const nuwatch::DetectorOptions& options, int dims,
                                        int vectors, bool end_in_incident) {
  auto detector = std::make_unique<nuwatch::Detector>(options, dims);
  std::mt19937_64 generator(7);
  std::normal_distribution<double> noise(0.0, 0.1);
  std::vector<double> x(static_cast<std::size_t>(dims));
  for (int i = 0; i < vectors; ++i) {
    const bool outlier = end_in_incident && i >= vectors - 6;
    for (int j = 0; j < dims; ++j) {
      x[static_cast<std::size_t>(j)] =
          std::sin(0.1 * i + j) + noise(generator) + (outlier ? 25.0 : 0.0);
    }
    detector->Observe(1767225600.0 + 10.0 * i, x);
  }
  return detector;
}

nuwatch::DetectorOptions SmallOptions() {
  nuwatch::DetectorOptions options;
  options.window = 60;
  options.warmup = 40;
  options.refit_every = 20;
  options.support_vector_budget = 12;
  options.calibration_folds = 0;
  return options;
}

}  // namespace

int main(int argc, char** argv) {
  if (argc != 2) {
    std::fprintf(stderr, "usage: %s DIR (writes DIR/model_fuzz and DIR/state_fuzz)\n", argv[0]);
    return 2;
  }
  const fs::path root = argv[1];
  const fs::path model_dir = root / "model_fuzz";
  const fs::path state_dir = root / "state_fuzz";
  fs::create_directories(model_dir);
  fs::create_directories(state_dir);

  struct Case {
    std::string name;
    nuwatch::DetectorOptions options;
    int dims;
    int vectors;
    bool incident;
  };
  std::vector<Case> cases;
  cases.push_back({"rbf", SmallOptions(), 3, 80, false});
  nuwatch::DetectorOptions calibrated = SmallOptions();
  calibrated.window = 120;
  calibrated.warmup = 120;
  calibrated.calibration_folds = 2;
  cases.push_back({"rbf-calibrated", calibrated, 2, 130, true});
  nuwatch::DetectorOptions min_volume = calibrated;  // the width's table (model format 3)
  min_volume.gamma.mode = nuwatch::GammaSpec::Mode::kMinVolume;
  cases.push_back({"rbf-min-volume", min_volume, 2, 130, false});
  nuwatch::DetectorOptions linear = SmallOptions();
  linear.kernel = nuwatch::KernelType::kLinear;
  linear.scaler = nuwatch::ScalerType::kRobust;
  cases.push_back({"linear-robust", linear, 4, 70, false});
  nuwatch::DetectorOptions poly = SmallOptions();
  poly.kernel = nuwatch::KernelType::kPolynomial;
  poly.scaler = nuwatch::ScalerType::kStandard;
  cases.push_back({"polynomial", poly, 2, 70, false});
  nuwatch::DetectorOptions transformed = SmallOptions();
  transformed.lags = 1;
  transformed.rolling_windows = {4};
  cases.push_back({"transform", transformed, 2, 90, true});

  int written = 0;
  for (const Case& c : cases) {
    const auto detector = Feed(c.options, c.dims, c.vectors, c.incident);
    const auto model = detector->model();
    if (!model) throw std::runtime_error("make_seeds: " + c.name + " has no model");
    WriteWithVariants(model_dir, c.name, nuwatch::EncodeModel(*model));
    written += 4;
    try {
      WriteWithVariants(
          state_dir, c.name,
          nuwatch::EncodeStreamState("pump-01/" + c.name, c.dims, detector->ExportState()));
      written += 4;
    } catch (const nuwatch::StateFileError& e) {
      // A format that cannot hold this case yet (state format 1 has no transform history):
      // regenerating after the format learns it adds the seed.
      std::printf("make_seeds: no state seed %s: %s\n", c.name.c_str(), e.what());
    }
  }
  // A stream still learning: no model, a partly filled window.
  const auto learning = Feed(SmallOptions(), 3, 10, false);
  WriteWithVariants(state_dir, "learning",
                    nuwatch::EncodeStreamState("pump-02", 3, learning->ExportState()));
  written += 4;
  std::printf("make_seeds: wrote %d files below %s\n", written, root.c_str());
  return 0;
}
