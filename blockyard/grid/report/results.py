"""What the report says, computed once: the index rows grouped by variant and axis point, the verdicts'
family, rounds, tuning and ladder results, and the few facts read from the cells' configs and env.json.

Pure except for the readers (``load_results``, ``read_*``), which read the grid dir and never write it.
The layout (figures, tables, sections) reads a ``GridResults`` and nothing else of the grid.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

from blockyard.config import TrainConfig
from blockyard.errors import UserError
from blockyard.grid.fairness import MATCH_TOLERANCE
from blockyard.grid.index import INDEX_NAME, CellRow, GridIndex, open_index
from blockyard.grid.ladder import Ladder, LadderTrends, ladder_trends
from blockyard.grid.rounds import plan_rounds
from blockyard.grid.spec import NULL_VARIANT, Design
from blockyard.grid.status import cell_dir
from blockyard.grid.tuning import TUNING_DIR, TunedGroup, Tuning, tuned_groups
from blockyard.grid.verdicts import Family, GroupKey, Point, compare_all, group_outcomes, point_text
from blockyard.text import is_finite_number


@dataclasses.dataclass(frozen=True)
class GridMeta:
    """What the grid recorded about itself in its index's meta table, parsed (``read_meta``)."""

    name: str  # the grid's name, or its dir's
    description: str
    reference: str | None  # None: no variants to compare
    match: str  # fairness: none, params or flops
    design: Design
    design_changed: bool  # the verdict rules changed with --force after cells had run
    cost_note: str  # which cost figures were measured rather than computed (plugin mixers)
    tuning: Tuning | None
    ladder: Ladder | None


def read_meta(index: GridIndex, default_name: str) -> GridMeta:
    """The index's meta, parsed; ``default_name`` names a grid that recorded no name."""
    get = index.get_meta
    return GridMeta(get("name") or default_name, get("description") or "", get("reference") or None,
                    get("match") or "none", Design.from_json(get("design")), get("design_changed") == "1",
                    get("cost_note") or "", Tuning.from_json(get("tuning")), Ladder.from_json(get("ladder")))


def mean_of(values: list[Any]) -> float | None:
    """The mean of the finite numbers among ``values``; None when there are none."""
    finite = [v for v in values if is_finite_number(v)]
    return sum(finite) / len(finite) if finite else None


@dataclasses.dataclass(frozen=True)
class Group:
    """The cells of one variant at one axis point (for curves and costs)."""

    variant: str
    point: Point
    rows: list[CellRow]

    @property
    def key(self) -> GroupKey:
        return (self.variant, self.point)

    @property
    def label(self) -> str:
        return self.variant if not self.point else f"{self.variant} ({point_text(self.point)})"

    @property
    def point_text(self) -> str:
        return point_text(self.point)

    @property
    def done(self) -> list[CellRow]:
        """The cells that finished with a finite final validation loss."""
        return [r for r in self.rows if r["status"] == "done" and is_finite_number(r["final_val_loss"])]

    @property
    def params_non_embedding(self) -> float | None:
        """Mean non-embedding parameters over the cells that recorded them."""
        return mean_of([r["params_non_embedding"] for r in self.rows if r.get("params_non_embedding")])

    @property
    def params_total(self) -> float | None:
        return mean_of([r["params_total"] for r in self.rows if r.get("params_total")])


def group_cells(rows: list[CellRow]) -> list[Group]:
    """The rows as groups, in the order the rows first list each (variant, point)."""
    groups: dict[GroupKey, Group] = {}
    for r in rows:
        key = (r["variant"], tuple(tuple(p) for p in r["point"]))
        if key not in groups:
            groups[key] = Group(r["variant"], key[1], [])
        groups[key].rows.append(r)
    return list(groups.values())


@dataclasses.dataclass(frozen=True)
class TuningResults:
    """Stage 1: the block, its cells' records, and each (variant, point)'s choice (None while cells may train)."""

    tuning: Tuning
    rows: list[CellRow]
    groups: list[TunedGroup] | None

    def chosen(self, variant: str, point: Point) -> float | None:
        return next((g.chosen for g in self.groups or () if g.variant == variant
                     and g.point == self.tuning.tuned_point(point)), None)


@dataclasses.dataclass(frozen=True)
class GridResults:
    """Everything the report says, computed once from the index rows and the recorded design."""

    name: str
    description: str
    reference: str | None
    match: str
    design: Design
    design_changed: bool
    cost_note: str  # which cost figures were measured rather than computed (plugin mixers)
    rows: list[CellRow]
    groups: list[Group]
    family: Family
    rounds: str | None  # "N rounds ran; <why it stopped>" with a seed schedule
    tuning: TuningResults | None = None  # stage 1 of a grid with a ``tune`` block
    ladder: Ladder | None = None
    trends: LadderTrends | None = None  # with a ladder
    # variant -> model.parametrization of its cells ("mixed" when they differ); read only under tune.rungs: first
    parametrizations: dict[str, str] = dataclasses.field(default_factory=dict)
    # variants whose cells use a plugin mixer declared token-local (no mixing in time, on purpose)
    token_local: frozenset[str] = frozenset()
    # the noise levers the cells' configs used: model.init_draws and train.ema_half_life -> the values seen
    levers: dict[str, frozenset[Any]] = dataclasses.field(default_factory=dict)


def grid_results(rows: list[CellRow], meta: GridMeta, tuning_rows: list[CellRow] | None = None,
                 parametrizations: dict[str, str] | None = None) -> GridResults:
    """The results of the cells ``rows`` under the grid's ``meta``; pure."""
    reference, design, tuning, ladder = meta.reference, meta.design, meta.tuning, meta.ladder
    tuned = None
    if tuning is not None:
        tuned = TuningResults(tuning, tuning_rows or [], tuned_groups(tuning_rows or [], tuning,
                                                                      design.smallest_effect))
    outcomes = group_outcomes(rows)
    family = compare_all(outcomes, reference, design)
    rounds = None
    if design.schedule is not None:
        state = plan_rounds(design, list(outcomes), reference, design.schedule.seed_order(), outcomes)
        rounds = (f"{state.rounds} round(s) ran; {state.reason}" if state.complete
                  else f"round {state.rounds} still running, {state.reason}")
    groups = group_cells(rows)
    trends = None
    if ladder is not None:
        params = {g.key: p for g in groups if (p := g.params_non_embedding) is not None}
        trends = ladder_trends(ladder, reference, {k: g.losses for k, g in outcomes.items()}, params,
                               skip=(NULL_VARIANT,))
    return GridResults(meta.name, meta.description, reference, meta.match, design, meta.design_changed,
                       meta.cost_note, rows, groups, family, rounds, tuned, ladder, trends, parametrizations or {})


def load_results(grid_dir: Path) -> GridResults:
    """The results of the grid in ``grid_dir``: its index (and stage 1's), and the facts its cells' files hold."""
    if not (grid_dir / INDEX_NAME).exists():
        raise UserError(f"{grid_dir}: no grid here (no {INDEX_NAME}); pass the dir a grid was run in")
    with open_index(grid_dir, readonly=True) as index:
        rows = index.cells()
        meta = read_meta(index, grid_dir.name)
    if not rows:
        raise UserError(f"{grid_dir}: the grid index holds no cells")
    tuning_rows = None
    if (grid_dir / TUNING_DIR / INDEX_NAME).exists():
        with open_index(grid_dir / TUNING_DIR, readonly=True) as index:
            tuning_rows = index.cells()
    carried = meta.tuning is not None and meta.tuning.carried
    parametrizations = read_parametrizations(grid_dir, rows) if carried else None
    res = grid_results(rows, meta, tuning_rows, parametrizations)
    return dataclasses.replace(res, token_local=read_token_local(grid_dir, rows), levers=read_levers(grid_dir, rows))


def read_parametrizations(grid_dir: Path, rows: list[CellRow]) -> dict[str, str]:
    """Variant -> ``model.parametrization`` of its cells' configs (GRID_DIR/configs/), one config read per group;
    "mixed" when its groups differ; a variant with no readable config is left out."""
    from blockyard.config import read_yaml

    seen: dict[str, set[str]] = {}
    for g in group_cells(rows):
        try:
            model = read_yaml(grid_dir / "configs" / f"{g.rows[0]['id']}.yaml").get("model") or {}
        except UserError:
            continue
        seen.setdefault(g.variant, set()).add(str(model.get("parametrization", "standard")))
    return {v: next(iter(p)) if len(p) == 1 else "mixed" for v, p in seen.items()}


DEFAULT_LR = TrainConfig().lr  # the trainer's peak learning rate when a config gives none
LEVER_KEYS = (("model", "init_draws", "by_path"), ("train", "ema_half_life", 0.0), ("train", "lr", DEFAULT_LR))


def read_levers(grid_dir: Path, rows: list[CellRow]) -> dict[str, frozenset[Any]]:
    """``model.init_draws``, ``train.ema_half_life`` and ``train.lr`` -> the values the cells' configs
    (GRID_DIR/configs/) use, one config read per group; a config without the key (written before it
    existed) counts as its default."""
    from blockyard.config import read_yaml

    seen: dict[str, set[Any]] = {f"{sec}.{key}": set() for sec, key, _ in LEVER_KEYS}
    for g in group_cells(rows):
        try:
            cfg = read_yaml(grid_dir / "configs" / f"{g.rows[0]['id']}.yaml")
        except UserError:
            continue
        for sec, key, default in LEVER_KEYS:
            seen[f"{sec}.{key}"].add((cfg.get(sec) or {}).get(key, default))
    return {k: frozenset(v) for k, v in seen.items()}


def read_token_local(grid_dir: Path, rows: list[CellRow]) -> frozenset[str]:
    """Variants whose first cell's env.json says the contract gate found a mixer declared token-local."""
    from blockyard.check import TOKEN_LOCAL_MARK
    from blockyard.rundir import ENV_FILE, read_json

    return frozenset(g.variant for g in group_cells(rows)
                     if TOKEN_LOCAL_MARK in str((read_json(cell_dir(grid_dir, g.rows[0]["id"]) / ENV_FILE) or {})
                                                .get("mixer_check", "")))


def axis_varies_size(groups: list[Group]) -> bool:
    """True when the mean non-embedding parameters differ across axis points by more than the matching tolerance."""
    by_point: dict[Point, list[float]] = {}
    for g in groups:
        params = g.params_non_embedding
        if params:
            by_point.setdefault(g.point, []).append(params)
    means = [sum(v) / len(v) for v in by_point.values()]
    return len(means) > 1 and max(means) > (1 + MATCH_TOLERANCE) * min(means)
