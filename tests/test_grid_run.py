"""End to end with the real trainer: a tiny grid with identical variants and a diverging one."""

from __future__ import annotations

import csv
import textwrap
from pathlib import Path

import pytest
import torch

from blockyard.errors import UserError
from blockyard.grid.index import open_index
from blockyard.grid.run import run_grid
from blockyard.grid.status import status_text

pytestmark = pytest.mark.slow  # full tier: grids trained end to end

# Tiny cells: the pydoc corpus (ships with Python), width 32, one block, 32-token windows.
TINY_BASE = """
  model: {width: 32, depth: 1, pattern: [global_attention], mlp_expansion: 2.0}
  data: {corpus: pydoc, seq_len: 32}
  train: {steps: 12, batch_size: 4, eval_every: 6, eval_windows: 4, log_every: 3, warmup_steps: 2,
          checkpoint_every: 6}
"""


@pytest.fixture(scope="module")
def finished_grid(tmp_path_factory) -> tuple[Path, int, list[str]]:
    tmp = tmp_path_factory.mktemp("grid")
    spec = tmp / "twins.yaml"
    spec.write_text(textwrap.dedent("""
        name: twins
        description: a team checking that blockyard finds no difference where there is none
        base:
    """) + TINY_BASE + textwrap.dedent("""
        variants:
          first: {}
          twin: {}
          hot: {train.lr: 50.0, train.diverge_factor: 1.01}
        reference: first
        seeds: [0, 1]
    """))
    lines: list[str] = []
    code = run_grid(spec, out=tmp / "out", workers=2, threads=1, echo=lines.append)
    return tmp / "out", code, lines


def test_identical_variants_are_equivalent(finished_grid):
    grid_dir, code, lines = finished_grid
    assert code == 0, lines
    with open_index(grid_dir, readonly=True) as index:
        cells = {c["id"]: c for c in index.cells()}
    # Same config and seed: the same batches and windows and (1 thread, CPU) the same numbers.
    for seed in (0, 1):
        assert cells[f"twin-seed{seed}"]["final_val_loss"] == cells[f"first-seed{seed}"]["final_val_loss"]
    assert cells["first-seed0"]["final_val_loss"] != cells["first-seed1"]["final_val_loss"]
    report = (grid_dir / "report.md").read_text()
    twin = next(ln for ln in report.splitlines() if ln.startswith("| twin |"))
    # Two seeds: leaving either out leaves no interval, so the verdict is marked fragile.
    assert "| +0.0000 | [+0.0000, +0.0000] | **equivalent** (fragile) |" in twin
    assert lines[-1] == f"report: {grid_dir / 'report.md'}"
    assert any(ln.startswith("grid twins: 6/6 done (2 diverged)") for ln in lines)


def test_diverging_cells_are_recorded_and_the_grid_finishes(finished_grid):
    grid_dir, code, _lines = finished_grid
    assert code == 0
    with open(grid_dir / "results.csv") as f:
        rows = {r["id"]: r for r in csv.DictReader(f)}
    assert [rows[f"hot-seed{s}"]["status"] for s in (0, 1)] == ["diverged", "diverged"]
    assert rows["hot-seed0"]["message"].startswith("diverged at step")
    assert all(rows[f"{v}-seed{s}"]["status"] == "done" for v in ("first", "twin") for s in (0, 1))
    report = (grid_dir / "report.md").read_text()
    excluded = report.split("## Cells without a final loss")[1].split("##")[0]
    assert "| hot-seed0 | diverged | 3 |" in excluded and "| hot-seed1 | diverged | 3 |" in excluded
    assert status_text(grid_dir) == "grid twins: 6/6 done (2 diverged), 0 running, 0 failed, 0 left | finished"


def test_rerun_of_a_finished_grid_trains_nothing(finished_grid):
    grid_dir, _code, _lines = finished_grid
    spec = grid_dir / "grid.yaml"
    summaries = {p: p.stat().st_mtime_ns for p in grid_dir.glob("cells/*/summary.json")}
    lines: list[str] = []
    # From the copied spec: its base is inline, so it is the same grid.
    assert run_grid(spec, out=grid_dir, echo=lines.append) == 0
    assert "(6 already finished, 0 to run;" in lines[0]
    assert not any(ln.startswith("start ") for ln in lines)
    assert {p: p.stat().st_mtime_ns for p in grid_dir.glob("cells/*/summary.json")} == summaries


def test_force_on_a_changed_spec_keeps_the_old_cells_aside(tmp_path):
    def spec(lr: float) -> Path:
        path = tmp_path / "one.yaml"
        path.write_text("name: one\nbase:\n" + TINY_BASE + f"seeds: [0]\nvariants: {{a: {{train.lr: {lr}}}}}\n"
                        "reference: a\n")
        return path

    out = tmp_path / "out"
    assert run_grid(spec(0.003), out=out, threads=1, echo=lambda _: None) == 0
    old_summary = (out / "cells" / "a-seed0" / "summary.json").read_text()
    with pytest.raises(UserError, match=r"holds a grid whose cells differ .*\(1 changed; e.g. a-seed0\)"):
        run_grid(spec(0.001), out=out, threads=1, echo=lambda _: None)
    assert (out / "cells" / "a-seed0" / "summary.json").read_text() == old_summary
    lines: list[str] = []
    assert run_grid(spec(0.001), out=out, threads=1, force=True, echo=lines.append) == 0
    (kept,) = (out / "superseded").iterdir()
    assert kept.name.startswith("a-seed0.")
    assert (kept / "run" / "summary.json").read_text() == old_summary
    assert "lr: 0.003" in (kept / "config.yaml").read_text()
    assert "lr: 0.001" in (out / "cells" / "a-seed0" / "config.yaml").read_text()
    assert (out / "grid.1.yaml").read_text() != (out / "grid.yaml").read_text()
    with open_index(out, readonly=True) as index:
        assert [c["status"] for c in index.cells()] == ["done"]


@pytest.mark.skipif(torch.cuda.is_available(), reason="needs a machine without CUDA for the failing cell")
def test_a_failing_cell_is_recorded_and_the_others_go_on(tmp_path):
    path = tmp_path / "broken.yaml"
    path.write_text("name: broken\nbase:\n" + TINY_BASE + "seeds: [0]\n"
                    "variants: {fine: {}, broken: {runtime.device: cuda}}\nreference: fine\n")
    lines: list[str] = []
    assert run_grid(path, out=tmp_path / "out", workers=2, threads=1, echo=lines.append) == 1
    with open_index(tmp_path / "out", readonly=True) as index:
        cells = {c["id"]: c for c in index.cells()}
    assert cells["fine-seed0"]["status"] == "done"
    broken = cells["broken-seed0"]
    assert (broken["status"], broken["exit_code"]) == ("failed", 2)
    assert broken["message"].startswith("error: runtime.device:")
    assert "| broken-seed0 | failed | 2 | error: runtime.device:" in (tmp_path / "out" / "report.md").read_text()
    assert lines[-1].startswith("1 cell(s) failed: broken-seed0")


@pytest.mark.slow
def test_seed_rounds_with_a_null_control_end_to_end(tmp_path):
    # A grid with seeds {first: 2, most: 3} and a smallest effect too small to show equivalence:
    # round 1 trains 2 seeds per group; what is still undecided gets seed 2 with the reference and
    # the null control (which follows the reference). A rerun replays the rounds and trains nothing.
    path = tmp_path / "rounds.yaml"
    path.write_text("name: rounds\nbase:\n" + TINY_BASE + textwrap.dedent("""
        variants:
          ref: {}
          wider: {model.mlp_expansion: 2.5}
        reference: ref
        seeds: {first: 2, most: 3}
        smallest_effect: 1.0e-6
        null_control: true
    """))
    out = tmp_path / "out"
    lines: list[str] = []
    assert run_grid(path, out=out, workers=2, threads=1, echo=lines.append) == 0, lines
    with open_index(out, readonly=True) as index:
        cells = {c["id"]: c for c in index.cells()}
    assert {f"{g}-seed{s}" for g in ("ref", "null-control", "wider") for s in (0, 1)} <= set(cells)
    # train.init_seed changes the initialisation only: same data seed, another final loss.
    assert cells["null-control-seed0"]["final_val_loss"] != cells["ref-seed0"]["final_val_loss"]
    with open(out / "verdicts.csv") as f:
        verdicts = {r["variant"]: r for r in csv.DictReader(f)}
    wider, null = verdicts["wider"], verdicts["null-control"]
    report = (out / "report.md").read_text()
    if len(cells) == 9:  # round 1 left the comparison undecided: seed 2 for all three groups
        assert "Rounds: 2 round(s) ran" in report and wider["pairs"] == "3"
        assert any("round 2:" in ln for ln in lines)
    else:  # decided at round 1: nothing more trained
        assert len(cells) == 6 and "Rounds: 1 round(s) ran; every comparison decided" in report
    # Between rounds the grid is not called finished; once no round can add seeds, it is.
    round_one_end = [ln for ln in lines if ln.startswith("grid rounds: 6/6 done")]
    assert round_one_end[-1].endswith("| round ended: checking whether a comparison needs more seeds"), lines
    assert status_text(out).splitlines()[0].endswith(f"{len(cells)}/{len(cells)} done, 0 running, 0 failed, "
                                                     "0 left | finished")
    # The null control (reference under init seed 1,000,000 + seed, same data) is no false positive.
    assert null["in_family"] == "False" and null["verdict"] not in ("better", "worse")
    assert "## Noise floor (null control)" in report
    rerun: list[str] = []
    assert run_grid(path, out=out, workers=2, threads=1, echo=rerun.append) == 0
    assert not any(ln.startswith("start ") for ln in rerun)


def test_force_drops_the_records_of_changed_cells_that_no_round_plans_yet(tmp_path):
    """After --force, a changed cell's old outcome must not survive in the index: with seeds until
    decided, a seed of a later round is not planned at once, and its stale row was replayed as if
    that round had run (and its cell, whose config had moved to superseded/, then failed to start)."""
    from blockyard.grid.plan import current_cells, plan_cells, plan_rows
    from blockyard.grid.run import _setup, _sync_index

    def spec_file(expansion: float) -> Path:
        path = tmp_path / "grid.yaml"
        path.write_text("name: stale\nbase:\n" + TINY_BASE + textwrap.dedent(f"""
            variants:
              ref: {{}}
              wider: {{model.mlp_expansion: {expansion}}}
            reference: ref
            seeds: {{first: 2, most: 3}}
            smallest_effect: 0.01
        """))
        return path

    out = tmp_path / "out"
    old = _setup(spec_file(2.5), out, None, 1, "local", None)
    universe = plan_cells(old.spec, threads=1)
    out.mkdir()
    with open_index(out) as index:  # an earlier run that went to round 2: every seed recorded done
        index.plan(plan_rows(universe))
        for i, p in enumerate(universe):
            index.mark_finished(p.id, "done", summary={"final_val_loss": 2.0 + 0.01 * i})
    new = _setup(spec_file(3.0), out, None, 1, "local", None)
    universe = plan_cells(new.spec, threads=1)
    with open_index(out) as index:
        _sync_index(new, index, universe, force=True, echo=lambda _: None)
        rows = {r["id"]: r for r in index.cells()}
        cells, _line, _complete = current_cells(new.spec, universe, index.cells())
    assert sorted(rows) == ["ref-seed0", "ref-seed1", "ref-seed2"]  # wider's old rows are gone, not kept as done
    assert sorted(p.id for p in cells) == ["ref-seed0", "ref-seed1", "wider-seed0", "wider-seed1"]  # round 1 again


def test_the_grid_processs_own_progress_lines_call_a_starting_cell_running(tmp_path):
    """A cell marked running whose process has not yet taken its writer lock is running in the grid
    process's own lines, also in a dir whose lock the grid does not hold (stage 1's GRID_DIR/tuning)."""
    from blockyard.grid.plan import plan_cells, plan_rows
    from blockyard.grid.run import _Recorder
    from blockyard.grid.spec import load_grid

    path = tmp_path / "grid.yaml"
    path.write_text("name: starting\nbase:\n" + TINY_BASE + "variants:\n  one: {}\nreference: one\nseeds: [0]\n")
    lines: list[str] = []
    with open_index(tmp_path) as index:
        index.plan(plan_rows(plan_cells(load_grid(path), threads=1)))
        index.mark_running("one-seed0")
        _Recorder(tmp_path, index, "starting", lines.append, 60.0).status()
    assert lines == ["grid starting: 0/1 done, 1 running, 0 failed, 0 left | ETA unknown (no speed measured yet)"]
