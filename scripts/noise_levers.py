#!/usr/bin/env python
"""Measure what each noise lever buys: the paired sd of a grid's comparisons, before and after.

Trains the default grid's design (configs/grids/default.yaml: its base, variants and reference) at a
fixed list of seeds with its null control, once per *setting* of the training levers, then reads
every cell's records and prints, per lever, the A/B paired sd of each comparison and the A/A sd of
the null control at the final evaluation, with the wall time per cell. Levers that change only what
is *evaluated* are read from the same runs, so they cost no extra training:

- ``model.init_draws``: ``stream`` (one random stream, before) or ``by_path`` (weights keyed by their
  path in the model, so shared modules start identical): a training setting, one grid each;
- ``train.ema_half_life``: the averaged weights' val loss (``loss``) against the trained weights'
  (``raw_loss``), both in every val line of a run with the average on;
- validation tokens: each cell's final trained and averaged weights evaluated again on
  ``--more-windows`` windows (default 512, against the grid's 32).

Usage (about 2 x 32 cells of the default grid; 2 workers x 1 thread)::

    .venv/bin/python scripts/noise_levers.py --out runs/noise-levers [--seeds 8] [--workers 2]
    .venv/bin/python scripts/noise_levers.py --out runs/noise-levers --analyse-only

The table it prints is the README's "What cuts the noise" table.
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import yaml

ROOT = Path(__file__).resolve().parents[1]
DEFAULT_GRID = ROOT / "configs" / "grids" / "default.yaml"
NULL = "null-control"
# Training settings: name -> overrides of the grid's base (the average is on in all: it changes no training).
# Each names its peak lr: the default grid's base moved to 1.5e-3 once that lever was measured, and the
# settings measured before it ran at the trainer's 3e-3, so they pin it to reproduce the table.
BEFORE_LR = 3e-3  # the trainer's default when the settings before the lr lever were measured
SETTINGS = {
    "stream": {"model.init_draws": "stream", "train.ema_half_life": 0.1, "train.lr": BEFORE_LR},
    "by_path": {"model.init_draws": "by_path", "train.ema_half_life": 0.1, "train.lr": BEFORE_LR},
    # shorter runs, more seeds: 300 of the 700 steps (0.43 of the compute per cell)
    "short": {"model.init_draws": "by_path", "train.ema_half_life": 0.1, "train.lr": BEFORE_LR,
              "train.steps": 300, "train.eval_every": 50, "train.checkpoint_every": 150},
    # half the peak lr (1.5e-3 against the trainer's 3e-3): a calmer trajectory, at a higher loss
    "low_lr": {"model.init_draws": "by_path", "train.ema_half_life": 0.1, "train.lr": 1.5e-3},
    # the geometric middle of the two (3e-3 / sqrt 2): where the loss / noise trade of the rate turns
    "mid_lr": {"model.init_draws": "by_path", "train.ema_half_life": 0.1, "train.lr": 2.1e-3},
    # twice the batch at half the steps: the same tokens, half the gradient noise per step
    "big_batch": {"model.init_draws": "by_path", "train.ema_half_life": 0.1, "train.lr": BEFORE_LR,
                  "train.batch_size": 32, "train.steps": 350, "train.warmup_steps": 25, "train.eval_every": 50,
                  "train.checkpoint_every": 175},
}
# The null control (the reference under init seed 1,000,000 + seed, same data) is trained once: under
# either setting it is the same model at an unrelated init, so its A/A sd is one quantity; it is not
# lowered by keyed draws (a different init seed shares nothing), which is why it is an upper bound of
# the noise of a shared-init pair.
NULL_CONTROL = {"stream": False, "by_path": True, "short": True, "low_lr": True, "mid_lr": True, "big_batch": True}
# The variants each setting trains (None: all of the default grid's). The "before" setting trains the
# reference and the hybrid only: one A/B comparison is enough to see what the keyed draws change, and
# it saves a third of that setting's cells on a 2-core machine.
VARIANTS = {"stream": ("global-attention", "hybrid-2r1l"), "by_path": None, "short": None, "low_lr": None,
            "mid_lr": None, "big_batch": None}


def grid_file(out: Path, setting: str, seeds: int) -> Path:
    """A grid file for ``setting``: the default grid's design at seeds 0..seeds-1 with its null control."""
    spec = yaml.safe_load(DEFAULT_GRID.read_text())
    base = dict(spec["base"])
    if "extends" in base:
        base["extends"] = str((DEFAULT_GRID.parent / base["extends"]).resolve())
    for key, value in SETTINGS[setting].items():
        head, leaf = key.split(".")
        base.setdefault(head, {})[leaf] = value
    if VARIANTS[setting] is not None:
        spec["variants"] = {k: v for k, v in spec["variants"].items() if k in VARIANTS[setting]}
    spec.update(name=f"noise-{setting}", base=base, seeds=list(range(seeds)), null_control=NULL_CONTROL[setting])
    path = out / f"noise-{setting}.yaml"
    out.mkdir(parents=True, exist_ok=True)
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def run_grid(path: Path, grid_dir: Path, workers: int) -> None:
    cmd = [sys.executable, "-m", "blockyard", "grid", str(path), "--out", str(grid_dir), "--workers", str(workers),
           "--threads", "1"]
    print("+", " ".join(cmd), flush=True)
    subprocess.run(cmd, check=False)


def final_val(cell: Path) -> dict | None:
    lines = [json.loads(x) for x in (cell / "metrics.jsonl").read_text().splitlines() if x.strip()]
    val = [x for x in lines if x.get("split") == "val"]
    summary = json.loads((cell / "summary.json").read_text()) if (cell / "summary.json").exists() else {}
    if summary.get("status") != "done" or not val:
        return None
    return {**val[-1], "wall_s": summary.get("wall_s")}


def more_windows(cell: Path, windows: int) -> dict[str, float]:
    """The final checkpoint's trained and averaged weights on ``windows`` validation windows."""
    import torch

    from blockyard.config import config_hash, load_config, replace
    from blockyard.data import load_data
    from blockyard.model import build_model
    from blockyard.train import checkpoint as ckpt
    from blockyard.train.loop import evaluate
    from blockyard.train.runtime import resolve_runtime

    trained = load_config(cell / "config.yaml")
    cfg = replace(trained, {"train.eval_windows": windows, "runtime.threads": 1})
    runtime, _ = resolve_runtime(cfg.runtime)
    data = load_data(cfg)
    model = build_model(cfg.model, data.vocab_size)
    newest = ckpt.list_checkpoints(cell / "checkpoints")[-1][1]
    state = ckpt.read_checkpoint(newest, config_hash(trained)).state  # verified against the manifest
    batches = list(data.val_batches())
    out = {}
    model.load_state_dict(state["model"])
    out["raw"] = evaluate(model, batches, runtime, is_task=False)["loss"]
    avg = (state.get("averaged") or {}).get("avg")
    if avg:
        with torch.no_grad():
            for name, p in model.named_parameters():
                p.copy_(avg[name])
        out["ema"] = evaluate(model, batches, runtime, is_task=False)["loss"]
    return out


def collect(grid_dir: Path, windows: int) -> dict[str, dict[int, dict]]:
    """variant -> seed -> {raw, ema, raw_more, ema_more, wall_s} for every finished cell."""
    cached = grid_dir / "noise-levers-cells.json"
    if cached.exists():
        return {v: {int(k): x for k, x in d.items()} for v, d in json.loads(cached.read_text()).items()}
    found: dict[str, dict[int, dict]] = {}
    for cell in sorted((grid_dir / "cells").iterdir()):
        line = final_val(cell)
        if line is None:
            continue
        variant, seed = cell.name.rsplit("-seed", 1)
        row = {"raw": line.get("raw_loss", line["loss"]), "ema": line["loss"], "wall_s": line["wall_s"]}
        if windows:
            more = more_windows(cell, windows)
            row |= {"raw_more": more["raw"], "ema_more": more.get("ema", math.nan)}
        found.setdefault(variant, {})[int(seed)] = row
    cached.write_text(json.dumps(found, indent=1))
    return found


def paired_sd(cells: dict[str, dict[int, dict]], a: str, b: str, field: str) -> tuple[float, int]:
    seeds = sorted(set(cells.get(a, {})) & set(cells.get(b, {})))
    d = np.array([cells[b][s].get(field, math.nan) - cells[a][s].get(field, math.nan) for s in seeds])
    d = d[np.isfinite(d)]  # a setting read without the re-evaluation has no *_more fields
    return (float(np.std(d, ddof=1)) if len(d) > 1 else math.nan), len(d)


def table(out: Path, windows: int) -> str:
    spec = yaml.safe_load(DEFAULT_GRID.read_text())
    ref = spec["reference"]
    others = [v for v in spec["variants"] if v != ref]
    rows = []
    for setting in SETTINGS:
        grid_dir = out / f"noise-{setting}"
        if not (grid_dir / "cells").exists():
            continue
        cells = collect(grid_dir, windows)
        wall = np.mean([r["wall_s"] for d in cells.values() for r in d.values()])
        for field, label in (("raw", "trained weights"), ("ema", "weight average")) + (
                (("raw_more", f"trained, {windows} windows"), ("ema_more", f"average, {windows} windows"))
                if windows else ()):
            ab = [paired_sd(cells, ref, v, field) if v in cells else (math.nan, 0) for v in others]
            aa, n = paired_sd(cells, ref, NULL, field) if NULL in cells else (math.nan, 0)
            if n == 0 and not any(k for _, k in ab):
                continue
            rows.append(f"| init {setting} | {label} | " + " | ".join(f"{sd:.4f} (n={k})" for sd, k in ab)
                        + f" | {aa:.4f} (n={n}) | {wall:.0f} |")
    head = ("| init | evaluated | " + " | ".join(f"A/B sd {v} - {ref}" for v in others)
            + " | A/A sd (null control) | s per cell |\n|" + "---|" * (len(others) + 4))
    return head + "\n" + "\n".join(rows)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, default=ROOT / "runs" / "noise-levers")
    ap.add_argument("--seeds", type=int, default=8)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--more-windows", type=int, default=512, help="0: skip the re-evaluation")
    ap.add_argument("--settings", nargs="*", default=list(SETTINGS), choices=list(SETTINGS))
    ap.add_argument("--analyse-only", action="store_true")
    args = ap.parse_args()
    if not args.analyse_only:
        for setting in args.settings:
            run_grid(grid_file(args.out, setting, args.seeds), args.out / f"noise-{setting}", args.workers)
    print(table(args.out, args.more_windows))


if __name__ == "__main__":
    main()
