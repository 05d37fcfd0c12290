"""runtime.precision: bf16_emulated reproduces bf16 training numerics on a CPU without bf16 units.

References:
* a bf16 GEMM unit multiplies bf16 numbers exactly, accumulates in fp32 and rounds the output once
  to nearest-even (Kalamkar et al. 2019, "A Study of BFLOAT16 for Deep Learning Training"; IEEE 754
  round-to-nearest-even). So the emulated product must be the exact (fp64) product of the same bf16
  inputs, rounded once to bf16, up to the order of the fp32 sums (a rare one-ulp flip).
* torch's own bf16 kernels (the reference implementation: on this kind of CPU they run slowly, but
  with the same fp32 accumulation) must give the same values, and a whole forward/backward pass
  must carry the same bf16 rounding error as torch's bf16 autocast does.
"""

from __future__ import annotations

import contextlib
import json

import pytest
import torch
import torch.nn.functional as F

from blockyard.config import config_from_dict
from blockyard.model import build_model
from blockyard.train import run_training
from blockyard.train.bf16_emulation import emulated_bf16_gemms
from blockyard.train.loop import train_step
from blockyard.train.optim import build_optimizer, build_scheduler
from blockyard.train.runtime import cpu_bf16_support, resolve_precision, resolve_runtime

NATIVE, _ = cpu_bf16_support()


def bf16(*shape: int, seed: int = 0) -> torch.Tensor:
    return torch.randn(*shape, generator=torch.Generator().manual_seed(seed)).bfloat16()


def within_one_rounding(got: torch.Tensor, exact: torch.Tensor, magnitude: torch.Tensor, terms: int) -> None:
    """``got`` (bf16) is ``exact`` rounded once, bar rare flips from the order of the fp32 sums.

    Bound: one bf16 ulp (at most 2^-7 relative, 8 significant bits) plus the fp32 summation error
    of ``terms`` products, terms x 2^-24 x sum |a_i b_i| (Higham 2002, "Accuracy and Stability of
    Numerical Algorithms", the gamma_n bound for dot products; cited from memory), which matters
    under cancellation.
    """
    assert got.dtype == torch.bfloat16
    assert (got == exact.bfloat16()).float().mean() >= 0.999
    bound = exact.abs() * 2**-7 + terms * 2**-24 * magnitude
    assert ((got.double() - exact).abs() <= bound).all()


OPS = {
    "mm": (lambda a, b, c: a @ b, ((96, 200), (200, 64), None)),
    "mm transposed": (lambda a, b, c: a.t() @ b.t(), ((200, 96), (64, 200), None)),
    "addmm": (lambda a, b, c: torch.addmm(c, a, b), ((96, 200), (200, 64), (64,))),
    "bmm": (lambda a, b, c: torch.bmm(a, b), ((3, 40, 130), (3, 130, 24), None)),
    "baddbmm": (lambda a, b, c: torch.baddbmm(c, a, b), ((3, 40, 130), (3, 130, 24), (3, 40, 24))),
    "linear": (lambda a, b, c: F.linear(a, b, c), ((5, 7, 130), (24, 130), (24,))),
    "depthwise conv1d": (lambda a, b, c: F.conv1d(a, b, c, groups=32, padding=3), ((4, 32, 50), (32, 1, 4), (32,))),
    "conv1d": (lambda a, b, c: F.conv1d(a, b), ((4, 32, 50), (16, 32, 5), None)),
}


@pytest.mark.parametrize("name", list(OPS))
def test_emulated_op_is_the_exact_result_rounded_once_as_torch_bf16_computes_it(name):
    fn, shapes = OPS[name]
    a, b, c = (None if s is None else bf16(*s, seed=i) for i, s in enumerate(shapes))
    exact = fn(a.double(), b.double(), None if c is None else c.double())
    magnitude = fn(a.double().abs(), b.double().abs(), None if c is None else c.double().abs())
    terms = max(shapes[0]) + 1  # a bound on the products per output (the inner size is the largest here)
    with emulated_bf16_gemms() as mode:
        got = fn(a, b, c)
    assert sum(mode.counts.values()) == 1  # it went through the emulation, not torch's bf16 kernel
    within_one_rounding(got, exact, magnitude, terms)
    within_one_rounding(fn(a, b, c), exact, magnitude, terms)  # torch's own bf16 kernel: the same numerics
    assert not torch.equal(got.double(), exact)  # and it did round


def test_emulation_leaves_other_ops_and_fp32_alone_and_restores_onednn():
    x = bf16(8, 8)
    w = torch.randn(8, 8)
    outside = (w @ w, x * 3, x.exp())
    before = torch._C._get_mkldnn_enabled()
    with emulated_bf16_gemms() as mode:
        inside = (w @ w, x * 3, x.exp())
        assert not torch._C._get_mkldnn_enabled()
    assert all(torch.equal(a, b) for a, b in zip(inside, outside, strict=True))
    assert not mode.counts  # fp32 matmuls and elementwise bf16 ops are not rerouted
    assert torch._C._get_mkldnn_enabled() == before


def numerics(precision: str):
    return emulated_bf16_gemms() if precision == "bf16_emulated" else contextlib.nullcontext()


def grads_and_loss(model, x, precision: str):
    """One forward/backward in fp32, bf16 (torch's kernels) or bf16_emulated: loss, flat grads, ops rerouted."""
    model.zero_grad()
    with numerics(precision) as fwd, torch.autocast("cpu", dtype=torch.bfloat16, enabled=precision != "fp32"):
        logits = model(x)
    loss = F.cross_entropy(logits.float().flatten(0, 1), x.flatten())
    with numerics(precision) as bwd:
        loss.backward()
    grads = torch.cat([p.grad.flatten() for p in model.parameters() if p.grad is not None])
    return loss.item(), grads, *(set(m.counts) if m else set() for m in (fwd, bwd))


@pytest.mark.parametrize(("kind", "forward_ops", "backward_ops"), [
    ("global_attention", {"aten.mm"}, {"aten.mm"}),
    # The recurrence's causal conv runs as the C++ op with fp32 sums under every precision (the
    # per-op tests above cover torch's conv1d), so only its matmuls have bf16 rounding to emulate.
    ("recurrence", {"aten.mm"}, {"aten.mm"}),
])
def test_a_training_pass_carries_the_rounding_error_of_torch_bf16_autocast(kind, forward_ops, backward_ops):
    # The gradient's bf16 error (bf16 minus fp32) must be the same error vector under the
    # emulation as under torch's bf16 kernels: cosine > 0.9 (measured here: 0.96 and 0.99). A
    # mis-placed or missing rounding gives an error of the same size but another direction.
    cfg = config_from_dict({"model": {"width": 64, "depth": 2, "pattern": [kind]}})
    torch.manual_seed(0)
    model = build_model(cfg.model, 256)
    x = torch.randint(256, (4, 64), generator=torch.Generator().manual_seed(1))
    loss32, g32, _, _ = grads_and_loss(model, x, "fp32")
    loss_torch, g_torch, _, _ = grads_and_loss(model, x, "bf16")
    loss_emu, g_emu, forward, backward = grads_and_loss(model, x, "bf16_emulated")
    assert forward_ops <= forward and backward_ops <= backward  # both passes were emulated
    assert loss_emu == pytest.approx(loss_torch, rel=1e-4)
    err_torch, err_emu = g_torch - g32, g_emu - g32
    assert err_emu.norm() > 1e-4 * g32.norm()  # a real bf16 error, not fp32
    assert F.cosine_similarity(err_emu, err_torch, dim=0) > 0.9
    assert loss_emu != loss32


def test_lstm_runs_under_emulation_close_to_fp32():
    # oneDNN's fused bf16 LSTM needs bf16 units; the emulation runs torch's native LSTM instead.
    cfg = config_from_dict({"model": {"width": 32, "depth": 1, "pattern": ["lstm"]}})
    torch.manual_seed(0)
    model = build_model(cfg.model, 64)
    x = torch.randint(64, (2, 16), generator=torch.Generator().manual_seed(1))
    loss32, g32, _, _ = grads_and_loss(model, x, "fp32")
    loss_emu, g_emu, forward, backward = grads_and_loss(model, x, "bf16_emulated")
    assert "aten.mm" in forward and "aten.mm" in backward
    assert loss_emu == pytest.approx(loss32, rel=0.02) and loss_emu != loss32
    assert torch.isfinite(g_emu).all() and (g_emu - g32).norm() < 0.05 * g32.norm()


def test_bf16_emulated_is_resolved_as_asked_on_any_cpu():
    precision, reason, warning = resolve_precision("bf16_emulated", torch.device("cpu"))
    assert (precision, warning) == ("bf16_emulated", None) and "bf16 numerics" in reason


def counting_batch(seed: int, b: int = 8, t: int = 64):
    g = torch.Generator().manual_seed(seed)
    seq = (torch.randint(64, (b, 1), generator=g) + torch.arange(t + 1)) % 64
    return seq[:, :-1], seq[:, 1:]


def test_train_step_follows_fp32_and_emulates_its_backward(monkeypatch):
    cfg = config_from_dict({"model": {"width": 64, "depth": 2, "pattern": ["global_attention"]},
                            "train": {"steps": 15, "warmup_steps": 2, "lr": 1e-2}})
    curves = {}
    for precision in ("fp32", "bf16_emulated"):
        rt, warnings = resolve_runtime(config_from_dict({"runtime": {"precision": precision}}).runtime)
        assert rt.precision == precision and not warnings
        torch.manual_seed(0)
        model = build_model(cfg.model, 256)
        opt = build_optimizer(model, cfg.train)
        sched = build_scheduler(opt, cfg.train, cfg.train.steps)
        curves[precision] = [train_step(model, opt, sched, [counting_batch(s)], rt, 1.0).loss for s in range(15)]
        assert all(p.dtype == torch.float32 for p in model.parameters())  # master weights stay fp32
    assert curves["fp32"][-1] < curves["fp32"][0] - 0.5
    assert curves["bf16_emulated"] != curves["fp32"]
    for a, b in zip(curves["fp32"], curves["bf16_emulated"], strict=True):
        assert b == pytest.approx(a, rel=0.02)


@pytest.mark.slow
def test_a_bf16_emulated_run_says_so_in_env_json(tmp_path, monkeypatch):
    monkeypatch.setenv("BLOCKYARD_CACHE", str(tmp_path / "cache"))
    cfg = config_from_dict({
        "name": "emu", "model": {"width": 32, "depth": 1, "pattern": ["global_attention"]},
        "data": {"corpus": "pydoc", "tokenizer": "bytes", "seq_len": 32},
        "train": {"steps": 4, "batch_size": 2, "eval_every": 4, "checkpoint_every": 4, "eval_windows": 2},
        "runtime": {"precision": "bf16_emulated", "threads": 1},
    })
    summary = run_training(cfg, tmp_path / "run", progress="silent")
    assert summary["status"] == "done"
    env = json.loads((tmp_path / "run" / "env.json").read_text())
    assert env["precision"] == "bf16_emulated" and "bf16 numerics" in env["precision_reason"]


@pytest.mark.skipif(not NATIVE, reason="needs a CPU with bf16 units (avx512_bf16 / amx_bf16)")
def test_on_a_cpu_with_bf16_units_emulation_matches_the_hardware():
    a, b = bf16(256, 512), bf16(512, 128, seed=1)
    with emulated_bf16_gemms():
        got = a @ b
    assert (got == a @ b).float().mean() >= 0.999
