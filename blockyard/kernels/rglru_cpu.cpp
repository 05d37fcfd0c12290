// CPU kernels of the RG-LRU (De et al. 2024, arXiv:2402.19427, sec. 2.4, eqs. 1-4): forward and
// backward, each one pass over time in the recurrence's (B, T, C) layout, and the one-token decode
// step (rglru_step). The recurrence:
//
//   log a0  = -softplus(-Lambda)                      per channel (a0 = sigmoid(Lambda))
//   r_t     = sigmoid(gate_a_t),  i_t = sigmoid(gate_x_t)           (gated; else r_t = i_t = 1)
//   log a_t = (c r_t) log a0                          (ungated: log a_t = log a0)
//   a_t     = exp(log a_t)
//   b_t     = sqrt(-expm1(2 log a_t)) (i_t x_t)       (input_norm; else b_t = i_t x_t)
//   h_t     = a_t h_{t-1} + b_t
//
// exactly the composition of PyTorch ops in blockyard/mixers/recurrence.py (rg_lru_reference),
// which stays the reference and the fallback. The state h is float32 (float64 for float64
// inputs); x and the gate logits may be float32, bfloat16 or float64.
//
// Backward (chain rule through the lines above; g_t = dL/dh_t in total):
//   g_t       = dL/dh_t (direct) + a_{t+1} g_{t+1}
//   dL/dx_t   = g_t m_t i_t                 with m_t = sqrt(1 - a_t^2) (1 without input_norm)
//   dL/dgx_t  = g_t m_t x_t i_t (1 - i_t)
//   dL/dloga  = g_t h_{t-1} a_t - g_t (i_t x_t) a_t^2 / m_t      (second term with input_norm)
//   dL/dga_t  = dL/dloga c log a0 r_t (1 - r_t)
//   dL/dLambda = sigmoid(-Lambda) sum_{b,t} dL/dloga c r_t       (ungated: without c r_t)
//   dL/dh0    = a_0 g_0
// The gates and decays are recomputed in the reverse pass from the saved inputs (cheaper than
// storing them), so training keeps only x, the gate logits and h.
//
// Parallel over (batch row, block of channels) items, sequential over time, vectorised over the
// contiguous channels; exp and expm1 are branch-free polynomials (vecmath.h) that the compiler
// vectorises, which the C library's scalar calls would prevent.
//
// The decode step (rglru_step) also applies the block's causal depthwise conv to its one token;
// the conv over a whole sequence, forward and backward, is in conv_cpu.cpp. The helpers both files
// share (state dtype, work blocking, optional pointers) are in cpu_common.h.

#include <ATen/Dispatch.h>
#include <ATen/Parallel.h>
#include <ATen/core/Tensor.h>
#include <ATen/ops/empty.h>
#include <ATen/ops/empty_like.h>
#include <ATen/ops/mul.h>
#include <ATen/ops/neg.h>
#include <ATen/ops/sigmoid.h>
#include <ATen/ops/softplus.h>
#include <ATen/ops/sum.h>
#include <ATen/ops/zeros.h>
#include <ATen/ops/zeros_like.h>
#include <c10/util/BFloat16.h>
#include <torch/library.h>

#include "cpu_common.h"
#include "vecmath.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <tuple>
#include <type_traits>
#include <vector>

namespace {

using namespace blockyard_vecmath;
using namespace blockyard_cpu;

// ----------------------------------------------------------------------------- one work item

struct Args {
  int64_t steps, channels;
  double c;
};

// Forward of channels [c0, c0 + n) of batch row `row`, t from 0 up. la0 = log a0 per channel.
template <typename I, typename S, bool kGated, bool kNorm>
BLOCKYARD_CLONES void forward_item(const I* __restrict__ x, const I* __restrict__ ga, const I* __restrict__ gx, const S* __restrict__ la0, const S* __restrict__ h0, S* __restrict__ h,
                                         int64_t row, int64_t c0, int64_t n, Args args) {
  const int64_t C = args.channels;
  const S cc = static_cast<S>(args.c);
  const S* prev = h0 + row * C + c0;
  const S* lam = la0 + c0;
  for (int64_t t = 0; t < args.steps; ++t) {
    const int64_t off = (row * args.steps + t) * C + c0;
    S* out = h + off;
    for (int64_t j = 0; j < n; ++j) {
      S log_a = lam[j];
      S u = load(x, off + j);
      if constexpr (kGated) {
        log_a = cc * sigmoid_of(static_cast<S>(load(ga, off + j))) * log_a;
        u = sigmoid_of(static_cast<S>(load(gx, off + j))) * u;
      }
      if constexpr (kNorm) u = std::sqrt(-expm1_of(S(2) * log_a)) * u;
      out[j] = exp_of(log_a) * prev[j] + u;
    }
    prev = out;
  }
}

// Reverse pass of one item, t from T-1 down; writes dx, dga, dgx, dh0 and the item's share of
// sum_t dL/dloga (c r_t) into lam_row (summed over t in S in `acc`, then over the batch rows in double).
template <typename I, typename S, bool kGated, bool kNorm>
BLOCKYARD_CLONES void backward_item(const S* __restrict__ gh, const I* __restrict__ x, const I* __restrict__ ga, const I* __restrict__ gx, const S* __restrict__ la0,
                                          const S* __restrict__ h0, const S* __restrict__ h, I* __restrict__ dx, I* __restrict__ dga, I* __restrict__ dgx, S* __restrict__ dh0, double* __restrict__ lam_row,
                                          S* __restrict__ g_next, S* __restrict__ a_next, S* __restrict__ acc, int64_t row, int64_t c0, int64_t n, Args args) {
  const int64_t C = args.channels;
  const S cc = static_cast<S>(args.c);
  const S* lam = la0 + c0;
  for (int64_t j = 0; j < n; ++j) {
    g_next[j] = S(0);
    a_next[j] = S(0);
    acc[j] = S(0);
  }
  for (int64_t t = args.steps - 1; t >= 0; --t) {
    const int64_t off = (row * args.steps + t) * C + c0;
    const S* __restrict__ h_prev = t > 0 ? h + off - C : h0 + row * C + c0;
    for (int64_t j = 0; j < n; ++j) {
      S log_a = lam[j];
      S r = S(1), i = S(1);
      const S xv = load(x, off + j);
      if constexpr (kGated) {
        r = sigmoid_of(static_cast<S>(load(ga, off + j)));
        i = sigmoid_of(static_cast<S>(load(gx, off + j)));
        log_a = cc * r * log_a;
      }
      const S a = exp_of(log_a);
      const S g = gh[off + j] + a_next[j] * g_next[j];
      const S ix = i * xv;
      S m = S(1);
      S dlog_a = g * h_prev[j] * a;
      if constexpr (kNorm) {
        m = std::sqrt(-expm1_of(S(2) * log_a));
        dlog_a = dlog_a - g * ix * (a * a) / m;
      }
      const S dix = g * m;
      store(dx, off + j, dix * i);
      if constexpr (kGated) {
        store(dgx, off + j, dix * xv * i * (S(1) - i));
        store(dga, off + j, dlog_a * cc * lam[j] * r * (S(1) - r));
        acc[j] += dlog_a * (cc * r);
      } else {
        acc[j] += dlog_a;
      }
      g_next[j] = g;
      a_next[j] = a;
    }
  }
  S* d0 = dh0 + row * C + c0;
  for (int64_t j = 0; j < n; ++j) d0[j] = a_next[j] * g_next[j];
  for (int64_t j = 0; j < n; ++j) lam_row[j] = static_cast<double>(acc[j]);
}

// ----------------------------------------------------------------------------- checks and dispatch

void check_inputs(const at::Tensor& x, const c10::optional<at::Tensor>& ga, const c10::optional<at::Tensor>& gx,
                  const at::Tensor& decay, const at::Tensor& h0) {
  TORCH_CHECK(x.dim() == 3, "rg_lru: x must be (B, T, C), got ", x.sizes());
  TORCH_CHECK(x.scalar_type() == at::kFloat || x.scalar_type() == at::kBFloat16 || x.scalar_type() == at::kDouble,
              "rg_lru: x must be float32, bfloat16 or float64, got ", x.scalar_type());
  TORCH_CHECK(ga.has_value() == gx.has_value(), "rg_lru: give both gate logits or neither");
  for (const auto* g : {&ga, &gx}) {
    if (g->has_value()) {
      TORCH_CHECK((*g)->sizes() == x.sizes() && (*g)->scalar_type() == x.scalar_type() && (*g)->is_contiguous(),
                  "rg_lru: gate logits must be contiguous tensors like x");
    }
  }
  const auto st = state_type(x.scalar_type());
  TORCH_CHECK(decay.dim() == 1 && decay.size(0) == x.size(2) && decay.scalar_type() == st && decay.is_contiguous(),
              "rg_lru: decay must be a contiguous (C,) tensor of the state dtype");
  TORCH_CHECK(h0.dim() == 2 && h0.size(0) == x.size(0) && h0.size(1) == x.size(2) && h0.scalar_type() == st &&
                  h0.is_contiguous(),
              "rg_lru: h0 must be a contiguous (B, C) tensor of the state dtype");
  TORCH_CHECK(x.is_contiguous() && x.device().is_cpu(), "rg_lru: x must be a contiguous CPU tensor");
}

// log a0 = -softplus(-Lambda), with torch's own softplus (so the per-channel constant is the reference's).
at::Tensor log_base_decay(const at::Tensor& decay) { return at::neg(at::softplus(at::neg(decay))); }

template <typename F>
void dispatch_flags(bool gated, bool norm, F&& f) {
  if (gated && norm) f(std::true_type{}, std::true_type{});
  else if (gated) f(std::true_type{}, std::false_type{});
  else if (norm) f(std::false_type{}, std::true_type{});
  else f(std::false_type{}, std::false_type{});
}

at::Tensor rglru_forward(const at::Tensor& x, const c10::optional<at::Tensor>& gate_a,
                         const c10::optional<at::Tensor>& gate_x, const at::Tensor& decay, const at::Tensor& h0,
                         double c, bool input_norm) {
  check_inputs(x, gate_a, gate_x, decay, h0);
  at::Tensor h = at::empty(x.sizes(), x.options().dtype(state_type(x.scalar_type())));
  const int64_t B = x.size(0), T = x.size(1), C = x.size(2);
  if (h.numel() == 0) return h;
  const at::Tensor la0 = log_base_decay(decay);
  const Blocking blk = choose_blocking(B, C);
  const Args args{T, C, c};
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, x.scalar_type(), "blockyard_rglru_forward", [&] {
    using I = scalar_t;
    using S = compute_t<I>;
    const I* px = x.const_data_ptr<I>();
    const I* pa = opt_ptr<I>(gate_a);
    const I* pg = opt_ptr<I>(gate_x);
    const S* pl = la0.const_data_ptr<S>();
    const S* p0 = h0.const_data_ptr<S>();
    S* ph = h.mutable_data_ptr<S>();
    dispatch_flags(gate_a.has_value(), input_norm, [&](auto gated, auto norm) {
      at::parallel_for(0, B * blk.blocks, grain_items(T, blk.width), [&](int64_t begin, int64_t end) {
        for (int64_t item = begin; item < end; ++item) {
          const int64_t row = item / blk.blocks, c0 = (item % blk.blocks) * blk.width;
          forward_item<I, S, decltype(gated)::value, decltype(norm)::value>(px, pa, pg, pl, p0, ph, row, c0,
                                                                            std::min(C, c0 + blk.width) - c0, args);
        }
      });
    });
  });
  return h;
}

// Returns (dx, dgate_a, dgate_x, ddecay, dh0); the gate gradients are empty tensors when ungated.
std::tuple<at::Tensor, at::Tensor, at::Tensor, at::Tensor, at::Tensor> rglru_backward(
    const at::Tensor& grad_h, const at::Tensor& x, const c10::optional<at::Tensor>& gate_a,
    const c10::optional<at::Tensor>& gate_x, const at::Tensor& decay, const at::Tensor& h0, const at::Tensor& h,
    double c, bool input_norm) {
  check_inputs(x, gate_a, gate_x, decay, h0);
  TORCH_CHECK(grad_h.sizes() == x.sizes() && grad_h.scalar_type() == h0.scalar_type() && grad_h.is_contiguous() &&
                  h.sizes() == x.sizes() && h.scalar_type() == h0.scalar_type() && h.is_contiguous(),
              "rg_lru: grad_h and h must be contiguous (B, T, C) tensors of the state dtype");
  const int64_t B = x.size(0), T = x.size(1), C = x.size(2);
  const bool gated = gate_a.has_value();
  at::Tensor dx = at::empty_like(x);
  at::Tensor dga = gated ? at::empty_like(x) : at::empty({0}, x.options());
  at::Tensor dgx = gated ? at::empty_like(x) : at::empty({0}, x.options());
  at::Tensor dh0 = at::empty_like(h0);
  at::Tensor lam_rows = at::zeros({B, C}, h0.options().dtype(at::kDouble));
  if (x.numel() == 0) {
    dh0.zero_();
    return {dx, dga, dgx, at::zeros_like(decay), dh0};
  }
  const at::Tensor la0 = log_base_decay(decay);
  const Blocking blk = choose_blocking(B, C);
  const Args args{T, C, c};
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, x.scalar_type(), "blockyard_rglru_backward", [&] {
    using I = scalar_t;
    using S = compute_t<I>;
    const S* pgh = grad_h.const_data_ptr<S>();
    const I* px = x.const_data_ptr<I>();
    const I* pa = opt_ptr<I>(gate_a);
    const I* pg = opt_ptr<I>(gate_x);
    const S* pl = la0.const_data_ptr<S>();
    const S* p0 = h0.const_data_ptr<S>();
    const S* ph = h.const_data_ptr<S>();
    I* pdx = dx.mutable_data_ptr<I>();
    I* pdga = gated ? dga.mutable_data_ptr<I>() : nullptr;
    I* pdgx = gated ? dgx.mutable_data_ptr<I>() : nullptr;
    S* pd0 = dh0.mutable_data_ptr<S>();
    double* pacc = lam_rows.mutable_data_ptr<double>();
    dispatch_flags(gated, input_norm, [&](auto g, auto norm) {
      at::parallel_for(0, B * blk.blocks, grain_items(T, blk.width), [&](int64_t begin, int64_t end) {
        std::vector<S> g_next(blk.width), a_next(blk.width), acc(blk.width);
        for (int64_t item = begin; item < end; ++item) {
          const int64_t row = item / blk.blocks, c0 = (item % blk.blocks) * blk.width;
          backward_item<I, S, decltype(g)::value, decltype(norm)::value>(
              pgh, px, pa, pg, pl, p0, ph, pdx, pdga, pdgx, pd0, pacc + row * C + c0, g_next.data(), a_next.data(), acc.data(),
              row, c0, std::min(C, c0 + blk.width) - c0, args);
        }
      });
    });
  });
  // d log a0 / d Lambda = sigmoid(-Lambda) (derivative of -softplus(-Lambda)).
  at::Tensor ddecay = at::mul(lam_rows.sum(0), at::sigmoid(at::neg(decay.to(at::kDouble)))).to(decay.scalar_type());
  return {dx, dga, dgx, ddecay, dh0};
}


// ----------------------------------------------------------------------------- one decode step

// y[j] = bias[j] + sum_i in[i] W[blk, i, j] over each diagonal block (W: (H, w, w)); the inner
// loop runs over contiguous j, so it vectorises.
void block_diagonal_matvec(const float* __restrict__ in, const float* __restrict__ weight,
                           const float* __restrict__ bias, float* __restrict__ out, int64_t blocks, int64_t w) {
  for (int64_t blk = 0; blk < blocks; ++blk) {
    float* o = out + blk * w;
    const float* x = in + blk * w;
    const float* W = weight + blk * w * w;
    for (int64_t j = 0; j < w; ++j) o[j] = bias[blk * w + j];
    for (int64_t i = 0; i < w; ++i) {
      const float xi = x[i];
      const float* row = W + i * w;
      for (int64_t j = 0; j < w; ++j) o[j] += xi * row[j];
    }
  }
}

// One token of the recurrent branch after its input projection, for a batch of sequences:
// causal depthwise conv over (conv tail, u) (De et al. 2024, fig. 2), the gates, and the RG-LRU
// update above. Returns (h_new, new conv tail): new tensors, the given state is only read.
// The tail holds the conv inputs of the last K-1 tokens, oldest first; the new tail is the old
// one shifted by one row with u appended, written once (no concatenation of temporaries).
std::tuple<at::Tensor, at::Tensor> rglru_step(const at::Tensor& u, const at::Tensor& tail,
                                              const c10::optional<at::Tensor>& conv_w,
                                              const c10::optional<at::Tensor>& conv_b,
                                              const c10::optional<at::Tensor>& gate_a_w,
                                              const c10::optional<at::Tensor>& gate_a_b,
                                              const c10::optional<at::Tensor>& gate_x_w,
                                              const c10::optional<at::Tensor>& gate_x_b, const at::Tensor& decay,
                                              const at::Tensor& h, double c, bool input_norm) {
  TORCH_CHECK(u.dim() == 2 && u.scalar_type() == at::kFloat && u.is_contiguous(), "rg_lru step: u must be (B, C) float32");
  const int64_t B = u.size(0), C = u.size(1);
  const bool has_conv = conv_w.has_value();
  const int64_t K = has_conv ? conv_w->size(1) : 1;
  TORCH_CHECK(tail.dim() == 3 && tail.size(0) == B && tail.size(2) == C && tail.size(1) == (has_conv ? K - 1 : 0) &&
                  tail.scalar_type() == at::kFloat && tail.is_contiguous(),
              "rg_lru step: tail must be a contiguous (B, K-1, C) float32 tensor");
  TORCH_CHECK(h.sizes() == u.sizes() && h.scalar_type() == at::kFloat && h.is_contiguous(), "rg_lru step: bad h");
  TORCH_CHECK(decay.dim() == 1 && decay.size(0) == C && decay.scalar_type() == at::kFloat && decay.is_contiguous(),
              "rg_lru step: bad decay");
  const bool gated = gate_a_w.has_value();
  int64_t blocks = 1, w = C;
  if (gated) {
    blocks = gate_a_w->size(0);
    w = gate_a_w->size(1);
    TORCH_CHECK(blocks * w == C && gate_a_w->is_contiguous() && gate_x_w->is_contiguous() &&
                    gate_a_b->is_contiguous() && gate_x_b->is_contiguous(),
                "rg_lru step: gate weights must be contiguous (H, C/H, C/H)");
  }
  if (has_conv) TORCH_CHECK(conv_w->is_contiguous() && conv_b->is_contiguous(), "rg_lru step: bad conv");
  at::Tensor h_new = at::empty_like(h);
  at::Tensor new_tail = at::empty_like(tail);
  std::vector<float> v(C), ra(C), rx(C);
  const at::Tensor la0_t = log_base_decay(decay);
  const float* la0 = la0_t.const_data_ptr<float>();
  const float cc = static_cast<float>(c);
  for (int64_t b = 0; b < B; ++b) {
    const float* ub = u.const_data_ptr<float>() + b * C;
    const float* tb = tail.const_data_ptr<float>() + b * (K - 1) * C;
    float* nt = new_tail.mutable_data_ptr<float>() + b * (K - 1) * C;
    if (has_conv) {  // v = bias + sum_k w[:, k] * input_{t-K+1+k}
      const float* cw = conv_w->const_data_ptr<float>();
      const float* cb = conv_b->const_data_ptr<float>();
      for (int64_t j = 0; j < C; ++j) {
        float acc = cb[j];
        for (int64_t k = 0; k + 1 < K; ++k) acc += cw[j * K + k] * tb[k * C + j];
        v[j] = acc + cw[j * K + K - 1] * ub[j];
      }
      if (K > 1) {
        std::memcpy(nt, tb + C, sizeof(float) * (K - 2) * C);
        std::memcpy(nt + (K - 2) * C, ub, sizeof(float) * C);
      }
    } else {
      std::memcpy(v.data(), ub, sizeof(float) * C);
    }
    if (gated) {
      block_diagonal_matvec(v.data(), gate_a_w->const_data_ptr<float>(), gate_a_b->const_data_ptr<float>(), ra.data(),
                            blocks, w);
      block_diagonal_matvec(v.data(), gate_x_w->const_data_ptr<float>(), gate_x_b->const_data_ptr<float>(), rx.data(),
                            blocks, w);
    }
    const float* hb = h.const_data_ptr<float>() + b * C;
    float* out = h_new.mutable_data_ptr<float>() + b * C;
    for (int64_t j = 0; j < C; ++j) {
      float log_a = la0[j];
      float x = v[j];
      if (gated) {
        log_a = cc * sigmoid_of(ra[j]) * log_a;
        x = sigmoid_of(rx[j]) * x;
      }
      if (input_norm) x = std::sqrt(-expm1_of(2.0f * log_a)) * x;
      out[j] = exp_of(log_a) * hb[j] + x;
    }
  }
  return {h_new, new_tail};
}

}  // namespace

TORCH_LIBRARY_FRAGMENT(BLOCKYARD_SCAN_NS, m) {
  m.def("rglru_forward(Tensor x, Tensor? gate_a, Tensor? gate_x, Tensor decay, Tensor h0, float c, bool input_norm)"
        " -> Tensor",
        &rglru_forward);
  m.def("rglru_backward(Tensor grad_h, Tensor x, Tensor? gate_a, Tensor? gate_x, Tensor decay, Tensor h0, Tensor h,"
        " float c, bool input_norm) -> (Tensor, Tensor, Tensor, Tensor, Tensor)",
        &rglru_backward);
  m.def("rglru_step(Tensor u, Tensor tail, Tensor? conv_w, Tensor? conv_b, Tensor? gate_a_w, Tensor? gate_a_b,"
        " Tensor? gate_x_w, Tensor? gate_x_b, Tensor decay, Tensor h, float c, bool input_norm) -> (Tensor, Tensor)",
        &rglru_step);
}
