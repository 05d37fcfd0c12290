// CPU kernel of the linear recurrence h_t = a_t * h_{t-1} + b_t (Martin & Cundy 2018, eq. 1;
// the first-order recurrence that Blelloch 1990, sec. 1.4, solves with a scan), forward and
// backward, in the recurrence's own (B, T, C) layout.
//
// Work is split over (batch row, block of channels) items with at::parallel_for; within an
// item the loop over time is sequential and the inner loop runs over contiguous channels, so it
// vectorises. Every element is read or written once per pass, so the kernel runs near the speed
// of memory (scripts/bench_scan.py compares it with one elementwise multiply-add).
//
// Backward (chain rule through h_t = a_t h_{t-1} + b_t; complex: PyTorch's conjugate
// convention, grad_x of z = w * x is grad_z * conj(w)):
//   g_t      = dL/dh_t (direct) + conj(a_{t+1}) * g_{t+1},   g_{T-1} = dL/dh_{T-1}
//   dL/db_t  = g_t
//   dL/da_t  = g_t * conj(h_{t-1}),   h_{-1} = h0
//   dL/dh0   = conj(a_0) * g_0
//
// Built with -ffp-contract=off so that a * h + b rounds twice, exactly as the two PyTorch ops
// of the sequential reference do.

#include <ATen/Dispatch.h>
#include <ATen/Parallel.h>
#include <ATen/core/Tensor.h>
#include <ATen/ops/empty.h>
#include <ATen/ops/empty_like.h>
#include <c10/util/complex.h>
#include <torch/library.h>

#include "cpu_common.h"
#include "vecmath.h"

#include <algorithm>
#include <tuple>

namespace {

using namespace blockyard_cpu;

// Elements per parallel task: the plain scan does one multiply-add per element, less work than the
// other kernels' elements (8k there), so a task needs more of them to outweigh the thread hand-off.
// It moves no result, only where a small problem stops being split.
constexpr int64_t kScanGrainElements = 1 << 15;

template <typename T>
inline T conj_value(T x) {
  return x;
}

template <typename T>
inline c10::complex<T> conj_value(c10::complex<T> x) {
  return std::conj(x);
}

// out[c] = a[c] * prev[c] + b[c]; the rows never overlap, which __restrict__ tells the compiler.
template <typename T>
inline void step_row(const T* __restrict__ a, const T* __restrict__ b, const T* __restrict__ prev,
                     T* __restrict__ out, int64_t n) {
  for (int64_t c = 0; c < n; ++c) out[c] = a[c] * prev[c] + b[c];
}

// The forward scan of one work item (one batch row, channels [c0, c0 + n)), t from 0 up.
template <typename T>
BLOCKYARD_CLONES void forward_item(const T* a, const T* b, const T* h0, T* h, int64_t row, int64_t c0, int64_t n,
                                   int64_t steps, int64_t channels) {
  const T* prev = h0 + row * channels + c0;
  for (int64_t t = 0; t < steps; ++t) {
    const int64_t off = (row * steps + t) * channels + c0;
    step_row(a + off, b + off, prev, h + off, n);
    prev = h + off;
  }
}

// One reverse step over one row of channels: g = gh + conj(a_next) * g_next (gh alone at the last
// step), stored as dL/db, and dL/da = g * conj(h_prev) when wanted. One fused pass keeps g in a
// register (two passes, re-reading g right after storing it, measured ~1.3x slower here).
template <typename T, bool kLast, bool kGradA>
inline void reverse_row(const T* __restrict__ gh, const T* __restrict__ a_next, const T* __restrict__ g_next,
                        const T* __restrict__ h_prev, T* __restrict__ g, T* __restrict__ grad_a, int64_t n) {
  for (int64_t c = 0; c < n; ++c) {
    const T gc = kLast ? gh[c] : gh[c] + conj_value(a_next[c]) * g_next[c];
    g[c] = gc;
    if constexpr (kGradA) grad_a[c] = gc * conj_value(h_prev[c]);
  }
}

// out[c] = x[c] * conj(y[c])
template <typename T>
inline void mul_conj_row(const T* __restrict__ x, const T* __restrict__ y, T* __restrict__ out, int64_t n) {
  for (int64_t c = 0; c < n; ++c) out[c] = x[c] * conj_value(y[c]);
}

// The reverse scan of one work item (one batch row, channels [c0, c0 + n)), t from T-1 down to 0.
template <typename T, bool kGradA>
BLOCKYARD_CLONES void reverse_item(const T* gh, const T* a, const T* h, const T* h0, T* g, T* grad_a,
                                   T* grad_h0, int64_t row, int64_t c0, int64_t n, int64_t steps,
                                   int64_t channels) {
  for (int64_t t = steps - 1; t >= 0; --t) {
    const int64_t off = (row * steps + t) * channels + c0;
    const T* h_prev = t > 0 ? h + off - channels : h0 + row * channels + c0;
    T* ga = kGradA ? grad_a + off : nullptr;
    if (t == steps - 1) {
      reverse_row<T, true, kGradA>(gh + off, nullptr, nullptr, h_prev, g + off, ga, n);
    } else {
      reverse_row<T, false, kGradA>(gh + off, a + off + channels, g + off + channels, h_prev, g + off, ga, n);
    }
  }
  // dL/dh0 = conj(a_0) * g_0, written as g_0 * conj(a_0) (the product commutes exactly).
  const int64_t off0 = row * steps * channels + c0;
  mul_conj_row(g + off0, a + off0, grad_h0 + row * channels + c0, n);
}

void check_inputs(const at::Tensor& a, const at::Tensor& b, const at::Tensor& h0) {
  TORCH_CHECK(a.dim() == 3, "scan: a must be (B, T, C), got ", a.sizes());
  TORCH_CHECK(b.sizes() == a.sizes(), "scan: b must have a's shape ", a.sizes(), ", got ", b.sizes());
  TORCH_CHECK(h0.dim() == 2 && h0.size(0) == a.size(0) && h0.size(1) == a.size(2),
              "scan: h0 must be (B, C) = (", a.size(0), ", ", a.size(2), "), got ", h0.sizes());
  TORCH_CHECK(a.scalar_type() == b.scalar_type() && a.scalar_type() == h0.scalar_type(),
              "scan: a, b and h0 must share one dtype");
  TORCH_CHECK(a.device().is_cpu() && b.device().is_cpu() && h0.device().is_cpu(), "scan: CPU tensors only");
  TORCH_CHECK(a.is_contiguous() && b.is_contiguous() && h0.is_contiguous(), "scan: inputs must be contiguous");
}

at::Tensor scan_forward(const at::Tensor& a, const at::Tensor& b, const at::Tensor& h0) {
  check_inputs(a, b, h0);
  at::Tensor h = at::empty_like(a);
  const int64_t B = a.size(0), T = a.size(1), C = a.size(2);
  if (h.numel() == 0) return h;
  const Blocking blk = choose_blocking(B, C);
  AT_DISPATCH_FLOATING_AND_COMPLEX_TYPES(a.scalar_type(), "blockyard_scan_forward", [&] {
    const scalar_t* pa = a.const_data_ptr<scalar_t>();
    const scalar_t* pb = b.const_data_ptr<scalar_t>();
    const scalar_t* p0 = h0.const_data_ptr<scalar_t>();
    scalar_t* ph = h.mutable_data_ptr<scalar_t>();
    at::parallel_for(0, B * blk.blocks, grain_items(T, blk.width, kScanGrainElements), [&](int64_t begin, int64_t end) {
      for (int64_t item = begin; item < end; ++item) {
        const int64_t row = item / blk.blocks;
        const int64_t c0 = (item % blk.blocks) * blk.width;
        const int64_t n = std::min(C, c0 + blk.width) - c0;
        forward_item(pa, pb, p0, ph, row, c0, n, T, C);
      }
    });
  });
  return h;
}

// Returns (grad_a, grad_b, grad_h0); grad_a is an empty tensor when need_grad_a is false.
std::tuple<at::Tensor, at::Tensor, at::Tensor> scan_backward(const at::Tensor& grad_h, const at::Tensor& a,
                                                             const at::Tensor& h, const at::Tensor& h0,
                                                             bool need_grad_a) {
  check_inputs(a, h, h0);
  TORCH_CHECK(grad_h.sizes() == a.sizes() && grad_h.scalar_type() == a.scalar_type() && grad_h.is_contiguous(),
              "scan: grad_h must be a contiguous tensor like a");
  const int64_t B = a.size(0), T = a.size(1), C = a.size(2);
  at::Tensor grad_b = at::empty_like(a);
  at::Tensor grad_a = need_grad_a ? at::empty_like(a) : at::empty({0}, a.options());
  at::Tensor grad_h0 = at::empty_like(h0);
  if (a.numel() == 0) {
    grad_h0.zero_();
    return {grad_a, grad_b, grad_h0};
  }
  const Blocking blk = choose_blocking(B, C);
  AT_DISPATCH_FLOATING_AND_COMPLEX_TYPES(a.scalar_type(), "blockyard_scan_backward", [&] {
    const scalar_t* pgh = grad_h.const_data_ptr<scalar_t>();
    const scalar_t* pa = a.const_data_ptr<scalar_t>();
    const scalar_t* ph = h.const_data_ptr<scalar_t>();
    const scalar_t* p0 = h0.const_data_ptr<scalar_t>();
    scalar_t* pg = grad_b.mutable_data_ptr<scalar_t>();  // g_t is dL/db_t: computed in place
    scalar_t* pga = need_grad_a ? grad_a.mutable_data_ptr<scalar_t>() : nullptr;
    scalar_t* pg0 = grad_h0.mutable_data_ptr<scalar_t>();
    at::parallel_for(0, B * blk.blocks, grain_items(T, blk.width, kScanGrainElements), [&](int64_t begin, int64_t end) {
      for (int64_t item = begin; item < end; ++item) {
        const int64_t row = item / blk.blocks;
        const int64_t c0 = (item % blk.blocks) * blk.width;
        const int64_t n = std::min(C, c0 + blk.width) - c0;
        if (pga != nullptr) {
          reverse_item<scalar_t, true>(pgh, pa, ph, p0, pg, pga, pg0, row, c0, n, T, C);
        } else {
          reverse_item<scalar_t, false>(pgh, pa, ph, p0, pg, pga, pg0, row, c0, n, T, C);
        }
      }
    });
  });
  return {grad_a, grad_b, grad_h0};
}

}  // namespace

TORCH_LIBRARY(BLOCKYARD_SCAN_NS, m) {
  m.def("forward(Tensor a, Tensor b, Tensor h0) -> Tensor", &scan_forward);
  m.def("backward(Tensor grad_h, Tensor a, Tensor h, Tensor h0, bool need_grad_a) -> (Tensor, Tensor, Tensor)",
        &scan_backward);
}
