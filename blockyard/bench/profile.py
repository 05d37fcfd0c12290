"""One training step under ``torch.profiler``, its time split by block kind (forward and backward)."""

from __future__ import annotations

import contextlib
import time
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import torch
from torch import nn

from blockyard.bench.cases import BenchCase, trainer_parts

if TYPE_CHECKING:
    from blockyard.model import LanguageModel

_LABEL = "bench::"


@contextlib.contextmanager
def labelled_forward(model: LanguageModel) -> Iterator[None]:
    """Open a profiler range around the forward of each part of the model, named by its block kind.

    Ranges nest: the innermost one names an op (mixer:<kind>, mlp, embedding); ops of a block
    outside both (norms, residual adds) are ``norms/residual``; ops of the model outside every
    block (final norm, tied head) are ``head/loss``.
    """
    parts: list[tuple[nn.Module, str]] = [(model, "head/loss"), (model.embed, "embedding")]
    for block in model.blocks:
        parts.append((block, "norms/residual"))
        parts.append((block.mixer, f"mixer:{block.mixer.kind}"))
        if block.mlp is not None:
            parts.append((block.mlp, "mlp"))
    handles = []
    for module, label in parts:
        stack: list[Any] = []

        def enter(_m: nn.Module, _args: Any, label: str = label, stack: list[Any] = stack) -> None:
            rf = torch.profiler.record_function(_LABEL + label)
            rf.__enter__()
            stack.append(rf)

        def leave(_m: nn.Module, _args: Any, _out: Any, stack: list[Any] = stack) -> None:
            stack.pop().__exit__(None, None, None)

        handles += [module.register_forward_pre_hook(enter), module.register_forward_hook(leave)]
    try:
        yield
    finally:
        for h in handles:
            h.remove()


def _forward_bucket(event: Any) -> str | None:
    """The innermost label range around a forward op, or None."""
    e = event
    while e is not None:
        if e.name.startswith(_LABEL):
            return e.name[len(_LABEL):]
        e = e.cpu_parent
    return None


def _is_scan(name: str) -> bool:
    """The range of a scan autograd Function (``_ChunkedScan``) or of its backward, or of a compiled
    kernel's custom op (``blockyard::linear_scan``, the fused ``blockyard::rg_lru``, which holds the
    RG-LRU's gates and decay too) or of its backward; the other custom ops (the causal conv) stay
    with their block."""
    name = name.removeprefix("autograd::engine::evaluate_function: ")
    prefixes = ("blockyard::", "GeneratedBackwardFor_blockyard_")
    compiled = name.startswith(tuple(p + op for p in prefixes for op in ("linear_scan", "rg_lru")))
    return compiled or (name.startswith("_") and "Scan" in name)


def event_buckets(events: list[Any]) -> list[tuple[Any, str]]:
    """Each profiled event with the bucket its time is charged to: a block kind (forward + its
    backward), ``scan`` (the linear scan inside recurrences, or the fused RG-LRU op, forward +
    backward, apart from its mixer), ``optimizer`` (AdamW step and zero_grad), ``other`` (clipping,
    schedule, loss bookkeeping).

    A backward op is charged to the forward op it differentiates: the autograd engine's
    ``evaluate_function`` range carries that op's sequence number.
    """
    by_seq: dict[int, str] = {}
    for e in events:
        if e.sequence_nr >= 0 and not e.name.startswith("autograd::engine"):
            by_seq.setdefault(e.sequence_nr, _forward_bucket(e) or "head/loss")
    out = []
    for e in events:
        bucket, a = None, e
        while a is not None and bucket is None:
            if _is_scan(a.name):
                bucket = "scan"
            elif a.name.startswith("autograd::engine::evaluate_function"):
                bucket = by_seq.get(a.sequence_nr, "backward:other")
            elif a.name.startswith("Optimizer."):
                bucket = "optimizer"
            elif a.name.startswith(_LABEL):
                bucket = a.name[len(_LABEL):]
            a = a.cpu_parent
        if bucket is None:
            bucket = "head/loss" if e.sequence_nr >= 0 else "other"
        out.append((e, bucket))
    return out


def step_time_shares(events: list[Any]) -> dict[str, float]:
    """Self CPU time of one profiled step per bucket of ``event_buckets``, in ms."""
    totals: dict[str, float] = {}
    for e, bucket in event_buckets(events):
        totals[bucket] = totals.get(bucket, 0.0) + e.self_cpu_time_total / 1e3
    return totals


def profile_step(case: BenchCase, cache_dir: Path, warmup: int = 3, threads: int = 0) -> dict[str, Any]:
    """One ``blockyard.train.train_step`` of ``case`` under torch.profiler: ms and share per bucket."""
    from torch.profiler import ProfilerActivity, profile

    parts = trainer_parts(case, cache_dir, threads)
    for i in range(warmup):
        parts.step(i)
    with labelled_forward(parts.model), profile(activities=[ProfilerActivity.CPU]) as prof:
        start = time.perf_counter()
        parts.step(warmup)
        wall_ms = (time.perf_counter() - start) * 1e3
    ms = step_time_shares(list(prof.events()))
    total = sum(ms.values())
    return {"wall_ms": wall_ms, "ms": ms, "share": {k: v / total for k, v in ms.items()}}
