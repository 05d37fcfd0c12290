"""The fused RMSNorm op (``blockyard/kernels/rmsnorm_cpu.cpp``) against torch's RMSNorm.

Source of the math: Zhang & Sennrich 2019 (arXiv:1910.07467), eq. 4: y = x / RMS(x) * g with
RMS(x) = sqrt(mean(x^2) + eps). The outside reference is torch's ``nn.functional.rms_norm`` with its
autograd; ``gradcheck`` checks the hand-derived backward against finite differences.
"""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from blockyard.kernels import build
from blockyard.kernels.ops import rms_norm_backward_op, rms_norm_fused, rms_norm_op
from blockyard.model import RMSNorm


def values_and_grads(fn, x, w, seed=1):
    x, w = x.detach().clone().requires_grad_(True), w.detach().clone().requires_grad_(True)
    y = fn(x, w)
    g = torch.randn(y.shape, generator=torch.Generator().manual_seed(seed)).to(y.dtype)
    return [y.detach(), *torch.autograd.grad(y, (x, w), g)]


def torch_rms_norm(x, w, eps=1e-6):
    return F.rms_norm(x, (x.shape[-1],), w, eps)


@pytest.mark.parametrize("shape", [(4, 33, 64), (1, 1, 7), (2, 3, 5, 40), (300, 256)])
def test_fused_matches_torch_fp32(kernels, shape):
    gen = torch.Generator().manual_seed(0)
    x = 2 * torch.randn(shape, generator=gen) + 0.5
    w = 1 + 0.1 * torch.randn(shape[-1], generator=gen)
    got = values_and_grads(lambda a, b: rms_norm_fused(a, b, 1e-6), x, w)
    want = values_and_grads(torch_rms_norm, x, w)
    for g, r in zip(got, want, strict=True):
        torch.testing.assert_close(g, r, atol=1e-5, rtol=1e-5)


def test_fused_bf16_input_within_one_rounding(kernels):
    # bf16 x (a bf16 residual stream): computed in float, rounded once; against float64 math on the
    # same bf16 values, within one bf16 rounding (2^-8 relative, IEEE-754; common practice, no source).
    gen = torch.Generator().manual_seed(1)
    x = torch.randn(8, 50, 96, generator=gen).bfloat16()
    w = 1 + 0.1 * torch.randn(96, generator=gen)
    y = rms_norm_fused(x, w, 1e-6)
    assert y.dtype == torch.bfloat16
    torch.testing.assert_close(y.double(), torch_rms_norm(x.double(), w.double()), rtol=2.0**-8, atol=1e-6)


def test_gradcheck_float64(kernels):
    x = torch.randn(3, 4, 12, dtype=torch.float64, requires_grad=True)
    w = torch.randn(12, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(lambda a, b: rms_norm_fused(a, b, 1e-5), (x, w))


def test_weight_gradient_does_not_depend_on_the_thread_count(kernels):
    # dL/dw sums over rows in fixed chunks, so its value is the same on 1 and 2 threads (bit for bit).
    x, w = torch.randn(500, 64), torch.randn(64)
    before = torch.get_num_threads()
    try:
        torch.set_num_threads(1)
        one = values_and_grads(lambda a, b: rms_norm_fused(a, b, 1e-6), x, w)
        torch.set_num_threads(2)
        two = values_and_grads(lambda a, b: rms_norm_fused(a, b, 1e-6), x, w)
    finally:
        torch.set_num_threads(before)
    assert all(torch.equal(a, b) for a, b in zip(one, two, strict=True))


def test_fake_kernels_give_shapes_and_dtypes_without_running():
    from torch._subclasses.fake_tensor import FakeTensorMode

    with FakeTensorMode():
        x, w = torch.empty(10, 16, dtype=torch.bfloat16), torch.empty(16)
        y, rstd = rms_norm_op(x, w, 1e-6)
        assert y.shape == (10, 16) and y.dtype == torch.bfloat16 and rstd.shape == (10,)
        dx, dw = rms_norm_backward_op(y, x, w, rstd)
        assert dx.shape == x.shape and dx.dtype == torch.bfloat16 and dw.shape == (16,)


def test_module_keeps_torchs_state_dict_and_falls_back(kernels, monkeypatch):
    # The model's RMSNorm is an nn.RMSNorm (same "weight" key, loads torch's); runtime.kernels: chunked and
    # a failed build (simulated) run torch's forward, compiled runs the op; all give torch's values.
    torch_norm = torch.nn.RMSNorm(16, eps=1e-6)
    with torch.no_grad():
        torch_norm.weight.normal_()
    x = torch.randn(3, 5, 16)
    for backend in ("compiled", "torch", "auto"):
        norm = RMSNorm(16, 1e-6, kernels=backend)
        norm.load_state_dict(torch_norm.state_dict())
        assert isinstance(norm, torch.nn.RMSNorm)
        torch.testing.assert_close(norm(x), torch_norm(x), atol=1e-6, rtol=1e-5)
    calls = []
    monkeypatch.setattr("blockyard.model.rms_norm_fused", lambda *a: calls.append(1) or torch_norm(a[0]))
    RMSNorm(16, 1e-6, kernels="compiled")(x)
    RMSNorm(16, 1e-6, kernels="torch")(x)
    assert calls == [1]
    with torch.no_grad():  # inference (eval, decode): torch's forward, one fused kernel already
        RMSNorm(16, 1e-6, kernels="compiled")(x)
    assert calls == [1]
    failed = build._BuildState()
    failed.state, failed.error = "failed", "RuntimeError: simulated: no compiler here"
    monkeypatch.setattr(build, "_STATE", failed)
    RMSNorm(16, 1e-6, kernels="auto")(x)
    assert calls == [1]
