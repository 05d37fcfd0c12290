"""The blockyard side of the benchmark: which configs are timed, and how one is trained and read.

Each case is trained by ``blockyard.train.run_training`` itself, records and all, in a temp run
dir; its tokens/s is read from the loop's own clock in ``metrics.jsonl``.
"""

from __future__ import annotations

import dataclasses
import itertools
import json
import statistics
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any


@dataclasses.dataclass(frozen=True)
class BenchCase:
    """One blockyard training config of the benchmark (all at width 256, depth 4 unless said)."""

    name: str
    kind: str  # a mixer kind: global_attention, recurrence, local_attention, ...
    seq_len: int
    batch: int
    precision: str = "fp32"
    width: int = 256
    depth: int = 4
    compile: bool = False  # runtime.compile (its warm-up runs before the loop's clock starts)

    @property
    def tokens_per_step(self) -> int:
        return self.seq_len * self.batch



# blockyard's own configs timed against each other. Batches at seq 2048 keep the tokens per step.
CASES = (
    BenchCase("attention-fp32", "global_attention", 256, 16),
    BenchCase("attention-bf16", "global_attention", 256, 16, "bf16"),
    BenchCase("recurrence-fp32", "recurrence", 256, 16),
    BenchCase("recurrence-bf16", "recurrence", 256, 16, "bf16"),
    BenchCase("attention-fp32-s2048", "global_attention", 2048, 2),
    BenchCase("recurrence-fp32-s2048", "recurrence", 2048, 2),
    BenchCase("attention-fp32-compiled", "global_attention", 256, 16, compile=True),
    BenchCase("recurrence-fp32-compiled", "recurrence", 256, 16, compile=True),
)
# Plain-loop twins of blockyard's cases (same shapes, same precision).
PLAIN_TWINS = {"attention-fp32": "plain-fp32", "attention-bf16": "plain-bf16"}


def blockyard_config(case: BenchCase, steps: int, cache_dir: str | Path, threads: int = 0, **train: Any) -> Any:
    """The blockyard ``Config`` of ``case``: pydoc bytes, evaluation and checkpoint only at the end."""
    from blockyard.config import config_from_dict

    mixer: dict[str, Any] = {"kind": case.kind}
    if "attention" in case.kind:
        mixer["heads"] = 4
    return config_from_dict({
        "name": f"bench-{case.name}",
        "model": {"width": case.width, "depth": case.depth, "pattern": ["mix"], "mixers": {"mix": mixer}},
        "data": {"corpus": "pydoc", "tokenizer": "bytes", "seq_len": case.seq_len, "cache_dir": str(cache_dir)},
        "train": {"steps": steps, "batch_size": case.batch, "eval_every": steps, "checkpoint_every": steps,
                  "eval_windows": 2, "log_every": 10, **train},
        "runtime": {"precision": case.precision, "threads": threads, "compile": case.compile},
    })


def loop_tokens_per_s(metrics: list[dict[str, Any]], warmup: int) -> float:
    """Tokens/s of the whole training loop: the best window between consecutive train lines at step >= ``warmup``.

    Uses the lines' ``wall_s`` (the loop's own clock) rather than the logged ``tokens_per_s``,
    which times the step function alone: this way batching, logging and RSS probes count too.
    The best window (the least disturbed by other processes) is taken, as for the plain loop.
    """
    lines = [m for m in metrics if m.get("split") == "train" and m["step"] >= warmup]
    if len(lines) < 2:
        raise ValueError(f"need two train lines at step >= {warmup}; raise --steps")
    return max((b["tokens"] - a["tokens"]) / (b["wall_s"] - a["wall_s"]) for a, b in itertools.pairwise(lines))


def loop_efficiency(metrics: list[dict[str, Any]], warmup: int) -> float:
    """The training loop's tokens/s over its ``train_step``'s own, in the same log windows (median).

    Each train line holds the step function's tokens/s over the steps since the previous line;
    the loop's wall clock over the same window also counts batching, records and RSS probes.
    Both clocks see the same steps, so their ratio is free of the machine's drift between runs.
    """
    lines = [m for m in metrics if m.get("split") == "train" and m["step"] >= warmup]
    ratios = [(b["tokens"] - a["tokens"]) / (b["wall_s"] - a["wall_s"]) / b["tokens_per_s"]
              for a, b in itertools.pairwise(lines) if b.get("tokens_per_s")]
    if not ratios:
        raise ValueError(f"need two train lines at step >= {warmup}; raise --steps")
    return statistics.median(ratios)


def blockyard_run(case: BenchCase, steps: int, warmup: int, cache_dir: Path, threads: int = 0,
                **train: Any) -> dict[str, Any]:
    """Train ``case`` with ``blockyard.train.run_training`` in a temp run dir; its loop tokens/s and summary."""
    from blockyard.rundir import read_metrics
    from blockyard.train import run_training

    cfg = blockyard_config(case, steps, cache_dir, threads, **train)
    with tempfile.TemporaryDirectory(prefix="blockyard-bench-") as tmp:
        summary = run_training(cfg, Path(tmp) / "run", progress="warnings")
        metrics = read_metrics(Path(tmp) / "run" / "metrics.jsonl")
        compiled = json.loads((Path(tmp) / "run" / "env.json").read_text())["compile"]
    if summary.get("status") != "done":  # e.g. stopped by SIGTERM: its speed is no measurement
        raise RuntimeError(f"bench run {case.name} ended {summary.get('status')!r}, not 'done'")
    if case.compile and not compiled["active"]:  # an eager figure under a compiled name would mislead
        raise RuntimeError(f"bench run {case.name}: torch.compile failed ({compiled.get('reason')})")
    return {"tokens_per_s": loop_tokens_per_s(metrics, warmup), "summary": summary, "config": cfg,
            "compile": compiled, "loop_efficiency": loop_efficiency(metrics, warmup)}


@dataclasses.dataclass(frozen=True)
class TrainerParts:
    """``case`` as the trainer builds it (model, AdamW, schedule, runtime, data), stepped by ``step(i)``.

    ``step(i)`` is one ``blockyard.train.train_step`` on training batch ``i``: forward, backward,
    clipping and the update, without the loop's records.
    """

    model: Any  # blockyard.model's model (torch.nn.Module; torch is imported lazily here)
    step: Callable[[int], None]


def trainer_parts(case: BenchCase, cache_dir: Path, threads: int = 0) -> TrainerParts:
    """Build ``case`` with the trainer's own builders, malloc settings and ``runtime.compile`` (seed 0),
    for step-level timing and profiling; RuntimeError where a compiled case's compilation fails."""
    import torch

    from blockyard.data import load_data
    from blockyard.model import build_model
    from blockyard.train import train_step
    from blockyard.train.allocator import keep_freed_memory
    from blockyard.train.compile import compile_for_training
    from blockyard.train.optim import build_optimizer, build_scheduler
    from blockyard.train.runtime import resolve_runtime

    cfg = blockyard_config(case, 100, cache_dir, threads)
    runtime, _ = resolve_runtime(cfg.runtime)
    keep_freed_memory()  # as run_training does
    data = load_data(cfg)
    torch.manual_seed(0)
    model = build_model(cfg.model, data.vocab_size, kernels=runtime.kernels)
    optimizer = build_optimizer(model, cfg.train)
    scheduler = build_scheduler(optimizer, cfg.train, cfg.train.steps)
    compiled = compile_for_training(model, runtime, data.train_batch(0))  # runtime.compile's warm-up, as the trainer
    if case.compile and not compiled["active"]:  # an eager figure under a compiled name would mislead
        raise RuntimeError(f"bench case {case.name}: torch.compile failed ({compiled.get('reason')})")

    def step(i: int) -> None:
        train_step(model, optimizer, scheduler, [data.train_batch(i)], runtime, cfg.train.grad_clip)

    return TrainerParts(model=model, step=step)
