"""Run a grid: train what its plan still needs, round after round, record it, write the report.

The pieces it drives: ``blockyard.grid.plan`` (the cells, their costs and hashes),
``blockyard.grid.dryrun`` (``--dry-run``'s text), ``blockyard.grid.griddir`` (the lock and the
refusals of a grid dir holding another spec), ``blockyard.grid.executors`` (local processes or Ray).

Grid dir layout::

    GRID_DIR/grid.yaml          the grid spec as given (earlier versions kept as grid.<n>.yaml)
    GRID_DIR/index.sqlite       every cell: variant, seed, axis point, config hash, status, timings, metrics
    GRID_DIR/configs/<cell>.yaml  each cell's resolved config (what ``blockyard train`` is given)
    GRID_DIR/plugins/           copies of the plugin files the cells load (a config's ``plugins``)
    GRID_DIR/cells/<cell>/      each cell's run dir (config.yaml, metrics.jsonl, summary.json, ...)
    GRID_DIR/logs/<cell>.log    each cell's trainer output
    GRID_DIR/report.md, report.html, results.csv, noise.csv, *.png
    GRID_DIR/tuning/            with a ``tune`` block: stage 1, a grid dir of its own (index, configs, cells,
                                logs); GRID_DIR/tuning.csv one row per tuning cell

With a ``tune`` block (``blockyard.grid.tuning``) the grid runs in two stages: stage 1 trains the
tuning cells, then each variant's value is chosen from their records and stage 2 trains the
verdict cells at it. The choice is a pure function of the tuning records, so a rerun after any
interruption resumes either stage with the same choice; failed tuning cells are retried only
until stage 2 has started (after that the choice stays as made, with them counted as +inf).

Rerunning the same grid resumes it: finished (done or diverged) cells are skipped, the others
are (re)started, and the trainer resumes interrupted ones from their checkpoints. A grid dir
holding cells of another spec is refused unless ``--force``, which moves the changed cells'
dirs to ``GRID_DIR/superseded/`` rather than deleting anything.
"""

from __future__ import annotations

import dataclasses
import json
import os
import time
from collections.abc import Callable
from pathlib import Path

from blockyard.config import dump_config
from blockyard.errors import UserError
from blockyard.grid import executors
from blockyard.grid.dryrun import budget_plan, dry_run_text, two_stage_dry_run
from blockyard.grid.griddir import (
    archive_spec,
    cell_changes,
    check_grid_dir,
    grid_lock,
    plugin_copies,
    refuse_changed_design,
    refuse_changed_spec,
    refuse_changed_tuning,
    supersede,
    write_if_changed,
)
from blockyard.grid.index import FINISHED, INDEX_NAME, ROUNDS_COMPLETE, ROUNDS_META, ROUNDS_OPEN, GridIndex, open_index
from blockyard.grid.plan import (
    PlannedCell,
    cost_note,
    current_cells,
    fingerprint,
    first_seeds,
    makespan,
    measured_speeds,
    plan_cells,
    plan_rows,
    plan_tuning,
    round_wall,
)
from blockyard.grid.spec import Design, GridSpec, load_grid
from blockyard.grid.status import cell_dir, grid_progress
from blockyard.grid.tuning import TUNING_DIR, chosen_values, tuned_groups
from blockyard.rundir import RunSummary, format_duration, read_summary
from blockyard.schema import to_dict
from blockyard.verify import reopen_if_final_checkpoint_damaged

DEFAULT_ROOT = Path("runs") / "grids"
STATUS_EVERY_S = 30.0
# Trainer exit codes (blockyard train): 0 done, 2 bad input, 3 diverged, 128 + signal when stopped.
EXIT_DIVERGED = 3
EXIT_STOPPED = (130, 143, -2, -15)


def available_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


def prepare_data(plan: list[PlannedCell], echo: Callable[[str], None]) -> None:
    """Load each distinct data config once here, before any cell starts.

    A corpus that cannot be read fails the grid at once (instead of in every cell), and the token
    cache is built once rather than by several cells at the same time.
    """
    from blockyard.data import load_data

    seen: set[str] = set()
    for p in plan:
        cfg = p.cell.cfg
        key = json.dumps(to_dict(cfg.data), sort_keys=True, default=str)
        if key in seen:
            continue
        seen.add(key)
        echo(f"preparing data: {cfg.data.corpus} ({cfg.data.tokenizer} tokens)")
        load_data(cfg)


# ----------------------------------------------------------------------------- outcomes


def last_log_line(path: Path) -> str | None:
    try:
        lines = [ln.strip() for ln in path.read_text(errors="replace").splitlines() if ln.strip()]
    except OSError:
        return None
    lines = [ln for ln in lines if not ln.startswith("=== ")]
    return lines[-1][:300] if lines else None


def outcome(exit_code: int | None, summary: RunSummary | None) -> str:
    """The cell status from the trainer's exit code, cross-checked with its summary.json."""
    status = None if summary is None else summary.get("status")
    if exit_code == 0:
        return "done" if status == "done" else "failed"
    if exit_code == EXIT_DIVERGED:
        return "diverged"
    if exit_code in EXIT_STOPPED:
        return "interrupted"
    return "failed"


class _Recorder:
    """Executor events -> index rows and progress lines."""

    def __init__(self, grid_dir: Path, index: GridIndex, name: str, echo: Callable[[str], None],
                 status_every_s: float) -> None:
        self.grid_dir, self.index, self.name, self.echo = grid_dir, index, name, echo
        self.status_every_s = status_every_s
        self._last_status = time.monotonic()
        self.more_rounds = False  # whether a later round of seeds may follow the cells now running

    def started(self, job: executors.CellJob) -> None:
        self.index.mark_running(job.id)
        self.echo(f"start {job.id}")

    def finished(self, job: executors.CellJob, exit_code: int | None, message: str | None) -> None:
        summary = read_summary(job.out_dir)
        status = outcome(exit_code, summary)
        if status not in ("done", "interrupted") and message is None:
            message = last_log_line(job.log_path)
        self.index.mark_finished(job.id, status, summary=summary, exit_code=exit_code, message=message)
        detail = ""
        if status == "done" and summary:
            detail = f": final val loss {summary.get('final_val_loss', float('nan')):.4f}"
            if summary.get("wall_s"):
                detail += f", {format_duration(summary['wall_s'])}"
        elif message:
            detail = f": {message}"
        self.echo(f"{status} {job.id}{detail}")
        self.status()

    def tick(self) -> None:
        if time.monotonic() - self._last_status >= self.status_every_s:
            self.status()

    def status(self) -> None:
        self._last_status = time.monotonic()
        # The recorder is the live grid process: a cell that has started but not yet taken its run dir's
        # writer lock is running, not "stopped" (stage 1's dir is not the one whose lock the grid holds).
        self.echo(grid_progress(self.grid_dir, self.index.cells(), self.name, grid_alive=True,
                                more_rounds=self.more_rounds).line())


def _reconcile(grid_dir: Path, index: GridIndex) -> list[str]:
    """Sync the index with the cell dirs (after a kill); returns the ids still to train, in order."""
    todo = []
    for row in index.cells():
        reopened = reopen_if_final_checkpoint_damaged(cell_dir(grid_dir, row["id"]))
        if reopened:
            print(f"warning: cell {row['id']}: {reopened}; retraining it from the newest good checkpoint")
            index.mark_finished(row["id"], "interrupted", summary=read_summary(cell_dir(grid_dir, row["id"])),
                                message=reopened)
        summary = read_summary(cell_dir(grid_dir, row["id"]))
        status = (summary or {}).get("status")
        if status in FINISHED:
            if row["status"] != status:
                index.mark_finished(row["id"], status, summary=summary, exit_code=row["exit_code"],
                                    message=row["message"], ended_at=row["ended_at"])
            continue
        if row["status"] == "running":  # left so by a grid process that was killed
            index.mark_finished(row["id"], "interrupted", summary=summary, message="grid process ended")
        todo.append(row["id"])
    return todo


# ----------------------------------------------------------------------------- entry point


@dataclasses.dataclass(frozen=True)
class _Setup:
    """What one ``blockyard grid`` call works with, resolved from its options and the grid dir."""

    spec: GridSpec
    grid_file: str | Path
    grid_dir: Path
    exists: bool
    executor: str
    address: str | None
    workers: int | None
    threads: int
    cores: int
    recorded_threads: int | None
    old_hashes: dict[str, str]
    old_design: str | None
    old_tuning: str | None = None  # the recorded tune block (JSON; "" or None: none)
    old_tuning_hashes: dict[str, str] = dataclasses.field(default_factory=dict)  # stage 1's cells
    check: bool = True  # run the mixer contract gate on plugin mixers (``blockyard.check``)

    @property
    def hint(self) -> str:
        if self.recorded_threads is not None and self.threads != self.recorded_threads:
            return f" (it was started with --threads {self.recorded_threads}, this run asks for {self.threads})"
        return ""


def _check_options(workers: int | None, threads: int | None, executor: str, address: str | None) -> None:
    if workers is not None and workers < 1:
        raise UserError(f"--workers {workers}: must be at least 1")
    if threads is not None and threads < 1:
        raise UserError(f"--threads {threads}: must be at least 1")
    if executor not in ("local", "ray"):
        raise UserError(f"--executor {executor}: allowed: local, ray")
    if address and executor != "ray":
        raise UserError("--address is for --executor ray")


def _setup(grid_file: str | Path, out: str | Path | None, workers: int | None, threads: int | None, executor: str,
           address: str | None) -> _Setup:
    """Read the spec and what the grid dir already holds; settle threads and workers."""
    spec = load_grid(grid_file)
    grid_dir = Path(out) if out else DEFAULT_ROOT / spec.name
    exists = check_grid_dir(grid_dir)
    cores = available_cores()
    recorded_threads, old_design, old_tuning = None, None, None
    old_hashes: dict[str, str] = {}
    old_tuning_hashes: dict[str, str] = {}
    if exists:
        with open_index(grid_dir, readonly=True) as index:
            value = index.get_meta("threads")
            recorded_threads = int(value) if value else None
            old_design = index.get_meta("design")
            old_tuning = index.get_meta("tuning")
            old_hashes = {r["id"]: r["config_hash"] for r in index.cells()}
        if (grid_dir / TUNING_DIR / INDEX_NAME).exists():
            with open_index(grid_dir / TUNING_DIR, readonly=True) as tindex:
                old_tuning_hashes = {r["id"]: r["config_hash"] for r in tindex.cells()}
    if threads is None:
        # A grid keeps the thread count it started with: it is part of each cell's config (and the
        # trainer resumes a run dir only under the same config).
        if recorded_threads is not None:
            threads = recorded_threads
        elif executor == "ray":
            threads = 1
        else:
            threads = max(1, cores // (workers or cores))
    if workers is None and executor == "local":
        workers = max(1, cores // threads)
    return _Setup(spec, grid_file, grid_dir, exists, executor, address, workers, threads, cores, recorded_threads,
                  old_hashes, old_design, old_tuning=old_tuning, old_tuning_hashes=old_tuning_hashes)


def _sync_index(s: _Setup, index: GridIndex, universe: list[PlannedCell], force: bool,
                echo: Callable[[str], None]) -> None:
    """Under the lock: re-check the spec, move superseded cells aside, record the spec and the design."""
    new = {p.id: p.config_hash for p in universe}
    grows = s.spec.design.schedule is not None
    old = {r["id"]: r["config_hash"] for r in index.cells()}
    changed, added, removed = cell_changes(old, new)
    if old and (changed or removed or (added and not grows)):
        refuse_changed_spec(s.grid_dir, s.grid_file, old, new, force, s.hint, grows)
        moved = supersede(s.grid_dir, changed + removed, old)
        if moved:
            echo(f"moved {len(moved)} superseded cell(s) to {s.grid_dir / 'superseded'}")
        # A changed cell's row goes too: its outcome belongs to the old config, and with seeds until
        # decided a later round (not planned now) would otherwise replay and report it.
        index.remove_unplanned(set(new) - set(changed))
    old_design = index.get_meta("design")
    refuse_changed_design(s.grid_dir, s.grid_file, old_design, s.spec.design, force)
    design_changed = index.get_meta("design_changed") or ""
    if old_design and Design.from_json(old_design) != s.spec.design and old:
        design_changed = "1"
    archive_spec(s.grid_dir, s.spec.text)
    index.set_meta({"name": s.spec.name, "description": s.spec.description, "reference": s.spec.reference or "",
                    "match": s.spec.match, "threads": str(s.threads), "fingerprint": fingerprint(universe),
                    "grid_file": str(Path(s.grid_file).resolve()), "design": s.spec.design.to_json(),
                    "design_changed": design_changed, "cost_note": cost_note(universe),
                    "tuning": _tuning_json(s.spec), "stage": "verdicts",
                    "ladder": s.spec.ladder.to_json() if s.spec.ladder else ""})


def _tuning_json(spec: GridSpec) -> str:
    return spec.tuning.to_json() if spec.tuning else ""


def _jobs(grid_dir: Path, ids: list[str], threads: int, check: bool) -> list[executors.CellJob]:
    return [executors.CellJob(id=cid, config_path=(grid_dir / "configs" / f"{cid}.yaml").resolve(),
                              out_dir=cell_dir(grid_dir, cid).resolve(),
                              log_path=(grid_dir / "logs" / f"{cid}.log").resolve(), threads=threads, check=check)
            for cid in ids]


def _run_rounds(s: _Setup, index: GridIndex, universe: list[PlannedCell], echo: Callable[[str], None],
                status_every_s: float) -> bool:
    """Train the cells of each round until no round adds cells; False when stopped by a signal."""
    recorder = _Recorder(s.grid_dir, index, s.spec.name, echo, status_every_s)
    seen: set[str] = set()
    while True:
        cells, rounds_line, complete = current_cells(s.spec, universe, index.cells())
        if {p.id for p in cells} <= seen:  # no new cells: done, or waiting on failed cells
            index.set_meta({ROUNDS_META: ROUNDS_COMPLETE})
            return True
        seen |= {p.id for p in cells}
        # Recorded so that progress lines and `grid --status` do not call a grid finished between rounds.
        recorder.more_rounds = not complete
        index.set_meta({ROUNDS_META: ROUNDS_COMPLETE if complete else ROUNDS_OPEN})
        if not _train(s, s.grid_dir, index, cells, recorder, echo, f"grid {s.spec.name}",
                      f"; {rounds_line}" if rounds_line else ""):
            return False
        if complete:
            return True


def _train(s: _Setup, grid_dir: Path, index: GridIndex, cells: list[PlannedCell], recorder: _Recorder,
           echo: Callable[[str], None], title: str, note: str = "", retry_failed: bool = True) -> bool:
    """Write the cells' configs, record them in the index, train those not finished; False when stopped."""
    (grid_dir / "configs").mkdir(exist_ok=True)
    for p in cells:
        write_if_changed(grid_dir / "configs" / f"{p.id}.yaml", dump_config(p.cell.cfg, plugin_copies(p, grid_dir)))
    index.plan(plan_rows(cells))
    todo = _reconcile(grid_dir, index)
    if not retry_failed:
        failed = {r["id"] for r in index.cells() if r["status"] == "failed"}
        todo = [i for i in todo if i not in failed]
    echo(f"{title}: {len(cells)} cells in {grid_dir} ({len(cells) - len(todo)} already finished, "
         f"{len(todo)} to run; {s.executor} executor, {s.workers or 'auto'} worker(s) x {s.threads} thread(s))"
         + note)
    jobs = _jobs(grid_dir, todo, s.threads, s.check)
    if jobs:
        (grid_dir / "cells").mkdir(exist_ok=True)
    try:
        if s.executor == "ray":
            executors.run_ray(jobs, s.workers, recorder, address=s.address, cores=s.cores)
        else:
            executors.run_local(jobs, s.workers or 1, recorder)
    except executors.GridStopped as stop:
        recorder.status()
        echo(f"grid stopped ({stop}); rerun the same command to resume")
        return False
    if not jobs:
        recorder.status()
    return True


def _tuning_stage(s: _Setup, index: GridIndex, tuning_plan: list[PlannedCell], force: bool,
                  echo: Callable[[str], None], status_every_s: float) -> dict[tuple, float] | None:
    """Stage 1 in GRID_DIR/tuning/: train the tuning cells, return each (variant, point)'s chosen value
    (None when stopped by a signal). Failed tuning cells are retried only while stage 2 has not started."""
    assert s.spec.tuning is not None
    tdir = s.grid_dir / TUNING_DIR
    tdir.mkdir(exist_ok=True)
    stage2_started = bool(index.cells())
    index.set_meta({"stage": "tuning", "tuning": _tuning_json(s.spec), "name": s.spec.name})
    with open_index(tdir) as tindex:
        new = {p.id: p.config_hash for p in tuning_plan}
        old = {r["id"]: r["config_hash"] for r in tindex.cells()}
        changed, _added, removed = cell_changes(old, new)
        if changed or removed:  # only with --force: checked before anything was written
            moved = supersede(tdir, changed + removed, old)
            if moved:
                echo(f"moved {len(moved)} superseded tuning cell(s) to {tdir / 'superseded'}")
            tindex.remove_unplanned(set(new) - set(changed))
        tindex.set_meta({"name": f"{s.spec.name} tuning", "threads": str(s.threads)})
        recorder = _Recorder(tdir, tindex, f"{s.spec.name} tuning", echo, status_every_s)
        t = s.spec.tuning
        if not _train(s, tdir, tindex, tuning_plan, recorder, echo, f"stage 1 of 2, tuning {t.key}",
                      retry_failed=not stage2_started):
            return None
        groups = tuned_groups(tindex.cells(), t, s.spec.design.smallest_effect)
    assert groups is not None, "every tuning cell ended"
    for g in groups:
        where = " at " + ", ".join(f"{k}={v}" for k, v in g.point) if g.point else ""
        echo(f"chosen {t.key} for {g.variant}{where}: {g.chosen:g}" + (", carried to every rung" if t.carried else "")
             + (" (at the edge of the searched values)" if g.at_edge else ""))
    return chosen_values(groups)


def _stage_one_result(s: _Setup, tuning_plan: list[PlannedCell]) -> dict[tuple, float] | None:
    """The chosen values when the grid dir's tuning cells are exactly ``tuning_plan``'s and all ended; else None."""
    tdir = s.grid_dir / TUNING_DIR
    if s.spec.tuning is None or not (tdir / INDEX_NAME).exists():
        return None
    with open_index(tdir, readonly=True) as tindex:
        rows = tindex.cells()
    if {r["id"]: r["config_hash"] for r in rows} != {p.id: p.config_hash for p in tuning_plan}:
        return None
    groups = tuned_groups(rows, s.spec.tuning, s.spec.design.smallest_effect)
    return None if groups is None else chosen_values(groups)


def run_grid(
    grid_file: str | Path,
    *,
    out: str | Path | None = None,
    workers: int | None = None,
    threads: int | None = None,
    executor: str = "local",
    address: str | None = None,
    force: bool = False,
    dry_run: bool = False,
    check: bool = True,
    echo: Callable[[str], None] = print,
    status_every_s: float = STATUS_EVERY_S,
    noise_from: str | Path | None = None,
) -> int:
    """``blockyard grid``: returns 0 when every cell finished (done or diverged), 1 when some failed,
    130 when stopped by a signal. ``noise_from``: an earlier grid dir whose paired sds the dry run's budget
    plan uses (``blockyard.grid.budget``)."""
    _check_options(workers, threads, executor, address)
    s = dataclasses.replace(_setup(grid_file, out, workers, threads, executor, address), check=check)
    if executor == "local" and s.workers is not None and s.workers * s.threads > s.cores:
        echo(f"note: {s.workers} worker(s) x {s.threads} thread(s) exceed the {s.cores} core(s) here; "
             "cells will share them")
    noise = None
    if noise_from is not None and not dry_run:
        raise UserError(f"--noise-from {noise_from}: only with --dry-run (it plans the budget; a run measures its own)")
    if noise_from is not None:  # read (and refused when it is no grid dir) before anything is measured or written
        from blockyard.grid.noise_files import read_noise_from

        noise = read_noise_from(noise_from)
    tuning_plan = plan_tuning(s.spec, s.threads)
    chosen = _stage_one_result(s, tuning_plan) if s.exists else None
    if s.spec.design.schedule is not None and s.spec.design.schedule.auto:
        s = _resolve_auto_most(s, tuning_plan, echo)
    universe = plan_cells(s.spec, s.threads, chosen)
    if dry_run:
        workers = s.workers or max(1, s.cores // s.threads)
        echo(f"grid {s.spec.name}: {len(tuning_plan) + len(universe)} cells -> {s.grid_dir}"
             + (" (exists)" if s.exists else ""))
        estimates = measured_speeds(universe, s.threads)
        echo(two_stage_dry_run(s.spec, tuning_plan, universe, workers, s.threads, chosen is not None) if tuning_plan
             else dry_run_text(universe, workers, s.threads, design=s.spec.design, ladder=s.spec.ladder,
                               reference=s.spec.reference, estimates=estimates))
        echo(budget_plan(s.spec, universe, estimates, workers, noise))
        return 0
    # Checked before anything is written (a refused command leaves the dir as it was), and again
    # under the lock in case another process changed the grid in between. The verdict cells of a
    # tuned grid are known here only once stage 1 has ended; else they are checked after it.
    refuse_changed_tuning(s.grid_dir, grid_file, s.old_tuning, _tuning_json(s.spec), bool(s.old_hashes), force)
    if tuning_plan:
        refuse_changed_spec(s.grid_dir / TUNING_DIR, grid_file, s.old_tuning_hashes,
                             {p.id: p.config_hash for p in tuning_plan}, force, s.hint)
    if not tuning_plan or chosen is not None:
        new = {p.id: p.config_hash for p in universe}
        refuse_changed_spec(s.grid_dir, grid_file, s.old_hashes, new, force, s.hint,
                             s.spec.design.schedule is not None)
    refuse_changed_design(s.grid_dir, grid_file, s.old_design, s.spec.design, force)
    unfinished = [p for p in universe if p.cell.seed in s.spec.seeds[:first_seeds(s.spec)]
                  and (read_summary(cell_dir(s.grid_dir, p.id)) or {}).get("status") not in FINISHED]
    unfinished += [p for p in tuning_plan if (read_summary(cell_dir(s.grid_dir / TUNING_DIR, p.id))
                                             or {}).get("status") not in FINISHED]
    if check:  # a plugin mixer that leaks is refused before any cell starts (and each cell checks again)
        from blockyard.check import gate_many

        gate_many([p.cell.cfg for p in unfinished])
    prepare_data(unfinished, echo)
    s.grid_dir.mkdir(parents=True, exist_ok=True)
    with grid_lock(s.grid_dir), open_index(s.grid_dir) as index:
        if tuning_plan:
            chosen = _tuning_stage(s, index, tuning_plan, force, echo, status_every_s)
            if chosen is None:
                return 130
            universe = plan_cells(s.spec, s.threads, chosen)
            assert s.spec.tuning is not None  # a tuning plan comes from the grid's tune block
            echo(f"stage 2 of 2: verdict cells, each variant at its chosen {s.spec.tuning.key}"
                 + (" (rung 1's, at every rung)" if s.spec.tuning.carried else ""))
        _sync_index(s, index, universe, force, echo)
        if not _run_rounds(s, index, universe, echo, status_every_s):
            return 130
        rows = index.cells()
    if tuning_plan:
        with open_index(s.grid_dir / TUNING_DIR, readonly=True) as tindex:
            rows = rows + tindex.cells()

    from blockyard.grid.report import write_report

    report = write_report(s.grid_dir)
    echo(f"report: {report}")
    failed = [r["id"] for r in rows if r["status"] not in FINISHED]
    if failed:
        echo(f"{len(failed)} cell(s) failed: {', '.join(failed)} (see {s.grid_dir / 'logs'}); "
             "rerun the same command to retry them")
        return 1
    return 0


def _resolve_auto_most(s: _Setup, tuning_plan: list[PlannedCell], echo: Callable[[str], None]) -> _Setup:
    """``seeds.most: auto``: the grid dir's recorded value for this schedule, else the most seeds whose worst case
    (after stage 1, if any) fits in ``budget_hours`` at the measured speed; echoed, and recorded with the design."""
    from blockyard.grid.budget import fit_most, resolve_most, with_most

    schedule = s.spec.design.schedule
    assert schedule is not None and schedule.budget_hours is not None
    hours = schedule.budget_hours

    def fit() -> int:
        workers = s.workers or max(1, s.cores // s.threads)
        first_round = plan_cells(s.spec, s.threads)
        estimates = measured_speeds(first_round + tuning_plan, s.threads)
        stage1 = makespan([p.cost.tokens / estimates[p.id] for p in tuning_plan], workers) if tuning_plan else 0.0
        later_tuning_seeds = [t for t in (s.spec.tuning.seeds if s.spec.tuning else ()) if t >= schedule.first]
        return fit_most(schedule, hours * 3600 - stage1,
                        round_wall(s.spec, first_round, estimates, workers), cap=min(later_tuning_seeds, default=None))

    most, recorded = resolve_most(schedule, Design.from_json(s.old_design) if s.old_design else None, fit)
    echo(f"seeds.most: auto -> {most} " + ("(recorded in the grid dir when it started)" if recorded else
                                           f"(the worst case fits in budget_hours {schedule.budget_hours:g} here)"))
    return dataclasses.replace(s, spec=with_most(s.spec, most))

