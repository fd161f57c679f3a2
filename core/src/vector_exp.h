// exp over a contiguous array of floats, in place: the kernel values of rbf scoring.
//
// By glibc's vector math library (libmvec) on x86-64 where the build found it: its AVX2 variant
// when the processor has AVX2 (chosen once, at the first call, as glibc itself picks among its
// scalar expf variants), else its SSE variant; elsewhere by Eigen's vectorised exp. A portable
// build is compiled for the x86-64 baseline (SSE2), where Eigen's exp costs 2.1 ns a value on this
// project's machine against 1.1 ns for libmvec's SSE variant and 0.50 ns for its AVX2 variant.
//
// Ensures: values[i] = exp(values[i]) for i < n, within 4 ulp where the result is a normal float
// (the accuracy glibc's manual gives libmvec's functions, from memory; the tests check every
// variant against std::exp in double). Every value goes through the same vector function wherever
// it sits in the array (the tail in a padded vector), so equal inputs give equal outputs in the
// single-vector and batch scoring paths. Requires: values points to n floats (n >= 0).
// Thread safety: reentrant.
#pragma once

#include <cstdint>
#include <string_view>
#include <vector>

namespace nuwatch {

enum class ExpVariant { kLibmvecAvx2, kLibmvecSse, kEigen };

// The variant ExpInPlace runs on this machine.
ExpVariant ChosenExpVariant();
// Every variant this build and this processor can run (the chosen one first), for the tests.
std::vector<ExpVariant> AvailableExpVariants();
std::string_view ExpVariantName(ExpVariant variant);  // "libmvec avx2", "libmvec sse", "eigen"

void ExpInPlace(float* values, int64_t n);
// A variant not in AvailableExpVariants() runs as kEigen.
void ExpInPlace(ExpVariant variant, float* values, int64_t n);

}  // namespace nuwatch
