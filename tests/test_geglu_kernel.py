"""The fused GeGLU ops (``blockyard/kernels/geglu_cpu.cpp``: the MLP's, and the recurrence block's
GeLU(gate) * y) against torch's GeLU and the references.

Sources: GeGLU(x) = GeLU(x W) * (x V) (Shazeer 2020, arXiv:2002.05202, eq. 5); GeLU(a) = a Phi(a) with
the exact normal CDF (Hendrycks & Gimpel 2016, arXiv:1606.08415, sec. 2); torch's ``F.gelu`` (exact
form) and ``torch.special.erf`` are the outside references. The op's float erf is Abramowitz &
Stegun 1964, eq. 7.1.26, whose stated bound |error| <= 1.5e-7 is checked here too.
"""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from blockyard.kernels import build, kernels_info
from blockyard.kernels.ops import (
    geglu_backward_op,
    geglu_fused,
    geglu_op,
    gelu_mul_backward_op,
    gelu_mul_fused,
    gelu_mul_op,
)
from blockyard.model import MLP, geglu, geglu_reference

# bf16 keeps 8 significant bits: one round-to-nearest is off by at most 2^-9 relative (IEEE-754
# rounding, common practice, no source). The reference rounds each of its ops' outputs to bf16 and
# the fused op only its result, so the two may differ by a few roundings: 2^-6 relative.
BF16_RTOL = 2.0**-6


def values_and_grads(fn, h, seed=1, dtype=None):
    """fn(h) and dL/dh for L = sum(fn(h) * g), g random, rounded to ``dtype`` (default h's) and then cast to h's."""
    h = h.detach().clone().requires_grad_(True)
    y = fn(h)
    g = torch.randn(y.shape, generator=torch.Generator().manual_seed(seed)).to(dtype or y.dtype).to(y.dtype)
    (grad,) = torch.autograd.grad(y, h, g)
    return y.detach(), grad


def test_erf_within_the_published_bound(kernels):
    # GeLU(a) * 1 = a Phi(a): the op's erf against torch.special.erf (float64) over [-10, 10];
    # A&S 7.1.26 bounds erf's error by 1.5e-7, so Phi's by 7.5e-8, plus float32 rounding of a Phi(a).
    a = torch.linspace(-10, 10, 400_001, dtype=torch.float64)
    h = torch.stack([a, torch.ones_like(a)], dim=-1).float()
    got = geglu_fused(h)[:, 0].double()
    want = a * 0.5 * (1 + torch.special.erf(a / 2**0.5))
    err = (got - want).abs() - 7.5e-8 * a.abs()
    assert err.max() <= 2 * torch.finfo(torch.float32).eps * want.abs().max()
    torch.testing.assert_close(geglu_fused(h)[:, 0], F.gelu(h[:, 0]), atol=2e-6, rtol=1e-6)


@pytest.mark.parametrize("shape", [(4, 33, 140), (1, 1, 2), (3, 2, 5, 18)])
def test_fused_matches_reference_fp32(kernels, shape):
    h = 3 * torch.randn(shape, generator=torch.Generator().manual_seed(0))
    got, want = values_and_grads(geglu_fused, h), values_and_grads(geglu_reference, h)
    for g, w in zip(got, want, strict=True):
        torch.testing.assert_close(g, w, atol=1e-5, rtol=1e-5)


def test_fused_bf16_within_the_rounding_bound(kernels):
    h = (3 * torch.randn(8, 64, 96, generator=torch.Generator().manual_seed(2))).bfloat16()
    (y, grad), (y_ref, grad_ref) = values_and_grads(geglu_fused, h), values_and_grads(geglu_reference, h)
    assert y.dtype == grad.dtype == torch.bfloat16
    # Against float64 math on the same bf16 inputs: the fused op rounds once.
    y64, grad64 = values_and_grads(geglu_reference, h.double(), dtype=torch.bfloat16)
    torch.testing.assert_close(y.double(), y64, rtol=2.0**-8, atol=1e-6)
    torch.testing.assert_close(grad.double(), grad64, rtol=2.0**-8, atol=1e-6)
    torch.testing.assert_close(y, y_ref, rtol=BF16_RTOL, atol=1e-2)
    torch.testing.assert_close(grad, grad_ref, rtol=BF16_RTOL, atol=1e-2)


def test_gradcheck_float64(kernels):
    # Finite differences against the hand-derived backward (float64 runs std::erf).
    h = torch.randn(2, 3, 10, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(geglu_fused, (h,))
    assert torch.autograd.gradcheck(geglu_reference, (h,))


def test_odd_width_is_refused():
    h = torch.randn(4, 6, 20)
    with pytest.raises(ValueError, match="halves"):
        geglu_fused(h[..., :19])


def test_strided_input_is_copied(kernels):
    h = torch.randn(6, 4, 20).transpose(0, 1)  # not contiguous
    torch.testing.assert_close(geglu_fused(h), geglu_reference(h), atol=1e-5, rtol=1e-5)


def test_fake_kernels_give_shapes_and_dtypes_without_running():
    from torch._subclasses.fake_tensor import FakeTensorMode

    with FakeTensorMode():
        h = torch.empty(4, 16, 24, dtype=torch.bfloat16)
        y = geglu_op(h)
        assert y.shape == (4, 16, 12) and y.dtype == torch.bfloat16
        grad = geglu_backward_op(y, h)
        assert grad.shape == h.shape and grad.dtype == torch.bfloat16


def test_backend_choice_and_fallback(kernels, monkeypatch):
    # runtime.kernels picks the MLP's GeGLU too: compiled -> the op, chunked -> torch's ops; a machine
    # whose build failed (simulated) falls back to torch's ops under auto.
    mlp = MLP(8, 12, "gated", kernels="auto")
    x = torch.randn(2, 5, 8)
    calls = []
    monkeypatch.setattr("blockyard.model.geglu_fused", lambda h: calls.append(h.shape) or geglu_reference(h))
    mlp(x)
    assert calls == [(2, 5, 24)]
    MLP(8, 12, "gated", kernels="torch")(x)
    assert len(calls) == 1
    failed = build._BuildState()
    failed.state, failed.error = "failed", "RuntimeError: simulated: no compiler here"
    monkeypatch.setattr(build, "_STATE", failed)
    h = torch.randn(3, 8)
    assert torch.equal(geglu(h, "auto"), geglu_reference(h)) and len(calls) == 1
    assert kernels_info("auto")["geglu_rms_norm_cpu"] == "PyTorch ops"


# ----------------------------------------------------------------------------- the two-input form


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_gelu_mul_matches_torch_on_a_strided_half(kernels, dtype):
    # The recurrence block's use: a is the gate half of a projection's output (a strided view), b its
    # own contiguous tensor; values and both gradients equal torch's F.gelu(a) * b.
    gen = torch.Generator().manual_seed(4)
    proj = (3 * torch.randn(3, 17, 2 * 24, generator=gen)).to(dtype).requires_grad_(True)
    b = torch.randn(3, 17, 24, generator=gen).to(dtype).requires_grad_(True)
    g = torch.randn(3, 17, 24, generator=gen).to(dtype)
    a = proj[..., :24]
    assert not a.is_contiguous()
    got = gelu_mul_fused(a, b)
    got_grads = torch.autograd.grad(got, (proj, b), g)
    want = F.gelu(a) * b
    want_grads = torch.autograd.grad(want, (proj, b), g)
    torch.testing.assert_close(got, want, atol=1e-5, rtol=1e-5)
    for x, y in zip(got_grads, want_grads, strict=True):
        torch.testing.assert_close(x, y, atol=1e-5, rtol=1e-5)


def test_gelu_mul_bf16_and_gradcheck(kernels):
    gen = torch.Generator().manual_seed(5)
    a, b = (2 * torch.randn(2, 9, 16, generator=gen)).bfloat16(), torch.randn(2, 9, 16, generator=gen).bfloat16()
    torch.testing.assert_close(gelu_mul_fused(a, b).double(), F.gelu(a.double()) * b.double(), rtol=2.0**-8,
                               atol=1e-6)
    a64 = torch.randn(2, 3, 6, dtype=torch.float64, requires_grad=True)
    b64 = torch.randn(2, 3, 6, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(gelu_mul_fused, (a64, b64))
    with pytest.raises(TypeError, match="same-shaped"):
        gelu_mul_fused(a64, b64[..., :5])


def test_gelu_mul_fake_kernels():
    from torch._subclasses.fake_tensor import FakeTensorMode

    with FakeTensorMode():
        a = torch.empty(12, 8, dtype=torch.bfloat16)
        y = gelu_mul_op(a, a)
        assert y.shape == (12, 8) and y.dtype == torch.bfloat16
        da, db = gelu_mul_backward_op(y, a, a)
        assert da.shape == db.shape == (12, 8)


def test_recurrence_block_uses_the_op_only_under_the_compiled_backend(kernels, monkeypatch):
    from blockyard.mixers import recurrence
    from blockyard.mixers.recurrence import RecurrenceBlock, RecurrenceOptions

    calls = []
    monkeypatch.setattr(recurrence, "gelu_mul_fused", lambda a, b: calls.append(a.shape) or F.gelu(a) * b)
    x = torch.randn(2, 6, 16)
    RecurrenceBlock(16, RecurrenceOptions(), layer=0, depth=1, kernels="compiled")(x)
    assert calls == [(2, 6, 16)]
    RecurrenceBlock(16, RecurrenceOptions(), layer=0, depth=1, kernels="torch")(x)
    assert len(calls) == 1
