#include "vector_exp.h"

#include <Eigen/Core>
#include <algorithm>

#if defined(NUWATCH_HAVE_LIBMVEC) && defined(__x86_64__)
#include <immintrin.h>

// glibc's libmvec entry points, by the x86-64 vector function ABI's names: b = SSE, 4 lanes;
// d = AVX2, 8 lanes; N = unmasked; v = one vector argument.
extern "C" __m128 _ZGVbN4v_expf(__m128);
extern "C" __attribute__((target("avx2"))) __m256 _ZGVdN8v_expf(__m256);
#define NUWATCH_EXP_BY_LIBMVEC 1
#endif

namespace nuwatch {
namespace {

#ifdef NUWATCH_EXP_BY_LIBMVEC
void ExpSse(float* values, int64_t n) {
  int64_t i = 0;
  for (; i + 4 <= n; i += 4) _mm_storeu_ps(values + i, _ZGVbN4v_expf(_mm_loadu_ps(values + i)));
  if (i == n) return;
  float tail[4] = {0, 0, 0, 0};
  std::copy(values + i, values + n, tail);
  _mm_storeu_ps(tail, _ZGVbN4v_expf(_mm_loadu_ps(tail)));
  std::copy(tail, tail + (n - i), values + i);
}

__attribute__((target("avx2"))) void ExpAvx2(float* values, int64_t n) {
  int64_t i = 0;
  for (; i + 8 <= n; i += 8)
    _mm256_storeu_ps(values + i, _ZGVdN8v_expf(_mm256_loadu_ps(values + i)));
  if (i == n) return;
  float tail[8] = {0, 0, 0, 0, 0, 0, 0, 0};
  std::copy(values + i, values + n, tail);
  _mm256_storeu_ps(tail, _ZGVdN8v_expf(_mm256_loadu_ps(tail)));
  std::copy(tail, tail + (n - i), values + i);
}

bool HasAvx2() {
  static const bool has = [] {
    __builtin_cpu_init();
    return __builtin_cpu_supports("avx2") != 0;
  }();
  return has;
}
#endif

void ExpEigen(float* values, int64_t n) {
  // Fixed-size chunks, which Eigen vectorises aligned or not (a dynamic map would peel its
  // unaligned head through the scalar exp); the tail through a padded chunk.
  using Chunk = Eigen::Array<float, 16, 1>;
  int64_t i = 0;
  for (; i + Chunk::SizeAtCompileTime <= n; i += Chunk::SizeAtCompileTime) {
    Eigen::Map<Chunk> chunk(values + i);
    chunk = chunk.exp();
  }
  if (i == n) return;
  Chunk tail = Chunk::Zero();
  std::copy(values + i, values + n, tail.data());
  tail = tail.exp();
  std::copy(tail.data(), tail.data() + (n - i), values + i);
}

}  // namespace

ExpVariant ChosenExpVariant() {
#ifdef NUWATCH_EXP_BY_LIBMVEC
  return HasAvx2() ? ExpVariant::kLibmvecAvx2 : ExpVariant::kLibmvecSse;
#else
  return ExpVariant::kEigen;
#endif
}

std::vector<ExpVariant> AvailableExpVariants() {
  std::vector<ExpVariant> variants = {ChosenExpVariant()};
#ifdef NUWATCH_EXP_BY_LIBMVEC
  if (variants.front() == ExpVariant::kLibmvecAvx2) variants.push_back(ExpVariant::kLibmvecSse);
  variants.push_back(ExpVariant::kEigen);
#endif
  return variants;
}

std::string_view ExpVariantName(ExpVariant variant) {
  switch (variant) {
    case ExpVariant::kLibmvecAvx2:
      return "libmvec avx2";
    case ExpVariant::kLibmvecSse:
      return "libmvec sse";
    case ExpVariant::kEigen:
      return "eigen";
  }
  return "unknown";
}

void ExpInPlace(float* values, int64_t n) { ExpInPlace(ChosenExpVariant(), values, n); }

void ExpInPlace(ExpVariant variant, float* values, int64_t n) {
  switch (variant) {
#ifdef NUWATCH_EXP_BY_LIBMVEC
    case ExpVariant::kLibmvecAvx2:
      if (HasAvx2()) return ExpAvx2(values, n);
      break;
    case ExpVariant::kLibmvecSse:
      return ExpSse(values, n);
#endif
    default:
      break;
  }
  ExpEigen(values, n);  // the variant this build or processor lacks: the portable one
}

}  // namespace nuwatch
