#include "nuwatch/model_file.h"

#include <fstream>
#include <iterator>

#include "nuwatch/checked_file.h"

namespace nuwatch {
namespace {

constexpr char kMagic[4] = {'N', 'U', 'W', 'M'};
constexpr uint64_t kMaxPayloadBytes = uint64_t{1} << 34;  // 16 GiB: larger is corruption

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

  return WrapChecksummed(kMagic, kModelFormatVersion, w.bytes);
}

namespace {

// Requires: a payload whose checksum matched.
Model DecodeModelPayload(ByteReader& r) {
  ModelParts p;
  const uint8_t kernel_type = r.Get<uint8_t>("kernel");
  if (kernel_type > 2) throw ModelFileError("unknown kernel type " + std::to_string(kernel_type));
  p.kernel.type = static_cast<KernelType>(kernel_type);
  p.kernel.gamma = r.Get<double>("kernel");
  p.kernel.degree = r.Get<int32_t>("kernel");
  p.kernel.coef0 = r.Get<double>("kernel");
  const uint8_t gamma_mode = r.Get<uint8_t>("gamma");
  if (gamma_mode > 2) throw ModelFileError("unknown gamma mode " + std::to_string(gamma_mode));
  p.gamma_spec.mode = static_cast<GammaSpec::Mode>(gamma_mode);
  p.gamma_spec.value = r.Get<double>("gamma");
  p.nu = r.Get<double>("nu");
  const uint32_t d = r.Get<uint32_t>("dimensions");
  const uint32_t n = r.Get<uint32_t>("dimensions");
  const uint8_t scaler_type = r.Get<uint8_t>("scaler");
  if (scaler_type > 2) throw ModelFileError("unknown scaler type " + std::to_string(scaler_type));
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
  if (r.remaining() != 0) throw ModelFileError("trailing bytes after the feature names");
  try {
    p.scaler = Scaler::FromParameters(static_cast<ScalerType>(scaler_type), center, scale);
    return Model(std::move(p));
  } catch (const PreconditionError& e) {
    throw ModelFileError(std::string("invalid model contents: ") + e.what());
  }
}

}  // namespace

Model DecodeModel(const uint8_t* data, std::size_t size) {
  return DecodeChecksummed<ModelFileError>(data, size, kMagic, kModelFormatVersion, "model",
                                           kMaxPayloadBytes, DecodeModelPayload);
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
