// CPU kernel of the recurrence block's causal depthwise Conv1D before the RG-LRU (De et al. 2024,
// arXiv:2402.19427, fig. 2), forward and backward, per channel c:
//
//   y_t = bias + sum_k w[c, k] u_{t-K+1+k}         (u_s for s < 0 from the tail, else 0)
//
// in the (B, T, C) layout the block works in: u may be a strided view (the recurrent half of the
// input projection; channels contiguous), y is contiguous and in the state dtype. This replaces a
// concatenation with the tail, two transposes and a grouped conv1d (blockyard/mixers/recurrence.py
// `causal_depthwise_conv`, which stays the reference). Backward:
//
//   dL/du_s   = sum_k w[c, k] dL/dy_{s+K-1-k}      over 0 <= s+K-1-k < T  (s < 0: the tail's rows)
//   dL/dw_k   = sum_{b,t} dL/dy_t u_{t-K+1+k},     dL/dbias = sum_{b,t} dL/dy_t
//
// Parallel over (batch row, block of channels) items (cpu_common.h), sequential over time, vectorised
// over the contiguous channels. The one-token decode step convolves inside rglru_step (rglru_cpu.cpp).

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
#include <cstdint>
#include <tuple>
#include <type_traits>
#include <vector>

namespace {

using namespace blockyard_vecmath;
using namespace blockyard_cpu;

struct ConvArgs {
  int64_t steps, channels, taps, x_row, x_step;  // x_row, x_step: u's strides over batch and time
};

// Row `row`, channels [c0, c0 + n): the input at time s (s < 0 reads the tail, or nullptr = zeros).
template <typename I>
inline const I* conv_input(const I* x, const I* tail, int64_t row, int64_t s, ConvArgs a) {
  if (s >= 0) return x + row * a.x_row + s * a.x_step;
  if (tail == nullptr) return nullptr;
  return tail + (row * (a.taps - 1) + a.taps - 1 + s) * a.channels;
}

// wt: the weight transposed to (K, C), so that every tap's weights are contiguous over channels.
template <typename I, typename S>
BLOCKYARD_CLONES void conv_forward_item(const I* __restrict__ x, const I* __restrict__ tail, const S* __restrict__ wt,
                                              const S* __restrict__ bias, S* __restrict__ y, int64_t row, int64_t c0,
                                              int64_t n, ConvArgs a) {
  const int64_t C = a.channels, K = a.taps;
  for (int64_t t = 0; t < a.steps; ++t) {
    S* __restrict__ out = y + (row * a.steps + t) * C + c0;
    for (int64_t j = 0; j < n; ++j) out[j] = bias[c0 + j];
    for (int64_t k = 0; k < K; ++k) {
      const I* __restrict__ src = conv_input(x, tail, row, t - K + 1 + k, a);
      if (src == nullptr) continue;
      src += c0;
      const S* __restrict__ wk = wt + k * C + c0;
      for (int64_t j = 0; j < n; ++j) out[j] += wk[j] * static_cast<S>(load(src, j));
    }
  }
}

// Reverse pass of one item: du (contiguous (B, T, C)), the tail's gradient (if a tail was given)
// and the item's sums over t of dL/dw (K rows) and dL/dbias (one row) into acc_row ((K + 1) x C, double).
template <typename I, typename S>
BLOCKYARD_CLONES void conv_backward_item(const S* __restrict__ gy, const I* __restrict__ x, const I* __restrict__ tail,
                                               const S* __restrict__ wt, I* __restrict__ dx, I* __restrict__ dtail,
                                               double* __restrict__ acc_row, S* __restrict__ acc, int64_t row, int64_t c0,
                                               int64_t n, ConvArgs a) {
  const int64_t C = a.channels, K = a.taps, T = a.steps;
  std::fill(acc, acc + (K + 1) * n, S(0));
  std::vector<S> buf(n);
  S* __restrict__ sum = buf.data();
  // One pass over time (the rows it reads stay in cache: K rows of dy and of u around s).
  for (int64_t s = -(K - 1); s < T; ++s) {
    if (s < 0 && dtail == nullptr) continue;
    for (int64_t j = 0; j < n; ++j) sum[j] = S(0);
    for (int64_t k = K - 1; k >= 0; --k) {  // dy_{s+K-1-k}, from the earliest output on
      const int64_t t = s + K - 1 - k;
      if (t < 0 || t >= T) continue;
      const S* __restrict__ g = gy + (row * T + t) * C + c0;
      const S* __restrict__ wk = wt + k * C + c0;
      for (int64_t j = 0; j < n; ++j) sum[j] += wk[j] * g[j];
    }
    I* __restrict__ d = s >= 0 ? dx + (row * T + s) * C + c0 : dtail + (row * (K - 1) + K - 1 + s) * C + c0;
    for (int64_t j = 0; j < n; ++j) store(d, j, sum[j]);
    if (s < 0) continue;
    const S* __restrict__ g = gy + (row * T + s) * C + c0;  // dL/dw and dL/dbias from output s
    S* __restrict__ db = acc + K * n;
    for (int64_t j = 0; j < n; ++j) db[j] += g[j];
    for (int64_t k = 0; k < K; ++k) {
      const I* __restrict__ src = conv_input(x, tail, row, s - K + 1 + k, a);
      if (src == nullptr) continue;
      src += c0;
      S* __restrict__ dw = acc + k * n;
      for (int64_t j = 0; j < n; ++j) dw[j] += g[j] * static_cast<S>(load(src, j));
    }
  }
  for (int64_t k = 0; k <= K; ++k)
    for (int64_t j = 0; j < n; ++j) acc_row[k * C + c0 + j] = static_cast<double>(acc[k * n + j]);
}

void check_conv(const at::Tensor& x, const c10::optional<at::Tensor>& tail, const at::Tensor& weight) {
  TORCH_CHECK(x.dim() == 3 && x.device().is_cpu() && (x.size(2) <= 1 || x.stride(2) == 1),
              "causal_conv: x must be a CPU (B, T, C) tensor with contiguous channels, got ", x.sizes());
  TORCH_CHECK(x.scalar_type() == at::kFloat || x.scalar_type() == at::kBFloat16 || x.scalar_type() == at::kDouble,
              "causal_conv: x must be float32, bfloat16 or float64, got ", x.scalar_type());
  const auto st = state_type(x.scalar_type());
  TORCH_CHECK(weight.dim() == 2 && weight.size(0) == x.size(2) && weight.size(1) >= 1 && weight.scalar_type() == st,
              "causal_conv: weight must be a (C, K) tensor of the state dtype");
  if (tail.has_value()) {
    TORCH_CHECK(tail->dim() == 3 && tail->size(0) == x.size(0) && tail->size(1) == weight.size(1) - 1 &&
                    tail->size(2) == x.size(2) && tail->scalar_type() == x.scalar_type() && tail->is_contiguous(),
                "causal_conv: tail must be a contiguous (B, K-1, C) tensor of x's dtype");
  }
}

ConvArgs conv_args(const at::Tensor& x, int64_t taps) {
  return {x.size(1), x.size(2), taps, x.stride(0), x.stride(1)};
}

at::Tensor conv_forward(const at::Tensor& x, const c10::optional<at::Tensor>& tail, const at::Tensor& weight,
                        const at::Tensor& bias) {
  check_conv(x, tail, weight);
  TORCH_CHECK(bias.dim() == 1 && bias.size(0) == x.size(2) && bias.scalar_type() == weight.scalar_type() &&
                  bias.is_contiguous(),
              "causal_conv: bias must be a contiguous (C,) tensor of the state dtype");
  at::Tensor y = at::empty(x.sizes(), x.options().dtype(state_type(x.scalar_type())));
  const int64_t B = x.size(0), T = x.size(1), C = x.size(2);
  if (y.numel() == 0) return y;
  const at::Tensor wt = weight.t().contiguous();
  const ConvArgs args = conv_args(x, weight.size(1));
  const Blocking blk = choose_blocking(B, C);
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, x.scalar_type(), "blockyard_causal_conv_forward", [&] {
    using I = scalar_t;
    using S = compute_t<I>;
    const I* px = x.const_data_ptr<I>();
    const I* pt = opt_ptr<I>(tail);
    const S* pw = wt.const_data_ptr<S>();
    const S* pb = bias.const_data_ptr<S>();
    S* py = y.mutable_data_ptr<S>();
    at::parallel_for(0, B * blk.blocks, grain_items(T, blk.width), [&](int64_t begin, int64_t end) {
      for (int64_t item = begin; item < end; ++item) {
        const int64_t row = item / blk.blocks, c0 = (item % blk.blocks) * blk.width;
        conv_forward_item<I, S>(px, pt, pw, pb, py, row, c0, std::min(C, c0 + blk.width) - c0, args);
      }
    });
  });
  return y;
}

// Returns (dx, dtail or an empty tensor, dweight, dbias); dx is contiguous whatever x's strides.
std::tuple<at::Tensor, at::Tensor, at::Tensor, at::Tensor> conv_backward(const at::Tensor& grad_y, const at::Tensor& x,
                                                                         const c10::optional<at::Tensor>& tail,
                                                                         const at::Tensor& weight) {
  const int64_t B = x.size(0), T = x.size(1), C = x.size(2), K = weight.size(1);
  const auto st = state_type(x.scalar_type());
  check_conv(x, tail, weight);
  TORCH_CHECK(grad_y.sizes() == x.sizes() && grad_y.scalar_type() == st && grad_y.is_contiguous(),
              "causal_conv: grad_y must be a contiguous (B, T, C) tensor of the state dtype");
  at::Tensor dx = at::empty(x.sizes(), x.options());
  at::Tensor dtail = tail.has_value() ? at::empty_like(*tail) : at::empty({0}, x.options());
  at::Tensor acc_rows = at::zeros({B, K + 1, C}, weight.options().dtype(at::kDouble));
  if (x.numel() > 0 || (tail.has_value() && tail->numel() > 0)) {
    const at::Tensor wt = weight.t().contiguous();
    const ConvArgs args = conv_args(x, K);
    const Blocking blk = choose_blocking(B, C);
    AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, x.scalar_type(), "blockyard_causal_conv_backward", [&] {
      using I = scalar_t;
      using S = compute_t<I>;
      const S* pg = grad_y.const_data_ptr<S>();
      const I* px = x.const_data_ptr<I>();
      const I* pt = opt_ptr<I>(tail);
      const S* pw = wt.const_data_ptr<S>();
      I* pdx = dx.mutable_data_ptr<I>();
      I* pdt = tail.has_value() ? dtail.mutable_data_ptr<I>() : nullptr;
      double* pacc = acc_rows.mutable_data_ptr<double>();
      at::parallel_for(0, B * blk.blocks, grain_items(T, blk.width), [&](int64_t begin, int64_t end) {
        std::vector<S> acc((K + 1) * blk.width);
        for (int64_t item = begin; item < end; ++item) {
          const int64_t row = item / blk.blocks, c0 = (item % blk.blocks) * blk.width;
          conv_backward_item<I, S>(pg, px, pt, pw, pdx, pdt, pacc + row * (K + 1) * C, acc.data(), row, c0,
                                   std::min(C, c0 + blk.width) - c0, args);
        }
      });
    });
  }
  const at::Tensor sums = acc_rows.sum(0).to(st);  // (K + 1, C): dL/dw transposed, then dL/dbias
  // Clones: outputs of a custom op must not share storage (contiguous() can return a view for K = 1).
  return {dx, dtail, sums.narrow(0, 0, K).t().clone(at::MemoryFormat::Contiguous), sums.select(0, K).clone()};
}

}  // namespace

TORCH_LIBRARY_FRAGMENT(BLOCKYARD_SCAN_NS, m) {
  m.def("causal_conv_forward(Tensor x, Tensor? tail, Tensor weight, Tensor bias) -> Tensor", &conv_forward);
  m.def("causal_conv_backward(Tensor grad_y, Tensor x, Tensor? tail, Tensor weight) -> (Tensor, Tensor, Tensor, Tensor)",
        &conv_backward);
}
