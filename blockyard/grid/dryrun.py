"""``blockyard grid --dry-run``: the plan as text, with measured-speed time estimates and the budget plan.

Nothing here trains or writes: the text is built from a plan (``blockyard.grid.plan``) and the
tokens/s measured for it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from blockyard.grid.fairness import planned_steps
from blockyard.grid.ladder import Ladder, RungCell, rung_summary
from blockyard.grid.plan import PlannedCell, makespan, measured_speeds, round_wall
from blockyard.grid.spec import Design, GridSpec, SeedSchedule
from blockyard.grid.tuning import TUNING_DIR
from blockyard.rundir import format_duration
from blockyard.text import aligned_table

if TYPE_CHECKING:
    from blockyard.grid.budget import NoiseEstimate

CELL_COLUMNS = ("cell", "adjustment", "params (non-emb)", "FLOPs/token", "steps", "tokens", "tokens/s", "est. time")


def dry_run_text(plan: list[PlannedCell], workers: int, threads: int, measure: bool = True,
                 design: Design | None = None, estimates: dict[str, float] | None = None,
                 ladder: Ladder | None = None, reference: str | None = None) -> str:
    """The cells with params, FLOPs/token, tokens and (measured-speed) estimated time; with a seed
    schedule, the best case (every comparison decided after round 1) and the worst (all to ``most``);
    with a ladder, each rung's parameters, tokens and cell time.
    ``estimates``: tokens/s per cell id, measured already (else measured here)."""
    if estimates is None:
        estimates = measured_speeds(plan, threads) if measure else {}
    lines = [aligned_table(CELL_COLUMNS, [_cell_row(p, estimates.get(p.id)) for p in plan])]
    seconds = {p.id: p.cost.tokens / estimates[p.id] for p in plan if p.id in estimates}
    if ladder is not None:
        lines += ["", *rung_summary(ladder, reference, [
            RungCell(p.cell.point, p.cell.variant, p.cost.params_non_embedding, p.cost.tokens, seconds.get(p.id))
            for p in plan])]
    if not measure:
        return "\n".join(lines)
    how = (f"{workers} worker(s) x {threads} thread(s); from a measured micro-benchmark (forward + backward + "
           "AdamW steps on random tokens, here, at each cell's thread count); evaluation, checkpoints and "
           "start-up are not included.")
    schedule = design.schedule if design else None
    if schedule is None:
        total = list(seconds.values())
        lines += ["", f"{len(plan)} cells. Estimated time: {_wall_text([total], workers)}. {how}"]
        return "\n".join(lines)
    rounds = _round_seconds(plan, seconds, schedule)
    lines += ["", f"Seeds until decided (first {schedule.first}, most {schedule.most}, {schedule.step} per round):",
              f"  best case, every comparison decided after round 1: {len(rounds[0])} cells, "
              f"{_wall_text(rounds[:1], workers)}",
              f"  worst case, {len(rounds)} rounds, every group to {schedule.most} seeds: {len(plan)} cells, "
              f"{_wall_text(rounds, workers)}",
              how]
    return "\n".join(lines)


def _cell_row(p: PlannedCell, speed: float | None) -> list[str]:
    """One cell's line of the dry run's table (``CELL_COLUMNS``)."""
    est = p.cost.tokens / speed if speed else None
    adj = ", ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}" for k, v in p.cell.adjustments.items())
    return [
        p.id, adj or "-", f"{p.cost.params_non_embedding:,d}",
        "n/a" if p.cost.flops_per_token is None else f"{p.cost.flops_per_token:,.0f}",
        str(planned_steps(p.cell.cfg)), f"{p.cost.tokens:,d}",
        f"{speed:,.0f}" if speed else "-", format_duration(est) if est is not None else "-",
    ]


def _round_seconds(plan: list[PlannedCell], seconds: dict[str, float],
                   schedule: SeedSchedule) -> list[list[float]]:
    """Each round's cell seconds under the seed schedule (round k adds the seeds between looks k-1 and k)."""
    looks = (0, *schedule.looks())
    return [[seconds[p.id] for p in plan if lo <= p.cell.seed < hi] for lo, hi in zip(looks, looks[1:], strict=False)]


def two_stage_dry_run(spec: GridSpec, tuning_plan: list[PlannedCell], plan: list[PlannedCell], workers: int,
                      threads: int, tuned: bool) -> str:
    """Both stages of a tuned grid, each with its cells and estimated time, then the total (``tuned``:
    stage 1 has finished, so ``plan`` holds the chosen values)."""
    assert spec.tuning is not None
    t = spec.tuning
    estimates = measured_speeds(tuning_plan + plan, threads)
    where = ("at each variant's chosen value" if tuned else
             f"at each variant's value chosen in stage 1 (shown at the base config's {t.key}; the cost does not "
             "depend on it unless the key changes the model or the budget)")
    if t.carried:
        where += ", rung 1's value at every rung"
    lines = [f"stage 1 of 2, tuning {t.key} over {len(t.values)} values x {len(t.seeds)} tuning seed(s) "
             f"({', '.join(map(str, t.seeds))}), budget {t.budget:g} x the verdict cells'"
             + (", on rung 1 only (tune.rungs: first; each variant's value is carried up the ladder)"
                if t.carried else "") + f": {len(tuning_plan)} cells under {TUNING_DIR}/",
             dry_run_text(tuning_plan, workers, threads, estimates=estimates), "",
             f"stage 2 of 2, verdict cells {where}: {len(plan)} cells",
             dry_run_text(plan, workers, threads, design=spec.design, estimates=estimates), ""]
    stage1 = makespan([p.cost.tokens / estimates[p.id] for p in tuning_plan], workers)
    seconds = {p.id: p.cost.tokens / estimates[p.id] for p in plan}
    schedule = spec.design.schedule
    if schedule is None:
        stage2 = {"": makespan(list(seconds.values()), workers)}
    else:
        rounds = _round_seconds(plan, seconds, schedule)
        stage2 = {" best case": makespan(rounds[0], workers),
                  " worst case": sum(makespan(r, workers) for r in rounds)}
    lines += [f"Both stages{case}: {format_duration(stage1)} + {format_duration(wall)} = "
              f"{format_duration(stage1 + wall)} (estimate)" for case, wall in stage2.items()]
    return "\n".join(lines)


def _wall_text(rounds: list[list[float]], workers: int) -> str:
    """Estimated wall time of rounds of cells run one round after the other, each on ``workers`` at once."""
    wall = sum(makespan(r, workers) for r in rounds)
    return f"{format_duration(wall)} for the grid ({format_duration(sum(map(sum, rounds)))} of cell time)"


def budget_plan(spec: GridSpec, plan: list[PlannedCell], estimates: dict[str, float], workers: int,
                noise: NoiseEstimate | None) -> str:
    """The dry run's budget plan (``blockyard.grid.budget.plan_lines``); empty without comparisons."""
    from blockyard.grid.budget import ASSUMED_PAIRED_SD, ASSUMED_SOURCE, NoiseEstimate, plan_lines  # noqa: F811
    from blockyard.grid.verdicts import family_size

    m = family_size(dict.fromkeys((p.cell.variant, p.cell.point) for p in plan), spec.reference)
    if m == 0:
        return ""
    noise = noise or NoiseEstimate(ASSUMED_PAIRED_SD, None, ASSUMED_SOURCE)
    return "\n".join(plan_lines(spec.design, m, len(spec.seeds), noise, round_wall(spec, plan, estimates, workers)))
