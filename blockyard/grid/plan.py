"""Plan a grid: its cells with fairness and threads applied, their costs and hashes, and time estimates.

Pure planning: nothing here writes to a grid dir. ``blockyard.grid.run`` trains the plan,
``blockyard.grid.dryrun`` prints it, ``blockyard.grid.griddir`` compares it with what a grid dir holds.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING

from blockyard.config import config_hash, replace
from blockyard.grid.fairness import CellCost, apply_budgets, apply_matching, cell_cost
from blockyard.grid.index import PlanRow
from blockyard.grid.spec import NULL_VARIANT, Cell, GridSpec, expand_cells, tuned_cells, tuning_cells
from blockyard.schema import to_dict

if TYPE_CHECKING:
    from blockyard.grid.verdicts import CellOutcome


@dataclasses.dataclass(frozen=True)
class PlannedCell:
    cell: Cell
    cost: CellCost
    config_hash: str

    @property
    def id(self) -> str:
        return self.cell.id


def plan_cells(spec: GridSpec, threads: int, chosen: dict[tuple, float] | None = None) -> list[PlannedCell]:
    """Every potential cell with fairness adjustments and ``runtime.threads`` applied, its cost and config hash.

    The null control is the reference under another init seed: it is not matched (the reference
    is the target), so its config differs from the reference's in ``train.init_seed`` only.
    With a ``tune`` block, ``chosen`` ((variant, point) -> value, from stage 1) sets each verdict cell's
    tuned key; without it the cells keep the base config's value (what a dry run shows before tuning).
    """
    cells = _matched_cells(spec)
    if chosen is not None:
        cells = tuned_cells(spec, cells, chosen)
    return _planned(cells, threads)


def plan_tuning(spec: GridSpec, threads: int) -> list[PlannedCell]:
    """Stage 1's cells (none without a ``tune`` block): matched before tuning, as the verdict cells are."""
    return _planned(tuning_cells(spec, _matched_cells(spec)), threads)


def _matched_cells(spec: GridSpec) -> list[Cell]:
    cells = apply_budgets(spec, expand_cells(spec))
    matched = apply_matching(spec, [c for c in cells if c.variant != NULL_VARIANT])
    by_id = {c.id: c for c in matched}
    return [by_id.get(c.id, c) for c in cells]


def _planned(cells: list[Cell], threads: int) -> list[PlannedCell]:
    costs: dict[tuple, CellCost] = {}
    planned = []
    for cell in cells:
        cfg = replace(cell.cfg, {"runtime.threads": threads})
        cell = dataclasses.replace(cell, cfg=cfg)
        key = (cell.variant, cell.point)  # the seed changes neither params nor FLOPs
        if key not in costs:
            costs[key] = cell_cost(cfg)
        planned.append(PlannedCell(cell, costs[key], config_hash(cfg)))
    return planned


def fingerprint(plan: list[PlannedCell]) -> str:
    blob = json.dumps({p.id: p.config_hash for p in plan}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def plan_rows(plan: list[PlannedCell]) -> list[PlanRow]:
    """The planned cells as grid-index rows (``GridIndex.plan``)."""
    return [{
        "id": p.id, "variant": p.cell.variant, "seed": p.cell.seed, "point": [list(kv) for kv in p.cell.point],
        "config_hash": p.config_hash, "adjustments": p.cell.adjustments, "planned_tokens": p.cost.tokens,
        "flops_per_token": p.cost.flops_per_token, "params_total": p.cost.params_total,
        "params_non_embedding": p.cost.params_non_embedding,
    } for p in plan]


def cost_note(plan: list[PlannedCell]) -> str:
    """Which cost figures were measured (plugin mixers without formulas), for the report."""
    from blockyard.cost.analytic import measured_note

    return " ".join(dict.fromkeys(note for p in plan if (note := measured_note(p.cell.cfg.model))))


def first_seeds(spec: GridSpec) -> int:
    """How many of ``spec.seeds`` the first round trains (all of a fixed list)."""
    return spec.design.schedule.first if spec.design.schedule else len(spec.seeds)


def current_cells(spec: GridSpec, universe: list[PlannedCell], rows: Sequence[CellOutcome]) -> tuple[
        list[PlannedCell], str | None, bool]:
    """The cells the grid needs now, a line on its rounds (None for a fixed seed list), and whether it is complete.

    With a seed schedule the rounds are replayed from the recorded outcomes (``blockyard.grid.rounds``).
    """
    if spec.design.schedule is None:
        return universe, None, True
    # Deciding a round needs the statistics (scipy): loaded only by grids with a seed schedule.
    from blockyard.grid.rounds import plan_rounds
    from blockyard.grid.verdicts import group_outcomes

    keys = list(dict.fromkeys((p.cell.variant, p.cell.point) for p in universe))
    state = plan_rounds(spec.design, keys, spec.reference, spec.seeds, group_outcomes(rows))
    cells = [p for p in universe if state.needs((p.cell.variant, p.cell.point), p.cell.seed)]
    return cells, f"round {state.rounds}: {state.reason}", state.complete


# ----------------------------------------------------------------------------- time estimates


def measured_speeds(plan: list[PlannedCell], threads: int) -> dict[str, float]:
    """Measured training tokens/s per cell id (one benchmark per distinct model, batch shape and runtime)."""
    from blockyard.grid.estimate import measure_tokens_per_s

    speeds: dict[str, float] = {}
    out = {}
    for p in plan:
        cfg = p.cell.cfg
        # Speed depends on the model, the batch shape and the runtime only (not on lr, seed or budget).
        key = json.dumps([to_dict(cfg.model), cfg.data.seq_len, cfg.train.batch_size, cfg.train.grad_accum,
                          to_dict(cfg.runtime)], sort_keys=True, default=str)
        if key not in speeds:
            speeds[key] = measure_tokens_per_s(cfg, threads)
        out[p.id] = speeds[key]
    return out


def makespan(seconds: list[float], workers: int) -> float:
    """Wall time of cells handed out in plan order to whichever of ``workers`` frees up first (as the
    local executor does)."""
    slots = [0.0] * max(1, workers)
    for s in seconds:
        slots[slots.index(min(slots))] += s
    return max(slots)


def round_wall(spec: GridSpec, plan: list[PlannedCell], speeds: dict[str, float],
               workers: int) -> Callable[[int], float]:
    """Wall seconds of a round that adds k seeds to every group (from one seed's cells, in plan order)."""
    per_group = [p.cost.tokens / speeds[p.id] for p in plan if p.cell.seed == spec.seeds[0]]
    return lambda k: makespan([x for x in per_group for _ in range(k)], workers)
