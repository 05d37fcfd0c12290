"""bf16 autocast: results close to fp32, with the recurrence state, softmax and loss kept in fp32.

Tolerances: bf16 keeps 8 significant bits, so one rounding is off by at most 2^-9 relative (IEEE-style
round to nearest; Kalamkar et al. 2019, "A Study of BFLOAT16 for Deep Learning Training"). A
network's bf16 loss differs from its fp32 loss by a few such roundings, hence the 2% bound below.

These run on every CPU. Without bf16 units the runtime falls back to fp32 (torch's emulated bf16 is
~1% of fp32 speed there), so the fixture below turns bf16 on anyway: the numerics under test are
torch's autocast either way, with fp32 accumulation in its bf16 matmuls; only the speed differs.
"""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from blockyard.config import config_from_dict
from blockyard.mixers.attention import causal_attention
from blockyard.model import build_model
from blockyard.train import runtime as runtime_mod
from blockyard.train.loop import token_loss_sum, train_step
from blockyard.train.optim import build_optimizer, build_scheduler
from blockyard.train.runtime import cpu_bf16_support, resolve_runtime

NATIVE, WHY = cpu_bf16_support()


@pytest.fixture(autouse=True)
def bf16_even_where_emulated(monkeypatch):
    if not NATIVE:
        monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (True, f"emulated for the test ({WHY})"))


def runtimes():
    fp32, _ = resolve_runtime(config_from_dict({}).runtime)
    bf16, warnings = resolve_runtime(config_from_dict({"runtime": {"precision": "bf16"}}).runtime)
    assert bf16.precision == "bf16" and not warnings
    return fp32, bf16


def model_cfg(kind: str):
    return config_from_dict({"model": {"width": 64, "depth": 2, "pattern": [kind]}}).model


def batch(vocab: int = 256, b: int = 4, t: int = 64, seed: int = 0):
    g = torch.Generator().manual_seed(seed)
    seq = torch.randint(vocab, (b, t + 1), generator=g)
    return seq[:, :-1], seq[:, 1:]


@pytest.mark.parametrize("kind", ["global_attention", "local_attention", "recurrence"])
def test_bf16_loss_is_fp32_and_close_to_the_fp32_loss(kind):
    fp32, bf16 = runtimes()
    torch.manual_seed(0)
    model = build_model(model_cfg(kind), 256)
    x, y = batch()
    losses = {}
    for rt in (fp32, bf16):
        with rt.autocast():
            logits = model(x)
        loss, n = token_loss_sum(logits, y)
        assert loss.dtype == torch.float32  # the loss is reduced in fp32 even from bf16 logits
        losses[rt.precision] = loss.item() / n
    assert logits.dtype == torch.bfloat16  # autocast really ran the head in bf16
    assert losses["bf16"] == pytest.approx(losses["fp32"], rel=0.02)


def test_cross_entropy_of_bf16_logits_equals_fp32_cross_entropy_of_the_same_values():
    # token_loss_sum upcasts before log-softmax: the result equals torch's fp32 cross-entropy of
    # the same (bf16-representable) logits to fp32 rounding, not to bf16 rounding.
    g = torch.Generator().manual_seed(1)
    logits = (4 * torch.randn(8, 32, 256, generator=g)).bfloat16()
    targets = torch.randint(256, (8, 32), generator=g)
    loss, n = token_loss_sum(logits, targets)
    want = F.cross_entropy(logits.double().flatten(0, 1), targets.flatten(), reduction="sum")
    assert n == 8 * 32
    assert abs(loss.item() - want.item()) / want.item() < 1e-6


def test_recurrence_state_stays_fp32_under_autocast():
    _, bf16 = runtimes()
    torch.manual_seed(0)
    model = build_model(model_cfg("recurrence"), 256)
    seen = []
    handle = model.blocks[0].mixer.lru.register_forward_hook(lambda _m, _a, out: seen.append(out[1].dtype))
    x, _ = batch(b=2, t=16)
    with bf16.autocast():
        model(x)
        states = model.init_state(2)
        for t in range(3):
            _, states = model.step(x[:, t], states)
    handle.remove()
    assert seen and all(d == torch.float32 for d in seen)  # last state of forward and of each step
    assert all(s.h.dtype == torch.float32 for s in states)


def test_attention_softmax_is_accumulated_beyond_bf16():
    # With bf16 inputs, an attention whose softmax and weighted sum run in fp32 is off from the exact
    # (fp64) result on the same inputs by about one rounding of its bf16 output; a softmax computed
    # in bf16 is off by several (measured here: ~3x). Long rows (T = 2048) make the sum matter.
    _, bf16 = runtimes()
    g = torch.Generator().manual_seed(0)
    q = 2 * torch.randn(1, 2, 2048, 64, generator=g)
    k = torch.randn(1, 2, 2048, 64, generator=g)
    v = torch.randn(1, 2, 2048, 64, generator=g) + 3
    with bf16.autocast():
        got = causal_attention(q, k, v)
    assert got.dtype == torch.bfloat16
    exact = causal_attention(*(t.bfloat16().double() for t in (q, k, v)))
    output_rounding = (exact.bfloat16().double() - exact).abs().max()
    assert (got.double() - exact).abs().max() <= 1.5 * output_rounding


def counting_batch(seed: int, b: int = 8, t: int = 64):
    """Sequences start, start + 1, ... (mod 64): the next token is a function of the current one."""
    g = torch.Generator().manual_seed(seed)
    seq = (torch.randint(64, (b, 1), generator=g) + torch.arange(t + 1)) % 64
    return seq[:, :-1], seq[:, 1:]


@pytest.mark.parametrize("kind", ["global_attention", "recurrence"])
def test_bf16_training_follows_fp32_training(kind):
    # 20 trainer steps on the same batches from the same init: the loss curves stay within 2%.
    fp32, bf16 = runtimes()
    cfg = config_from_dict({"model": {"width": 64, "depth": 2, "pattern": [kind]},
                            "train": {"steps": 20, "warmup_steps": 2, "lr": 1e-2}})
    curves = {}
    for rt in (fp32, bf16):
        torch.manual_seed(0)
        model = build_model(cfg.model, 256)
        opt = build_optimizer(model, cfg.train)
        sched = build_scheduler(opt, cfg.train, cfg.train.steps)
        curves[rt.precision] = [train_step(model, opt, sched, [counting_batch(s)], rt, 1.0).loss for s in range(20)]
        assert all(p.dtype == torch.float32 for p in model.parameters())  # master weights stay fp32
    assert curves["fp32"][-1] < curves["fp32"][0] - 0.5  # it learns at all
    for a, b in zip(curves["fp32"], curves["bf16"], strict=True):
        assert b == pytest.approx(a, rel=0.02)
