// The model file: exact round trips, rejection of every truncation and every single-byte
// corruption, crafted payloads with a valid checksum, the CRC-32 check value, and atomic writes.
#include "nuwatch/model_file.h"

#include <gmock/gmock.h>
#include <gtest/gtest.h>
#include <unistd.h>

#include <algorithm>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <limits>
#include <random>
#include <string>
#include <vector>

#include "common/random_data.h"
#include "crc32.h"
#include "nuwatch/checked_file.h"
#include "nuwatch/detector.h"

namespace nuwatch {
namespace {

using ::testing::HasSubstr;
using ::testing::Not;
namespace fs = std::filesystem;

using testing_data::RandomGaussian;

std::vector<double> Row(const MatrixD& x, int64_t i) {
  return std::vector<double>(x.row(i).data(), x.row(i).data() + x.cols());
}

Model FittedModel(KernelType kernel, ScalerType scaler, int64_t rows, int64_t dims, double nu,
                  std::vector<std::string> names, uint64_t seed) {
  FitOptions o;
  o.kernel = kernel;
  o.scaler = scaler;
  o.nu = nu;
  o.degree = 2;
  o.coef0 = 0.5;
  MatrixD x = RandomGaussian(rows, dims, seed);
  x.col(0).array() += 100.0;  // a location the scaler must carry
  return FitModel(x, o, std::move(names));
}

// A small model, so that every prefix and every byte can be tried.
Model SmallModel() {
  return FittedModel(KernelType::kRbf, ScalerType::kStandard, 25, 2, 0.2, {"temp", "rpm"}, 1);
}

// Every field bit for bit: doubles compared by their bytes, so that -0.0 and NaN payloads would
// not slip through an == comparison.
template <typename T>
bool SameBytes(const T& a, const T& b) {
  return std::memcmp(&a, &b, sizeof(T)) == 0;
}

bool SameDoubles(const double* a, const double* b, std::size_t n) {
  // memcmp's pointers must not be null even for n == 0 (an empty Eigen vector's data() is null).
  return n == 0 || std::memcmp(a, b, n * sizeof(double)) == 0;
}

void ExpectIdenticalParts(const ModelParts& a, const ModelParts& b) {
  EXPECT_EQ(a.kernel.type, b.kernel.type);
  EXPECT_TRUE(SameBytes(a.kernel.gamma, b.kernel.gamma));
  EXPECT_EQ(a.kernel.degree, b.kernel.degree);
  EXPECT_TRUE(SameBytes(a.kernel.coef0, b.kernel.coef0));
  EXPECT_EQ(a.gamma_spec.mode, b.gamma_spec.mode);
  EXPECT_TRUE(SameBytes(a.gamma_spec.value, b.gamma_spec.value));
  EXPECT_EQ(a.scaler.type(), b.scaler.type());
  ASSERT_EQ(a.scaler.dims(), b.scaler.dims());
  EXPECT_TRUE(SameDoubles(a.scaler.center().data(), b.scaler.center().data(), a.scaler.dims()));
  EXPECT_TRUE(SameDoubles(a.scaler.scale().data(), b.scaler.scale().data(), a.scaler.dims()));
  EXPECT_TRUE(SameBytes(a.nu, b.nu));
  ASSERT_EQ(a.support_vectors.rows(), b.support_vectors.rows());
  ASSERT_EQ(a.support_vectors.cols(), b.support_vectors.cols());
  EXPECT_TRUE(
      SameDoubles(a.support_vectors.data(), b.support_vectors.data(), a.support_vectors.size()));
  ASSERT_EQ(a.coefficients.size(), b.coefficients.size());
  EXPECT_TRUE(SameDoubles(a.coefficients.data(), b.coefficients.data(), a.coefficients.size()));
  EXPECT_TRUE(SameBytes(a.rho, b.rho));
  EXPECT_EQ(a.training.n_train, b.training.n_train);
  EXPECT_EQ(a.training.n_support, b.training.n_support);
  EXPECT_EQ(a.training.n_bounded, b.training.n_bounded);
  EXPECT_EQ(a.training.iterations, b.training.iterations);
  EXPECT_EQ(a.training.converged, b.training.converged);
  EXPECT_TRUE(SameBytes(a.training.objective, b.training.objective));
  EXPECT_TRUE(SameBytes(a.training.seconds, b.training.seconds));
  EXPECT_EQ(a.compression.support_vectors_before, b.compression.support_vectors_before);
  EXPECT_EQ(a.compression.support_vectors_after, b.compression.support_vectors_after);
  EXPECT_TRUE(SameBytes(a.compression.weight_degradation, b.compression.weight_degradation));
  EXPECT_TRUE(SameBytes(a.compression.rho_before, b.compression.rho_before));
  EXPECT_TRUE(SameBytes(a.compression.seconds, b.compression.seconds));
  EXPECT_EQ(a.version, b.version);
  EXPECT_EQ(a.feature_names, b.feature_names);
  ASSERT_EQ(a.scaler.whitening().size(), b.scaler.whitening().size());
  EXPECT_TRUE(SameDoubles(a.scaler.whitening().data(), b.scaler.whitening().data(),
                          a.scaler.whitening().size()));
  EXPECT_TRUE(a.transform == b.transform);
  ASSERT_EQ(a.calibration.valid(), b.calibration.valid());
  if (a.calibration.valid()) {
    const Calibration::Parts &ca = a.calibration.parts(), &cb = b.calibration.parts();
    EXPECT_EQ(ca.sorted_scores, cb.sorted_scores);
    EXPECT_EQ(ca.has_tail, cb.has_tail);
    EXPECT_TRUE(SameBytes(ca.tail_threshold, cb.tail_threshold));
    EXPECT_TRUE(SameBytes(ca.junction_score, cb.junction_score));
    EXPECT_TRUE(SameBytes(ca.junction_p, cb.junction_p));
    EXPECT_TRUE(SameBytes(ca.tail.shape, cb.tail.shape));
    EXPECT_TRUE(SameBytes(ca.tail.scale, cb.tail.scale));
    EXPECT_TRUE(SameBytes(ca.summary.level, cb.summary.level));
    EXPECT_TRUE(SameBytes(ca.summary.incidents_per_day, cb.summary.incidents_per_day));
    EXPECT_EQ(ca.summary.reference_opened, cb.summary.reference_opened);
    EXPECT_EQ(ca.summary.warnings, cb.summary.warnings);
  }
  ASSERT_EQ(a.gamma_candidates.size(), b.gamma_candidates.size());
  for (std::size_t i = 0; i < a.gamma_candidates.size(); ++i) {
    EXPECT_TRUE(SameBytes(a.gamma_candidates[i].gamma, b.gamma_candidates[i].gamma));
    EXPECT_TRUE(SameBytes(a.gamma_candidates[i].log_volume, b.gamma_candidates[i].log_volume));
    EXPECT_TRUE(
        SameBytes(a.gamma_candidates[i].standard_error, b.gamma_candidates[i].standard_error));
    EXPECT_TRUE(SameBytes(a.gamma_candidates[i].effective_samples,
                          b.gamma_candidates[i].effective_samples));
  }
}

void ExpectIdenticalDecisions(const Model& a, const Model& b) {
  const MatrixD probes = RandomGaussian(40, a.dims(), 99) * 2.0;
  const VectorD batch_a = a.DecisionBatch(probes), batch_b = b.DecisionBatch(probes);
  for (int64_t i = 0; i < probes.rows(); ++i) {
    const std::vector<double> x = Row(probes, i);
    EXPECT_EQ(a.Decision(x), b.Decision(x)) << "row " << i;
    EXPECT_EQ(a.DecisionExact(x), b.DecisionExact(x)) << "row " << i;
    EXPECT_EQ(batch_a[i], batch_b[i]) << "row " << i;
  }
}

// A scratch directory per test, removed afterwards.
class TempDir {
 public:
  TempDir() {
    const auto* info = ::testing::UnitTest::GetInstance()->current_test_info();
    path_ = fs::temp_directory_path() / ("nuwatch_model_file_" + std::to_string(::getpid()) + "_" +
                                         info->test_suite_name() + "_" + info->name());
    fs::remove_all(path_);
    fs::create_directories(path_);
  }
  ~TempDir() {
    std::error_code ignored;
    fs::remove_all(path_, ignored);
  }
  std::string File(const std::string& name) const { return (path_ / name).string(); }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

std::vector<uint8_t> ReadAll(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  return std::vector<uint8_t>((std::istreambuf_iterator<char>(in)),
                              std::istreambuf_iterator<char>());
}

std::vector<std::string> Listing(const fs::path& dir) {
  std::vector<std::string> names;
  for (const auto& entry : fs::directory_iterator(dir)) names.push_back(entry.path().filename());
  std::sort(names.begin(), names.end());
  return names;
}

// ---------------------------------------------------------------------------------------------
// Round trips.

TEST(ModelFileRoundTrip, EncodeDecodeIsExactForEveryKernelAndScaler) {
  const struct {
    KernelType kernel;
    ScalerType scaler;
  } cases[] = {{KernelType::kRbf, ScalerType::kStandard},
               {KernelType::kLinear, ScalerType::kNone},
               {KernelType::kPolynomial, ScalerType::kRobust}};
  for (const auto& c : cases) {
    const Model model = FittedModel(c.kernel, c.scaler, 120, 3, 0.15, {"a", "bb", ""}, 2);
    const std::vector<uint8_t> bytes = EncodeModel(model);
    const Model decoded = DecodeModel(bytes.data(), bytes.size());
    ExpectIdenticalParts(model.parts(), decoded.parts());
    ExpectIdenticalDecisions(model, decoded);
    // Encoding is a function of the parts: re-encoding gives the same bytes.
    EXPECT_EQ(EncodeModel(decoded), bytes);
  }
}

// Version 2's fields: a whitened, calibrated model of lagged and rolling features, as FitWindow
// (the detector's refit) builds it, survives the file bit for bit, and its p-values with it.
TEST(ModelFileRoundTrip, WhitenedCalibratedTransformedModelIsExact) {
  DetectorOptions o;
  o.scaler = ScalerType::kWhiten;
  o.lags = 1;
  o.rolling_windows = {4};
  o.rolling_statistics = {"mean", "slope"};
  o.max_gap_seconds = 30;
  o.false_alarm_rate = 0.001;  // below 1/(n + 1): the tail model is used
  o.false_incidents_per_day = 2;
  o.feature_names = {"temp", "rpm"};
  const MatrixD raw = RandomGaussian(600, 2, 7);
  std::vector<double> times(raw.rows());
  for (std::size_t i = 0; i < times.size(); ++i) times[i] = 10.0 * static_cast<double>(i);
  std::vector<int64_t> rows_of;
  const FeatureTransform transform(TransformOptions(o), 2);
  const MatrixD z = transform.TransformAll(raw, times, &rows_of);
  std::vector<uint64_t> ids(z.rows());
  std::vector<double> z_times;
  for (std::size_t i = 0; i < rows_of.size(); ++i)
    if (rows_of[i] >= 0) z_times.push_back(times[i]);
  for (std::size_t i = 0; i < ids.size(); ++i) ids[i] = i + 1;
  const WindowFitResult fit = FitWindow(z, ids, z_times, o, nullptr, 4);
  const Model& model = *fit.model;
  ASSERT_TRUE(model.calibrated());
  ASSERT_TRUE(model.parts().calibration.parts().has_tail);
  EXPECT_EQ(model.input_dims(), 2);
  EXPECT_EQ(model.dims(), 2 * (1 + 1 + 2));
  EXPECT_EQ(model.parts().feature_names[4], "temp, mean of 4");
  const std::vector<uint8_t> bytes = EncodeModel(model);
  const Model decoded = DecodeModel(bytes.data(), bytes.size());
  ExpectIdenticalParts(model.parts(), decoded.parts());
  ExpectIdenticalDecisions(model, decoded);
  EXPECT_EQ(EncodeModel(decoded), bytes);
  for (int64_t i = 0; i < 20; ++i) {
    const std::vector<double> x(z.row(i).data(), z.row(i).data() + z.cols());
    EXPECT_EQ(model.PValue(model.Evaluate(x)), decoded.PValue(decoded.Evaluate(x)));
  }
}

TEST(ModelFileRoundTrip, AllStatisticsVersionAndNoNamesSurvive) {
  ModelParts p = FittedModel(KernelType::kRbf, ScalerType::kStandard, 60, 2, 0.3, {}, 3).parts();
  p.compression.support_vectors_before = 123;
  p.compression.support_vectors_after = 45;
  p.compression.weight_degradation = 0.0123;
  p.compression.rho_before = -7.5e-3;
  p.compression.seconds = 1.25;
  p.training.converged = false;
  p.version = 0xFFFFFFFFFFFFull;
  p.gamma_spec = *GammaSpec::Parse("0.3333");
  const Model model(p);
  const std::vector<uint8_t> bytes = EncodeModel(model);
  const Model decoded = DecodeModel(bytes.data(), bytes.size());
  ExpectIdenticalParts(model.parts(), decoded.parts());
  EXPECT_TRUE(decoded.parts().feature_names.empty());
}

TEST(ModelFileRoundTrip, MinVolumeWidthAndItsTableSurvive) {
  ModelParts p = FittedModel(KernelType::kRbf, ScalerType::kWhiten, 60, 2, 0.3, {}, 3).parts();
  p.gamma_spec = *GammaSpec::Parse("min_volume");
  const double inf = std::numeric_limits<double>::infinity();
  p.gamma_candidates = {{0.1, 3.25, 0.02, 812.5}, {0.2, 2.75, 0.03, 640}, {0.4, inf, 0, 0}};
  const Model model(p);
  const std::vector<uint8_t> bytes = EncodeModel(model);
  const Model decoded = DecodeModel(bytes.data(), bytes.size());
  EXPECT_EQ(decoded.parts().gamma_spec.ToString(), "min_volume");
  ExpectIdenticalParts(model.parts(), decoded.parts());
  EXPECT_EQ(EncodeModel(decoded), bytes);
}

TEST(ModelFileCompatibility, VersionTwoFilesStillReadAndCannotClaimMinVolume) {
  // A version 2 payload is a version 3 payload without the trailing candidate count.
  static constexpr char kModelMagic[4] = {'N', 'U', 'W', 'M'};
  ModelParts p = FittedModel(KernelType::kRbf, ScalerType::kStandard, 60, 2, 0.3, {}, 3).parts();
  const std::vector<uint8_t> v3 = EncodeModel(Model(p));
  constexpr std::size_t kHeader = 4 + 4 + 8, kTrailer = 4;
  std::vector<uint8_t> payload(v3.begin() + kHeader, v3.end() - kTrailer - 4);
  const std::vector<uint8_t> v2 = WrapChecksummed(kModelMagic, 2, payload);
  const Model old = DecodeModel(v2.data(), v2.size());
  ExpectIdenticalParts(p, old.parts());
  // Gamma mode 3 did not exist in version 2: such a file is corrupt, not a min_volume model.
  payload[1 + 8 + 4 + 8] = 3;  // kernel type, gamma, degree, coef0, then the gamma mode
  const std::vector<uint8_t> forged = WrapChecksummed(kModelMagic, 2, payload);
  EXPECT_THAT([&] { DecodeModel(forged.data(), forged.size()); },
              ::testing::ThrowsMessage<ModelFileError>(HasSubstr("unknown gamma mode 3")));
}

TEST(ModelFileRoundTrip, SaveLoadIsExact) {
  TempDir dir;
  const Model model = SmallModel();
  const std::string path = dir.File("model.nuwm");
  SaveModel(model, path);
  const Model loaded = LoadModel(path);
  ExpectIdenticalParts(model.parts(), loaded.parts());
  ExpectIdenticalDecisions(model, loaded);
  EXPECT_EQ(ReadAll(path), EncodeModel(model));
}

TEST(ModelFileLayout, HeaderIsMagicVersionAndPayloadLength) {
  // model_file.h: "NUWM" | u32 format_version | u64 payload_bytes | payload | u32 CRC-32.
  const std::vector<uint8_t> bytes = EncodeModel(SmallModel());
  ASSERT_GE(bytes.size(), 20u);
  EXPECT_EQ(std::string(bytes.begin(), bytes.begin() + 4), "NUWM");
  uint32_t version;
  uint64_t payload;
  uint32_t crc;
  std::memcpy(&version, bytes.data() + 4, 4);
  std::memcpy(&payload, bytes.data() + 8, 8);
  EXPECT_EQ(version, kModelFormatVersion);
  EXPECT_EQ(payload + 20, bytes.size());
  std::memcpy(&crc, bytes.data() + 16 + payload, 4);
  EXPECT_EQ(crc, Crc32(bytes.data() + 16, payload));
}

// ---------------------------------------------------------------------------------------------
// Damage.

TEST(ModelFileDamage, EveryTruncationThrowsModelFileError) {
  const std::vector<uint8_t> bytes = EncodeModel(SmallModel());
  for (std::size_t length = 0; length < bytes.size(); ++length) {
    // A copy of exactly `length` bytes, so that a read past the end would touch unowned memory
    // (and show up under a sanitizer) rather than the rest of the original buffer.
    const std::vector<uint8_t> prefix(bytes.begin(), bytes.begin() + length);
    EXPECT_THROW(DecodeModel(prefix.data(), prefix.size()), ModelFileError) << "length " << length;
  }
  // Padding is rejected as well: the header fixes the length.
  std::vector<uint8_t> padded = bytes;
  padded.push_back(0);
  EXPECT_THROW(DecodeModel(padded.data(), padded.size()), ModelFileError);
}

// A CRC with a degree-32 generator detects every burst of length <= 32 (common knowledge of cyclic
// codes; e.g. Koopman, "32-bit cyclic redundancy codes for Internet applications", DSN 2002), so
// every change confined to one payload byte is caught. Changes to the header are caught by the
// magic, version and length checks; to the stored CRC by the comparison.
TEST(ModelFileDamage, EverySingleByteChangeThrowsModelFileError) {
  const std::vector<uint8_t> bytes = EncodeModel(SmallModel());
  ASSERT_LT(bytes.size(), 1000u) << "keep the model small: 255 variants per byte are tried";
  std::vector<uint8_t> damaged = bytes;
  int escaped = 0;
  for (std::size_t position = 0; position < bytes.size(); ++position) {
    for (int change = 1; change < 256; ++change) {
      damaged[position] = static_cast<uint8_t>(bytes[position] ^ change);
      try {
        DecodeModel(damaged.data(), damaged.size());
        if (++escaped <= 5) {
          ADD_FAILURE() << "byte " << position << " xor " << change << " was accepted";
        }
      } catch (const ModelFileError&) {
      }
    }
    damaged[position] = bytes[position];
  }
  EXPECT_EQ(escaped, 0);
}

TEST(ModelFileDamage, NewerFormatVersionSaysSo) {
  std::vector<uint8_t> bytes = EncodeModel(SmallModel());
  const uint32_t newer = kModelFormatVersion + 1;
  std::memcpy(bytes.data() + 4, &newer, 4);
  try {
    DecodeModel(bytes.data(), bytes.size());
    FAIL() << "expected ModelFileError";
  } catch (const ModelFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr("newer"));
    EXPECT_THAT(e.what(), HasSubstr(std::to_string(newer)));
  }
}

TEST(ModelFileDamage, ReasonsAreClear) {
  const std::vector<uint8_t> bytes = EncodeModel(SmallModel());
  auto reason = [](std::vector<uint8_t> b) -> std::string {
    try {
      DecodeModel(b.data(), b.size());
    } catch (const ModelFileError& e) {
      return e.what();
    }
    return "accepted";
  };
  std::vector<uint8_t> b = bytes;
  b[0] = 'X';
  EXPECT_THAT(reason(b), HasSubstr("not a nuwatch model file"));
  b = bytes;
  b[30] ^= 0x10;
  EXPECT_THAT(reason(b), HasSubstr("checksum"));
  EXPECT_THAT(reason(std::vector<uint8_t>(bytes.begin(), bytes.begin() + 10)),
              HasSubstr("truncated"));
  EXPECT_THAT(reason(std::vector<uint8_t>(bytes.begin(), bytes.end() - 1)), HasSubstr("truncated"));
}

// Payloads that pass the checksum but lie about their contents: the decoder must reject them
// without reading out of bounds or allocating what a size field claims. The field offsets follow
// the order in which EncodeModel writes them (model_file.cc).
constexpr std::size_t kPayload = 16;
constexpr std::size_t kKernelType = kPayload + 0, kGamma = kPayload + 1, kNu = kPayload + 30,
                      kDims = kPayload + 38, kCount = kPayload + 42, kScalerType = kPayload + 46,
                      kCenter = kPayload + 47;

void Reseal(std::vector<uint8_t>& file) {
  const uint64_t payload = file.size() - 20;
  std::memcpy(file.data() + 8, &payload, 8);
  const uint32_t crc = Crc32(file.data() + kPayload, payload);
  std::memcpy(file.data() + kPayload + payload, &crc, 4);
}

template <typename T>
void Put(std::vector<uint8_t>& file, std::size_t offset, T value) {
  std::memcpy(file.data() + offset, &value, sizeof(T));
}

std::string DecodeError(const std::vector<uint8_t>& file) {
  try {
    DecodeModel(file.data(), file.size());
  } catch (const ModelFileError& e) {
    return e.what();
  } catch (const std::exception& e) {
    return std::string("wrong exception type: ") + e.what();
  }
  return "accepted";
}

// Version 3 adds the gamma candidates' count (u32 0 for a model without a table).
constexpr std::size_t kVersion2TailBytes = 4 + (4 + 4 + 4 + 3 + 8) + 1 + 4;

TEST(ModelFileCrafted, ResealedLiesAreRejected) {
  const Model model = SmallModel();
  const std::vector<uint8_t> bytes = EncodeModel(model);
  {
    // Sanity: resealing an untouched file changes nothing.
    std::vector<uint8_t> f = bytes;
    Reseal(f);
    EXPECT_EQ(f, bytes);
  }
  auto crafted = [&](auto&& edit) {
    std::vector<uint8_t> f = bytes;
    edit(f);
    Reseal(f);
    return DecodeError(f);
  };
  EXPECT_THAT(crafted([](auto& f) { f[kKernelType] = 7; }), HasSubstr("unknown kernel type 7"));
  EXPECT_THAT(crafted([](auto& f) { f[kScalerType] = 9; }), HasSubstr("unknown scaler type 9"));
  EXPECT_THAT(crafted([](auto& f) { Put<double>(f, kGamma, -1.0); }),
              HasSubstr("invalid model contents"));
  EXPECT_THAT(crafted([](auto& f) { Put<double>(f, kNu, 1.5); }), HasSubstr("nu = 1.5"));
  EXPECT_THAT(crafted([](auto& f) { Put<uint32_t>(f, kDims, 0xFFFFFFFFu); }),
              HasSubstr("inconsistent sizes"));
  EXPECT_THAT(crafted([](auto& f) { Put<uint32_t>(f, kCount, 0xFFFFFFFFu); }),
              HasSubstr("inconsistent sizes"));
  EXPECT_THAT(crafted([](auto& f) { Put<uint32_t>(f, kCount, 0xFFFFFFFEu); }),
              HasSubstr("inconsistent sizes"));
  EXPECT_THAT(crafted([](auto& f) { Put<uint32_t>(f, kCount, 0u); }),
              HasSubstr("inconsistent sizes"));
  // Scale of feature 0 (right after the d centres) set to 0.
  EXPECT_THAT(crafted([&](auto& f) { Put<double>(f, kCenter + 8 * model.dims(), 0.0); }),
              HasSubstr("invalid model contents"));
  // The feature-name count and the first name's length sit near the end of the payload, before the
  // names "temp" and "rpm": 4 + (4 + 4) + (4 + 3) bytes, followed by version 2's fields of an
  // uncalibrated standard-scaled model: whitening rows (u32 0), the identity transform (lags i32,
  // no windows u32, three statistics u32 + 3 x u8, max gap f64) and the calibration flag (u8 0),
  // and version 3's count of gamma candidates (u32 0).
  const std::size_t names_at = bytes.size() - 4 - 19 - kVersion2TailBytes;
  EXPECT_THAT(crafted([&](auto& f) { Put<uint32_t>(f, names_at, 3u); }),
              HasSubstr("3 feature names for 2 features"));
  EXPECT_THAT(crafted([&](auto& f) { Put<uint32_t>(f, names_at + 4, 0x7FFFFFFFu); }),
              HasSubstr("feature names"));
  // A byte appended to the payload.
  EXPECT_THAT(crafted([](auto& f) { f.insert(f.end() - 4, uint8_t{0}); }),
              HasSubstr("trailing bytes"));
  // A payload cut short before the names, resealed so that only the parser can notice.
  EXPECT_THAT(crafted([](auto& f) { f.erase(f.end() - 4 - 10 - kVersion2TailBytes, f.end() - 4); }),
              HasSubstr("ends inside"));
}

TEST(ModelFileCrafted, ResealedLiesInTheGammaTableAreRejected) {
  ModelParts p = SmallModel().parts();
  p.gamma_spec = *GammaSpec::Parse("min_volume");
  p.gamma_candidates = {{0.5, 1.25, 0.01, 900}};
  const std::vector<uint8_t> bytes = EncodeModel(Model(p));
  // The table ends the payload: count u32, then gamma, log volume, standard error, effective
  // samples (f64 each), then the CRC-32.
  const std::size_t table_at = bytes.size() - 4 - 32 - 4;
  auto crafted = [&](auto&& edit) {
    std::vector<uint8_t> f = bytes;
    edit(f);
    Reseal(f);
    return DecodeError(f);
  };
  EXPECT_EQ(crafted([](auto&) {}), "accepted");
  EXPECT_THAT(crafted([&](auto& f) { Put<uint32_t>(f, table_at, 0x7FFFFFFFu); }),
              HasSubstr("gamma candidates"));
  EXPECT_THAT(crafted([&](auto& f) { Put<double>(f, table_at + 4, -0.5); }),
              HasSubstr("gamma candidate 0"));
  EXPECT_THAT(crafted([&](auto& f) {
                Put<double>(f, table_at + 12, std::numeric_limits<double>::quiet_NaN());
              }),
              HasSubstr("gamma candidate 0"));
}

TEST(ModelFileCrafted, RandomResealedCorruptionNeverEscapesAsAnotherError) {
  // Random multi-byte damage with a recomputed checksum: DecodeModel either accepts (a changed
  // support-vector value is still a valid model) or throws ModelFileError; nothing else, no crash.
  const std::vector<uint8_t> bytes = EncodeModel(SmallModel());
  std::mt19937_64 generator(5);
  std::uniform_int_distribution<std::size_t> position(kPayload, bytes.size() - 5);
  std::uniform_int_distribution<int> value(0, 255), count(1, 8);
  for (int trial = 0; trial < 3000; ++trial) {
    std::vector<uint8_t> f = bytes;
    for (int k = count(generator); k > 0; --k) f[position(generator)] = value(generator);
    Reseal(f);
    const std::string result = DecodeError(f);
    EXPECT_THAT(result, Not(HasSubstr("wrong exception type"))) << "trial " << trial;
  }
}

// ---------------------------------------------------------------------------------------------
// CRC-32.

TEST(Crc32, StandardCheckValue) {
  // CRC-32/ISO-HDLC (the zlib / IEEE 802.3 CRC) of "123456789" is 0xCBF43926 (Greg Cook,
  // "Catalogue of parametrised CRC algorithms").
  const char* check = "123456789";
  EXPECT_EQ(Crc32(reinterpret_cast<const uint8_t*>(check), 9), 0xCBF43926u);
  // The CRC of nothing is 0 (init and final xor cancel).
  EXPECT_EQ(Crc32(nullptr, 0), 0u);
}

// The decision (DEVELOPERS.md, "Why core keeps its CRC-32"): core depends on Eigen only, so it
// keeps its table-driven CRC instead of linking zlib; this check holds it to zlib's crc32 itself
// (through Python's zlib module, which wraps it) on random buffers of every length up to 300.
TEST(Crc32, AgreesWithZlibOnRandomBuffers) {
  std::mt19937 random(11);
  std::vector<uint8_t> bytes(300);
  for (uint8_t& b : bytes) b = static_cast<uint8_t>(random());
  const fs::path path = fs::temp_directory_path() / ("nuwatch_crc_" + std::to_string(::getpid()));
  std::ofstream(path, std::ios::binary)
      .write(reinterpret_cast<const char*>(bytes.data()),
             static_cast<std::streamsize>(bytes.size()));
  const std::string command =
      std::string(NUWATCH_PYTHON) +
      " -c 'import sys, zlib; d = open(sys.argv[1], \"rb\").read(); "
      "print(\" \".join(str(zlib.crc32(d[:n])) for n in range(len(d) + 1)))' " +
      path.string();
  std::FILE* pipe = ::popen(command.c_str(), "r");
  ASSERT_NE(pipe, nullptr);
  std::vector<uint32_t> zlib;
  unsigned long value = 0;
  while (std::fscanf(pipe, "%lu", &value) == 1) zlib.push_back(static_cast<uint32_t>(value));
  ASSERT_EQ(::pclose(pipe), 0);
  fs::remove(path);
  ASSERT_EQ(zlib.size(), bytes.size() + 1);
  for (std::size_t n = 0; n <= bytes.size(); ++n)
    EXPECT_EQ(Crc32(bytes.data(), n), zlib[n]) << "length " << n;
}

TEST(Crc32, ChainsLikeZlib) {
  // model_file.h: "as zlib computes it", i.e. crc32(crc32(0, a), b) == crc32(0, a + b).
  const char* text = "the quick brown fox jumps over the lazy dog";
  const auto* p = reinterpret_cast<const uint8_t*>(text);
  const std::size_t n = std::strlen(text);
  for (std::size_t split = 0; split <= n; split += 7) {
    EXPECT_EQ(Crc32(p + split, n - split, Crc32(p, split)), Crc32(p, n)) << "split " << split;
  }
}

// ---------------------------------------------------------------------------------------------
// Files.

TEST(WriteFileAtomically, CreatesAndReplacesLeavingNoTemporaryFile) {
  TempDir dir;
  const std::string path = dir.File("state.bin");
  const std::vector<uint8_t> first{1, 2, 3, 4, 5}, second{9, 8, 7};
  WriteFileAtomically(path, first.data(), first.size());
  EXPECT_EQ(ReadAll(path), first);
  EXPECT_EQ(Listing(dir.path()), std::vector<std::string>{"state.bin"});
  WriteFileAtomically(path, second.data(), second.size());
  EXPECT_EQ(ReadAll(path), second);
  EXPECT_EQ(Listing(dir.path()), std::vector<std::string>{"state.bin"});
  // An empty file is a valid content too.
  WriteFileAtomically(path, second.data(), 0);
  EXPECT_TRUE(ReadAll(path).empty());
  EXPECT_EQ(Listing(dir.path()), std::vector<std::string>{"state.bin"});
}

TEST(WriteFileAtomically, RelativePathInTheWorkingDirectory) {
  TempDir dir;
  struct WorkingDirectory {  // restored even when the write throws
    explicit WorkingDirectory(const fs::path& to) : previous(fs::current_path()) {
      fs::current_path(to);
    }
    ~WorkingDirectory() { fs::current_path(previous); }
    fs::path previous;
  };
  const std::vector<uint8_t> content{42};
  {
    WorkingDirectory inside(dir.path());
    WriteFileAtomically("relative.bin", content.data(), content.size());
  }
  EXPECT_EQ(ReadAll(dir.File("relative.bin")), content);
  EXPECT_EQ(Listing(dir.path()), std::vector<std::string>{"relative.bin"});
}

TEST(WriteFileAtomically, UnwritableDirectoryThrowsNamingThePath) {
  TempDir dir;
  const std::vector<uint8_t> content{1};
  // A "directory" that is a regular file and one that does not exist fail even for root.
  { std::ofstream(dir.File("plain_file")) << "x"; }
  for (const std::string& path :
       {dir.File("plain_file") + "/model.nuwm", dir.File("missing") + "/model.nuwm"}) {
    try {
      WriteFileAtomically(path, content.data(), content.size());
      ADD_FAILURE() << "expected ModelFileError for " << path;
    } catch (const ModelFileError& e) {
      EXPECT_THAT(e.what(), HasSubstr(path));
    }
  }
  // Permissions only bind an unprivileged user.
  if (::geteuid() != 0) {
    const fs::path locked = dir.path() / "locked";
    fs::create_directory(locked);
    fs::permissions(locked, fs::perms::owner_read | fs::perms::owner_exec);
    const std::string path = (locked / "model.nuwm").string();
    try {
      WriteFileAtomically(path, content.data(), content.size());
      ADD_FAILURE() << "expected ModelFileError for " << path;
    } catch (const ModelFileError& e) {
      EXPECT_THAT(e.what(), HasSubstr(path));
    }
    fs::permissions(locked, fs::perms::owner_all);
  }
  EXPECT_THROW(SaveModel(SmallModel(), dir.File("missing") + "/m.nuwm"), ModelFileError);
}

TEST(LoadModel, MissingAndCorruptFilesNameThePath) {
  TempDir dir;
  const std::string missing = dir.File("does_not_exist.nuwm");
  try {
    LoadModel(missing);
    FAIL() << "expected ModelFileError";
  } catch (const ModelFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr(missing));
  }
  const std::string corrupt = dir.File("corrupt.nuwm");
  SaveModel(SmallModel(), corrupt);
  std::vector<uint8_t> bytes = ReadAll(corrupt);
  bytes[bytes.size() / 2] ^= 0x01;
  WriteFileAtomically(corrupt, bytes.data(), bytes.size());
  try {
    LoadModel(corrupt);
    FAIL() << "expected ModelFileError";
  } catch (const ModelFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr(corrupt));
    EXPECT_THAT(e.what(), HasSubstr("checksum"));
  }
}

// Regression test (was a bug): LoadModel on a path that is a directory lets a
// std::ios_base::failure escape
// ("basic_filebuf::underflow error reading the file: Is a directory", without the path) instead of
// the ModelFileError naming the path that model_file.h promises for any I/O failure. The ifstream
// opens a directory without complaint on Linux; the read then throws from inside the
// istreambuf_iterator copy, which the function does not catch.
TEST(LoadModel, DirectoryGivesModelFileErrorNamingThePath) {
  TempDir dir;
  const std::string path = dir.path().string();
  try {
    LoadModel(path);
    ADD_FAILURE() << "expected ModelFileError";
  } catch (const ModelFileError& e) {
    EXPECT_THAT(e.what(), HasSubstr(path));
  } catch (const std::exception& e) {
    ADD_FAILURE() << "expected ModelFileError naming " << path
                  << ", got another exception: " << e.what();
  }
}

}  // namespace
}  // namespace nuwatch
