"""The recurrence mixer against the published equations of the RG-LRU block and its ablations.

Sources: De et al. 2024 (arXiv:2402.19427), sec. 2.4, eqs. 1-4 and fig. 2 (the block and the RG-LRU);
Orvieto et al. 2023 (arXiv:2303.06349): complex diagonal recurrence, ring init, the
sqrt(1 - |lambda|^2) normalisation; Gu et al. 2022 (arXiv:2206.11893, id from memory): fixed
diagonal decay, linear time-invariant.
"""

from __future__ import annotations

import cmath
import functools
import itertools
import math

import pytest
import torch
import torch.nn.functional as F
from scipy import stats

from blockyard.config import config_from_dict
from blockyard.errors import ConfigError
from blockyard.kernels import linear_scan
from blockyard.mixers import MIXERS
from blockyard.mixers.recurrence import (
    MAX_PHASE,
    RGLRU,
    RecurrenceBlock,
    RecurrenceOptions,
    complex_lru,
    rg_lru,
    rg_lru_reference,
)

WIDTH = 8


def _scan_loop(a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor | None = None) -> torch.Tensor:
    """h_t = a_t h_{t-1} + b_t, one step at a time: the test's own reference scan."""
    h = torch.zeros_like(b[:, 0]) if h0 is None else h0
    out = []
    for t in range(b.shape[1]):
        h = a[:, t] * h + b[:, t]
        out.append(h)
    return torch.stack(out, dim=1)


def _block(width: int = WIDTH, kernels: str = "auto", **opts) -> RecurrenceBlock:
    torch.manual_seed(0)
    return MIXERS["recurrence"](width, RecurrenceOptions(**opts), layer=0, depth=2, kernels=kernels)


def _block_reference(m: RecurrenceBlock, x: torch.Tensor) -> torch.Tensor:
    """De et al. 2024, fig. 2 and eqs. 1-4, written out loop by loop in float64 from the module's parameters.

    Deliberately computes a_t = sigmoid(Lambda)^(c r_t) and sqrt(1 - a_t^2) directly (not in log
    space), the conv as an explicit sum over taps and the block-diagonal gates as dense matrices.
    """
    o = m.options
    p = {k: v.detach().double() for k, v in m.named_parameters()}
    x = x.double()
    rec_w = m.rec_width
    gate = x @ p["proj_in.weight"][:rec_w].T
    u = x @ p["proj_in.weight"][rec_w:].T
    batch, steps, _ = u.shape
    if o.conv_width > 0:
        w, bias = p["conv.weight"], p["conv.bias"]
        k_w = o.conv_width
        conv = torch.zeros_like(u)
        for t in range(steps):
            conv[:, t] = bias
            for k in range(k_w):
                s = t - k_w + 1 + k
                if s >= 0:
                    conv[:, t] += w[:, k] * u[:, s]
        u = conv
    if o.gate:
        r = torch.sigmoid(u @ torch.block_diag(*p["lru.gate_a.weight"]) + p["lru.gate_a.bias"])
        i = torch.sigmoid(u @ torch.block_diag(*p["lru.gate_x.weight"]) + p["lru.gate_x.bias"])
    else:  # fixed-decay ablation (Gu et al. 2022): no recurrence gate and no input gate
        r = torch.ones_like(u)
        i = torch.ones_like(u)
    if o.complex:
        lam = torch.exp(torch.complex(-torch.exp(p["lru.nu_log"]), torch.exp(p["lru.theta_log"])))
        h = torch.zeros(batch, rec_w, dtype=torch.complex128)
    else:
        base = torch.sigmoid(p["lru.decay"])
        h = torch.zeros(batch, rec_w, dtype=torch.float64)
    ys = []
    for t in range(steps):
        power = o.c * r[:, t] if o.gate else torch.ones_like(r[:, t])
        if o.complex:
            mag = lam.abs() ** power
            a = mag * torch.exp(1j * lam.angle())
        else:
            mag = a = base**power
        norm = torch.sqrt(1 - mag**2) if o.input_norm else torch.ones_like(mag)
        h = a * h + norm * (i[:, t] * u[:, t])
        ys.append(h.real if o.complex else h)
    y = torch.stack(ys, dim=1)
    return (F.gelu(gate) * y) @ p["proj_out.weight"].T


FORWARD_CASES = [
    {},
    {"c": 2.0, "gate_blocks": 2},
    {"gate_blocks": 1, "conv_width": 2},
    {"width_mult": 4 / 3, "gate_blocks": 11},  # round(4/3 * 8) = 11 channels
    {"width_mult": 0.5, "gate_blocks": 4},
    {"conv_width": 0},
    {"conv_width": 1, "input_norm": False},
    {"gate": False},
    {"gate": False, "input_norm": False, "conv_width": 3},
    {"complex": True},
    {"complex": True, "gate": False},
    {"complex": True, "input_norm": False, "c": 4.0},
]


@pytest.mark.parametrize("opts", FORWARD_CASES, ids=lambda d: ",".join(f"{k}={v}" for k, v in d.items()) or "default")
def test_forward_matches_published_equations(opts):
    # De et al. 2024, fig. 2 / eqs. 1-4 (and the complex and fixed-decay ablations): the fast path through
    # the project scan equals a direct sequential loop over the equations.
    m = _block(**opts)
    x = torch.randn(2, 9, WIDTH)
    torch.testing.assert_close(m(x).double(), _block_reference(m, x), atol=1e-5, rtol=1e-5)


@pytest.fixture(params=["reference", "torch", "compiled"])
def kernels(request):
    """Each backend of runtime.kernels in turn, passed to the block the way the model builder passes it."""
    return request.param


@pytest.mark.parametrize("opts", [{}, {"gate": False}, {"complex": True}, {"complex": True, "gate": False}])
def test_every_scan_backend_matches_published_equations(opts, kernels):
    # As above, for each backend the runtime.kernels key selects (compiled: the fused RG-LRU op for the
    # real variants); T = 40 takes the chunked path past its short cut.
    m = _block(kernels=kernels, **opts)
    x = torch.randn(2, 40, WIDTH)
    torch.testing.assert_close(m(x).double(), _block_reference(m, x), atol=1e-5, rtol=1e-5)
    x.requires_grad_(True)
    m(x).square().sum().backward()
    assert all(p.grad is not None and p.grad.isfinite().all() for p in m.parameters())


def test_recurrence_width_follows_width_mult():
    # De et al. 2024 widen the recurrence to 4/3 D; ours is round(width_mult * D).
    assert _block(12, width_mult=4 / 3).rec_width == 16
    assert _block(12).rec_width == 12


def test_rg_lru_gradcheck_float64(kernels):
    # Finite differences vs autograd through De et al. 2024's eqs. 1-4 (torch.autograd.gradcheck).
    torch.manual_seed(1)
    shape = (2, 5, 3)
    args = [
        torch.randn(shape, dtype=torch.float64),
        torch.randn(3, dtype=torch.float64) + 2.0,
        torch.randn(shape, dtype=torch.float64),
        torch.randn(shape, dtype=torch.float64),
        torch.randn(2, 3, dtype=torch.float64),
    ]
    for a in args:
        a.requires_grad_(True)

    def real(x, lam, ga, gx, h0):
        return rg_lru(x, lam, ga, gx, c=8.0, input_norm=True, h0=h0, backend=kernels)

    def cplx(x, lam, ga, gx, h0):
        theta_log = torch.full_like(lam, math.log(0.3))
        scan = functools.partial(linear_scan, backend=kernels)
        return torch.view_as_real(complex_lru(x, lam - 3.0, theta_log, ga, gx, c=8.0, h0=h0.to(torch.complex128),
                                              scan=scan))

    assert torch.autograd.gradcheck(real, args)
    assert torch.autograd.gradcheck(cplx, args)


def test_rg_lru_fast_scan_matches_loop_scan():
    # The project scan (blockyard.kernels) and the test's sequential loop give the same RG-LRU states.
    torch.manual_seed(2)
    x, ga, gx = (torch.randn(3, 40, 6) for _ in range(3))
    lam, h0 = torch.randn(6), torch.randn(3, 6)
    torch.testing.assert_close(rg_lru(x, lam, ga, gx, h0=h0), rg_lru_reference(x, lam, ga, gx, h0=h0, scan=_scan_loop))


def test_closed_recurrence_gate_copies_the_state():
    # De et al. 2024, sec. 2.4: r_t = 0 gives a_t = 1 and sqrt(1 - a_t^2) = 0, so h_t = h_{t-1}.
    torch.manual_seed(3)
    x, gx = torch.randn(2, 7, 4), torch.randn(2, 7, 4)
    h0 = torch.randn(2, 4)
    closed = torch.full((2, 7, 4), -math.inf)
    h = rg_lru(x, torch.randn(4), closed, gx, h0=h0)
    torch.testing.assert_close(h, h0[:, None].expand_as(h), rtol=0, atol=1e-6)


def test_closed_input_gate_ignores_the_input():
    # De et al. 2024, eq. 4: i_t = 0 removes x_t from the update, h_t = a_t h_{t-1}.
    torch.manual_seed(4)
    ga, h0, lam = torch.randn(2, 7, 4), torch.randn(2, 4), torch.randn(4)
    closed = torch.full((2, 7, 4), -math.inf)
    h1 = rg_lru(torch.randn(2, 7, 4), lam, ga, closed, h0=h0)
    h2 = rg_lru(100 * torch.randn(2, 7, 4), lam, ga, closed, h0=h0)
    torch.testing.assert_close(h1, h2, rtol=0, atol=1e-6)
    a = torch.sigmoid(lam) ** (8.0 * torch.sigmoid(ga))
    torch.testing.assert_close(h1, _scan_loop(a, torch.zeros_like(a), h0))


@pytest.mark.parametrize("decay", [0.5, 0.8, 0.9, 0.95])
def test_input_norm_preserves_unit_variance(decay):
    # Orvieto et al. 2023, sec. 3.3 (and De et al. 2024, eq. 4): with gamma = sqrt(1 - a^2) the
    # stationary variance of h_t = a h_{t-1} + gamma x_t under unit white noise is gamma^2 / (1 - a^2) = 1;
    # without it, 1 / (1 - a^2) (AR(1) stationary variance, a textbook fact).
    torch.manual_seed(5)
    lam = torch.full((1,), math.log(decay / (1 - decay)))  # sigmoid(lam) = decay
    x = torch.randn(64, 3000, 1)
    burn_in = 500
    normed = rg_lru(x, lam, None, None, input_norm=True)[:, burn_in:].var().item()
    raw = rg_lru(x, lam, None, None, input_norm=False)[:, burn_in:].var().item()
    assert normed == pytest.approx(1.0, rel=0.05)
    assert raw == pytest.approx(1 / (1 - decay**2), rel=0.05)


def test_decay_init_is_uniform_in_published_range():
    # De et al. 2024, sec. 2.4: Lambda is initialised so that a^c is uniform in [0.9, 0.999].
    # Kolmogorov-Smirnov against that uniform (scipy.stats.kstest); the fixed seed makes it deterministic.
    torch.manual_seed(6)
    for opts in (RecurrenceOptions(), RecurrenceOptions(c=3.0)):
        lru = RGLRU(4096, opts)
        with torch.no_grad():
            lru.decay.zero_()
        lru.reset_parameters()  # what the backbone's reset_special_parameters calls after its generic init
        a_c = (torch.sigmoid(lru.decay.detach().double()) ** opts.c).numpy()
        assert a_c.min() >= 0.9 - 1e-6 and a_c.max() <= 0.999 + 1e-6
        assert stats.kstest(a_c, "uniform", args=(0.9, 0.099)).pvalue > 1e-3
    # Fixed decay (gate off): the decay a = sigmoid(Lambda) itself takes the range.
    a = torch.sigmoid(RGLRU(4096, RecurrenceOptions(gate=False)).decay.detach().double()).numpy()
    assert stats.kstest(a, "uniform", args=(0.9, 0.099)).pvalue > 1e-3


def test_complex_ring_init():
    # Orvieto et al. 2023, sec. 3.2 / appendix (from memory): |lambda|^2 uniform on the ring
    # [r_min^2, r_max^2] (here at the open gate, |lambda|^c), phase uniform in [0, max_phase].
    torch.manual_seed(7)
    lru = RGLRU(4096, RecurrenceOptions(complex=True))
    radius_sq = torch.exp(-2 * 8.0 * torch.exp(lru.nu_log.detach().double())).numpy()
    phase = torch.exp(lru.theta_log.detach().double()).numpy()
    assert stats.kstest(radius_sq, "uniform", args=(0.81, 0.999**2 - 0.81)).pvalue > 1e-3
    assert stats.kstest(phase, "uniform", args=(0.0, MAX_PHASE)).pvalue > 1e-3


def test_complex_lru_matches_python_complex_loop():
    # Orvieto et al. 2023, eq. 7 with De et al. 2024's gates on the magnitude, computed with Python's
    # complex numbers (cmath), channel by channel.
    torch.manual_seed(8)
    batch, steps, ch = 2, 6, 3
    x, ga, gx = (torch.randn(batch, steps, ch, dtype=torch.float64) for _ in range(3))
    nu_log, theta_log = torch.randn(ch, dtype=torch.float64) - 2, torch.randn(ch, dtype=torch.float64)
    h0 = torch.randn(batch, ch, dtype=torch.complex128)
    for gated, norm in itertools.product((True, False), repeat=2):
        got = complex_lru(x, nu_log, theta_log, ga if gated else None, gx if gated else None,
                          c=5.0, input_norm=norm, h0=h0)
        for bi, ci in itertools.product(range(batch), range(ch)):
            lam = cmath.exp(complex(-math.exp(nu_log[ci]), math.exp(theta_log[ci])))
            h = complex(h0[bi, ci])
            for t in range(steps):
                sig = lambda z: 1 / (1 + math.exp(-z))
                r = sig(float(ga[bi, t, ci])) if gated else 1.0
                i = sig(float(gx[bi, t, ci])) if gated else 1.0
                mag = abs(lam) ** (5.0 * r if gated else 1.0)
                a = cmath.rect(mag, cmath.phase(lam))
                gamma = math.sqrt(1 - mag**2) if norm else 1.0
                h = a * h + gamma * i * float(x[bi, t, ci])
                assert abs(complex(got[bi, t, ci]) - h) < 1e-10


def test_gate_off_is_time_invariant_and_linear():
    # Gu et al. 2022: a fixed diagonal decay is an LTI system: superposition and shift
    # equivariance hold; with the RG-LRU gates (De et al. 2024) they do not.
    torch.manual_seed(9)
    x1, x2 = torch.randn(2, 12, WIDTH), torch.randn(2, 12, WIDTH)

    def shifted(x):
        return torch.cat([torch.zeros_like(x[:, :3]), x[:, :-3]], dim=1)

    for complex_state in (False, True):
        fixed = RGLRU(WIDTH, RecurrenceOptions(gate=False, complex=complex_state))
        assert not any("gate" in name for name, _ in fixed.named_parameters())
        f = lambda x, m=fixed: m(x)[0]
        torch.testing.assert_close(f(x1 + 2 * x2), f(x1) + 2 * f(x2), atol=1e-5, rtol=1e-5)
        torch.testing.assert_close(f(shifted(x1)), shifted(f(x1)), atol=1e-6, rtol=1e-6)
    gated = RGLRU(WIDTH, RecurrenceOptions())
    g = lambda x: gated(x)[0]
    assert not torch.allclose(g(x1 + 2 * x2), g(x1) + 2 * g(x2), atol=1e-3)


def test_conv_width_zero_has_no_conv():
    # conv_width 0 removes De et al. 2024's temporal Conv1D entirely.
    names = [n for n, _ in _block(conv_width=0).named_parameters()]
    assert not any("conv" in n for n in names)
    conv1 = dict(_block(conv_width=1).named_parameters())
    assert conv1["conv.weight"].shape == (WIDTH, 1)


# step == forward, causality and functional state over every gate / state / conv / norm combination,
# and the exact cost hooks: tests/test_mixers_contract.py.


def test_state_is_float32_under_bf16_autocast():
    # De et al. 2024 keep the recurrence in float32 under low-precision training.
    m = _block()
    x = torch.randn(2, 5, WIDTH)
    with torch.autocast("cpu", dtype=torch.bfloat16):
        y = m(x)
        _, state = m.step(x[:, 0], m.init_state(2))
        _, h_last = m.lru(x.bfloat16())
    assert y.dtype == torch.bfloat16
    assert state.h.dtype == torch.float32 and state.conv_tail.dtype == torch.float32
    assert h_last.dtype == torch.float32
    torch.testing.assert_close(y.float(), m(x), atol=0.05, rtol=0.05)


def test_gate_blocks_must_divide_recurrence_width():
    # Config validation: the dotted key path is named (project contract, blockyard.errors.ConfigError).
    def load(**opts):
        mixer = {"kind": "recurrence", **opts}
        return config_from_dict({"model": {"width": 12, "pattern": ["rec"], "mixers": {"rec": mixer}}})

    with pytest.raises(ConfigError) as e:
        load(gate_blocks=5)
    assert e.value.path == "model.mixers.rec.gate_blocks"
    with pytest.raises(ConfigError) as e:
        load(width_mult=4 / 3, gate_blocks=3)  # round(16) channels, 3 does not divide
    assert e.value.path == "model.mixers.rec.gate_blocks"
    load(width_mult=4 / 3, gate_blocks=8)
    load(gate=False, gate_blocks=5)  # no gates, nothing to divide
    for key, value in (("width_mult", 0.01), ("width_mult", -1.0), ("c", 0.0)):
        with pytest.raises(ConfigError) as e:
            load(**{key: value})
        assert e.value.path == f"model.mixers.rec.{key}"


def test_extra_flops_track_the_knobs():
    # The elementwise work grows with the gates, the complex state and the recurrence width.
    flops = lambda **o: RecurrenceBlock.extra_flops_per_token(64, RecurrenceOptions(**o), 128)
    assert 0 < flops(gate=False) < flops() < flops(complex=True)
    assert flops(width_mult=2.0) == pytest.approx(2 * flops())
    assert RecurrenceBlock.extra_flops_per_token(64, RecurrenceOptions(), 4096) == flops()


def test_backbone_keeps_special_init():
    # The backbone's generic normal init must not overwrite the decay init (De et al. 2024, sec. 2.4).
    from blockyard.model import build_model

    cfg = config_from_dict({"model": {"width": 16, "depth": 1, "pattern": ["recurrence"]}}).model
    torch.manual_seed(10)
    lru = build_model(cfg, vocab_size=32).blocks[0].mixer.lru
    a_c = torch.sigmoid(lru.decay) ** 8.0
    assert a_c.min() >= 0.9 - 1e-6 and a_c.max() <= 0.999 + 1e-6
    assert build_model(cfg, vocab_size=32).blocks[0].mixer.proj_out.residual_out
