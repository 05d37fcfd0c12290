// Vectorisable math shared by the CPU kernels (rglru_cpu.cpp, conv_cpu.cpp, geglu_cpu.cpp,
// rmsnorm_cpu.cpp): branch-free polynomial exp, expm1 and erf that GCC vectorises inside the
// kernels' loops (the C library's scalar calls would keep those loops scalar), and loads / stores
// that compute bfloat16 in float; and the multi-versioning attribute every kernel loop carries
// (scan_cpu.cpp uses only that).
#pragma once

#include <c10/util/BFloat16.h>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstring>

// Each kernel loop is compiled for AVX-512, AVX2 and the baseline, picked at load time (no
// -march=native: a cached build must run on any machine of the architecture).
#if defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__))
#define BLOCKYARD_CLONES __attribute__((target_clones("avx512f", "avx2", "default")))
#else
#define BLOCKYARD_CLONES
#endif

namespace blockyard_vecmath {

// exp(x) for float: x = n ln2 + r with |r| <= ln2 / 2, exp(r) by its Taylor polynomial to degree 7
// (truncation r^8 / 8! < 2e-9 relative) and 2^n through the exponent bits. Round-to-nearest by
// the 1.5 * 2^23 trick (valid because -ffp-contract=off and no fast-math keep it exact).
inline float exp_poly(float x) {
  const float xc = std::min(std::max(x, -87.0f), 88.0f);
  const float shifter = 12582912.0f;  // 1.5 * 2^23
  const float n = (xc * 1.44269504088896341f + shifter) - shifter;
  const float r = (xc - n * 0.693145751953125f) - n * 1.42860682030941723e-06f;  // ln2 in two parts
  float p = 1.0f / 5040.0f;
  p = p * r + 1.0f / 720.0f;
  p = p * r + 1.0f / 120.0f;
  p = p * r + 1.0f / 24.0f;
  p = p * r + 1.0f / 6.0f;
  p = p * r + 0.5f;
  p = p * r + 1.0f;
  p = p * r + 1.0f;
  const int32_t bits = (static_cast<int32_t>(n) + 127) << 23;
  float scale;
  std::memcpy(&scale, &bits, sizeof(scale));
  const float y = p * scale;
  return x > 88.0f ? INFINITY : (x < -87.0f ? 0.0f : y);
}

// expm1(x) for float: the Taylor polynomial to degree 9 for |x| < 0.3 (truncation 0.3^10 / 10!
// < 2e-12), where exp(x) - 1 would lose digits; exp(x) - 1 elsewhere.
inline float expm1_poly(float x) {
  float p = 1.0f / 362880.0f;
  p = p * x + 1.0f / 40320.0f;
  p = p * x + 1.0f / 5040.0f;
  p = p * x + 1.0f / 720.0f;
  p = p * x + 1.0f / 120.0f;
  p = p * x + 1.0f / 24.0f;
  p = p * x + 1.0f / 6.0f;
  p = p * x + 0.5f;
  p = p * x + 1.0f;
  const float small = p * x;
  const float large = exp_poly(x) - 1.0f;
  return std::fabs(x) < 0.3f ? small : large;
}

inline float exp_of(float x) { return exp_poly(x); }
inline double exp_of(double x) { return std::exp(x); }
inline float expm1_of(float x) { return expm1_poly(x); }
inline double expm1_of(double x) { return std::expm1(x); }

template <typename S>
inline S sigmoid_of(S z) {
  return S(1) / (S(1) + exp_of(-z));
}

template <typename S>
inline S load(const S* p, int64_t i) {
  return p[i];
}
inline float load(const c10::BFloat16* p, int64_t i) {
  const uint32_t bits = static_cast<uint32_t>(p[i].x) << 16;
  float v;
  std::memcpy(&v, &bits, sizeof(v));
  return v;
}

template <typename I, typename S>
inline void store(I* p, int64_t i, S v) {
  p[i] = static_cast<I>(v);
}

// float -> bfloat16, round to nearest even, NaN -> the quiet NaN 0x7FC0: c10::BFloat16's rounding
// written without a branch, so that loops storing bfloat16 vectorise.
inline void store(c10::BFloat16* p, int64_t i, float v) {
  uint32_t bits;
  std::memcpy(&bits, &v, sizeof(bits));
  const uint32_t rounded = (bits + 0x7FFFu + ((bits >> 16) & 1u)) >> 16;
  p[i].x = static_cast<uint16_t>(v != v ? 0x7FC0u : rounded);
}

// erf(x) for float: Abramowitz & Stegun 1964, eq. 7.1.26 (|error| <= 1.5e-7), with t = 1 / (1 + p|x|):
// erf(|x|) = 1 - (a1 t + a2 t^2 + a3 t^3 + a4 t^4 + a5 t^5) exp(-x^2), odd in x. Constants from
// that table (quoted from memory; tests/test_geglu_kernel.py checks the result against torch.erf).
// erf_with_gauss returns erf(x) and sets e = exp(-x^2), the Gaussian factor it computes anyway.
inline float erf_with_gauss(float x, float& e) {
  const float ax = std::fabs(x);
  const float t = 1.0f / (1.0f + 0.3275911f * ax);
  float p = 1.061405429f;
  p = p * t - 1.453152027f;
  p = p * t + 1.421413741f;
  p = p * t - 0.284496736f;
  p = p * t + 0.254829592f;
  e = exp_poly(-ax * ax);
  return std::copysign(1.0f - p * t * e, x);
}

// The standard normal CDF Phi(a) and density phi(a) together: erf's exp(-x^2) at x = a / sqrt 2 is
// exp(-a^2 / 2), the density's exponential, so one exp serves both (GeLU's backward needs both).
inline void normal_cdf_pdf(float a, float& cdf, float& pdf) {
  float e;
  cdf = 0.5f * (1.0f + erf_with_gauss(a * 0.70710678118654752440f, e));
  pdf = 0.39894228040143267794f * e;
}

inline void normal_cdf_pdf(double a, double& cdf, double& pdf) {
  cdf = 0.5 * (1.0 + std::erf(a * 0.70710678118654752440));
  pdf = 0.39894228040143267794 * std::exp(-0.5 * a * a);
}

}  // namespace blockyard_vecmath
