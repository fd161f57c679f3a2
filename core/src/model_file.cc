#include "nuwatch/model_file.h"

#include <cmath>
#include <fstream>
#include <iterator>

#include "nuwatch/checked_file.h"

namespace nuwatch {
namespace {

constexpr char kMagic[4] = {'N', 'U', 'W', 'M'};
constexpr uint64_t kMaxPayloadBytes = uint64_t{1} << 34;  // 16 GiB: larger is corruption

void EncodeCalibration(ByteWriter& w, const Calibration& calibration) {
  w.Put<uint8_t>(calibration.valid() ? 1 : 0);
  if (!calibration.valid()) return;
  const Calibration::Parts& c = calibration.parts();
  w.Put<uint64_t>(c.sorted_scores.size());
  w.PutArray(c.sorted_scores.data(), c.sorted_scores.size());
  w.Put<uint8_t>(c.has_tail ? 1 : 0);
  w.Put<double>(c.tail_threshold);
  w.Put<double>(c.junction_score);
  w.Put<double>(c.junction_p);
  w.Put<double>(c.tail.shape);
  w.Put<double>(c.tail.scale);
  const CalibrationSummary& s = c.summary;
  w.Put<double>(s.false_alarm_rate);
  w.Put<double>(s.false_incidents_per_day);
  w.Put<double>(s.level);
  w.Put<uint8_t>(s.level_from_tail ? 1 : 0);
  w.Put<double>(s.span_days);
  w.Put<double>(s.vectors_per_day);
  w.Put<double>(s.reference_level);
  w.Put<int64_t>(s.reference_flagged);
  w.Put<int64_t>(s.reference_opened);
  w.Put<double>(s.incidents_per_day);
  w.Put<uint32_t>(static_cast<uint32_t>(s.warnings.size()));
  for (const auto& warning : s.warnings) w.PutString(warning);
}

Calibration DecodeCalibration(ByteReader& r) {
  if (r.Get<uint8_t>("calibration") == 0) return {};
  Calibration::Parts c;
  const uint64_t n = r.Get<uint64_t>("calibration");
  r.Need(n, sizeof(float), "calibration scores");
  c.sorted_scores.resize(n);
  r.GetArray(c.sorted_scores.data(), n, "calibration scores");
  c.has_tail = r.Get<uint8_t>("calibration") != 0;
  c.tail_threshold = r.Get<double>("calibration");
  c.junction_score = r.Get<double>("calibration");
  c.junction_p = r.Get<double>("calibration");
  c.tail.shape = r.Get<double>("calibration");
  c.tail.scale = r.Get<double>("calibration");
  CalibrationSummary& s = c.summary;
  s.false_alarm_rate = r.Get<double>("calibration");
  s.false_incidents_per_day = r.Get<double>("calibration");
  s.level = r.Get<double>("calibration");
  s.level_from_tail = r.Get<uint8_t>("calibration") != 0;
  s.span_days = r.Get<double>("calibration");
  s.vectors_per_day = r.Get<double>("calibration");
  s.reference_level = r.Get<double>("calibration");
  s.reference_flagged = r.Get<int64_t>("calibration");
  s.reference_opened = r.Get<int64_t>("calibration");
  s.incidents_per_day = r.Get<double>("calibration");
  const uint32_t warnings = r.Get<uint32_t>("calibration warnings");
  r.Need(warnings, sizeof(uint32_t), "calibration warnings");
  for (uint32_t i = 0; i < warnings; ++i) s.warnings.push_back(r.GetString("calibration warnings"));
  return Calibration::FromParts(std::move(c));
}

}  // namespace

std::vector<uint8_t> EncodeModel(const Model& model) {
  const ModelParts& p = model.parts();
  ByteWriter w;
  w.Put<uint8_t>(static_cast<uint8_t>(p.kernel.type));
  w.Put<double>(p.kernel.gamma);
  w.Put<int32_t>(p.kernel.degree);
  w.Put<double>(p.kernel.coef0);
  w.Put<uint8_t>(static_cast<uint8_t>(p.gamma_spec.mode));
  w.Put<double>(p.gamma_spec.value);
  w.Put<double>(p.nu);
  const uint32_t d = static_cast<uint32_t>(model.dims());
  const uint32_t n = static_cast<uint32_t>(model.num_support());
  w.Put<uint32_t>(d);
  w.Put<uint32_t>(n);
  w.Put<uint8_t>(static_cast<uint8_t>(p.scaler.type()));
  w.PutArray(p.scaler.center().data(), d);
  w.PutArray(p.scaler.scale().data(), d);
  for (uint32_t i = 0; i < n; ++i) w.PutArray(&p.support_vectors(i, 0), d);
  w.PutArray(p.coefficients.data(), n);
  w.Put<double>(p.rho);
  w.Put<int64_t>(p.training.n_train);
  w.Put<int64_t>(p.training.n_support);
  w.Put<int64_t>(p.training.n_bounded);
  w.Put<int64_t>(p.training.iterations);
  w.Put<uint8_t>(p.training.converged ? 1 : 0);
  w.Put<double>(p.training.objective);
  w.Put<double>(p.training.seconds);
  w.Put<int64_t>(p.compression.support_vectors_before);
  w.Put<int64_t>(p.compression.support_vectors_after);
  w.Put<double>(p.compression.weight_degradation);
  w.Put<double>(p.compression.rho_before);
  w.Put<double>(p.compression.seconds);
  w.Put<uint64_t>(p.version);
  w.Put<uint32_t>(static_cast<uint32_t>(p.feature_names.size()));
  for (const auto& name : p.feature_names) w.PutString(name);
  // Version 2.
  const MatrixD& whitening = p.scaler.whitening();
  w.Put<uint32_t>(static_cast<uint32_t>(whitening.rows()));
  w.PutArray(whitening.data(), static_cast<std::size_t>(whitening.size()));
  const FeatureTransformOptions& t = p.transform;
  w.Put<int32_t>(t.lags);
  w.Put<uint32_t>(static_cast<uint32_t>(t.rolling_windows.size()));
  for (const int window : t.rolling_windows) w.Put<int32_t>(window);
  w.Put<uint32_t>(static_cast<uint32_t>(t.rolling_statistics.size()));
  for (const RollingStatistic statistic : t.rolling_statistics)
    w.Put<uint8_t>(static_cast<uint8_t>(statistic));
  w.Put<double>(t.max_gap_seconds);
  EncodeCalibration(w, p.calibration);
  // Version 3.
  w.Put<uint32_t>(static_cast<uint32_t>(p.gamma_candidates.size()));
  for (const GammaCandidate& c : p.gamma_candidates) {
    w.Put<double>(c.gamma);
    w.Put<double>(c.log_volume);
    w.Put<double>(c.standard_error);
    w.Put<double>(c.effective_samples);
  }

  return WrapChecksummed(kMagic, kModelFormatVersion, w.bytes);
}

namespace {

// Requires: a payload whose checksum matched.
Model DecodeModelPayload(ByteReader& r, uint32_t version) {
  ModelParts p;
  const uint8_t kernel_type = r.Get<uint8_t>("kernel");
  if (kernel_type > 2) throw ModelFileError("unknown kernel type " + std::to_string(kernel_type));
  p.kernel.type = static_cast<KernelType>(kernel_type);
  p.kernel.gamma = r.Get<double>("kernel");
  p.kernel.degree = r.Get<int32_t>("kernel");
  p.kernel.coef0 = r.Get<double>("kernel");
  const uint8_t gamma_mode = r.Get<uint8_t>("gamma");
  if (gamma_mode > 3 || (gamma_mode == 3 && version < 3))
    throw ModelFileError("unknown gamma mode " + std::to_string(gamma_mode));
  p.gamma_spec.mode = static_cast<GammaSpec::Mode>(gamma_mode);
  p.gamma_spec.value = r.Get<double>("gamma");
  p.nu = r.Get<double>("nu");
  const uint32_t d = r.Get<uint32_t>("dimensions");
  const uint32_t n = r.Get<uint32_t>("dimensions");
  const uint8_t scaler_type = r.Get<uint8_t>("scaler");
  if (scaler_type > 3) throw ModelFileError("unknown scaler type " + std::to_string(scaler_type));
  // Sizes are checked against what is left before anything is allocated.
  if (d == 0 || n == 0 ||
      (static_cast<uint64_t>(d) * (n + 2) + n) > r.remaining() / sizeof(double)) {
    throw ModelFileError("inconsistent sizes: " + std::to_string(n) + " support vectors of " +
                         std::to_string(d) + " dimensions do not fit the payload");
  }
  VectorD center(d), scale(d);
  r.GetArray(center.data(), d, "scaler");
  r.GetArray(scale.data(), d, "scaler");
  p.support_vectors.resize(n, d);
  r.GetArray(p.support_vectors.data(), static_cast<uint64_t>(n) * d, "support vectors");
  p.coefficients.resize(n);
  r.GetArray(p.coefficients.data(), n, "coefficients");
  p.rho = r.Get<double>("rho");
  p.training.n_train = r.Get<int64_t>("training statistics");
  p.training.n_support = r.Get<int64_t>("training statistics");
  p.training.n_bounded = r.Get<int64_t>("training statistics");
  p.training.iterations = r.Get<int64_t>("training statistics");
  p.training.converged = r.Get<uint8_t>("training statistics") != 0;
  p.training.objective = r.Get<double>("training statistics");
  p.training.seconds = r.Get<double>("training statistics");
  p.compression.support_vectors_before = r.Get<int64_t>("compression statistics");
  p.compression.support_vectors_after = r.Get<int64_t>("compression statistics");
  p.compression.weight_degradation = r.Get<double>("compression statistics");
  p.compression.rho_before = r.Get<double>("compression statistics");
  p.compression.seconds = r.Get<double>("compression statistics");
  p.version = r.Get<uint64_t>("version");
  const uint32_t names = r.Get<uint32_t>("feature names");
  if (names != 0 && names != d) {
    throw ModelFileError(std::to_string(names) + " feature names for " + std::to_string(d) +
                         " features");
  }
  for (uint32_t i = 0; i < names; ++i) p.feature_names.push_back(r.GetString("feature names"));
  MatrixD whitening;
  try {
    if (version >= 2) {
      const uint32_t rows = r.Get<uint32_t>("whitening");
      if (rows != 0 && rows != d) {
        throw ModelFileError("a whitening matrix of " + std::to_string(rows) + " rows for " +
                             std::to_string(d) + " features");
      }
      r.Need(static_cast<uint64_t>(rows) * rows, sizeof(double), "whitening");
      whitening.resize(rows, rows);
      r.GetArray(whitening.data(), static_cast<uint64_t>(rows) * rows, "whitening");
      FeatureTransformOptions& t = p.transform;
      t.lags = r.Get<int32_t>("transform");
      const uint32_t windows = r.Get<uint32_t>("transform");
      r.Need(windows, sizeof(int32_t), "transform");
      t.rolling_windows.resize(windows);
      for (int& window : t.rolling_windows) window = r.Get<int32_t>("transform");
      const uint32_t statistics = r.Get<uint32_t>("transform");
      r.Need(statistics, 1, "transform");
      t.rolling_statistics.clear();
      for (uint32_t i = 0; i < statistics; ++i) {
        const uint8_t statistic = r.Get<uint8_t>("transform");
        if (statistic > 2)
          throw ModelFileError("unknown rolling statistic " + std::to_string(statistic));
        t.rolling_statistics.push_back(static_cast<RollingStatistic>(statistic));
      }
      t.max_gap_seconds = r.Get<double>("transform");
      p.calibration = DecodeCalibration(r);
    }
    if (version >= 3) {
      const uint32_t candidates = r.Get<uint32_t>("gamma candidates");
      r.Need(candidates, 4 * sizeof(double), "gamma candidates");
      for (uint32_t i = 0; i < candidates; ++i) {
        GammaCandidate c;
        c.gamma = r.Get<double>("gamma candidates");
        c.log_volume = r.Get<double>("gamma candidates");
        c.standard_error = r.Get<double>("gamma candidates");
        c.effective_samples = r.Get<double>("gamma candidates");
        // log_volume may be +-inf (an unbounded envelope, none sampled), never NaN.
        if (!(c.gamma > 0) || !std::isfinite(c.gamma) || std::isnan(c.log_volume) ||
            std::isnan(c.standard_error) || !std::isfinite(c.effective_samples)) {
          throw ModelFileError("gamma candidate " + std::to_string(i) +
                               " is not a width > 0 "
                               "with a volume");
        }
        p.gamma_candidates.push_back(c);
      }
    }
    if (r.remaining() != 0) throw ModelFileError("trailing bytes after the model");
    p.scaler =
        Scaler::FromParameters(static_cast<ScalerType>(scaler_type), center, scale, whitening);
    return Model(std::move(p));
  } catch (const PreconditionError& e) {
    throw ModelFileError(std::string("invalid model contents: ") + e.what());
  }
}

}  // namespace

Model DecodeModel(const uint8_t* data, std::size_t size) {
  try {
    const ChecksummedPayload payload =
        UnwrapChecksummed(data, size, kMagic, kModelFormatVersion, "model", kMaxPayloadBytes);
    ByteReader reader(payload.data, payload.size, "model");
    return DecodeModelPayload(reader, payload.version);
  } catch (const ChecksummedFileError& e) {
    throw ModelFileError(e.what());
  }
}

void SaveModel(const Model& model, const std::string& path) {
  const std::vector<uint8_t> bytes = EncodeModel(model);
  WriteFileAtomically(path, bytes.data(), bytes.size());
}

Model LoadModel(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw ModelFileError(path + ": cannot open for reading");
  std::vector<uint8_t> bytes;
  try {
    bytes.assign(std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>());
  } catch (const std::exception& e) {  // e.g. a directory: the stream buffer throws on read
    throw ModelFileError(path + ": read error: " + e.what());
  }
  if (in.bad()) throw ModelFileError(path + ": read error");
  try {
    return DecodeModel(bytes.data(), bytes.size());
  } catch (const ModelFileError& e) {
    throw ModelFileError(path + ": " + e.what());
  }
}

}  // namespace nuwatch
