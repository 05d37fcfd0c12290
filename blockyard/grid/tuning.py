"""Each variant at its own tuned value: the grid's ``tune`` block, and how a value is chosen.

A grid file may hold::

    tune:
      key: train.lr                               # any numeric config key
      values: [1.0e-3, 2.0e-3, 4.0e-3, 8.0e-3]    # or {low: 5.0e-4, high: 8.0e-3, count: 5} (log-spaced)
      seeds: [100, 101, 102]                      # tuning seeds, disjoint from the grid's seeds (default: 3 of them)
      budget: 1.0                                 # tuning cells' token budget / the verdict cells' (0 < b <= 1)
      rungs: all                                  # with a ladder: all (each rung tuned on its own) or first

Stage 1 trains every (variant, point, value, tuning seed) under ``GRID_DIR/tuning/`` (a grid dir of
its own: index, cells, configs, logs); a tuning cell's point is the verdict point with the tuned
key appended. For each (variant, point) the chosen value is the one with the lowest mean final
validation loss over the tuning seeds among the values whose next larger value never diverged (a one-step
stability margin; see ``eligible``), a diverged or failed cell counting as +infinity; ties go
to the smallest value (for a learning rate, the more stable one). Stage 2 trains the verdict
cells, each variant at its chosen value; the verdict rules apply to them unchanged. The seeds are
disjoint so that the verdict is not measured on the noise the selection used (the winner's curse:
the chosen value's tuning loss is biased low).

This module is the block's schema and the pure rules on cell records (no I/O, no statistics
libraries: the grid's parent process imports it). A *point* is whatever the grid expands its
groups over (a ladder rung, then axis values): ``Tuning.tuned_point`` maps a verdict point to the
point whose tuning gives it its value.

``rungs: first`` (grids with a ``ladder`` only) tunes on rung 1 alone and carries each variant's
chosen value up the ladder: the verdict cell at ("rung", k) and any axis point trains at the value
chosen at ("rung", 1) and the same axis point. Stage 1 then holds rung-1 cells only, so tuning
costs what the smallest model costs. This is what a learning rate under ``model.parametrization:
mup`` is for (Yang et al. 2022, arXiv:2203.03466: tuned at a small width, it transfers to larger
ones); under the standard parametrization the best learning rate drifts with width, and the
report says so. ``rungs: all`` (the default) tunes every rung on its own.
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Iterable
from typing import Any

from blockyard.config import Config
from blockyard.errors import ConfigError
from blockyard.grid.index import CellRow
from blockyard.grid.ladder import RUNG
from blockyard.schema import to_dict
from blockyard.text import is_finite_number

TUNE_KEYS = ("key", "values", "seeds", "budget", "rungs")
# tune.rungs: which rungs of a ladder stage 1 tunes (the others take rung 1's value under "first").
RUNGS_ALL, RUNGS_FIRST = "all", "first"
TUNE_RUNGS = (RUNGS_ALL, RUNGS_FIRST)
RANGE_KEYS = ("low", "high", "count")
DEFAULT_TUNING_SEEDS = 3  # tune.seeds left out: this many seeds, from TUNING_SEED_START up
TUNING_SEED_START = 100
# Stage 1's grid dir, inside the grid dir.
TUNING_DIR = "tuning"
# Keys a tuning may not search: they set the budget, which ``tune.budget`` scales.
_BUDGET_KEYS = ("train.steps", "train.tokens")

Point = tuple[tuple[str, Any], ...]
GroupKey = tuple[str, Point]


@dataclasses.dataclass(frozen=True)
class Tuning:
    """A parsed ``tune`` block: the key searched, its values (ascending), the tuning seeds, budget and rungs."""

    key: str
    values: tuple[float, ...]
    seeds: tuple[int, ...]
    budget: float = 1.0
    rungs: str = RUNGS_ALL  # RUNGS_FIRST: tune on rung 1 only and carry each variant's value up the ladder

    def to_json(self) -> str:
        return json.dumps(dataclasses.asdict(self), sort_keys=True)

    @classmethod
    def from_json(cls, text: str | None) -> Tuning | None:
        """The recorded block; None for a grid without one (or one recorded before tuning existed).
        A block recorded before ``rungs`` existed tuned every rung: ``all``."""
        if not text:
            return None
        data = json.loads(text)
        return cls(data["key"], tuple(data["values"]), tuple(data["seeds"]), float(data["budget"]),
                   str(data.get("rungs", RUNGS_ALL)))

    @property
    def carried(self) -> bool:
        """Rung 1's chosen values are carried up the ladder (``rungs: first``)."""
        return self.rungs == RUNGS_FIRST

    def budget_overrides(self, cfg: Config) -> dict[str, int]:
        """Overrides that give a tuning cell ``budget`` x the verdict cell's budget (``cfg``: the verdict cell's)."""
        if self.budget == 1.0:
            return {}
        per_step = cfg.train.batch_size * cfg.train.grad_accum * cfg.data.seq_len
        if cfg.train.tokens > 0:
            out = {"train.tokens": max(1, round(self.budget * cfg.train.tokens))}
            steps = math.ceil(out["train.tokens"] / per_step)
        else:
            out = {"train.steps": max(1, round(self.budget * cfg.train.steps))}
            steps = out["train.steps"]
        if steps <= cfg.train.warmup_steps:
            # A run that ends inside its warmup never trains at the value being tuned.
            raise ConfigError("tune.budget", f"{self.budget:g} gives the tuning cells {steps} steps, not more than "
                              f"train.warmup_steps ({cfg.train.warmup_steps}); raise it (at most 1)")
        return out

    def tuned_point(self, point: Point) -> Point:
        """The point whose tuning gives ``point`` its value: itself, or under ``rungs: first`` the same point
        at rung 1 (the rest of the point, other axes, unchanged)."""
        if not self.carried:
            return point
        return tuple((RUNG, 1) if key == RUNG else (key, v) for key, v in point)

    def tuned_points(self, points: Iterable[Point]) -> list[Point]:
        """The points stage 1 tunes: every point some verdict point takes its value from."""
        return list(dict.fromkeys(self.tuned_point(p) for p in points))


def is_learning_rate(key: str) -> bool:
    last = key.split(".")[-1]
    return last == "lr" or last.endswith("_lr")


# ----------------------------------------------------------------------------- reading


def parse_tuning(raw: Any, *, seeds: tuple[int, ...], reserved: tuple[str, ...], matched_key: str | None,
                 set_by: dict[str, str], has_ladder: bool = False) -> Tuning | None:
    """Validate a ``tune`` block's shape. ``set_by``: dotted key -> where the grid sets it (variants, axes),
    keys a tuning may not search; ``matched_key``: the key ``match:`` adjusts; ``has_ladder``: the grid has a
    ``ladder`` (``rungs: first`` needs one). The key's type and each value are checked against the configs
    by ``check_tuned_key`` and the grid's piece validation."""
    if raw is None:
        return None
    if not isinstance(raw, dict):
        raise ConfigError("tune", "expected a mapping: {key: train.lr, values: [...], seeds: [...], budget: 1.0}")
    unknown = sorted(str(k) for k in set(raw) - set(TUNE_KEYS))
    if unknown:
        raise ConfigError(f"tune.{unknown[0]}", f"unknown key (allowed: {', '.join(TUNE_KEYS)})")
    key = _parse_key(raw.get("key"), reserved, matched_key, set_by)
    return Tuning(key, _parse_values(raw.get("values"), key), _parse_seeds(raw.get("seeds"), seeds),
                  _parse_budget(raw.get("budget", 1.0)), _parse_rungs(raw.get("rungs", RUNGS_ALL), has_ladder))


def _parse_key(key: Any, reserved: tuple[str, ...], matched_key: str | None, set_by: dict[str, str]) -> str:
    if not isinstance(key, str) or not key or any(not part for part in key.split(".")):
        raise ConfigError("tune.key", f"{key!r}: a dotted numeric config key, e.g. train.lr")
    if key in reserved or key in _BUDGET_KEYS:
        raise ConfigError("tune.key", f"{key} cannot be tuned (seeds and the cell name come from the grid; "
                          "tune.budget scales the budget); tune a numeric config key such as train.lr")
    if key == matched_key:
        raise ConfigError("tune.key", f"{key} is the key `match:` adjusts (matching happens before tuning); "
                          "tune another key")
    if key in set_by:
        raise ConfigError("tune.key", f"{key} is also set by {set_by[key]}; the tuning chooses each variant's value")
    return key


def _parse_values(raw: Any, key: str) -> tuple[float, ...]:
    allowed = ("at least 2 distinct numbers, e.g. [1.0e-3, 2.0e-3, 4.0e-3], or {low: 5.0e-4, high: 8.0e-3, "
               "count: 5} (log-spaced)")
    if isinstance(raw, dict):
        values = _log_range(raw)
    elif isinstance(raw, list):
        values = raw
    else:
        raise ConfigError("tune.values", f"{raw!r}: {allowed}")
    if len(values) < 2 or any(not is_finite_number(v) for v in values):
        raise ConfigError("tune.values", f"{values!r}: {allowed}")
    if len(set(values)) != len(values):
        raise ConfigError("tune.values", f"lists a value twice; {allowed}")
    if is_learning_rate(key) and min(values) <= 0:
        raise ConfigError("tune.values", f"{min(values)!r}: learning rates must be > 0")
    return tuple(sorted(values))


def _log_range(raw: dict[str, Any]) -> list[float]:
    unknown = sorted(str(k) for k in set(raw) - set(RANGE_KEYS))
    if unknown:
        raise ConfigError(f"tune.values.{unknown[0]}", f"unknown key (allowed: {', '.join(RANGE_KEYS)})")
    low, high, count = raw.get("low"), raw.get("high"), raw.get("count")
    if not is_finite_number(low) or low <= 0:
        raise ConfigError("tune.values.low", f"{low!r}: a number > 0 (the values are log-spaced)")
    if not is_finite_number(high) or high <= low:
        raise ConfigError("tune.values.high", f"{high!r}: a number > tune.values.low ({low})")
    if not isinstance(count, int) or isinstance(count, bool) or count < 2:
        raise ConfigError("tune.values.count", f"{count!r}: an integer >= 2")
    # Three significant digits: readable cell ids, and the ends land exactly on low and high.
    return [float(f"{low * (high / low) ** (i / (count - 1)):.3g}") for i in range(count)]


def default_tuning_seeds(verdict_seeds: tuple[int, ...]) -> tuple[int, ...]:
    """``tune.seeds`` left out: the first ``DEFAULT_TUNING_SEEDS`` integers from 100 up that are not verdict seeds.
    Three, not one: a value that survives one seed says little about the cliff above it (issue 26)."""
    taken, s = set(verdict_seeds), TUNING_SEED_START
    out: list[int] = []
    while len(out) < DEFAULT_TUNING_SEEDS:
        if s not in taken:
            out.append(s)
        s += 1
    return tuple(out)


def _parse_seeds(raw: Any, verdict_seeds: tuple[int, ...]) -> tuple[int, ...]:
    allowed = "a list of distinct non-negative integers not among the grid's seeds, e.g. [100, 101, 102]"
    if raw is None:
        return default_tuning_seeds(verdict_seeds)
    if not isinstance(raw, list) or not raw:
        raise ConfigError("tune.seeds", f"{raw!r}: {allowed}")
    for s in raw:
        if not isinstance(s, int) or isinstance(s, bool) or s < 0:
            raise ConfigError("tune.seeds", f"{s!r}: {allowed}")
    if len(set(raw)) != len(raw):
        raise ConfigError("tune.seeds", f"lists a seed twice; {allowed}")
    shared = sorted(set(raw) & set(verdict_seeds))
    if shared:
        raise ConfigError("tune.seeds", f"{', '.join(map(str, shared))} also among the grid's seeds: tuning and "
                          "verdict seeds must be disjoint (a verdict measured on the noise the selection used is "
                          "biased towards the tuned variant)")
    return tuple(raw)


def _parse_budget(raw: Any) -> float:
    if not is_finite_number(raw) or not 0 < raw <= 1:
        raise ConfigError("tune.budget", f"{raw!r}: a number in (0, 1], the tuning cells' token budget as a "
                          "fraction of the verdict cells'")
    return float(raw)


def _parse_rungs(raw: Any, has_ladder: bool) -> str:
    allowed = (f"{RUNGS_ALL} (each rung of the ladder tuned on its own; the default) or {RUNGS_FIRST} (tuned on "
               "rung 1 only, each variant's chosen value carried up the ladder)")
    if raw not in TUNE_RUNGS:
        raise ConfigError("tune.rungs", f"{raw!r}: {allowed}")
    if raw == RUNGS_FIRST and not has_ladder:
        raise ConfigError("tune.rungs", f"{RUNGS_FIRST} needs a ladder (grid key `ladder`: rungs of model size); "
                          f"without one use {RUNGS_ALL} or leave the key out")
    return str(raw)


def check_tuned_key(tuning: Tuning, configs: dict[str, Config]) -> None:
    """The tuned key must hold a number in every variant's config (``configs``: variant name -> config)."""
    for name, cfg in configs.items():
        node: Any = to_dict(cfg)
        for part in tuning.key.split("."):
            if not isinstance(node, dict) or part not in node:
                raise ConfigError("tune.key", f"{tuning.key} is not a config key (of variant {name}); tune a numeric "
                                  "config key such as train.lr")
            node = node[part]
        if not is_finite_number(node):
            raise ConfigError("tune.key", f"{tuning.key} is {node!r} in variant {name}, not a number; tune a numeric "
                              "config key such as train.lr")


# ----------------------------------------------------------------------------- the selection rule


def mean_score(scores: list[float]) -> float:
    """The mean over tuning seeds; +inf when any seed diverged or failed (or none ran)."""
    if not scores or any(not math.isfinite(s) for s in scores):
        return math.inf
    return math.fsum(scores) / len(scores)


def eligible(scores: dict[float, list[float]]) -> list[float]:
    """Values with a one-step stability margin: finite mean, and the next larger value searched did not diverge
    (or fail) on any tuning seed. The largest value has no larger neighbour to vouch for it: never eligible."""
    values = sorted(scores)
    return [v for v, up in zip(values, values[1:], strict=False)
            if math.isfinite(mean_score(scores[v])) and math.isfinite(mean_score(scores[up]))]


def choose(scores: dict[float, list[float]]) -> float:
    """The eligible value (``eligible``: its next larger value survived every tuning seed) with the lowest mean
    score over the tuning seeds; ties go to the smallest. With no eligible value, the smallest value searched
    (the report tells the user to search lower).

    Why the margin: "lowest mean, diverged = +inf" picks the largest value that happened to survive the few
    tuning seeds, which on a sharp stability cliff then diverges on the verdict seeds (issue 26); a value one
    step below a value that survived every tuning seed keeps a step of room. Common practice for learning
    rates (back off from the largest stable rate), no single source.
    """
    if not scores:
        raise ValueError("no values to choose from")
    candidates = eligible(scores)
    if not candidates:
        return min(scores)
    means = {v: mean_score(scores[v]) for v in candidates}
    return min(candidates, key=lambda v: means[v])  # candidates ascend: min keeps the smallest of equal means


def basin(means: dict[float, float], chosen: float, width: float) -> tuple[float, float]:
    """The run of searched values around ``chosen`` whose mean is within ``width`` of the chosen one's."""
    values = sorted(means)
    lo = hi = values.index(chosen)
    limit = means[chosen] + width
    while lo > 0 and means[values[lo - 1]] <= limit:
        lo -= 1
    while hi < len(values) - 1 and means[values[hi + 1]] <= limit:
        hi += 1
    return values[lo], values[hi]


@dataclasses.dataclass(frozen=True)
class TunedGroup:
    """One (variant, point)'s stage-1 outcome."""

    variant: str
    point: Point  # the verdict point (without the tuned key)
    scores: dict[float, dict[int, float]]  # value -> seed -> final val loss (+inf: diverged or failed)
    chosen: float
    basin: tuple[float, float]

    @property
    def key(self) -> GroupKey:
        return (self.variant, self.point)

    @property
    def means(self) -> dict[float, float]:
        return {v: mean_score(list(s.values())) for v, s in sorted(self.scores.items())}

    @property
    def at_edge(self) -> bool:
        """The chosen value is the smallest searched, or the best mean is at the largest (never eligible): the
        optimum may lie outside the values searched."""
        return self.chosen == min(self.scores) or self.best_at_largest

    @property
    def best_at_largest(self) -> bool:
        """The largest value searched had the lowest finite mean: the search should go higher."""
        means = self.means
        finite = [v for v, m in means.items() if math.isfinite(m)]
        return bool(finite) and min(finite, key=lambda v: means[v]) == max(self.scores)

    @property
    def no_margin(self) -> bool:
        """No value had a stable larger neighbour, so the smallest was taken by default."""
        return not eligible({v: list(s.values()) for v, s in self.scores.items()})

    @property
    def all_failed(self) -> bool:
        return all(math.isinf(m) for m in self.means.values())


def _score(row: CellRow) -> float | None:
    """A tuning cell's score: its final loss; +inf when diverged or failed; None while it may still train."""
    loss = row.get("final_val_loss")
    if row["status"] == "done":
        return float(loss) if is_finite_number(loss) else math.inf
    if row["status"] in ("diverged", "failed"):
        return math.inf
    return None


def split_point(row: CellRow, key: str) -> tuple[Point, float]:
    """A tuning cell's (verdict point, tuned value): its point is the verdict point with the tuned key appended."""
    point = tuple(tuple(p) for p in row["point"])
    if not point or point[-1][0] != key:
        raise ValueError(f"tuning cell {row['id']} has no {key} in its point")
    return point[:-1], point[-1][1]


def tuned_groups(rows: Iterable[CellRow], tuning: Tuning, smallest_effect: float) -> list[TunedGroup] | None:
    """Every tuned (variant, point) with its chosen value and basin, in row order; None while a cell may still train."""
    parts: dict[GroupKey, dict[float, dict[int, float]]] = {}
    for r in rows:
        point, value = split_point(r, tuning.key)
        score = _score(r)
        if score is None:
            return None
        parts.setdefault((r["variant"], point), {}).setdefault(value, {})[r["seed"]] = score
    out = []
    for (variant, point), scores in parts.items():
        chosen = choose({v: list(s.values()) for v, s in scores.items()})
        means = {v: mean_score(list(s.values())) for v, s in scores.items()}
        out.append(TunedGroup(variant, point, scores, chosen, basin(means, chosen, smallest_effect)))
    return out


def chosen_values(groups: Iterable[TunedGroup]) -> dict[GroupKey, float]:
    return {g.key: g.chosen for g in groups}


def value_for(tuning: Tuning, chosen: dict[GroupKey, float], variant: str, point: Point) -> float:
    """The value a verdict cell of ``variant`` at ``point`` trains at."""
    return chosen[(variant, tuning.tuned_point(point))]


@dataclasses.dataclass(frozen=True)
class SharedValue:
    """Exploratory: a variant against the reference at one searched value, paired by tuning seed."""

    variant: str
    point: Point
    value: float
    seeds: tuple[int, ...]  # tuning seeds both finished with a finite loss
    diffs: tuple[float, ...]  # variant - reference per seed


def shared_value_differences(groups: list[TunedGroup], reference: str) -> list[SharedValue]:
    """For every non-reference group, the paired difference to the reference at each value both searched."""
    refs = {g.point: g for g in groups if g.variant == reference}
    out = []
    for g in groups:
        ref = refs.get(g.point)
        if g.variant == reference or ref is None:
            continue
        for value in sorted(set(g.scores) & set(ref.scores)):
            a, b = g.scores[value], ref.scores[value]
            seeds = tuple(s for s in sorted(set(a) & set(b)) if math.isfinite(a[s]) and math.isfinite(b[s]))
            out.append(SharedValue(g.variant, g.point, value, seeds, tuple(a[s] - b[s] for s in seeds)))
    return out
