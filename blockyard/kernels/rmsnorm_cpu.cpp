// CPU kernel of RMSNorm (Zhang & Sennrich 2019, arXiv:1910.07467, eq. 4), forward and backward, one
// pass over memory each:
//
//   r_n   = 1 / sqrt(mean_j x_nj^2 + eps)          per row n (kept for the backward)
//   y_nj  = x_nj r_n w_j
//   xh_nj = x_nj r_n,   gh_nj = dL/dy_nj w_j
//   dL/dx_nj = r_n (gh_nj - xh_nj mean_k(gh_nk xh_nk))
//   dL/dw_j  = sum_n dL/dy_nj xh_nj
//
// The same math as torch's nn.RMSNorm (blockyard/model.py, the reference and the fallback), whose
// backward on CPU runs as a chain of elementwise ops (pow, mean, rsqrt, mul and their backward).
// x and dL/dy may be float32, bfloat16 (computed in float) or float64; the weight, 1 / rms and the
// sums are float32 (float64 for float64 inputs).

#include <ATen/Dispatch.h>
#include <ATen/Parallel.h>
#include <ATen/core/Tensor.h>
#include <ATen/ops/empty.h>
#include <ATen/ops/empty_like.h>
#include <ATen/ops/zeros.h>
#include <torch/library.h>

#include "cpu_common.h"
#include "vecmath.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <tuple>
#include <type_traits>
#include <vector>

namespace {

using namespace blockyard_vecmath;
using namespace blockyard_cpu;

// Sums over a row run in kLanes interleaved partial sums, added up at the end: an order fixed by the
// source, so GCC may vectorise the loop without -ffast-math (which would let it reorder any sum).
constexpr int64_t kLanes = 16;

template <typename S>
inline S add_lanes(const S* part) {
  S total = 0;
  for (int64_t k = 0; k < kLanes; ++k) total += part[k];
  return total;
}

template <typename I, typename S>
BLOCKYARD_CLONES S sum_squares(const I* __restrict__ x, int64_t D) {
  S part[kLanes] = {};
  int64_t j = 0;
  for (; j + kLanes <= D; j += kLanes) {
    for (int64_t k = 0; k < kLanes; ++k) {
      const S v = load(x, j + k);
      part[k] += v * v;
    }
  }
  for (int64_t k = 0; j + k < D; ++k) {
    const S v = load(x, j + k);
    part[k] += v * v;
  }
  return add_lanes(part);
}

template <typename I, typename S>
BLOCKYARD_CLONES void scale_row(const I* __restrict__ x, const S* __restrict__ w, S r, I* __restrict__ y, int64_t D) {
  for (int64_t j = 0; j < D; ++j) store(y, j, load(x, j) * r * w[j]);
}

// One row of the backward: dot = mean_k(gh_k xh_k); dx; the row's share of dw added to acc.
template <typename I, typename S>
BLOCKYARD_CLONES void backward_row(const I* __restrict__ g, const I* __restrict__ x, const S* __restrict__ w, S r,
                                   I* __restrict__ dx, S* __restrict__ acc, int64_t D) {
  S part[kLanes] = {};
  for (int64_t j0 = 0; j0 < D; j0 += kLanes) {
    const int64_t n = std::min(kLanes, D - j0);
    for (int64_t k = 0; k < n; ++k) {
      const S xh = load(x, j0 + k) * r, gj = load(g, j0 + k);
      part[k] += gj * w[j0 + k] * xh;
      acc[j0 + k] += gj * xh;
    }
  }
  const S dot = add_lanes(part) / static_cast<S>(D);
  for (int64_t j = 0; j < D; ++j) {
    const S xh = load(x, j) * r;
    store(dx, j, r * (load(g, j) * w[j] - xh * dot));
  }
}

void check(const at::Tensor& x, const at::Tensor& weight) {
  TORCH_CHECK(x.device().is_cpu() && x.dim() == 2 && x.is_contiguous(), "rms_norm: x must be a contiguous (N, D) CPU tensor");
  TORCH_CHECK(weight.dim() == 1 && weight.size(0) == x.size(1) && weight.is_contiguous() &&
                  weight.scalar_type() == (x.scalar_type() == at::kDouble ? at::kDouble : at::kFloat),
              "rms_norm: weight must be a contiguous (D,) tensor of the compute dtype");
}

// Returns (y in x's dtype, r = 1 / rms per row in the compute dtype).
std::tuple<at::Tensor, at::Tensor> rms_norm_forward(const at::Tensor& x, const at::Tensor& weight, double eps) {
  check(x, weight);
  const int64_t N = x.size(0), D = x.size(1);
  at::Tensor y = at::empty_like(x);
  at::Tensor rstd = at::empty({N}, weight.options());
  if (x.numel() == 0) return {y, rstd};
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, x.scalar_type(), "blockyard_rms_norm_forward", [&] {
    using I = scalar_t;
    using S = compute_t<I>;
    const I* px = x.const_data_ptr<I>();
    const S* pw = weight.const_data_ptr<S>();
    I* py = y.mutable_data_ptr<I>();
    S* pr = rstd.mutable_data_ptr<S>();
    at::parallel_for(0, N, grain_rows(D), [&](int64_t r0, int64_t r1) {
      for (int64_t n = r0; n < r1; ++n) {
        const S ms = sum_squares<I, S>(px + n * D, D) / static_cast<S>(D);
        const S r = S(1) / std::sqrt(ms + static_cast<S>(eps));
        pr[n] = r;
        scale_row<I, S>(px + n * D, pw, r, py + n * D, D);
      }
    });
  });
  return {y, rstd};
}

// Returns (dL/dx in x's dtype, dL/dw in the weight's dtype).
std::tuple<at::Tensor, at::Tensor> rms_norm_backward(const at::Tensor& grad_y, const at::Tensor& x,
                                                     const at::Tensor& weight, const at::Tensor& rstd) {
  check(x, weight);
  TORCH_CHECK(grad_y.sizes() == x.sizes() && grad_y.scalar_type() == x.scalar_type() && grad_y.is_contiguous(),
              "rms_norm: grad_y must be a contiguous tensor like x");
  const int64_t N = x.size(0), D = x.size(1);
  at::Tensor dx = at::empty_like(x);
  const int64_t rows = grain_rows(D), chunks = (N + rows - 1) / rows;
  // One partial dw per chunk (fixed chunks: the sum does not depend on the thread count), summed after.
  at::Tensor partial = at::zeros({std::max<int64_t>(chunks, 1), D}, weight.options());
  if (x.numel() > 0) {
    AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, x.scalar_type(), "blockyard_rms_norm_backward", [&] {
      using I = scalar_t;
      using S = compute_t<I>;
      const I* pg = grad_y.const_data_ptr<I>();
      const I* px = x.const_data_ptr<I>();
      const S* pw = weight.const_data_ptr<S>();
      const S* pr = rstd.const_data_ptr<S>();
      I* pdx = dx.mutable_data_ptr<I>();
      S* pp = partial.mutable_data_ptr<S>();
      at::parallel_for(0, chunks, 1, [&](int64_t c0, int64_t c1) {
        for (int64_t c = c0; c < c1; ++c) {
          for (int64_t n = c * rows; n < std::min(N, (c + 1) * rows); ++n) {
            backward_row<I, S>(pg + n * D, px + n * D, pw, pr[n], pdx + n * D, pp + c * D, D);
          }
        }
      });
    });
  }
  return {dx, partial.sum(0)};
}

}  // namespace

TORCH_LIBRARY_FRAGMENT(BLOCKYARD_SCAN_NS, m) {
  m.def("rms_norm_forward(Tensor x, Tensor weight, float eps) -> (Tensor, Tensor)", &rms_norm_forward);
  m.def("rms_norm_backward(Tensor grad_y, Tensor x, Tensor weight, Tensor rstd) -> (Tensor, Tensor)",
        &rms_norm_backward);
}
