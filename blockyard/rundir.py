"""A run dir, read without torch: its file names, metric lines, summary, durations, and who writes it.

Written by the trainer (``blockyard.train.records``); read by the trainer on resume, by
``blockyard grid --status`` (from another terminal while a grid runs), the grid's index and report,
and the evaluation commands. Importing this module imports neither torch nor numpy, so a status
check stays instant.

One process at a time writes a run dir: it holds the OS lock ``RUN_DIR/writer.lock``
(:func:`writing`) for its whole life; the kernel drops it when that process dies, so
:func:`writer_pid` tells a live run from a stopped one.
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any, TypedDict, cast

from blockyard import fs
from blockyard.errors import UserError

CONFIG_FILE = "config.yaml"
METRICS_FILE = "metrics.jsonl"
SUMMARY_FILE = "summary.json"
ENV_FILE = "env.json"
CHECKPOINT_DIR = "checkpoints"
TENSORBOARD_DIR = "tb"
#: ``blockyard eval``'s results inside a run dir (they describe one checkpoint of one config).
EVAL_FILE = "eval.json"
#: The writer's lock; not a record: ``--force`` keeps it, and a dir holding only it counts as empty.
LOCK_FILE = "writer.lock"

#: Copies of the plugin files a run's config names (``mixers.plugins``).
PLUGIN_DIR = "plugins"
#: Files and folders a run owns inside its dir; ``--force`` removes these and nothing else.
RECORD_NAMES = (CONFIG_FILE, METRICS_FILE, SUMMARY_FILE, ENV_FILE, CHECKPOINT_DIR, TENSORBOARD_DIR, EVAL_FILE,
                PLUGIN_DIR)

#: Metric-line fields that measure time and so differ between otherwise identical runs.
TIMING_FIELDS = ("tokens_per_s", "wall_s")


# ----------------------------------------------------------------------------- records


class ParamCounts(TypedDict):
    """Parameters of the model a run trained: all of them, and those outside the embedding and head."""

    total: int
    non_embedding: int


class Divergence(TypedDict):
    """Where and why a run stopped as diverged."""

    step: int
    loss: float
    reason: str


class RunSummary(TypedDict, total=False):
    """``summary.json``: what a run last said of itself (written at every checkpoint and at the end).

    What the grid's index, ``--status``, resume and ``verify`` read; a summary from an older version may
    lack any key, so readers use ``.get``.
    """

    status: str  # running, done, diverged, interrupted, failed
    name: str
    config_hash: str
    steps: int
    total_steps: int
    tokens_seen: int
    final_val_loss: float | None
    final_val_bits_per_token: float | None
    best_val_loss: float | None
    params: ParamCounts
    wall_s: float
    tokens_per_s: float | None
    peak_rss_bytes: int | None
    updated_at: str
    diverged: Divergence  # status diverged only
    interrupted_by: str  # status interrupted only: the signal's name, or what reopened the run
    reopened: str  # written by verify when it reopens a finished run whose final checkpoint is damaged


# ----------------------------------------------------------------------------- reading


def read_json(path: Path) -> dict[str, Any] | None:
    """The JSON object in ``path``, or None when missing or unreadable."""
    try:
        data = json.loads(Path(path).read_text())
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def read_summary(run_dir: Path) -> RunSummary | None:
    """``RUN_DIR/summary.json`` (status, final losses, steps, time), None when absent or unreadable."""
    return cast("RunSummary | None", read_json(Path(run_dir) / SUMMARY_FILE))


def summary_status(run_dir: Path) -> str | None:
    """running, done, diverged, interrupted or failed, as the run last wrote it; None before it wrote any."""
    summary = read_summary(run_dir)
    return None if summary is None else summary.get("status")


def parse_metrics(text: str) -> list[dict[str, Any]]:
    """The metric lines of ``text``, stopping at the first unparseable line (a write cut by a kill)."""
    lines = []
    for raw in text.splitlines():
        if not raw.strip():
            continue
        try:
            line = json.loads(raw)
        except ValueError:
            break
        if not isinstance(line, dict) or "step" not in line:
            break
        lines.append(line)
    return lines


def read_metrics(path: Path) -> list[dict[str, Any]]:
    """The lines of a ``metrics.jsonl`` file ([] when missing); see :func:`parse_metrics`."""
    try:
        return parse_metrics(Path(path).read_text())
    except FileNotFoundError:
        return []


def without_timing(line: dict[str, Any]) -> dict[str, Any]:
    """A metric line minus :data:`TIMING_FIELDS`: what two identical runs agree on exactly."""
    return {k: v for k, v in line.items() if k not in TIMING_FIELDS}


def last_train_line(run_dir: Path) -> dict[str, Any]:
    """The newest train line of a run ({} before the first): step, tokens, tokens_per_s, wall_s."""
    train = [line for line in read_metrics(Path(run_dir) / METRICS_FILE) if line.get("split") == "train"]
    return train[-1] if train else {}


def format_duration(seconds: float) -> str:
    """``75.2`` -> ``1m15s``; ``3725`` -> ``1h02m``."""
    s = max(0, int(round(seconds)))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s // 3600}h{(s % 3600) // 60:02d}m"


# ----------------------------------------------------------------------------- the one writer


def writer_pid(run_dir: Path) -> int | None:
    """The pid of the process writing ``run_dir`` now (-1: one is, pid unknown), None when none is."""
    return fs.lock_holder(Path(run_dir) / LOCK_FILE)


def is_empty(run_dir: Path) -> bool:
    """True for a missing dir, or one holding nothing but (maybe) the writer's lock."""
    run_dir = Path(run_dir)
    return not run_dir.exists() or (run_dir.is_dir() and all(p.name == LOCK_FILE for p in run_dir.iterdir()))


@contextlib.contextmanager
def writing(run_dir: Path, *, wait_s: float = 0.0) -> Iterator[None]:
    """Be the one writer of ``run_dir`` for the block (the dir is created if missing).

    Another live writer: wait up to ``wait_s`` seconds for it to end, then raise UserError (one
    line: the dir, its pid, how to watch it), having changed nothing. A dir this call created and
    left empty is removed again, so a refused or failed command leaves no trace.
    """
    run_dir = Path(run_dir)
    if run_dir.exists() and not run_dir.is_dir():
        raise UserError(f"{run_dir}: exists and is not a directory (pass another --out)")
    created = not run_dir.exists()
    lock = run_dir / LOCK_FILE
    held = contextlib.ExitStack()
    try:
        with fs.reporting(lock, "the run dir's lock"):
            held.enter_context(fs.hold_lock(lock, wait_s=wait_s))
    except fs.LockBusy as busy:
        who = f"process {busy.holder}" if busy.holder > 0 else "another process"
        waited = f" (waited {wait_s:g} s)" if wait_s else ""
        raise UserError(f"{run_dir}: {who} is writing this run dir{waited}; watch it with: "
                        f"tail -f {run_dir / METRICS_FILE} (or wait for it to end)") from None
    with held:
        try:
            yield
        finally:
            if created and is_empty(run_dir):
                lock.unlink(missing_ok=True)  # while still held: see fs.hold_lock
                with contextlib.suppress(OSError):
                    run_dir.rmdir()
