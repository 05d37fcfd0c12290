"""Optimiser pieces of the trainer: schedule, AdamW parameter groups, gradient accumulation."""

from __future__ import annotations

import copy
import math

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from blockyard.config import config_from_dict
from blockyard.model import build_model
from blockyard.train.loop import token_loss_sum, train_step
from blockyard.train.optim import build_optimizer, build_scheduler, lr_factor, param_groups, total_steps
from blockyard.train.runtime import Runtime

CPU = Runtime(device=torch.device("cpu"), threads=1, precision="fp32", precision_reason="test", kernels="auto",
              kernels_info={})


def _cfg(**train):
    return config_from_dict({
        "model": {"width": 32, "depth": 3, "pattern": ["global_attention", "recurrence", "lstm"]},
        "data": {"seq_len": 16},
        "train": train,
    })


def _cosine_reference(step: int, warmup: int, total: int, floor: float) -> float:
    # Linear warmup, then SGDR cosine annealing without restarts (Loshchilov & Hutter 2017,
    # eq. 5: eta_t = eta_min + (eta_max - eta_min) (1 + cos(pi T_cur / T_i)) / 2) with
    # eta_max = 1, eta_min = floor, T_cur = step - warmup, T_i = total - warmup. Written out here
    # independently of blockyard.train.optim.
    if step <= warmup:
        return step / warmup
    t_cur, t_i = step - warmup, total - warmup
    return floor + (1 - floor) * (1 + math.cos(math.pi * t_cur / t_i)) / 2


@pytest.mark.parametrize("warmup,total,floor", [(10, 100, 0.1), (1, 7, 0.0), (25, 300, 0.5)])
def test_schedule_matches_warmup_plus_cosine(warmup, total, floor):
    for step in sorted({1, 2, warmup // 2 or 1, warmup, warmup + 1, (warmup + total) // 2, total - 1, total}):
        assert lr_factor(step, warmup, total, floor) == pytest.approx(_cosine_reference(step, warmup, total, floor),
                                                                      rel=1e-12, abs=1e-12)
    # Landmarks of the formula: the peak right at the end of warmup, half way down mid-decay, the floor at the end.
    assert lr_factor(warmup, warmup, total, floor) == pytest.approx(1.0)
    if (total - warmup) % 2 == 0:
        assert lr_factor((warmup + total) // 2, warmup, total, floor) == pytest.approx((1 + floor) / 2)
    assert lr_factor(total, warmup, total, floor) == pytest.approx(floor)


def test_schedule_without_warmup_starts_at_peak():
    assert lr_factor(0, 0, 50, 0.1) == pytest.approx(1.0)
    assert lr_factor(50, 0, 50, 0.1) == pytest.approx(0.1)


def test_scheduler_drives_the_optimizer_lr_by_update_number():
    """The lr AdamW uses for update s (1-based) is peak * lr_factor(s): LambdaLR wiring has no off-by-one."""
    cfg = _cfg(lr=0.01, warmup_steps=5, lr_floor=0.2)
    model = nn.Linear(3, 3)
    opt = build_optimizer(model, cfg.train)
    sched = build_scheduler(opt, cfg.train, 20)
    for s in range(1, 21):
        for group in opt.param_groups:
            assert group["lr"] == pytest.approx(0.01 * _cosine_reference(s, 5, 20, 0.2), rel=1e-12)
        opt.step()
        sched.step()


def test_token_budget_sets_steps():
    cfg = _cfg(tokens=10_000, batch_size=4, grad_accum=3, steps=7)
    # ceil(10000 / (4 * 3 * 16)) = ceil(52.08) = 53
    assert total_steps(cfg.train, 16) == 53
    assert total_steps(_cfg(steps=7).train, 16) == 7


def _kind(model: nn.Module, name: str) -> str:
    module = model.get_submodule(name.rsplit(".", 1)[0]) if "." in name else model
    if isinstance(module, nn.Embedding):
        return "embedding"
    if isinstance(module, nn.RMSNorm):
        return "norm"
    if "bias" in name.rsplit(".", 1)[-1]:
        return "bias"
    return "other"


@pytest.mark.parametrize("decay_all", [False, True])
def test_adamw_groups_exclude_norms_biases_embeddings(decay_all):
    """Decay on matrices only (common practice, no source); every parameter in exactly one group."""
    cfg = _cfg(weight_decay=0.1, decay_all=decay_all)
    torch.manual_seed(0)
    model = build_model(cfg.model, 50)
    groups = param_groups(model, 0.1, decay_all)
    ids = [id(p) for g in groups for p in g["params"]]
    assert len(ids) == len(set(ids)) == len(list(model.parameters()))
    decay_of = {id(p): g["weight_decay"] for g in groups for p in g["params"]}
    kinds = {}
    for name, p in model.named_parameters():
        kind = _kind(model, name)
        kinds[kind] = kinds.get(kind, 0) + 1
        if decay_all:
            assert decay_of[id(p)] == 0.1, name
        elif kind in ("embedding", "norm", "bias") or p.ndim < 2:
            assert decay_of[id(p)] == 0.0, name
        else:
            assert decay_of[id(p)] == 0.1, name
    # The model really has each kind, so the check above is not vacuous.
    assert kinds["embedding"] == 1 and kinds["norm"] >= 4 and kinds["bias"] >= 2 and kinds["other"] >= 4
    opt = build_optimizer(model, cfg.train)
    assert isinstance(opt, torch.optim.AdamW)
    assert sorted(g["weight_decay"] for g in opt.param_groups) == ([0.1] if decay_all else [0.0, 0.1])


def _reference_grads(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> list[torch.Tensor]:
    # Reference: torch's own mean cross-entropy over every non-ignored target of the whole batch.
    model.zero_grad()
    logits = model(x)
    F.cross_entropy(logits.flatten(0, 1), y.flatten(), ignore_index=-100).backward()
    return [p.grad.clone() for p in model.parameters()]


@pytest.mark.parametrize("masked", [False, True])
def test_grad_accumulation_equals_one_big_batch(masked):
    """grad_accum=2 with batch 4 == one batch of 8 made of the same micro-batches (mean over tokens)."""
    cfg = _cfg()
    torch.manual_seed(0)
    model = build_model(cfg.model, 40)
    g = torch.Generator().manual_seed(1)
    x = torch.randint(0, 40, (8, 16), generator=g)
    y = torch.randint(0, 40, (8, 16), generator=g)
    if masked:  # unequal scored-token counts per micro-batch, as in synthetic tasks
        y[:4, :12] = -100
        y[4:, :3] = -100
    ref_model = copy.deepcopy(model)
    ref = _reference_grads(ref_model, x, y)
    big_model, acc_model = copy.deepcopy(model), copy.deepcopy(model)
    results = []
    for m, batches in ((big_model, [(x, y)]), (acc_model, [(x[:4], y[:4]), (x[4:], y[4:])])):
        # SGD with lr 1: the update is exactly -grad, so parameters compare the gradients directly.
        opt = torch.optim.SGD(m.parameters(), lr=1.0)
        sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda _: 1.0)
        results.append(train_step(m, opt, sched, batches, CPU, grad_clip=0.0))
        for p, p0, gref in zip(m.parameters(), model.parameters(), ref, strict=True):
            torch.testing.assert_close(p0 - p, gref, rtol=1e-4, atol=1e-6)
    big, acc = results
    assert acc.loss == pytest.approx(big.loss, rel=1e-6)
    assert acc.grad_norm == pytest.approx(big.grad_norm, rel=1e-5)
    ref_loss, n = token_loss_sum(ref_model(x), y)
    assert big.loss == pytest.approx(ref_loss.item() / n, rel=1e-6)
    assert big.grad_norm == pytest.approx(torch.linalg.vector_norm(torch.stack([r.norm() for r in ref])).item(),
                                          rel=1e-5)


def test_grad_clip_reports_norm_before_clipping():
    cfg = _cfg()
    torch.manual_seed(0)
    model = build_model(cfg.model, 40)
    x = torch.randint(0, 40, (4, 16), generator=torch.Generator().manual_seed(2))
    ref = _reference_grads(copy.deepcopy(model), x, x.roll(1, 1))
    norm = torch.linalg.vector_norm(torch.stack([r.norm() for r in ref])).item()
    clip = norm / 10
    opt = torch.optim.SGD(model.parameters(), lr=1.0)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda _: 1.0)
    before = [p.detach().clone() for p in model.parameters()]
    stats = train_step(model, opt, sched, [(x, x.roll(1, 1))], CPU, grad_clip=clip)
    assert stats.grad_norm == pytest.approx(norm, rel=1e-5)
    # torch.nn.utils.clip_grad_norm_ scales by clip / (norm + 1e-6): the step has norm ~= clip.
    step_norm = torch.linalg.vector_norm(torch.stack([(b - p).norm() for b, p in zip(before, model.parameters(),
                                                                                      strict=True)])).item()
    assert step_norm == pytest.approx(clip, rel=1e-4)


@pytest.mark.parametrize("fraction", [0.1, 0.9999999, 1.0, 10.0])
def test_grad_clip_equals_torchs_clip_grad_norm_bit_for_bit(fraction):
    # The trainer skips torch's multiply by a factor of exactly 1 (no clipping); everywhere else it
    # must leave the very gradients torch.nn.utils.clip_grad_norm_ leaves, to the last bit.
    cfg = _cfg()
    torch.manual_seed(0)
    model = build_model(cfg.model, 40)
    x = torch.randint(0, 40, (4, 16), generator=torch.Generator().manual_seed(2))
    ref = copy.deepcopy(model)
    ref_loss, n = token_loss_sum(ref(x), x.roll(1, 1))
    (ref_loss / n).backward()
    norm = torch.nn.utils.get_total_norm([p.grad for p in ref.parameters()])
    torch.nn.utils.clip_grad_norm_(ref.parameters(), float(norm) * fraction)
    opt = torch.optim.SGD(model.parameters(), lr=0.0)  # plain SGD leaves the gradients as the step saw them
    train_step(model, opt, torch.optim.lr_scheduler.LambdaLR(opt, lambda _: 1.0), [(x, x.roll(1, 1))], CPU,
               grad_clip=float(norm) * fraction)
    assert all(torch.equal(p.grad, r.grad) for p, r in zip(model.parameters(), ref.parameters(), strict=True))


def test_optimizer_reads_betas_lr_and_decay():
    cfg = _cfg(lr=0.004, beta1=0.8, beta2=0.99, weight_decay=0.05)
    opt = build_optimizer(build_model(cfg.model, 30), cfg.train)
    assert opt.defaults["betas"] == (0.8, 0.99) and opt.defaults["lr"] == 0.004
    assert {g["group"]: g["weight_decay"] for g in opt.param_groups} == {"decay": 0.05, "no_decay": 0.0}
