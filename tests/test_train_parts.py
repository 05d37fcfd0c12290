"""Small pieces of the trainer on their own: evaluation, divergence rule, records, checkpoints, probes."""

from __future__ import annotations

import math
import os
import random

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

from blockyard.errors import ConfigError
from blockyard.rundir import parse_metrics
from blockyard.train import checkpoint as ckpt
from blockyard.train.loop import divergence, evaluate
from blockyard.train.memory import PeakRSS, current_rss_bytes, peak_rss_bytes
from blockyard.train.runtime import Runtime, resolve_device, resolve_threads

CPU = Runtime(device=torch.device("cpu"), threads=1, precision="fp32", precision_reason="test", kernels="auto",
              kernels_info={})


class FixedLogits(nn.Module):
    """A 'model' whose logits are given: evaluation is then checkable by hand."""

    def __init__(self, logits: torch.Tensor) -> None:
        super().__init__()
        self.logits = logits
        self.calls = 0

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = self.logits[self.calls]
        self.calls += 1
        return out


def test_evaluate_mean_loss_over_scored_tokens_and_accuracy():
    g = torch.Generator().manual_seed(0)
    logits = torch.randn(2, 3, 5, 7, generator=g)  # two batches of (3, 5) positions, vocab 7
    ys = [torch.randint(0, 7, (3, 5), generator=g) for _ in range(2)]
    ys[0][:, :3] = -100
    ys[1][0] = -100
    model = FixedLogits(logits)
    x = torch.zeros(3, 5, dtype=torch.long)
    result = evaluate(model, [(x, y) for y in ys], CPU, is_task=True)
    # Reference: torch's mean cross-entropy over all scored positions of both batches at once.
    all_logits = logits.flatten(0, 2)
    all_y = torch.cat([y.flatten() for y in ys])
    ref = F.cross_entropy(all_logits, all_y, ignore_index=-100).item()
    assert result["loss"] == pytest.approx(ref, rel=1e-6)
    assert result["bits_per_token"] == pytest.approx(ref / math.log(2), rel=1e-6)
    mask = all_y != -100
    hand = (all_logits.argmax(-1)[mask] == all_y[mask]).float().mean().item()
    assert result["accuracy"] == pytest.approx(hand)
    x = torch.zeros(3, 5, dtype=torch.long)
    assert "accuracy" not in evaluate(FixedLogits(logits), [(x, ys[0])], CPU, is_task=False)


def test_evaluate_hooks_add_metrics_and_mode_is_restored():
    model = nn.Sequential(nn.Embedding(5, 5))
    model.train()
    seen = []

    def hook(m, runtime):
        seen.append(m.training)
        return {"probe_x": 0.25}

    x = torch.randint(0, 5, (2, 4))
    result = evaluate(model, [(x, x)], CPU, is_task=False, hooks=[hook])
    assert result["probe_x"] == 0.25 and seen == [False] and model.training


def test_divergence_rule():
    assert divergence(2.0, 1.5, 2.0) is None
    assert "threshold 3.0000" in divergence(3.5, 1.5, 2.0)
    assert "not finite" in divergence(float("nan"), 1.5, 2.0)
    assert "not finite" in divergence(float("inf"), 1.5, 10.0)


def test_parse_metrics_stops_at_a_cut_line():
    text = '{"step": 1, "split": "train", "loss": 2.0}\n{"step": 5, "split": "train", "lo'
    assert parse_metrics(text) == [{"step": 1, "split": "train", "loss": 2.0}]


def test_peak_rss_sees_a_released_allocation():
    # An anonymous mapping, not the heap: an earlier test may have told malloc to keep freed memory
    # (train.allocator.keep_freed_memory), and a heap block would then reuse pages already resident.
    # The process's high-water mark may also sit above today's RSS (earlier tests in this process),
    # so the mapping is sized to climb past it: whatever headroom there is, plus 96 MiB.
    import mmap

    rss_before = current_rss_bytes()
    size = max(0, peak_rss_bytes() - rss_before) + 96 * 2**20
    block = mmap.mmap(-1, size)
    pages = np.frombuffer(block, dtype=np.uint8)
    pages[::4096] = 1  # one write a page: every page resident
    del pages
    block.close()  # returned to the system: the current RSS falls back
    probe = PeakRSS(previous_peak=1)
    # Released already, still counted in the peak (current RSS from psutil, an independent reader).
    assert probe.sample() >= rss_before + size - 6 * 2**20
    assert PeakRSS(previous_peak=10**15).sample() == 10**15  # an earlier segment's larger peak is kept


def test_threads_and_device_resolution():
    assert resolve_threads(0) == os.cpu_count()
    assert resolve_threads(3) == 3
    assert resolve_device("cpu") == torch.device("cpu")
    with pytest.raises(ConfigError, match="runtime.device"):
        resolve_device("gpu0")


def test_checkpoint_roundtrip_restores_rng_and_state(tmp_path):
    model = nn.Linear(3, 2)
    opt = torch.optim.AdamW(model.parameters(), lr=0.1)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda i: 0.5 ** i)
    model(torch.ones(1, 3)).sum().backward()
    opt.step()
    sched.step()
    torch.manual_seed(7)
    np.random.seed(7)
    random.seed(7)
    ckpt.save_checkpoint(tmp_path, step=3, config_hash="abc", model=model, optimizer=opt, scheduler=sched,
                         loop={"first_loss": 1.0}, keep=2)
    expected = (torch.rand(3), np.random.rand(3), random.random())
    torch.manual_seed(0)
    np.random.seed(0)
    random.seed(0)
    model2 = nn.Linear(3, 2)
    opt2 = torch.optim.AdamW(model2.parameters(), lr=0.1)
    sched2 = torch.optim.lr_scheduler.LambdaLR(opt2, lambda i: 0.5 ** i)
    found = ckpt.latest_valid_checkpoint(tmp_path, "abc")
    assert found.step == 3
    assert ckpt.restore(found, model2, opt2, sched2) == {"first_loss": 1.0}
    got = (torch.rand(3), np.random.rand(3), random.random())
    assert torch.equal(expected[0], got[0]) and np.array_equal(expected[1], got[1]) and expected[2] == got[2]
    assert torch.equal(model.weight, model2.weight)
    assert opt2.param_groups[0]["lr"] == pytest.approx(0.05)
    assert torch.equal(opt.state_dict()["state"][0]["exp_avg"], opt2.state_dict()["state"][0]["exp_avg"])


def test_keep_last_k_and_config_mismatch(tmp_path):
    model = nn.Linear(2, 2)
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda i: 1.0)
    for step in (10, 20, 30):
        ckpt.save_checkpoint(tmp_path, step=step, config_hash="abc", model=model, optimizer=opt, scheduler=sched,
                             loop={}, keep=2)
    assert [s for s, _ in ckpt.list_checkpoints(tmp_path)] == [20, 30]
    assert not list(tmp_path.glob("*.tmp"))  # atomic writes leave no temp files behind
    warnings = []
    assert ckpt.latest_valid_checkpoint(tmp_path, "other", warn=warnings.append) is None
    assert len(warnings) == 2 and all("written for config abc" in w for w in warnings)
