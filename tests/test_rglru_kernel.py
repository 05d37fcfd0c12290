"""The fused C++ RG-LRU op against the composed PyTorch reference and the published equations.

Source of the math: De et al. 2024 (arXiv:2402.19427), sec. 2.4, eqs. 1-4 (recurrence gate,
input gate, a_t = sigmoid(Lambda)^(c r_t), h_t = a_t h_{t-1} + sqrt(1 - a_t^2) (i_t x_t)).
``rg_lru_reference`` writes those equations as PyTorch ops with autograd; the fused op
(``blockyard/kernels/rglru_cpu.cpp``) has a hand-derived backward, so comparing gradients checks
that derivation, and ``gradcheck`` checks both against finite differences.
"""

from __future__ import annotations

import pytest
import torch

from blockyard.kernels import build, kernels_info, scan_reference
from blockyard.kernels.ops import (
    causal_conv_backward_op,
    causal_conv_fused,
    causal_conv_op,
    rg_lru_backward_op,
    rg_lru_fused,
    rg_lru_op,
)
from blockyard.mixers.recurrence import causal_depthwise_conv, rg_lru, rg_lru_reference, uses_fused_op

# bf16 keeps 8 significant bits: one round-to-nearest is off by at most 2^-9 relative (IEEE-754
# rounding, common practice, no source); gradients that leave the op in bf16 are rounded once.
BF16_GRAD_RTOL = 2.0**-8


def inputs(shape, *, gated=True, dtype=torch.float32, seed=0):
    """x, Lambda, gate logits (or None), h0 as leaves that require grad."""
    gen = torch.Generator().manual_seed(seed)
    batch, _, channels = shape
    sdt = torch.promote_types(dtype, torch.float32)
    x = torch.randn(shape, generator=gen).to(dtype)
    lam = (torch.randn(channels, generator=gen) + 2.0).to(sdt)  # decays around the published init range
    ga = torch.randn(shape, generator=gen).to(dtype) if gated else None
    gx = torch.randn(shape, generator=gen).to(dtype) if gated else None
    h0 = torch.randn(batch, channels, generator=gen).to(sdt)
    leaves = [t for t in (x, lam, ga, gx, h0) if t is not None]
    for t in leaves:
        t.requires_grad_(True)
    return x, lam, ga, gx, h0


def values_and_grads(fn, x, lam, ga, gx, h0, *, c, input_norm, seed=1):
    h = fn(x, lam, ga, gx, c=c, input_norm=input_norm, h0=h0)
    weight = torch.randn(h.shape, generator=torch.Generator().manual_seed(seed), dtype=h.dtype)
    leaves = [t for t in (x, lam, ga, gx, h0) if t is not None]
    grads = torch.autograd.grad((h * weight).sum(), leaves)
    return [h.detach(), *grads]


def reference(x, lam, ga, gx, *, c, input_norm, h0):
    return rg_lru_reference(x, lam, ga, gx, c=c, input_norm=input_norm, h0=h0, scan=scan_reference)


SHAPES = [(1, 1, 1), (2, 1, 5), (3, 37, 20), (2, 64, 33), (1, 9, 64)]
FLAGS = [(True, True), (True, False), (False, True), (False, False)]


@pytest.mark.parametrize("shape", SHAPES, ids=str)
@pytest.mark.parametrize(("gated", "input_norm"), FLAGS, ids=["gated-norm", "gated", "fixed-norm", "fixed"])
def test_fused_matches_reference_fp32(kernels, shape, gated, input_norm):
    # fp32 atol 1e-5, forward and the gradients wrt x, Lambda, both gate logits and h0 (issue 19's check).
    args = inputs(shape, gated=gated, seed=sum(shape))
    got = values_and_grads(rg_lru_fused, *args, c=8.0, input_norm=input_norm)
    want = values_and_grads(reference, *args, c=8.0, input_norm=input_norm)
    for name, g, w in zip(("h", "x", "Lambda", "gate_a", "gate_x", "h0"), got, want, strict=False):
        torch.testing.assert_close(g, w, atol=1e-5, rtol=1e-5, msg=lambda m, name=name: f"{name}: {m}")


def test_fused_matches_reference_with_other_c_and_no_h0(kernels):
    x, lam, ga, gx, _ = inputs((2, 50, 24), seed=5)
    got = values_and_grads(rg_lru_fused, x, lam, ga, gx, None, c=3.0, input_norm=True)
    want = values_and_grads(reference, x, lam, ga, gx, None, c=3.0, input_norm=True)
    for g, w in zip(got, want, strict=True):
        torch.testing.assert_close(g, w, atol=1e-5, rtol=1e-5)


def test_fused_bf16_inputs_within_the_rounding_bound(kernels):
    # bf16 x and gate logits, float32 state: the reference upcasts the same bf16 values to fp32, so
    # the states agree to fp32 accuracy; gradients wrt the bf16 inputs are rounded to bf16 once (both
    # paths), so they agree within one bf16 rounding of the fp32 gradient (BF16_GRAD_RTOL).
    args = inputs((2, 40, 32), dtype=torch.bfloat16, seed=3)
    got = values_and_grads(rg_lru_fused, *args, c=8.0, input_norm=True)
    want = values_and_grads(reference, *args, c=8.0, input_norm=True)
    assert got[0].dtype == torch.float32 and got[1].dtype == torch.bfloat16
    torch.testing.assert_close(got[0], want[0], atol=1e-5, rtol=1e-5)
    for g, w in zip(got[1:], want[1:], strict=True):
        assert g.dtype == w.dtype
        torch.testing.assert_close(g.float(), w.float(), atol=1e-5, rtol=BF16_GRAD_RTOL)


@pytest.mark.parametrize("gated", [True, False])
def test_gradcheck_float64_reference_and_fused(kernels, gated):
    # Finite differences (torch.autograd.gradcheck) against autograd through the published
    # equations, and against the fused op's hand-derived backward (it runs float64 too).
    x, lam, ga, gx, h0 = (None if t is None else t.detach().double().requires_grad_()
                          for t in inputs((2, 6, 3), gated=gated, seed=7))
    leaves = [t for t in (x, lam, ga, gx, h0) if t is not None]

    def call(fn):
        def f(*ts):
            it = iter(ts)
            xx, ll = next(it), next(it)
            a, g = (next(it), next(it)) if gated else (None, None)
            return fn(xx, ll, a, g, c=8.0, input_norm=True, h0=next(it))
        return f

    assert torch.autograd.gradcheck(call(reference), leaves)
    assert torch.autograd.gradcheck(call(rg_lru_fused), leaves)


def test_fake_kernels_give_shapes_and_dtypes_without_running():
    # FakeTensorMode (torch's shape propagation, what torch.compile traces with): the op and its
    # backward op give the right shapes and dtypes; no kernel runs, so no build is needed.
    from torch._subclasses.fake_tensor import FakeTensorMode

    with FakeTensorMode():
        x = torch.empty(4, 16, 8, dtype=torch.bfloat16)
        lam, h0 = torch.empty(8), torch.empty(4, 8)
        h = rg_lru_op(x, x, x, lam, h0, 8.0, True)
        assert h.shape == (4, 16, 8) and h.dtype == torch.float32
        grads = rg_lru_backward_op(h, x, x, x, lam, h0, h, 8.0, True)
        assert [tuple(g.shape) for g in grads] == [(4, 16, 8)] * 3 + [(8,), (4, 8)]
        assert [g.dtype for g in grads] == [torch.bfloat16] * 3 + [torch.float32] * 2
        ungated = rg_lru_backward_op(h, x, None, None, lam, h0, h, 8.0, False)
        assert ungated[1].numel() == 0 and ungated[2].numel() == 0


def test_memory_estimate_traces_the_compiled_path(kernels):
    # The activation estimate runs the model under FakeTensorMode; with the fused op's fake kernel it
    # follows the compiled path, which saves less than the composed ops (x, gates and h; no intermediates).
    from blockyard.config import config_from_dict
    from blockyard.cost.memory import estimate_activation_memory

    cfg = config_from_dict({"model": {"width": 32, "depth": 1, "pattern": ["recurrence"]}}).model
    fused = estimate_activation_memory(cfg, 64, 2, 16, kernels="compiled")
    composed = estimate_activation_memory(cfg, 64, 2, 16, kernels="torch")
    assert 0 < fused.parts["block:0"] < composed.parts["block:0"]


def test_auto_falls_back_to_the_reference_when_the_build_failed(monkeypatch):
    # A machine where the kernels cannot be built (simulated: the build state says it failed):
    # auto runs the composed PyTorch path, gives the reference's values and says so for env.json.
    failed = build._BuildState()
    failed.state, failed.error = "failed", "RuntimeError: simulated: no compiler here"
    monkeypatch.setattr(build, "_STATE", failed)
    x, lam, ga, gx, h0 = inputs((2, 30, 8), seed=9)
    assert not uses_fused_op(x, "auto")
    got = values_and_grads(rg_lru, x, lam, ga, gx, h0, c=8.0, input_norm=True)
    want = values_and_grads(reference, x, lam, ga, gx, h0, c=8.0, input_norm=True)
    for g, w in zip(got, want, strict=True):
        torch.testing.assert_close(g, w, atol=1e-5, rtol=1e-5)
    info = kernels_info("auto")
    assert info["rg_lru_cpu"] == "PyTorch ops around the chunked scan" and "simulated" in info["compiled"]["error"]
    with pytest.raises(RuntimeError, match="unavailable: RuntimeError: simulated"):
        rg_lru_fused(x, lam, ga, gx, h0=h0)


def test_backend_choice_reaches_the_op(kernels):
    x = torch.randn(1, 3, 4)
    assert uses_fused_op(x, "auto") and uses_fused_op(x, "compiled")
    assert not uses_fused_op(x, "torch") and not uses_fused_op(x, "reference")
    assert not uses_fused_op(x.to(torch.float16), "auto")  # not a dtype of the op


@pytest.mark.parametrize(("gate", "conv_width", "input_norm"), [(True, 4, True), (False, 0, False), (True, 1, False),
                                                                 (False, 3, True)])
def test_fused_step_equals_the_composed_step_and_leaves_the_state_alone(kernels, gate, conv_width, input_norm):
    # The one-call decode step (conv, gates, RG-LRU update in C++) against the composed ops' step,
    # token by token from the same states; the state it is given is never written to.
    from blockyard.mixers import MIXERS
    from blockyard.mixers.recurrence import RecurrenceOptions

    torch.manual_seed(11)
    opts = RecurrenceOptions(gate=gate, conv_width=conv_width, input_norm=input_norm)
    fused = MIXERS["recurrence"](16, opts, layer=0, depth=2, kernels="compiled")
    composed = MIXERS["recurrence"](16, opts, layer=0, depth=2, kernels="torch")
    composed.load_state_dict(fused.state_dict())
    x = torch.randn(3, 6, 16)
    with torch.no_grad():
        assert fused._fused_step_applies(x[:, 0]) and not composed._fused_step_applies(x[:, 0])
        s_fused, s_comp = fused.init_state(3), composed.init_state(3)
        for t in range(x.shape[1]):
            before = [s_fused.h.clone(), s_fused.conv_tail.clone()]
            y1, new_fused = fused.step(x[:, t], s_fused)
            y2, s_comp = composed.step(x[:, t], s_comp)
            assert torch.equal(s_fused.h, before[0]) and torch.equal(s_fused.conv_tail, before[1])
            s_fused = new_fused
            torch.testing.assert_close(y1, y2, atol=1e-5, rtol=1e-5)
            torch.testing.assert_close(s_fused.h, s_comp.h, atol=1e-5, rtol=1e-5)
            torch.testing.assert_close(s_fused.conv_tail, s_comp.conv_tail, atol=0, rtol=0)


# ----------------------------------------------------------------------------- causal depthwise conv
# The C++ conv (conv_cpu.cpp, causal_conv_*) against the block's reference ``causal_depthwise_conv``,
# which is torch's grouped F.conv1d over (tail, x): y_t = bias + sum_k w[:, k] x_{t-K+1+k}
# (De et al. 2024, fig. 2: a causal depthwise Conv1D).


def conv_inputs(shape, taps, *, tail=False, dtype=torch.float32, seed=0):
    """x as the strided recurrent half of a (B, T, 2C) projection (as in the block), weight, bias, tail."""
    gen = torch.Generator().manual_seed(seed)
    batch, steps, channels = shape
    sdt = torch.promote_types(dtype, torch.float32)
    both = torch.randn(batch, steps, 2 * channels, generator=gen).to(dtype).requires_grad_()
    weight = torch.randn(channels, taps, generator=gen).to(sdt).requires_grad_()
    bias = torch.randn(channels, generator=gen).to(sdt).requires_grad_()
    before = torch.randn(batch, taps - 1, channels, generator=gen).to(dtype).requires_grad_() if tail else None
    return both, weight, bias, before


def conv_values_and_grads(fn, both, weight, bias, tail, seed=1):
    channels = weight.shape[0]
    y = fn(both[..., channels:], weight, bias, tail)
    grad_y = torch.randn(y.shape, generator=torch.Generator().manual_seed(seed)).to(y.dtype)
    leaves = [t for t in (both, weight, bias, tail) if t is not None]
    return [y.detach(), *torch.autograd.grad((y * grad_y).sum(), leaves)]


def conv_reference(x, weight, bias, tail):
    return causal_depthwise_conv(x, weight, bias, tail)[0]


CONV_SHAPES = [((1, 1, 1), 4), ((2, 2, 5), 4), ((3, 37, 20), 4), ((2, 9, 64), 3), ((1, 40, 16), 1), ((2, 5, 33), 6)]


@pytest.mark.parametrize(("shape", "taps"), CONV_SHAPES, ids=str)
@pytest.mark.parametrize("tail", [False, True], ids=["zeros-before", "tail"])
def test_fused_conv_matches_torch_conv1d_fp32(kernels, shape, taps, tail):
    # fp32 atol 1e-5, forward and the gradients wrt x (through the strided view), weight, bias and tail.
    args = conv_inputs(shape, taps, tail=tail, seed=sum(shape) + taps)
    got = conv_values_and_grads(causal_conv_fused, *args)
    want = conv_values_and_grads(conv_reference, *args)
    assert got[0].is_contiguous()
    for name, g, w in zip(("y", "x", "weight", "bias", "tail"), got, want, strict=False):
        torch.testing.assert_close(g, w, atol=1e-5, rtol=1e-5, msg=lambda m, name=name: f"{name}: {m}")


def test_fused_conv_bf16_inputs_within_the_rounding_bound(kernels):
    # bf16 x and tail, float32 weights: the op sums the K taps in float32 and returns float32, so it
    # matches the float64 conv of the same bf16 values to fp32 accuracy; the gradients wrt the bf16
    # inputs are rounded to bf16 once (BF16_GRAD_RTOL), those wrt the weights are float32 sums.
    both, weight, bias, tail = conv_inputs((2, 30, 24), 4, tail=True, dtype=torch.bfloat16, seed=4)
    got = conv_values_and_grads(causal_conv_fused, both, weight, bias, tail)
    wide = [t.detach().double().requires_grad_() for t in (both, weight, bias, tail)]
    want = conv_values_and_grads(conv_reference, *wide)
    assert got[0].dtype == torch.float32 and got[1].dtype == got[4].dtype == torch.bfloat16
    torch.testing.assert_close(got[0].double(), want[0], atol=1e-5, rtol=1e-5)
    for g, w in zip(got[1:], want[1:], strict=True):
        rtol = BF16_GRAD_RTOL if g.dtype == torch.bfloat16 else 1e-5
        torch.testing.assert_close(g.double(), w, atol=1e-5, rtol=rtol)


def test_fused_conv_gradcheck_float64(kernels):
    # Finite differences (torch.autograd.gradcheck) against the hand-derived backward, with and without a tail.
    x = torch.randn(2, 6, 3, dtype=torch.float64, requires_grad=True)
    weight = torch.randn(3, 4, dtype=torch.float64, requires_grad=True)
    bias = torch.randn(3, dtype=torch.float64, requires_grad=True)
    tail = torch.randn(2, 3, 3, dtype=torch.float64, requires_grad=True)
    assert torch.autograd.gradcheck(causal_conv_fused, (x, weight, bias, tail))
    assert torch.autograd.gradcheck(causal_conv_fused, (x[:, :2], weight, bias))  # T < K - 1: all taps reach back


def test_conv_fake_kernels_give_shapes_and_dtypes_without_running():
    from torch._subclasses.fake_tensor import FakeTensorMode

    with FakeTensorMode():
        x, weight, bias = torch.empty(4, 16, 8, dtype=torch.bfloat16), torch.empty(8, 4), torch.empty(8)
        tail = torch.empty(4, 3, 8, dtype=torch.bfloat16)
        y = causal_conv_op(x, tail, weight, bias)
        assert y.shape == (4, 16, 8) and y.dtype == torch.float32
        grads = causal_conv_backward_op(y, x, tail, weight)
        assert [tuple(g.shape) for g in grads] == [(4, 16, 8), (4, 3, 8), (8, 4), (8,)]
        assert [g.dtype for g in grads] == [torch.bfloat16] * 2 + [torch.float32] * 2


def test_block_gradients_match_between_compiled_and_composed_paths(kernels):
    # The whole block (C++ conv and fused RG-LRU vs torch's conv1d and the composed RG-LRU): same
    # output and same gradients for every parameter and the input, fp32 atol 1e-5.
    from blockyard.mixers import MIXERS
    from blockyard.mixers.recurrence import RecurrenceOptions

    torch.manual_seed(12)
    fast = MIXERS["recurrence"](32, RecurrenceOptions(), layer=0, depth=2, kernels="compiled")
    composed = MIXERS["recurrence"](32, RecurrenceOptions(), layer=0, depth=2, kernels="torch")
    composed.load_state_dict(fast.state_dict())
    x = torch.randn(3, 21, 32, requires_grad=True)
    grad_y = torch.randn(3, 21, 32)
    results = []
    for block in (fast, composed):
        y = block(x)
        results.append([y.detach(), *torch.autograd.grad((y * grad_y).sum(), [x, *block.parameters()])])
    names = ["y", "x", *(n for n, _ in fast.named_parameters())]
    for name, g, w in zip(names, *results, strict=True):
        torch.testing.assert_close(g, w, atol=1e-5, rtol=1e-5, msg=lambda m, name=name: f"{name}: {m}")
