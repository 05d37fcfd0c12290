"""Stop a running grid (SIGTERM), kill it (the grid process alone, then its process group), rerun it.

No finished cell may be trained again, and the final numbers must equal those of a grid that was
never interrupted (the trainer's resume is exact; the grid must skip and resume the right cells).
"""

from __future__ import annotations

import json
import os
import signal
import textwrap
from pathlib import Path

import psutil
import pytest
from _helpers import start_grid, wait_until

from blockyard.grid.index import open_index
from blockyard.grid.run import run_grid

pytestmark = pytest.mark.slow  # full tier: a grid killed and resumed

SPEC = """
name: resume
description: a team checking that an overnight grid survives a crash
base:
  model: {width: 32, depth: 1, pattern: [global_attention], mlp_expansion: 2.0}
  data: {corpus: pydoc, seq_len: 32}
  train: {steps: 400, batch_size: 4, eval_every: 100, eval_windows: 4, log_every: 20, warmup_steps: 10,
          checkpoint_every: 20}
variants:
  attention: {}
  recurrence: {model.pattern: [recurrence]}
reference: attention
seeds: [0, 1]
"""
CELLS = 4


def _summary_status(cell: Path) -> str | None:
    try:
        return json.loads((cell / "summary.json").read_text()).get("status")
    except (OSError, ValueError):
        return None


def _cell_mid_way(grid_dir: Path, not_these: set[str]) -> str | None:
    """A cell (not in ``not_these``) with a checkpoint and no summary yet, once some cell has finished."""
    cells = sorted((grid_dir / "cells").glob("*")) if (grid_dir / "cells").exists() else []
    if not any(_summary_status(c) == "done" for c in cells):
        return None
    for c in cells:
        training = _summary_status(c) in (None, "running")
        if c.name not in not_these and training and any((c / "checkpoints").glob("step_*.pt")):
            return c.name
    return None


def _records(grid_dir: Path, cell: str) -> dict[str, tuple[int, bytes]]:
    files = {name: grid_dir / "cells" / cell / name for name in ("summary.json", "metrics.jsonl")}
    return {name: (path.stat().st_mtime_ns, path.read_bytes()) for name, path in files.items()}


def _finals(grid_dir: Path) -> dict[str, float]:
    with open_index(grid_dir, readonly=True) as index:
        return {c["id"]: c["final_val_loss"] for c in index.cells() if c["status"] == "done"}


def _verdicts(grid_dir: Path) -> str:
    return (grid_dir / "report.md").read_text().split("## Verdicts")[1].split("## Variants")[0]


@pytest.mark.slow
def test_killed_grid_resumes_without_retraining_finished_cells(tmp_path):
    spec = tmp_path / "resume.yaml"
    spec.write_text(textwrap.dedent(SPEC))
    reference_dir = tmp_path / "uninterrupted"
    assert run_grid(spec, out=reference_dir, workers=1, threads=1, echo=lambda _: None) == 0

    grid_dir = tmp_path / "interrupted"
    # 1. SIGTERM the grid: it stops its running cell cleanly (checkpoint) and exits 130.
    proc = start_grid(spec, grid_dir)
    first = wait_until(lambda: _cell_mid_way(grid_dir, set()), 240, "a finished cell and one mid-way")
    finished_first = {c.name for c in (grid_dir / "cells").glob("*") if _summary_status(c) == "done"}
    kept = {cell: _records(grid_dir, cell) for cell in finished_first}
    os.kill(proc.pid, signal.SIGTERM)
    assert proc.wait(120) == 130
    assert _summary_status(grid_dir / "cells" / first) == "interrupted"
    with open_index(grid_dir, readonly=True) as index:
        assert index.cell(first)["status"] == "interrupted"

    # 2. SIGKILL the grid process alone: its running cell must stop by itself (it asked the kernel
    #    for SIGTERM on the grid's death), after writing a checkpoint.
    proc = start_grid(spec, grid_dir)
    second = wait_until(lambda: _cell_mid_way(grid_dir, {first}), 240, "a second cell mid-way")
    children = psutil.Process(proc.pid).children(recursive=True)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(30)
    assert children, "the grid had no running cell process"
    _gone, alive = psutil.wait_procs(children, timeout=60)
    assert not alive, f"cell processes outlived the grid: {alive}"
    assert _summary_status(grid_dir / "cells" / second) == "interrupted"

    # 3. Rerun, then SIGKILL the whole process group (grid and cell at once: no clean stop).
    proc = start_grid(spec, grid_dir)
    wait_until(lambda: _cell_mid_way(grid_dir, {first, second}), 240, "a third cell mid-way")
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(30)
    finished_before_last = {c.name for c in (grid_dir / "cells").glob("*") if _summary_status(c) == "done"}

    # 4. Rerun to the end.
    lines: list[str] = []
    assert run_grid(spec, out=grid_dir, workers=1, threads=1, echo=lines.append) == 0
    n_done = len(finished_before_last)
    start_line = next(ln for ln in lines if ln.startswith("grid resume:"))
    assert f"({n_done} already finished, {CELLS - n_done} to run;" in start_line
    for cell, records in kept.items():
        assert _records(grid_dir, cell) == records, f"{cell} was trained again"
    for cell in (first, second):
        assert "from the checkpoint at step" in (grid_dir / "logs" / f"{cell}.log").read_text()

    # Same numbers as the uninterrupted grid, cell by cell and in the report's verdicts.
    finals = _finals(grid_dir)
    assert len(finals) == CELLS
    assert finals == _finals(reference_dir)
    assert _verdicts(grid_dir) == _verdicts(reference_dir)
