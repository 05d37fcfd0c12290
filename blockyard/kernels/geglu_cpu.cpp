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
// A two-input form (gelu_mul) takes a and b as separate (N, H) tensors, rows at any stride.

#include <ATen/Dispatch.h>
#include <ATen/Parallel.h>
#include <ATen/core/Tensor.h>
#include <ATen/ops/empty.h>
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

// out[j] = GeLU(a[j]) * b[j] over one row, in the compute type S.
template <typename S>
BLOCKYARD_CLONES void geglu_forward_row(const S* __restrict__ a, const S* __restrict__ b, S* __restrict__ out,
                                        int64_t H) {
  for (int64_t j = 0; j < H; ++j) {
    S cdf, pdf;  // the density is not needed here; the compiler drops its one multiply
    normal_cdf_pdf(a[j], cdf, pdf);
    out[j] = a[j] * cdf * b[j];
  }
}

// da[j] = g b GeLU'(a), db[j] = g GeLU(a) over one row, in the compute type S.
template <typename S>
BLOCKYARD_CLONES void geglu_backward_row(const S* __restrict__ g, const S* __restrict__ a, const S* __restrict__ b,
                                         S* __restrict__ da, S* __restrict__ db, int64_t H) {
  for (int64_t j = 0; j < H; ++j) {
    S cdf, pdf;
    normal_cdf_pdf(a[j], cdf, pdf);
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

// Rows [r0, r1) of out = GeLU(a) * b; a and b rows at strides sa and sb, out rows contiguous. float and
// double rows are computed in place; bfloat16 rows are widened into a float buffer first and rounded
// back after (separate loops keep the math loop a pure float loop).
template <typename I, typename S>
void forward_rows(const I* a, int64_t sa, const I* b, int64_t sb, I* out, int64_t r0, int64_t r1, int64_t H) {
  if constexpr (std::is_same_v<I, S>) {
    for (int64_t r = r0; r < r1; ++r) geglu_forward_row<S>(a + r * sa, b + r * sb, out + r * H, H);
  } else {
    std::vector<S> buf(3 * H);
    for (int64_t r = r0; r < r1; ++r) {
      widen(a + r * sa, buf.data(), H);
      widen(b + r * sb, buf.data() + H, H);
      geglu_forward_row<S>(buf.data(), buf.data() + H, buf.data() + 2 * H, H);
      narrow(buf.data() + 2 * H, out + r * H, H);
    }
  }
}

// Rows [r0, r1) of the backward: da, db rows at strides sda, sdb (the packed GeGLU writes both halves
// of one (N, 2H) row; the two-input op two contiguous tensors).
template <typename I, typename S>
void backward_rows(const I* g, const I* a, int64_t sa, const I* b, int64_t sb, I* da, int64_t sda, I* db,
                   int64_t sdb, int64_t r0, int64_t r1, int64_t H) {
  if constexpr (std::is_same_v<I, S>) {
    for (int64_t r = r0; r < r1; ++r)
      geglu_backward_row<S>(g + r * H, a + r * sa, b + r * sb, da + r * sda, db + r * sdb, H);
  } else {
    std::vector<S> buf(5 * H);
    S* gb = buf.data();
    for (int64_t r = r0; r < r1; ++r) {
      widen(g + r * H, gb, H);
      widen(a + r * sa, gb + H, H);
      widen(b + r * sb, gb + 2 * H, H);
      geglu_backward_row<S>(gb, gb + H, gb + 2 * H, gb + 3 * H, gb + 4 * H, H);
      narrow(gb + 3 * H, da + r * sda, H);
      narrow(gb + 4 * H, db + r * sdb, H);
    }
  }
}

void check_h(const at::Tensor& h) {
  TORCH_CHECK(h.device().is_cpu() && h.is_contiguous() && h.dim() >= 1 && h.size(-1) % 2 == 0,
              "geglu: h must be a contiguous CPU tensor with an even last dim");
}

at::Tensor geglu_forward(const at::Tensor& h) {
  check_h(h);
  const int64_t H = h.size(-1) / 2, N = H ? h.numel() / (2 * H) : 0;
  auto sizes = h.sizes().vec();
  sizes.back() = H;
  at::Tensor out = at::empty(sizes, h.options());
  if (out.numel() == 0) return out;
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, h.scalar_type(), "blockyard_geglu_forward", [&] {
    using I = scalar_t;
    using S = compute_t<I>;
    const I* ph = h.const_data_ptr<I>();
    I* po = out.mutable_data_ptr<I>();
    at::parallel_for(0, N, grain_rows(H),
                     [&](int64_t r0, int64_t r1) { forward_rows<I, S>(ph, 2 * H, ph + H, 2 * H, po, r0, r1, H); });
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
    using S = compute_t<I>;
    const I* pg = grad.const_data_ptr<I>();
    const I* ph = h.const_data_ptr<I>();
    I* pd = dh.mutable_data_ptr<I>();
    at::parallel_for(0, N, grain_rows(H),
                     [&](int64_t r0, int64_t r1) {
                       backward_rows<I, S>(pg, ph, 2 * H, ph + H, 2 * H, pd, 2 * H, pd + H, 2 * H, r0, r1, H);
                     });
  });
  return dh;
}

// The two-input form: out = GeLU(a) * b for (N, H) a and b of one dtype, rows at any stride, the last
// dim contiguous (the recurrence block's GeLU(gate) * RG-LRU output, gate a view into its projection).
void check_pair(const at::Tensor& a, const at::Tensor& b) {
  TORCH_CHECK(a.device().is_cpu() && a.dim() == 2 && a.sizes() == b.sizes() && a.scalar_type() == b.scalar_type() &&
                  (a.size(1) <= 1 || (a.stride(1) == 1 && b.stride(1) == 1)),
              "gelu_mul: a and b must be (N, H) CPU tensors of one dtype with contiguous rows");
}

at::Tensor gelu_mul_forward(const at::Tensor& a, const at::Tensor& b) {
  check_pair(a, b);
  const int64_t N = a.size(0), H = a.size(1);
  at::Tensor out = at::empty({N, H}, a.options());
  if (out.numel() == 0) return out;
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, a.scalar_type(), "blockyard_gelu_mul_forward", [&] {
    using I = scalar_t;
    using S = compute_t<I>;
    const I* pa = a.const_data_ptr<I>();
    const I* pb = b.const_data_ptr<I>();
    I* po = out.mutable_data_ptr<I>();
    at::parallel_for(0, N, grain_rows(H), [&](int64_t r0, int64_t r1) {
      forward_rows<I, S>(pa, a.stride(0), pb, b.stride(0), po, r0, r1, H);
    });
  });
  return out;
}

std::tuple<at::Tensor, at::Tensor> gelu_mul_backward(const at::Tensor& grad, const at::Tensor& a, const at::Tensor& b) {
  check_pair(a, b);
  const int64_t N = a.size(0), H = a.size(1);
  TORCH_CHECK(grad.is_contiguous() && grad.sizes() == a.sizes() && grad.scalar_type() == a.scalar_type(),
              "gelu_mul: grad must be a contiguous (N, H) tensor of a's dtype");
  at::Tensor da = at::empty({N, H}, a.options()), db = at::empty({N, H}, a.options());
  if (da.numel() == 0) return {da, db};
  AT_DISPATCH_FLOATING_TYPES_AND(at::kBFloat16, a.scalar_type(), "blockyard_gelu_mul_backward", [&] {
    using I = scalar_t;
    using S = compute_t<I>;
    const I* pg = grad.const_data_ptr<I>();
    const I* pa = a.const_data_ptr<I>();
    const I* pb = b.const_data_ptr<I>();
    I* pda = da.mutable_data_ptr<I>();
    I* pdb = db.mutable_data_ptr<I>();
    at::parallel_for(0, N, grain_rows(H), [&](int64_t r0, int64_t r1) {
      backward_rows<I, S>(pg, pa, a.stride(0), pb, b.stride(0), pda, H, pdb, H, r0, r1, H);
    });
  });
  return {da, db};
}

}  // namespace

TORCH_LIBRARY_FRAGMENT(BLOCKYARD_SCAN_NS, m) {
  m.def("geglu_forward(Tensor h) -> Tensor", &geglu_forward);
  m.def("geglu_backward(Tensor grad, Tensor h) -> Tensor", &geglu_backward);
  m.def("gelu_mul_forward(Tensor a, Tensor b) -> Tensor", &gelu_mul_forward);
  m.def("gelu_mul_backward(Tensor grad, Tensor a, Tensor b) -> (Tensor, Tensor)", &gelu_mul_backward);
}
