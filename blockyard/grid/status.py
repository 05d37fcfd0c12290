"""The grid's progress line: cells done / running / failed / left, and an ETA.

It reads only the index and the cells' run dirs (``blockyard.rundir``, no torch), so
``blockyard grid --status DIR`` works from another terminal (or machine, on a shared filesystem)
while the grid runs. It tells the truth after a crash: a cell the index calls running counts as
running only while a process writes its run dir (the run dir's lock) or the grid process lives;
otherwise it is "stopped". A cell whose own summary says done (or diverged) counts as such even
before the grid has recorded it in the index.

ETA = tokens still to train (what running cells have left plus the budgets of cells not yet
started) / the summed tokens/s of the running cells (a cell too new to have a speed counts at the
mean speed of the finished cells), i.e. it assumes the grid keeps running as many cells at once
at the speed measured now.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path

from blockyard import fs
from blockyard.errors import UserError
from blockyard.grid.index import FINISHED, INDEX_NAME, ROUNDS_META, ROUNDS_OPEN, CellRow, open_index
from blockyard.grid.tuning import TUNING_DIR, Tuning
from blockyard.rundir import format_duration, last_train_line, summary_status, writer_pid

LOCK_NAME = "grid.lock"


def cell_dir(grid_dir: Path, cell_id: str) -> Path:
    return Path(grid_dir) / "cells" / cell_id


@dataclasses.dataclass(frozen=True)
class CellProgress:
    id: str
    status: str  # running, or stopped (the index says running, but no process writes the cell)
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
    stopped: int
    failed: int
    left: int
    eta_s: float | None
    cells: list[CellProgress]
    more_rounds: bool = False  # seeds until decided: the rounds so far may not be the last

    @property
    def total(self) -> int:
        return self.done + self.diverged + self.running + self.stopped + self.failed + self.left

    def line(self) -> str:
        return f"grid {self.name}: " + self.counts()

    def counts(self) -> str:
        """Cells done / running / stopped / failed / left and the ETA, without the grid's name."""
        parts = [f"{self.done + self.diverged}/{self.total} done"]
        if self.diverged:
            parts[0] += f" ({self.diverged} diverged)"
        parts.append(f"{self.running} running")
        if self.stopped:
            parts.append(f"{self.stopped} stopped")
        parts += [f"{self.failed} failed", f"{self.left} left"]
        if self.running == 0:
            # Said between two cells of a running grid too, and of a stopped one (status_text adds which).
            if self.left or self.stopped:
                eta = "no cell running"
            elif self.more_rounds:
                eta = "round ended: checking whether a comparison needs more seeds"
            else:
                eta = "finished"
        elif self.eta_s is None:
            eta = "ETA unknown (no speed measured yet)"
        else:
            eta = f"ETA {format_duration(self.eta_s)}"
        return ", ".join(parts) + f" | {eta}"


def cell_status(grid_dir: Path, row: CellRow, grid_alive: bool) -> str:
    """A cell's status as it is now: the index's, corrected by the cell's run dir.

    Its own summary saying done or diverged wins (the grid may have died before recording it);
    "running" with no process writing the run dir and no live grid process is "stopped".
    """
    status = row["status"]
    if status in FINISHED:
        return status
    own = summary_status(cell_dir(grid_dir, row["id"]))
    if own in FINISHED:
        return own
    if status == "running" and not grid_alive and writer_pid(cell_dir(grid_dir, row["id"])) is None:
        return "stopped"
    return status


def _cell_progress(grid_dir: Path, row: CellRow, status: str) -> CellProgress:
    last = last_train_line(cell_dir(grid_dir, row["id"]))
    return CellProgress(
        id=row["id"],
        status=status,
        tokens_done=int(last.get("tokens") or 0),
        tokens_planned=int(row["planned_tokens"]),
        tokens_per_s=last.get("tokens_per_s"),
        step=last.get("step"),
    )


def grid_progress(grid_dir: str | Path, rows: list[CellRow] | None = None,
                  name: str | None = None, grid_alive: bool | None = None,
                  more_rounds: bool | None = None) -> GridProgress:
    """Counts and ETA from the index rows (read from ``grid_dir`` when not given) and the cells' run dirs.

    ``grid_alive``: whether a grid process runs these cells (default: whether one holds ``grid_dir``);
    ``more_rounds``: whether a later round of seeds may follow (default: as the index records it).
    """
    grid_dir = Path(grid_dir)
    if rows is None or name is None or more_rounds is None:
        with open_index(grid_dir, readonly=True) as index:
            rows = index.cells() if rows is None else rows
            name = name or index.get_meta("name") or grid_dir.name
            if more_rounds is None:
                more_rounds = index.get_meta(ROUNDS_META) == ROUNDS_OPEN
    if grid_alive is None:
        grid_alive = lock_holder(grid_dir) is not None
    counts = {"done": 0, "diverged": 0, "running": 0, "stopped": 0, "failed": 0, "left": 0}
    cells: list[CellProgress] = []
    tokens_left = 0.0
    for row in rows:
        status = cell_status(grid_dir, row, grid_alive)
        if status in counts:
            counts[status] += 1
        else:  # pending, interrupted: still to train
            counts["left"] += 1
            tokens_left += row["planned_tokens"]
        if status in ("running", "stopped"):
            cp = _cell_progress(grid_dir, row, status)
            cells.append(cp)
            tokens_left += max(0, cp.tokens_planned - cp.tokens_done)
    # A cell that has just started has no speed yet: count it at the mean speed of finished cells.
    finished_rates = [rate for r in rows if r["status"] == "done" and (rate := r.get("tokens_per_s"))]
    fallback = sum(finished_rates) / len(finished_rates) if finished_rates else None
    rates = [c.tokens_per_s or fallback for c in cells if c.status == "running"]
    known = [rate for rate in rates if rate]
    eta = tokens_left / sum(known) if rates and len(known) == len(rates) else None
    return GridProgress(name=name, eta_s=eta, cells=cells, more_rounds=more_rounds, **counts)


def lock_holder(grid_dir: Path) -> int | None:
    """The pid of the grid process that holds ``grid_dir`` now (None when no process holds its lock)."""
    return fs.lock_holder(Path(grid_dir) / LOCK_NAME)


def _stage_lines(grid_dir: Path, progress: GridProgress) -> tuple[list[str], GridProgress]:
    """A tuned grid's lines: which stage runs, then each stage's counts; and stage 1's progress."""
    with open_index(grid_dir, readonly=True) as index:
        stage = index.get_meta("stage")
        tuning = Tuning.from_json(index.get_meta("tuning"))
    # Stage 1's cells are run by the same grid process, which holds GRID_DIR's lock.
    tuning_progress = grid_progress(grid_dir / TUNING_DIR, grid_alive=lock_holder(grid_dir) is not None)
    key = f" {tuning.key}" if tuning else ""
    carried = tuning is not None and tuning.carried  # tune.rungs: first
    if stage == "verdicts":
        now = (f"stage 2 of 2 (verdict cells at each variant's chosen{key}"
               + (", tuned on rung 1 and carried up the ladder)" if carried else ")"))
    else:
        now = f"stage 1 of 2 (tuning{key}" + (" on rung 1 only)" if carried else ")")
    return [f"grid {progress.name}: {now}", f"  stage 1, tuning: {tuning_progress.counts()}",
            "  stage 2, verdict cells: " + (progress.counts() if progress.total else
                                            "not started (they wait for the tuning stage)")], tuning_progress


def status_text(grid_dir: str | Path) -> str:
    """What ``blockyard grid --status DIR`` prints: the grid line, then one line per running or stopped cell."""
    grid_dir = Path(grid_dir)
    if not (grid_dir / INDEX_NAME).exists():
        raise UserError(f"{grid_dir}: no grid here (no {INDEX_NAME}); pass the dir a grid was run in")
    progress = grid_progress(grid_dir)
    lines, cells = [progress.line()], list(progress.cells)
    if (grid_dir / TUNING_DIR / INDEX_NAME).exists():
        lines, tuning = _stage_lines(grid_dir, progress)
        cells = tuning.cells + cells
        progress = dataclasses.replace(progress, running=progress.running + tuning.running,
                                       stopped=progress.stopped + tuning.stopped, left=progress.left + tuning.left)
    for c in cells:
        share = f"{100 * c.tokens_done / c.tokens_planned:.0f}%" if c.tokens_planned else "?"
        if c.status == "stopped":
            speed = "no process writes it"
        else:
            speed = f"{c.tokens_per_s:,.0f} tok/s" if c.tokens_per_s else "starting"
        lines.append(f"  {c.status} {c.id}: step {c.step or 0}, {share} of {c.tokens_planned:,d} tokens, {speed}")
    holder = lock_holder(grid_dir)
    if holder is None and (progress.running or progress.stopped or progress.left):
        lines.append("  (no grid process holds this dir now: rerun the grid command to resume)")
    elif holder is not None:
        who = f"grid process {holder}" if holder > 0 else "a grid process"
        lines.append(f"  ({who} is running it; checked {time.strftime('%H:%M:%S')})")
    return "\n".join(lines)
