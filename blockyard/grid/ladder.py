"""A ladder of model sizes: rungs, their token budgets, and the per-rung numbers the trend fits need.

Grid keys (``blockyard.grid.spec``)::

    ladder:                     # at least 2 rungs, smallest first; each a set of dotted-key overrides
      - {model.width: 32, model.depth: 2}
      - {model.width: 64, model.depth: 3}
      - {model.width: 128, model.depth: 4}
    tokens_per_param: 20        # optional: each rung's train.tokens = this x the reference's
                                # non-embedding parameters at that rung (about 20 is compute-optimal,
                                # Hoffmann et al. 2022, arXiv:2203.15556); without it every rung keeps
                                # the base's budget (train.tokens or train.steps): a fixed budget
    ladder_target: 1.0e7        # optional: a non-embedding parameter count to extrapolate each gap to

Rung k (1-based) is the first part of every cell's point, ``("rung", k)``, so every variant x rung
(x axis point) x seed is a cell, fairness matching happens per rung and every rung's comparisons
belong to the grid's verdict family like any axis point. The report then fits each variant's loss
against its non-embedding parameters N over the rungs and the trend of each paired gap
(``blockyard.grid.trend``).

This module imports nothing from the spec or the cost model, so the spec can parse a ladder with it; the
token budgets need the cost model and are applied by ``blockyard.grid.fairness.apply_budgets``.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from blockyard.errors import ConfigError
from blockyard.rundir import format_duration
from blockyard.text import aligned_table

RUNG = "rung"  # the point key of a rung
LADDER_KEYS = ("ladder", "tokens_per_param", "ladder_target")
MIN_RUNGS = 2
BUDGET_KEY = "train.tokens"

Point = tuple[tuple[str, Any], ...]
GroupKey = tuple[str, Point]


@dataclasses.dataclass(frozen=True)
class Ladder:
    """Parsed ladder keys: the rungs' overrides, smallest first; the budget rule; the target size."""

    rungs: tuple[dict[str, Any], ...]
    tokens_per_param: float | None = None  # None: every rung keeps the base's budget
    target: float | None = None

    def to_json(self) -> str:
        return json.dumps(dataclasses.asdict(self), sort_keys=True, default=str)

    @classmethod
    def from_json(cls, text: str | None) -> Ladder | None:
        """The ladder recorded in a grid index; None for a grid without one."""
        if not text:
            return None
        data = json.loads(text)
        return cls(tuple(data["rungs"]), data.get("tokens_per_param"), data.get("target"))

    def rung_path(self, k: int) -> str:
        """The key that names rung k (1-based) in error messages."""
        return f"ladder.{RUNG}{k}"

    def overrides_text(self, k: int) -> str:
        return ", ".join(f"{key}={json.dumps(v) if isinstance(v, (list, dict)) else v}"
                         for key, v in self.rungs[k - 1].items()) or "-"


def parse_ladder(raw: Any, tpp: float | None, target: float | None,
                 check_key: Callable[[str, Any], str]) -> Ladder | None:
    """The grid's ``ladder`` (rungs), with ``tokens_per_param`` and ``ladder_target`` (numbers > 0, already checked
    by the grid file's schema), validated; None when the grid has no ``ladder``.

    ``check_key(path, key)`` is the spec's check of one override key (dotted, not reserved).
    """
    if raw is None:
        for key, value in zip(LADDER_KEYS[1:], (tpp, target), strict=True):
            if value is not None:
                raise ConfigError(key, "needs a ladder: (a list of rungs, each a mapping of dotted keys to values)")
        return None
    allowed = f"a list of at least {MIN_RUNGS} rungs, smallest first, each a mapping of dotted keys to values"
    if not isinstance(raw, list) or len(raw) < MIN_RUNGS:
        raise ConfigError("ladder", f"{allowed} (got {len(raw) if isinstance(raw, list) else repr(raw)})")
    rungs = []
    for k, rung in enumerate(raw, start=1):
        path = f"ladder.{RUNG}{k}"
        if not isinstance(rung, dict) or not rung:
            raise ConfigError(path, f"expected a non-empty mapping of dotted keys to values, got {rung!r}")
        for key in rung:
            check_key(path, key)
        rungs.append(dict(rung))
    texts = [json.dumps(r, sort_keys=True, default=str) for r in rungs]
    for k, text in enumerate(texts, start=1):
        if texts.index(text) != k - 1:
            raise ConfigError(f"ladder.{RUNG}{k}", f"repeats rung {texts.index(text) + 1}; every rung needs its size")
    if tpp is not None:
        for k, rung in enumerate(rungs, start=1):
            if BUDGET_KEY in rung:
                raise ConfigError(f"ladder.{RUNG}{k}.{BUDGET_KEY}",
                                  "set by tokens_per_param; set each key in one place")
    return Ladder(tuple(rungs), tpp, target)


def check_conflicts(ladder: Ladder, axes: Mapping[str, Any], variants: Mapping[str, Mapping[str, Any]]) -> None:
    """A key set by a rung may be set by no axis and no variant (which value would win?)."""
    for k, rung in enumerate(ladder.rungs, start=1):
        for key in rung:
            if key in axes:
                raise ConfigError(f"axes.{key}", f"also set by ladder rung {k}; set each key in one place")
            for vname, overrides in variants.items():
                if key in overrides:
                    raise ConfigError(f"variants.{vname}.{key}", f"also set by ladder rung {k}; set each key in "
                                      "one place")
    if ladder.tokens_per_param is not None:
        if BUDGET_KEY in axes:
            raise ConfigError(f"axes.{BUDGET_KEY}", "set by tokens_per_param; set each key in one place")
        for vname, overrides in variants.items():
            if BUDGET_KEY in overrides:
                raise ConfigError(f"variants.{vname}.{BUDGET_KEY}", "set by tokens_per_param (match: flops "
                                  "adjusts the budgets of non-reference variants); set each key in one place")


def rung_points(ladder: Ladder | None) -> list[Point]:
    """The rung part of the points: ``[(("rung", 1),), ...]``; ``[()]`` without a ladder."""
    if ladder is None:
        return [()]
    return [((RUNG, k),) for k in range(1, len(ladder.rungs) + 1)]


def rung_overrides(ladder: Ladder | None, point: Point) -> dict[str, Any]:
    """The overrides of the rung in ``point`` (empty without one)."""
    k = rung_of(point)
    return {} if ladder is None or k is None else dict(ladder.rungs[k - 1])


def rung_of(point: Point) -> int | None:
    """The rung number of a point, None when it has none."""
    return next((int(v) for key, v in point if key == RUNG), None)


def split_point(point: Point) -> tuple[int | None, Point]:
    """(rung, the rest of the point): the rest names one ladder of a variant when the grid also has axes."""
    return rung_of(point), tuple((k, v) for k, v in point if k != RUNG)


# ----------------------------------------------------------------------------- budgets


def budget(ladder: Ladder, reference_non_embedding: int) -> int:
    """A rung's token budget: tokens_per_param x the reference's non-embedding parameters there."""
    assert ladder.tokens_per_param is not None
    return max(1, round(ladder.tokens_per_param * reference_non_embedding))


def check_sizes(ladder: Ladder, reference_n: Mapping[Point, int]) -> None:
    """The reference's size must grow from rung to rung (at every other axis point) and reach below the target.

    ``reference_n``: the reference's non-embedding parameters at each point (rung and axis point).
    """
    ladders: dict[Point, list[tuple[int, int]]] = {}
    for point, n in reference_n.items():
        k, rest = split_point(point)
        if k is not None:
            ladders.setdefault(rest, []).append((k, n))
    for rungs in ladders.values():
        rungs.sort()
        for (k0, n0), (k1, n1) in zip(rungs, rungs[1:], strict=False):
            if n1 <= n0:
                raise ConfigError(ladder.rung_path(k1), f"the reference has {n1:,d} non-embedding parameters here, "
                                  f"not more than rung {k0}'s {n0:,d}; list rungs smallest first, each larger")
        largest = rungs[-1][1]
        if ladder.target is not None and ladder.target < largest:
            raise ConfigError("ladder_target", f"{ladder.target:g} is below the largest rung's {largest:,d} "
                              "non-embedding parameters (the reference's); a target lies at or beyond the ladder")


# ----------------------------------------------------------------------------- dry run


@dataclasses.dataclass(frozen=True)
class RungCell:
    """What the dry run knows of one cell, for the per-rung summary."""

    point: Point
    variant: str
    params_non_embedding: int
    tokens: int
    seconds: float | None


def rung_summary(ladder: Ladder, reference: str | None, cells: Sequence[RungCell]) -> list[str]:
    """Dry-run lines: each rung's overrides, the reference's parameters and tokens, its cells and their time."""
    header = ["rung", "overrides", "params (non-emb, ref)", "tokens (ref)", "cells", "cell time"]
    rows = []
    total_time: float | None = 0.0
    for k in range(1, len(ladder.rungs) + 1):
        at = [c for c in cells if rung_of(c.point) == k]
        ref = [c for c in at if c.variant == reference] or at
        params = sorted({c.params_non_embedding for c in ref})
        tokens = sorted({c.tokens for c in ref})
        secs = [c.seconds for c in at if c.seconds is not None]
        t = sum(secs) if at and len(secs) == len(at) else None  # unknown if any cell's time is
        total_time = None if t is None or total_time is None else total_time + t
        rows.append([str(k), ladder.overrides_text(k), " / ".join(f"{p:,d}" for p in params),
                     " / ".join(f"{x:,d}" for x in tokens), str(len(at)), "-" if t is None else format_duration(t)])
    rows.append(["total", "", "", "", str(len(cells)), "-" if total_time is None else format_duration(total_time)])
    budget_text = (f"{ladder.tokens_per_param:g} tokens per non-embedding parameter of the reference"
                   if ladder.tokens_per_param is not None else "the base's budget at every rung (fixed)")
    lines = [f"Ladder: {len(ladder.rungs)} rungs; token budget: {budget_text}"
             + (f"; target N={ladder.target:.3g}" if ladder.target else "")]
    lines += aligned_table(header, rows, indent="  ").splitlines()
    return lines


# ----------------------------------------------------------------------------- trends


@dataclasses.dataclass(frozen=True)
class Series:
    """One variant's ladder (at one point of the other axes): N and the per-seed values at each rung used."""

    variant: str
    rest: Point  # the point without its rung
    rungs: tuple[int, ...]
    n: tuple[float, ...]
    values: tuple[dict[int, float], ...]  # seed -> value, per rung

    def per_rung(self) -> list[list[float]]:
        return [[v[s] for s in sorted(v)] for v in self.values]


@dataclasses.dataclass(frozen=True)
class LadderTrends:
    """What the report shows of a ladder: a fit per variant, a trend per comparison, and why any is missing."""

    fits: dict[GroupKey, Any]  # (variant, rest point) -> trend.PowerLawFit
    loss_points: dict[GroupKey, Series]
    trends: dict[GroupKey, Any]  # (variant, rest point) -> trend.GapTrend
    gap_points: dict[GroupKey, Series]
    notes: list[str]  # "<who>: why no fit / trend, or which rungs were left out"


def _who(variant: str, rest: Point) -> str:
    return variant + (" at " + ", ".join(f"{k}={v}" for k, v in rest) if rest else "")


def _series(variant: str, rest: Point, by_rung: Mapping[int, tuple[float, dict[int, float]]],
            notes: list[str], what: str) -> Series:
    """Keep the rungs with at least one value; note the others."""
    kept = {k: v for k, v in sorted(by_rung.items()) if v[1]}
    missing = sorted(set(by_rung) - set(kept))
    if missing:
        notes.append(f"{_who(variant, rest)}: rung(s) {', '.join(map(str, missing))} left out of the {what} "
                     "(no finished seed)")
    return Series(variant, rest, tuple(kept), tuple(v[0] for v in kept.values()),
                  tuple(v[1] for v in kept.values()))


def ladder_trends(ladder: Ladder, reference: str | None, losses: Mapping[GroupKey, Mapping[int, float]],
                  params: Mapping[GroupKey, float], skip: Sequence[str] = ()) -> LadderTrends:
    """Fit every variant's loss against its own N over the rungs, and each variant's gap to the reference
    (paired by seed, against the reference's N) over the rungs; ``skip``: groups to leave out (the null
    control).

    ``losses[(variant, point)]``: seed -> final loss of the finished cells; ``params``: each group's
    non-embedding parameters.
    """
    from blockyard.grid import trend  # scipy: loaded by the report, not by every grid parent that parses a spec

    notes: list[str] = []
    by_series: dict[GroupKey, dict[int, tuple[float, dict[int, float]]]] = {}
    for (variant, point), seeds in losses.items():
        k, rest = split_point(point)
        if k is None or variant in skip or (variant, point) not in params:
            continue
        by_series.setdefault((variant, rest), {})[k] = (float(params[(variant, point)]), dict(seeds))

    fits, loss_points = {}, {}
    for key, by_rung in by_series.items():
        s = _series(*key, by_rung, notes, "loss fit")
        try:
            fits[key] = trend.fit_power_law(s.n, s.per_rung())
            loss_points[key] = s
        except ValueError as e:
            notes.append(f"{_who(*key)}: no loss fit ({e})")

    trends, gap_points = {}, {}
    for (variant, rest), by_rung in by_series.items():
        ref = by_series.get((reference or "", rest))
        if variant == reference or ref is None:
            continue
        diffs = {}
        for k, (_, seeds) in by_rung.items():
            if k in ref:
                n_ref, ref_seeds = ref[k]
                diffs[k] = (n_ref, {s: seeds[s] - ref_seeds[s] for s in sorted(set(seeds) & set(ref_seeds))})
        s = _series(variant, rest, diffs, notes, "gap trend")
        try:
            trends[(variant, rest)] = trend.gap_trend(s.n, s.per_rung(), target=ladder.target)
            gap_points[(variant, rest)] = s
        except ValueError as e:
            notes.append(f"{_who(variant, rest)}: no gap trend ({e})")
    return LadderTrends(fits, loss_points, trends, gap_points, notes)


FIT_COLUMNS = ("variant", "point", "form", "E", "E_low", "E_high", "A", "A_low", "A_high", "alpha", "alpha_low",
               "alpha_high", "level", "rungs", "n_min", "n_max", "bootstrap_refits", "note")
TREND_COLUMNS = ("variant", "point", "slope_per_doubling", "slope_low", "slope_high", "trend", "target",
                 "gap_at_target", "gap_low", "gap_high", "crossover", "mean_gap_low", "mean_gap_high", "level",
                 "pairs", "rungs", "caution", "slope_df", "rung_sd")


def _point_cell(rest: Point) -> str:
    return "; ".join(f"{k}={v}" for k, v in rest)


def fit_rows(res: LadderTrends) -> list[list[Any]]:
    """fits.csv: one row per variant (and point of the other axes)."""
    return [[v, _point_cell(rest), f.form, f.E, f.E_low, f.E_high, f.A, f.A_low, f.A_high, f.alpha, f.alpha_low,
             f.alpha_high, f.level, f.n_rungs, f.n_min, f.n_max, f.n_boot, f.note]
            for (v, rest), f in res.fits.items()]


def trend_rows(res: LadderTrends) -> list[list[Any]]:
    """trend.csv: one row per comparison; the gap is variant minus reference (nats/token)."""
    return [[v, _point_cell(rest), t.slope, t.slope_low, t.slope_high, t.trend, t.target, t.gap_at_target,
             t.gap_low, t.gap_high, t.crossover, t.mean_low, t.mean_high, t.level, t.n_points, len(t.rung_n),
             t.caution, t.slope_df, t.rung_sd]
            for (v, rest), t in res.trends.items()]


def series_label(key: GroupKey) -> str:
    return _who(*key)
