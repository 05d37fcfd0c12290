// CPU kernel of the gated GeLU unit of the MLP (GeGLU, Shazeer 2020, arXiv:2002.05202, eq. 5),
// forward and backward, each one pass over memory:
//
//   h = [a | b]  (N, 2H), the MLP's input projection;   out = GeLU(a) * b  (N, H)
//   GeLU(a)  = a Phi(a),   Phi(a) = (1 + erf(a / sqrt 2)) / 2          (Hendrycks & Gimpel 2016, exact form)
//   GeLU'(a) = Phi(a) + a phi(a),   phi(a) = exp(-a^2 / 2) / sqrt(2 pi)
//   dL/da = g b GeLU'(a),   dL/db = g GeLU(a)   written side by side into dL/dh (N, 2H)
//
// The same math as torch's F.gelu(a) * b over h.chunk(2, -1) (blockyard/model.py, the reference and
// the fallback), which takes two passes forward and four backward (mul, mul, gelu_backward, and the
// cat that chunk's backward makes). Computed in float for bfloat16 inputs, rounded once on store.

#include <ATen/Dispatch.h>
#include <ATen/Parallel.h>
#include <ATen/core/Tensor.h>
#include <ATen/ops/empty.h>
#include <torch/library.h>

#include "vecmath.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <type_traits>
#include <vector>

#ifndef BLOCKYARD_SCAN_NS
#define BLOCKYARD_SCAN_NS blockyard_scan
#endif

namespace {

using namespace blockyard_vecmath;

template <typename S>
inline S phi_cdf(S a) {
  return S(0.5) * (S(1) + erf_of(a * S(0.70710678118654752440)));
}

// out[j] = GeLU(a[j]) * b[j] over one row, in the compute type S.
template <typename S>
BLOCKYARD_CLONES void geglu_forward_row(const S* __restrict__ a, const S* __restrict__ b, S* __restrict__ out,
                                        int64_t H) {
  for (int64_t j = 0; j < H; ++j) out[j] = a[j] * phi_cdf(a[j]) * b[j];
}

// da[j] = g b GeLU'(a), db[j] = g GeLU(a) over one row, in the compute type S.
template <typename S>
BLOCKYARD_CLONES void geglu_backward_row(const S* __restrict__ g, const S* __restrict__ a, const S* __restrict__ b,
                                         S* __restrict__ da, S* __restrict__ db, int64_t H) {
  const S inv_sqrt_2pi = S(0.39894228040143267794);
  for (int64_t j = 0; j < H; ++j) {
    const S cdf = phi_cdf(a[j]);
    const S pdf = inv_sqrt_2pi * exp_of(S(-0.5) * a[j] * a[j]);
    da[j] = g[j] * b[j] * (cdf + a[j] * pdf);
    db[j] = g[j] * a[j] * cdf;
  }
}

template <typename I>
BLOCKYARD_CLONES void widen(const I* __restrict__ src, float* __restrict__ dst, int64_t n) {
  for (int64_t j = 0; j < n; ++j) dst[j] = load(src, j);
}

template <typename I>
BLOCKYARD_CLONES void narrow(const float* __restrict__ src, I* __restrict__ dst, int64_t n) {
  for (int64_t j = 0; j < n; ++j) store(dst, j, src[j]);
}

// Rows [r0, r1): in place on float / double rows; bfloat16 rows are widened into a float buffer
// first and rounded back after (separate loops keep the math loop a pure float loop).
template <typename I, typename S>
void geglu_forward_rows(const I* h, I* out, int64_t r0, int64_t r1, int64_t H) {
  if constexpr (std::is_same_v<I, S>) {
    for (int64_t r = r0; r < r1; ++r) geglu_forward_row<S>(h + r * 2 * H, h + r * 2 * H + H, out + r * H, H);
  } else {
    std::vector<S> buf(3 * H);
    for (int64_t r = r0; r < r1; ++r) {
      widen(h + r * 2 * H, buf.data(), 2 * H);
      geglu_forward_row<S>(buf.data(), buf.data() + H, buf.data() + 2 * H, H);
      narrow(buf.data() + 2 * H, out + r * H, H);
    }
  }
}

template <typename I, typename S>
void geglu_backward_rows(const I* g, const I* h, I* dh, int64_t r0, int64_t r1, int64_t H) {
  if constexpr (std::is_same_v<I, S>) {
    for (int64_t r = r0; r < r1; ++r) {
      const I* hr = h + r * 2 * H;
      geglu_backward_row<S>(g + r * H, hr, hr + H, dh + r * 2 * H, dh + r * 2 * H + H, H);
    }
  } else {
    std::vector<S> buf(5 * H);
    S* gb = buf.data();
    for (int64_t r = r0; r < r1; ++r) {
      widen(g + r * H, gb, H);
      widen(h + r * 2 * H, gb + H, 2 * H);
      geglu_backward_row<S>(gb, gb + H, gb + 2 * H, gb + 3 * H, gb + 4 * H, H);
      narrow(gb + 3 * H, dh + r * 2 * H, 2 * H);
    }
  }
}

void check_h(const at::Tensor& h) {
  TORCH_CHECK(h.device().is_cpu() && h.is_contiguous() && h.dim() >= 1 && h.size(-1) % 2 == 0,
              "geglu: h must be a contiguous CPU tensor with an even last dim");
}

// Rows per parallel chunk: about 16k elements, so that a chunk outweighs the thread hand-off.
int64_t grain_rows(int64_t H) { return std::max<int64_t>(1, 16384 / std::max<int64_t>(H, 1)); }

at::Tensor geglu_forward(const at::Tensor& h) {
  check_h(h);
  const int64_t H = h.size(-1) / 2, N = H ? h.numel() / (2 * H) : 0;
  auto sizes = h.sizes().vec();
  sizes.back() = H;
  at::Tensor out = at::empty(sizes, h.options());
  if (out.numel() == 0) return out;
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, h.scalar_type(), "blockyard_geglu_forward", [&] {
    using I = scalar_t;
    using S = std::conditional_t<std::is_same_v<I, double>, double, float>;
    const I* ph = h.const_data_ptr<I>();
    I* po = out.mutable_data_ptr<I>();
    at::parallel_for(0, N, grain_rows(H), [&](int64_t r0, int64_t r1) { geglu_forward_rows<I, S>(ph, po, r0, r1, H); });
  });
  return out;
}

at::Tensor geglu_backward(const at::Tensor& grad, const at::Tensor& h) {
  check_h(h);
  const int64_t H = h.size(-1) / 2, N = H ? h.numel() / (2 * H) : 0;
  TORCH_CHECK(grad.is_contiguous() && grad.scalar_type() == h.scalar_type() && grad.numel() == N * H,
              "geglu: grad must be a contiguous tensor of h's dtype and the output's shape");
  at::Tensor dh = at::empty(h.sizes(), h.options());
  if (dh.numel() == 0) return dh;
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, h.scalar_type(), "blockyard_geglu_backward", [&] {
    using I = scalar_t;
    using S = std::conditional_t<std::is_same_v<I, double>, double, float>;
    const I* pg = grad.const_data_ptr<I>();
    const I* ph = h.const_data_ptr<I>();
    I* pd = dh.mutable_data_ptr<I>();
    at::parallel_for(0, N, grain_rows(H),
                     [&](int64_t r0, int64_t r1) { geglu_backward_rows<I, S>(pg, ph, pd, r0, r1, H); });
  });
  return dh;
}

}  // namespace

TORCH_LIBRARY_FRAGMENT(BLOCKYARD_SCAN_NS, m) {
  m.def("geglu_forward(Tensor h) -> Tensor", &geglu_forward);
  m.def("geglu_backward(Tensor grad, Tensor h) -> Tensor", &geglu_backward);
}
