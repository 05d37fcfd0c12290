"""Length extrapolation: a trained run's validation loss at multiples of its training context.

A model trained on windows of ``seq_len`` tokens is evaluated on validation windows of
``k * seq_len`` tokens. The loss is split into position buckets (equal slices of the window), so
the table shows *where* a model breaks: a model that extrapolates keeps the late buckets at or
below the early ones (more context can only help an ideal predictor); one that does not sees its
loss rise past position ``seq_len``. RoPE attention without a window is the classic failure
(Press et al. 2022, "Train Short, Test Long", fig. 1, from memory); recurrences and local
attention are expected to hold.

Each length uses the trainer's rule for placing validation windows (same seed and count), so at
1x the windows are exactly those of the run's val loss; at other lengths they are other slices
of the validation split, so totals across lengths differ by sampling as well. The buckets within
one length compare positions on the same text. ``blockyard eval`` writes the rows to
``RUN_DIR/eval.json`` (kept per length while the checkpoint and config stay the same).
"""

from __future__ import annotations

import dataclasses
import math
import re
from pathlib import Path
from typing import Any

import torch
import torch.nn.functional as F

from blockyard.data.batches import IGNORE_INDEX
from blockyard.errors import UserError
from blockyard.plotting import finish, pyplot
from blockyard.rundir import EVAL_FILE, read_json, read_metrics, writing
from blockyard.text import aligned_table

Batches = list[tuple[torch.Tensor, torch.Tensor]]


@dataclasses.dataclass(frozen=True)
class BucketLoss:
    """Summed token losses and counts per position bucket; means are derived, so they always agree."""

    loss_sum: torch.Tensor  # (n_buckets,) float64, nats
    count: torch.Tensor  # (n_buckets,) int64, scored tokens

    def __add__(self, other: BucketLoss) -> BucketLoss:
        return BucketLoss(self.loss_sum + other.loss_sum, self.count + other.count)

    @property
    def bucket_means(self) -> list[float]:
        return [float(s / c) if c > 0 else float("nan") for s, c in zip(self.loss_sum, self.count, strict=True)]

    @property
    def mean(self) -> float:
        """Token-weighted mean loss over the whole window (the count-weighted average of the buckets)."""
        total = int(self.count.sum())
        return float(self.loss_sum.sum() / total) if total else float("nan")


def bucket_edges(length: int, n_buckets: int) -> list[int]:
    """Boundaries of ``n_buckets`` contiguous position slices of a window of ``length`` (as equal as integers allow)."""
    n = max(1, min(n_buckets, length))
    return [round(i * length / n) for i in range(n + 1)]


def position_bucket_loss(logits: torch.Tensor, y: torch.Tensor, n_buckets: int) -> BucketLoss:
    """Cross-entropy of ``logits: (B, T, V)`` against ``y: (B, T)``, summed per position bucket."""
    token_loss = F.cross_entropy(
        logits.flatten(0, 1).float(), y.flatten(), ignore_index=IGNORE_INDEX, reduction="none"
    ).view(y.shape)
    scored = y != IGNORE_INDEX
    edges = bucket_edges(y.shape[1], n_buckets)
    sums, counts = [], []
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        sums.append(token_loss[:, lo:hi].double().sum())
        counts.append(scored[:, lo:hi].sum())
    return BucketLoss(torch.stack(sums), torch.stack(counts).long())


# ----------------------------------------------------------------------------- windows and lengths


def parse_lengths(text: str, seq_len: int) -> list[tuple[str, int]]:
    """``"1x,2x,4x"`` (multiples of the training seq_len) or token counts ``"256,1024"`` -> [(label, tokens)]."""
    out = []
    for item in (part.strip() for part in text.split(",")):
        try:
            if item.endswith("x"):
                tokens = round(float(item[:-1]) * seq_len)
            else:
                tokens = int(item)
        except ValueError:
            tokens = 0
        if tokens < 1:
            raise UserError(f"--lengths {text}: {item!r} is neither a multiple like 2x nor a token count like 512")
        out.append((item, tokens))
    if not out:
        raise UserError("--lengths: give at least one length, e.g. 1x,2x,4x")
    return out


def validation_windows(data: Any, length: int) -> Batches:
    """The run's validation windows, cut at ``length`` tokens instead of ``data.seq_len``.

    ``data.val_batches(length)``: same seed, number of windows and placement rule as the trainer's,
    so at ``length == seq_len`` these are exactly the windows its val loss was measured on. For a
    synthetic task, the task's validation sequences generated at that length.
    """
    if not data.is_task and len(data.val_tokens) < length + 1:
        raise UserError(f"--lengths: {length} tokens do not fit the validation split "
                        f"({len(data.val_tokens)} tokens); use shorter lengths or raise data.val_fraction")
    try:
        return data.val_batches(length)
    except UserError as e:  # a task's ConfigError: too short for its parameters
        raise UserError(f"--lengths: {length} tokens: {e}") from None


@torch.no_grad()
def windows_loss(model: torch.nn.Module, batches: Batches, n_buckets: int) -> BucketLoss:
    """Summed position-bucket losses of the full forward pass over ``batches``."""
    model.eval()
    total = None
    for x, y in batches:
        part = position_bucket_loss(model(x), y, n_buckets)
        total = part if total is None else total + part
    if total is None:
        raise ValueError("no windows to evaluate")
    return total


def length_result(label: str, length: int, loss: BucketLoss, seq_len: int) -> dict[str, Any]:
    """One row of eval.json: total loss, bits per token and the per-bucket losses with their edges."""
    mean = loss.mean
    return {
        "label": label,
        "length": length,
        "multiple": length / seq_len,
        "loss": mean,
        "bits_per_token": mean / math.log(2),
        "tokens": int(loss.count.sum()),
        "bucket_edges": bucket_edges(length, len(loss.count)),
        "bucket_loss": loss.bucket_means,
        "bucket_tokens": [int(c) for c in loss.count],
    }


def length_extrapolation(run: Any, lengths: list[tuple[str, int]], n_buckets: int) -> list[dict[str, Any]]:
    """Loss per position bucket of ``run`` (a ``blockyard.eval.generate.LoadedRun``) at each length."""
    seq_len = run.cfg.data.seq_len
    rows = []
    for label, length in lengths:
        batches = validation_windows(run.data, length)
        rows.append(length_result(label, length, windows_loss(run.model, batches, n_buckets), seq_len))
    return rows


# ----------------------------------------------------------------------------- eval.json, table, command




def format_table(rows: list[dict[str, Any]]) -> str:
    """Lengths down, position buckets across (nats per token)."""
    n = max(len(r["bucket_loss"]) for r in rows)
    header = ["length", "tokens", "loss", "bits/tok"] + [f"b{i + 1}" for i in range(n)]
    lines = []
    for r in rows:
        buckets = [f"{v:.3f}" for v in r["bucket_loss"]] + [""] * (n - len(r["bucket_loss"]))
        lines.append([r["label"], str(r["length"]), f"{r['loss']:.4f}", f"{r['bits_per_token']:.3f}", *buckets])
    return aligned_table(header, lines, right=True)


def merge_eval(old: dict[str, Any] | None, new: dict[str, Any]) -> dict[str, Any]:
    """eval.json after an evaluation: rows of other lengths (and probes) survive if they were
    measured on the same checkpoint of the same config; otherwise the file starts over."""
    if old is None or old.get("step") != new["step"] or old.get("config_hash") != new["config_hash"]:
        return new
    by_length = {r["length"]: r for r in old.get("lengths", [])}
    by_length.update({r["length"]: r for r in new.get("lengths", [])})
    merged = {**old, **new, "lengths": sorted(by_length.values(), key=lambda r: r["length"])}
    merged["probes"] = {**old.get("probes", {}), **new.get("probes", {})}
    return merged


def eval_command(run_dir: str | Path, lengths: str, *, buckets: int = 8, probes: str = "") -> str:
    """``blockyard eval``: length extrapolation (and probes) of a trained run; writes RUN_DIR/eval.json."""
    if buckets < 1:
        raise UserError(f"--buckets {buckets}: must be >= 1")
    with writing(Path(run_dir)):  # one writer per run dir: no trainer replaces the checkpoint meanwhile
        return _evaluate_run_dir(Path(run_dir), lengths, buckets, probes)


def _evaluate_run_dir(run_dir: Path, lengths: str, buckets: int, probes: str) -> str:
    from blockyard.config import config_hash
    from blockyard.eval.generate import load_run
    from blockyard.train.records import write_json

    run = load_run(run_dir)
    rows = length_extrapolation(run, parse_lengths(lengths, run.cfg.data.seq_len), buckets) if lengths else []
    probe_names = tuple(p.strip() for p in probes.split(",") if p.strip())
    probe_results = {}
    if probe_names:
        from blockyard.eval.probes import run_probes

        probe_results = run_probes(run.model, run.cfg, run.data.tokenizer, names=probe_names)
    if not rows and not probe_results:
        raise UserError("give --lengths and/or --probes")
    result = {"run": str(run.path), "config_hash": config_hash(run.cfg), "step": run.step,
              "seq_len": run.cfg.data.seq_len, "eval_windows": run.cfg.train.eval_windows,
              "lengths": rows, "probes": probe_results}
    path = Path(run_dir) / EVAL_FILE
    write_json(path, merge_eval(read_json(path), result), what="the evaluation results")
    parts = [f"{run.path} at step {run.step} (trained at seq_len {run.cfg.data.seq_len}); loss in nats/token"]
    if rows:
        parts.append(format_table(rows))
    if probe_results:
        parts.append("\n".join(f"{k} {v:.3f}" for k, v in probe_results.items()))
    parts.append(f"wrote {path}")
    return "\n\n".join(parts)


# ----------------------------------------------------------------------------- plots (for the grid report)


def read_eval(run_dir: str | Path) -> dict[str, Any] | None:
    """A run dir's eval.json if it holds length rows, else None (never evaluated, or unreadable)."""
    data = read_json(Path(run_dir) / EVAL_FILE)
    return data if data and data.get("lengths") else None


def mean_by_length(evals: list[dict[str, Any]]) -> tuple[list[int], list[float]]:
    """Lengths present in every eval (e.g. the seeds of one variant) and their mean loss."""
    per = [{r["length"]: r["loss"] for r in e["lengths"]} for e in evals]
    common = sorted(set.intersection(*(set(p) for p in per))) if per else []
    return common, [sum(p[L] for p in per) / len(per) for L in common]


def mean_buckets(evals: list[dict[str, Any]], length: int) -> tuple[list[float], list[float]]:
    """Bucket centres (token positions) and the bucket losses at ``length``, averaged over ``evals``."""
    rows = [r for e in evals for r in e["lengths"] if r["length"] == length]
    edges = rows[0]["bucket_edges"]
    centres = [(a + b) / 2 for a, b in zip(edges[:-1], edges[1:], strict=True)]
    means = [sum(r["bucket_loss"][i] for r in rows) / len(rows) for i in range(len(centres))]
    return centres, means


def plot_length_extrapolation(evals: dict[str, list[dict[str, Any]]], path: str | Path) -> Path:
    """PNG for a grid report: per variant (key), loss vs evaluation length, and loss per position
    at the longest length all its runs share; the training seq_len is marked. ``evals`` maps a
    variant label to the eval.json dicts of its runs (seeds)."""
    plt = pyplot()
    fig, (ax_len, ax_pos) = plt.subplots(1, 2, figsize=(11, 4))
    seq_lens: set[int] = set()
    for label, runs in evals.items():
        runs = [e for e in runs if e and e.get("lengths")]
        lengths, losses = mean_by_length(runs)
        if not lengths:
            continue
        seq_lens.update(e["seq_len"] for e in runs)
        (line,) = ax_len.plot(lengths, losses, marker="o", ms=3, label=f"{label} (n={len(runs)})")
        centres, means = mean_buckets(runs, lengths[-1])
        ax_pos.plot(centres, means, marker=".", color=line.get_color(), label=f"{label} @ {lengths[-1]}")
    for ax in (ax_len, ax_pos):
        for s in sorted(seq_lens):
            ax.axvline(s, color="grey", ls=":", lw=1)
        ax.set_xscale("log", base=2)
        ax.grid(True, which="both", alpha=0.3)
        ax.set_ylabel("validation loss (nats/token)")
        ax.legend(fontsize=7)
    ax_len.set_xlabel("evaluation length (tokens); dotted: training seq_len")
    ax_pos.set_xlabel("position in the window (bucket centre)")
    ax_len.set_title("length extrapolation")
    ax_pos.set_title("loss by position at the longest length")
    return finish(fig, path, dpi=120)


def probe_curves(line: dict[str, Any]) -> dict[str, list[tuple[int, float]]]:
    """From a val line: probe -> [(size, accuracy)] sorted by size (pairs for mqar, distance for passkey)."""
    pattern = re.compile(r"^probe_(\w+?)_[pd](\d+)_acc$")
    curves: dict[str, list[tuple[int, float]]] = {}
    for key, value in line.items():
        m = pattern.match(key)
        if m and value is not None:
            curves.setdefault(m.group(1), []).append((int(m.group(2)), float(value)))
    return {k: sorted(v) for k, v in curves.items()}


def plot_probe_accuracy(lines: dict[str, list[dict[str, Any]]], path: str | Path) -> Path | None:
    """PNG for a grid report: one panel per probe, accuracy vs size, one line per variant (key),
    averaged over its runs' final val lines. Returns the path, or None when no line holds probes."""
    plt = pyplot()
    by_variant = {label: [probe_curves(line) for line in runs] for label, runs in lines.items()}
    names = sorted({p for curves in by_variant.values() for c in curves for p in c})
    if not names:
        return None
    fig, axes = plt.subplots(1, len(names), figsize=(5 * len(names), 3.6), squeeze=False)
    for ax, name in zip(axes[0], names, strict=True):
        for label, runs in by_variant.items():
            points = [dict(c[name]) for c in runs if name in c]
            if not points:
                continue
            sizes = sorted(set.intersection(*(set(p) for p in points)))
            ax.plot(sizes, [sum(p[s] for p in points) / len(points) for s in sizes], marker="o", ms=3,
                    label=f"{label} (n={len(points)})")
        ax.set_xscale("symlog", base=2, linthresh=1)  # a passkey distance may be 0
        ax.set_ylim(-0.02, 1.02)
        ax.set_xlabel("key-value pairs" if name == "mqar" else "distance (filler characters)")
        ax.set_ylabel("accuracy")
        ax.set_title(f"probe: {name}")
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=7)
    return finish(fig, path, dpi=120)


def report_figures(out_dir: str | Path, run_dirs: dict[str, list[Path]]) -> list[tuple[str, str]]:
    """The extra PNGs of a grid report, for the runs of each variant label: length extrapolation (from
    the cells' eval.json, where ``blockyard eval`` was run) and probe accuracy (from the final val line of
    their metrics.jsonl, where ``eval.probes`` was set). Returns (file name, caption) of those written."""
    out_dir = Path(out_dir)
    written = []
    evals = {label: [e for e in (read_eval(d) for d in dirs) if e] for label, dirs in run_dirs.items()}
    evals = {label: e for label, e in evals.items() if e}
    if evals:
        name = "length_extrapolation.png"
        plot_length_extrapolation(evals, out_dir / name)
        written.append((name, "Validation loss at multiples of the training context (`blockyard eval`; mean over the "
                              "cells evaluated), and per position bucket at the longest length; dotted: training "
                              "seq_len."))
    finals: dict[str, list[dict[str, Any]]] = {}
    for label, dirs in run_dirs.items():
        for d in dirs:
            val = [line for line in read_metrics(Path(d) / "metrics.jsonl") if line.get("split") == "val"]
            if val:
                finals.setdefault(label, []).append(val[-1])
    name = "probe_accuracy.png"
    if finals and plot_probe_accuracy(finals, out_dir / name) is not None:
        written.append((name, "Probe accuracy (`eval.probes`) at the final evaluation vs probe size, mean over "
                              "seeds: MQAR by key-value pairs, passkey by distance."))
    return written
