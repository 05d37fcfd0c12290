"""Measure the verdicts' false-positive rate on real training: K null comparisons on a tiny model.

Each null comparison is what ``null_control: true`` adds to a grid: the reference trained on n
seeds, and again on the same data seeds under init seeds 1,000,000 + seed (``train.init_seed``),
so the true difference is 0. It is decided with the grid's rules for a standalone comparison
(a 95% paired t interval at the smallest effect, ``blockyard.grid.verdicts``); a "better" or
"worse" is a false positive. The script prints each comparison, then the false-positive rate with
its 95% Clopper-Pearson interval (Clopper & Pearson 1934, via statsmodels): a valid design keeps
it at or below 5%.

    PYTHONPATH=. .venv/bin/python scripts/calibrate_verdicts.py --comparisons 20 --seeds 3 --workers 2

Cells are ordinary run dirs under ``--out`` (default: a temporary folder, removed at the end).

Measured under the current defaults (weights drawn by path; the null control's other init seed shares
nothing with the reference, so keyed draws do not lower an A/A pair's noise) with ``--comparisons 200
--seeds 3 --steps 60 --workers 2`` (1,200 runs, 148 s on the project's idle 2-core machine): 3 better,
1 worse, 5 equivalent, 191 undecided; false-positive rate 4/200 = 0.020, 95% Clopper-Pearson interval
[0.005, 0.050]; median paired sd of two runs of the same model 0.0119 nats/token. (Before, at 40
comparisons: 1/40 = 0.025, [0.001, 0.132].)
"""

from __future__ import annotations

import argparse
import concurrent.futures
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from blockyard.grid import stats
from blockyard.grid.spec import NULL_VARIANT, Cell, expand_cells, parse_grid
from blockyard.grid.verdicts import compare_all, group_outcomes

# The tiny model: one global-attention block of width 32 on the pydoc corpus (ships with Python).
TINY = {
    "model": {"width": 32, "depth": 1, "pattern": ["global_attention"], "mlp_expansion": 2.0},
    "data": {"corpus": "pydoc", "seq_len": 32},
    "train": {"steps": 60, "batch_size": 8, "warmup_steps": 5, "eval_every": 60, "eval_windows": 16,
              "log_every": 20, "checkpoint_every": 60},
    "runtime": {"threads": 1},
}


def null_cells(comparisons: int, seeds: int, steps: int, smallest_effect: float) -> tuple[list[Cell], Any]:
    """The reference and null-control cells of ``comparisons`` x ``seeds`` seeds (the grid's own expansion)."""
    base = {**TINY, "train": {**TINY["train"], "steps": steps, "eval_every": steps, "checkpoint_every": steps}}
    spec = parse_grid({"name": "calibrate", "base": base, "variants": {"ref": {}}, "reference": "ref",
                       "seeds": list(range(comparisons * seeds)), "null_control": True,
                       "smallest_effect": smallest_effect}, base_dir=Path.cwd())
    return expand_cells(spec), spec


def train_cell(cell: Cell, out: Path) -> dict[str, Any]:
    """Train one cell in this process; its row for ``blockyard.grid.verdicts``."""
    from blockyard.train import run_training

    summary = run_training(cell.cfg, out / cell.id, progress="silent")
    return {"variant": cell.variant, "point": cell.point, "seed": cell.seed, "status": summary.get("status", "done"),
            "final_val_loss": summary.get("final_val_loss")}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--comparisons", type=int, default=20, help="K: null comparisons (default 20)")
    p.add_argument("--seeds", type=int, default=3, help="seeds per comparison (default 3)")
    p.add_argument("--steps", type=int, default=60, help="training steps per cell (default 60)")
    p.add_argument("--smallest-effect", type=float, default=0.01, help="nats/token (default 0.01)")
    p.add_argument("--workers", type=int, default=1, help="cells trained at once, 1 thread each (default 1)")
    p.add_argument("--out", default=None, help="keep the run dirs here (default: a temporary folder)")
    args = p.parse_args(argv)
    if args.comparisons < 1 or args.seeds < 2 or args.steps < 1 or args.workers < 1 or args.smallest_effect <= 0:
        print("error: --comparisons >= 1, --seeds >= 2, --steps >= 1, --workers >= 1, --smallest-effect > 0",
              file=sys.stderr)
        return 2
    cells, spec = null_cells(args.comparisons, args.seeds, args.steps, args.smallest_effect)
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(args.out) if args.out else Path(tmp)
        start = time.perf_counter()
        with concurrent.futures.ProcessPoolExecutor(args.workers) as pool:
            rows = list(pool.map(train_cell, cells, [out] * len(cells)))
        wall = time.perf_counter() - start
    by_seed = {(r["variant"], r["seed"]): r for r in rows}
    false_positives, sds, verdicts = 0, [], {v: 0 for v in stats.VERDICTS}
    for k in range(args.comparisons):
        block = range(k * args.seeds, (k + 1) * args.seeds)
        family = compare_all(group_outcomes([by_seed[(v, s)] for v in ("ref", NULL_VARIANT) for s in block]),
                             "ref", spec.design, with_planning=False)
        (c,) = family.null
        verdicts[c.verdict] += 1
        false_positives += c.verdict in (stats.BETTER, stats.WORSE)
        if c.interval is not None and c.interval.sd is not None:
            sds.append(c.interval.sd)
        print(f"comparison {k + 1:3d} (seeds {block.start}-{block.stop - 1}): difference {c.mean_diff:+.5f}, "
              f"95% interval [{c.interval.low:+.5f}, {c.interval.high:+.5f}], {c.verdict}")
    low, high = stats.clopper_pearson(false_positives, args.comparisons)
    print(f"\n{len(cells)} tiny runs ({args.steps} steps each) in {wall:.0f} s with {args.workers} worker(s).")
    print("verdicts: " + ", ".join(f"{n} {v}" for v, n in verdicts.items()))
    if sds:
        print(f"paired sd of two runs of the same model (median over comparisons): {statistics.median(sds):.5f} "
              "nats/token")
    print(f"false-positive rate: {false_positives}/{args.comparisons} = {false_positives / args.comparisons:.3f}, "
          f"95% Clopper-Pearson interval [{low:.3f}, {high:.3f}] (a valid design: <= 0.05)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
