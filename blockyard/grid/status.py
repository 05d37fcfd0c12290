"""The grid's progress line: cells done / running / failed / left, and an ETA.

It reads only the index and the cells' ``metrics.jsonl``, so ``blockyard grid --status DIR``
works from another terminal (or machine, on a shared filesystem) while the grid runs.

ETA = tokens still to train (what running cells have left plus the budgets of cells not yet
started) / the summed tokens/s of the running cells (a cell too new to have a speed counts at the
mean speed of the finished cells), i.e. it assumes the grid keeps running as many cells at once
at the speed measured now.
"""

from __future__ import annotations

import dataclasses
import json
import os
import time
from pathlib import Path
from typing import Any

from blockyard.errors import UserError
from blockyard.grid.index import INDEX_NAME, open_index
from blockyard.grid.tuning import TUNING_DIR, Tuning

LOCK_NAME = "grid.lock"


def read_jsonl(path: Path) -> list[dict[str, Any]]:
    """The JSON lines of ``path``, stopping at a line cut short by a kill; [] when missing."""
    try:
        text = path.read_text()
    except FileNotFoundError:
        return []
    lines = []
    for raw in text.splitlines():
        if not raw.strip():
            continue
        try:
            line = json.loads(raw)
        except ValueError:
            break
        if isinstance(line, dict):
            lines.append(line)
    return lines


def read_summary(path: Path) -> dict[str, Any] | None:
    try:
        data = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def cell_dir(grid_dir: Path, cell_id: str) -> Path:
    return Path(grid_dir) / "cells" / cell_id


def format_duration(seconds: float) -> str:
    s = max(0, int(round(seconds)))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s // 3600}h{(s % 3600) // 60:02d}m"


@dataclasses.dataclass(frozen=True)
class CellProgress:
    id: str
    status: str
    tokens_done: int
    tokens_planned: int
    tokens_per_s: float | None
    step: int | None


@dataclasses.dataclass(frozen=True)
class GridProgress:
    name: str
    done: int
    diverged: int
    running: int
    failed: int
    left: int
    eta_s: float | None
    cells: list[CellProgress]

    @property
    def total(self) -> int:
        return self.done + self.diverged + self.running + self.failed + self.left

    def line(self) -> str:
        return f"grid {self.name}: " + self.counts()

    def counts(self) -> str:
        """Cells done / running / failed / left and the ETA, without the grid's name."""
        parts = [f"{self.done + self.diverged}/{self.total} done"]
        if self.diverged:
            parts[0] += f" ({self.diverged} diverged)"
        parts += [f"{self.running} running", f"{self.failed} failed", f"{self.left} left"]
        if self.running == 0:
            # Said between two cells of a running grid too, and of a stopped one (status_text adds which).
            eta = "finished" if self.left == 0 else "no cell running"
        elif self.eta_s is None:
            eta = "ETA unknown (no speed measured yet)"
        else:
            eta = f"ETA {format_duration(self.eta_s)}"
        return ", ".join(parts) + f" | {eta}"


def _running_progress(grid_dir: Path, row: dict[str, Any]) -> CellProgress:
    lines = read_jsonl(cell_dir(grid_dir, row["id"]) / "metrics.jsonl")
    train = [ln for ln in lines if ln.get("split") == "train"]
    last = train[-1] if train else {}
    return CellProgress(
        id=row["id"],
        status=row["status"],
        tokens_done=int(last.get("tokens") or 0),
        tokens_planned=int(row["planned_tokens"]),
        tokens_per_s=last.get("tokens_per_s"),
        step=last.get("step"),
    )


def grid_progress(grid_dir: str | Path, rows: list[dict[str, Any]] | None = None,
                  name: str | None = None) -> GridProgress:
    """Counts and ETA from the index rows (read from ``grid_dir`` when not given)."""
    grid_dir = Path(grid_dir)
    if rows is None or name is None:
        with open_index(grid_dir, readonly=True) as index:
            rows = index.cells() if rows is None else rows
            name = name or index.get_meta("name") or grid_dir.name
    counts = {"done": 0, "diverged": 0, "running": 0, "failed": 0, "left": 0}
    running: list[CellProgress] = []
    tokens_left = 0.0
    for row in rows:
        status = row["status"]
        if status in ("done", "diverged", "running", "failed"):
            counts[status] += 1
        else:  # pending, interrupted: still to train
            counts["left"] += 1
            tokens_left += row["planned_tokens"]
        if status == "running":
            cp = _running_progress(grid_dir, row)
            running.append(cp)
            tokens_left += max(0, cp.tokens_planned - cp.tokens_done)
    # A cell that has just started has no speed yet: count it at the mean speed of finished cells.
    finished_rates = [r["tokens_per_s"] for r in rows if r["status"] == "done" and r.get("tokens_per_s")]
    fallback = sum(finished_rates) / len(finished_rates) if finished_rates else None
    rates = [c.tokens_per_s or fallback for c in running]
    eta = tokens_left / sum(rates) if rates and all(rates) else None
    return GridProgress(name=name, eta_s=eta, cells=running, **counts)


def lock_holder(grid_dir: Path) -> int | None:
    """The pid of the grid process that holds ``grid_dir`` now (None when no process holds its lock)."""
    import fcntl

    path = Path(grid_dir) / LOCK_NAME
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        try:
            # A shared lock is granted only when no grid process holds the exclusive one.
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            try:
                return int(os.read(fd, 64).split()[0])
            except (ValueError, IndexError):
                return -1
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)


def _stage_lines(grid_dir: Path, progress: GridProgress) -> tuple[list[str], GridProgress]:
    """A tuned grid's lines: which stage runs, then each stage's counts; and stage 1's progress."""
    with open_index(grid_dir, readonly=True) as index:
        stage = index.get_meta("stage")
        tuning = Tuning.from_json(index.get_meta("tuning"))
    tuning_progress = grid_progress(grid_dir / TUNING_DIR)
    key = f" {tuning.key}" if tuning else ""
    now = (f"stage 2 of 2 (verdict cells at each variant's chosen{key})" if stage == "verdicts"
           else f"stage 1 of 2 (tuning{key})")
    return [f"grid {progress.name}: {now}", f"  stage 1, tuning: {tuning_progress.counts()}",
            "  stage 2, verdict cells: " + (progress.counts() if progress.total else
                                            "not started (they wait for the tuning stage)")], tuning_progress


def status_text(grid_dir: str | Path) -> str:
    """What ``blockyard grid --status DIR`` prints: the grid line, then one line per running cell."""
    grid_dir = Path(grid_dir)
    if not (grid_dir / INDEX_NAME).exists():
        raise UserError(f"{grid_dir}: no grid here (no {INDEX_NAME}); pass the dir a grid was run in")
    progress = grid_progress(grid_dir)
    lines, running = [progress.line()], list(progress.cells)
    if (grid_dir / TUNING_DIR / INDEX_NAME).exists():
        lines, tuning = _stage_lines(grid_dir, progress)
        running = tuning.cells + running
        progress = dataclasses.replace(progress, running=progress.running + tuning.running,
                                       left=progress.left + tuning.left)
    for c in running:
        speed = f"{c.tokens_per_s:,.0f} tok/s" if c.tokens_per_s else "starting"
        share = f"{100 * c.tokens_done / c.tokens_planned:.0f}%" if c.tokens_planned else "?"
        lines.append(f"  running {c.id}: step {c.step or 0}, {share} of {c.tokens_planned:,d} tokens, {speed}")
    holder = lock_holder(grid_dir)
    if holder is None and (progress.running or progress.left):
        lines.append("  (no grid process holds this dir now: rerun the grid command to resume)")
    elif holder is not None:
        who = f"grid process {holder}" if holder > 0 else "a grid process"
        lines.append(f"  ({who} is running it; checked {time.strftime('%H:%M:%S')})")
    return "\n".join(lines)
