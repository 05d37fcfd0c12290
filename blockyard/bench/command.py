"""``blockyard bench``: check the arguments, run the speed benchmark (and the quality check), write JSON, report."""

from __future__ import annotations

import json
from pathlib import Path

from blockyard.bench.cases import CASES, BenchCase
from blockyard.bench.paired import DEFAULT_PAIRS
from blockyard.bench.quality import QUALITY_LR, QUALITY_SEEDS, run_quality
from blockyard.bench.report import format_report
from blockyard.bench.speed import run_bench
from blockyard.errors import UserError


def bench_command(*, steps: int = 30, warmup: int = 10, rounds: int = 2, profile: bool = True,
                  quality: bool = False, quality_steps: int = 300, quality_seeds: int = QUALITY_SEEDS,
                  quality_lr: float = QUALITY_LR, json_path: str | None = None, threads: int = 0,
                  cases: str | None = None, pairs: int = DEFAULT_PAIRS) -> str:
    """Run the benchmark (and the bf16 quality check), write JSON, return the report.

    ``cases``: comma-separated names of ``blockyard.bench.cases.CASES`` to time (None: all);
    ``pairs``: alternated step pairs per model-vs-model ratio (``blockyard.bench.paired``).
    """
    check_arguments(steps=steps, warmup=warmup, quality=quality, quality_steps=quality_steps,
                    quality_seeds=quality_seeds, quality_lr=quality_lr, json_path=json_path, threads=threads,
                    pairs=pairs)
    result = run_bench(steps=steps, warmup=warmup, rounds=rounds, profile=profile, threads=threads,
                       log=lambda s: print(s, flush=True), cases=chosen_cases(cases), pairs=pairs)
    if quality:
        print("bf16 quality ...", flush=True)
        result["quality"] = run_quality(quality_steps, quality_seeds, threads=threads, lr=quality_lr)
    if json_path is not None:
        Path(json_path).write_text(json.dumps(result, indent=2, default=str) + "\n")
    return format_report(result)


def chosen_cases(names: str | None) -> tuple[BenchCase, ...]:
    """The cases named in ``names`` (comma-separated, in CASES' order); all for None; UserError on an unknown one."""
    if names is None:
        return CASES
    wanted = [n.strip() for n in names.split(",") if n.strip()]
    known = {c.name for c in CASES}
    unknown = [n for n in wanted if n not in known]
    if unknown or not wanted:
        raise UserError(f"--cases {names}: {'unknown ' + ', '.join(unknown) if unknown else 'no name given'}; "
                        f"allowed: {', '.join(c.name for c in CASES)}")
    return tuple(c for c in CASES if c.name in wanted)


def check_arguments(*, steps: int, warmup: int, quality: bool, quality_steps: int, quality_seeds: int,
                    quality_lr: float, json_path: str | None, threads: int, pairs: int = DEFAULT_PAIRS) -> None:
    """Raise a one-line ``UserError`` naming the first bad option, before anything is measured."""
    if warmup < 1 or steps < warmup + 10:
        raise UserError(f"--steps {steps} / --warmup {warmup}: need warmup >= 1 and steps >= warmup + 10 "
                        "(tokens/s is read between log lines, every 10 steps)")
    if json_path is not None and Path(json_path).is_dir():
        raise UserError(f"--json {json_path}: is a directory; give a file path")
    if pairs < 0 or 0 < pairs < 6:
        raise UserError(f"--pairs {pairs}: must be 0 (skip) or >= 6 (fewer give no 95% interval of the median)")
    if threads < 0:
        raise UserError(f"--threads {threads}: must be >= 0 (0 = every core)")
    if quality and (quality_seeds < 1 or quality_steps < 20):
        raise UserError(f"--quality-seeds {quality_seeds} / --quality-steps {quality_steps}: need seeds >= 1 "
                        "and steps >= 20")
    if quality and not 0 < quality_lr <= 1:
        raise UserError(f"--quality-lr {quality_lr}: must be in (0, 1]")
