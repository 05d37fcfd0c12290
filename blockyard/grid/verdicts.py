"""From cell outcomes to verdicts: the comparisons of a grid, their family, divergence, fragility, planning.

A *group* is one variant at one axis point (``GroupKey = (variant, point)``); a *comparison* is a
non-reference group against the reference group at the same point, paired by seed. The grid's
comparisons form one family whose intervals hold jointly at ``stats.LEVEL`` (see
``blockyard.grid.stats``); the null control (``spec.NULL_VARIANT``) is compared the same way at
the same per-comparison level but kept out of the family: it measures the design's noise floor.

Divergence is an outcome: where the two groups of a comparison diverged on different seeds, the
verdict comes from the worst-rank composite (``DivergenceTest``), never from the seeds one group
lost. A decided verdict that changes when any single seed is left out is marked ``fragile``.

Pure functions over cell records (``CellOutcome``: ``variant, point, seed, status, final_val_loss``):
no I/O, so the report, the round planner (``blockyard.grid.rounds``) and later stages (tuning,
size ladders: anything that yields groups keyed by variant and point) share them.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Mapping
from typing import Any, TypedDict

from blockyard.grid import stats
from blockyard.grid.spec import NULL_VARIANT, Design
from blockyard.text import is_finite_number, percent_text, value_text

Point = tuple[tuple[str, Any], ...]
GroupKey = tuple[str, Point]


def point_text(point: Point) -> str:
    """``model.width=64, model.depth=3``; ``-`` without axes."""
    return ", ".join(f"{k}={value_text(v)}" for k, v in point) or "-"


@dataclasses.dataclass(frozen=True)
class GroupOutcomes:
    """What the cells of one group ended as, by seed."""

    variant: str
    point: Point
    losses: dict[int, float]  # done, with a finite final validation loss
    diverged: tuple[int, ...]  # diverged (or done with a non-finite loss)
    failed: tuple[int, ...]  # failed: the trainer stopped on an error (a rerun retries them)
    unfinished: tuple[int, ...]  # pending, running or interrupted

    @property
    def key(self) -> GroupKey:
        return (self.variant, self.point)

    @property
    def finished(self) -> set[int]:
        """Seeds whose cell ended for good (done or diverged)."""
        return set(self.losses) | set(self.diverged)


class CellOutcome(TypedDict):
    """What the verdicts read of a cell's record: the index's ``CellRow`` is one, and so is a simulated cell."""

    variant: str
    point: list[tuple[str, Any]]
    seed: int
    status: str  # done, diverged, failed; anything else is unfinished
    final_val_loss: float | None


def group_outcomes(rows: Iterable[CellOutcome]) -> dict[GroupKey, GroupOutcomes]:
    """Cell records grouped by (variant, point), in the order the rows list them."""
    parts: dict[GroupKey, dict[str, Any]] = {}
    for r in rows:
        key = (r["variant"], tuple(tuple(p) for p in r["point"]))
        g = parts.setdefault(key, {"losses": {}, "diverged": [], "failed": [], "unfinished": []})
        status, loss = r["status"], r.get("final_val_loss")
        if status == "done" and is_finite_number(loss):
            g["losses"][r["seed"]] = float(loss)
        elif status in ("done", "diverged"):
            g["diverged"].append(r["seed"])
        elif status == "failed":
            g["failed"].append(r["seed"])
        else:
            g["unfinished"].append(r["seed"])
    return {k: GroupOutcomes(k[0], k[1], v["losses"], tuple(v["diverged"]), tuple(v["failed"]),
                             tuple(v["unfinished"])) for k, v in parts.items()}


def restrict(groups: dict[GroupKey, GroupOutcomes],
             seeds: Mapping[GroupKey, Iterable[int]]) -> dict[GroupKey, GroupOutcomes]:
    """Each group's outcomes on the given seeds only (a look of the sequential design sees so much)."""
    out = {}
    for key, g in groups.items():
        keep = set(seeds.get(key, ()))
        out[key] = GroupOutcomes(g.variant, g.point, {s: v for s, v in g.losses.items() if s in keep},
                                 tuple(s for s in g.diverged if s in keep), tuple(s for s in g.failed if s in keep),
                                 tuple(s for s in g.unfinished if s in keep))
    return out


# ----------------------------------------------------------------------------- comparisons


@dataclasses.dataclass(frozen=True)
class Planning:
    """What would decide a comparison at the smallest effect, at the level its verdicts use (the look's)."""

    sd_upper: float | None  # upper confidence bound of the paired sd (stats.SD_BOUND_CONFIDENCE)
    seeds_for_difference: int | None  # pairs to call better/worse at 80% power if |true difference| >= delta
    seeds_for_equivalence: int | None  # pairs to call equivalent at 80% power if the truth is 0
    detectable: float | None  # smallest true difference found with 80% power at the pairs run

    @property
    def seeds_needed(self) -> int | None:
        """Pairs that decide either way (the larger of the two); None past stats.MAX_SEEDS or unknown."""
        if self.seeds_for_difference is None or self.seeds_for_equivalence is None:
            return None
        return max(self.seeds_for_difference, self.seeds_for_equivalence)


@dataclasses.dataclass(frozen=True)
class DivergenceTest:
    """The comparison on the worst-rank composite, used when the two groups diverged on different seeds.

    Every seed both groups finished (done or diverged) is a pair; a diverged cell ranks worse than every
    finished loss (Lachin 1999), so a pair where only the variant diverged is a difference of +inf, one
    where only the reference did -inf, and one where both did carries no information (left out). No loss
    is imputed: the signed-rank test needs only the order.
    """

    pairs: int  # informative pairs (seeds both finished, not both diverged)
    variant_only: int  # pairs where only the variant diverged
    reference_only: int  # pairs where only the reference diverged
    both: int  # pairs where both diverged (left out)
    rank: stats.SignedRank
    reachable: bool  # some sign pattern of these pairs reaches the look's level
    mcnemar_p: float  # exact test of the divergence counts alone (two-sided)
    verdict: str


@dataclasses.dataclass(frozen=True)
class Comparison:
    """A group against the reference at the same axis point, paired by seed."""

    variant: str
    reference: str
    point: Point
    in_family: bool  # False for the null control
    smallest_effect: float
    seeds: tuple[int, ...]  # seeds both groups finished (done, finite loss)
    diffs: tuple[float, ...]  # variant - reference per seed (nats per token)
    interval: stats.Interval | None  # at the family's per-comparison level (simultaneous)
    unadjusted: stats.Interval | None  # plain 95% t interval
    verdict: str
    note: str
    planning: Planning | None
    variant_outcomes: GroupOutcomes
    reference_outcomes: GroupOutcomes
    divergence: DivergenceTest | None  # set when the groups diverged on different paired seeds: it gives the verdict
    fragile: bool = False  # decided, and dropping some one seed changes the verdict (leave-one-seed-out)

    @property
    def key(self) -> GroupKey:
        return (self.variant, self.point)

    @property
    def point_text(self) -> str:
        return point_text(self.point)

    @property
    def mean_diff(self) -> float | None:
        return self.interval.mean if self.interval else None

    @property
    def decided(self) -> bool:
        return self.verdict in (stats.BETTER, stats.WORSE, stats.EQUIVALENT)

    @property
    def divergence_differs(self) -> bool:
        """The groups diverged on different seeds among those both finished."""
        return self.divergence is not None


@dataclasses.dataclass(frozen=True)
class Family:
    """Every comparison of a grid under one design."""

    design: Design
    size: int  # m: comparisons sharing the family's error budget
    comparison_alpha: float  # two-sided level of one comparison over the whole design ((1 - LEVEL) / m)
    look_alpha: float  # two-sided nominal level of one comparison at one look (= comparison_alpha with one look)
    comparisons: list[Comparison]  # the family, in plan order
    null: list[Comparison]  # null-control comparisons (outside the family)

    @property
    def undecided(self) -> list[Comparison]:
        return [c for c in self.comparisons if not c.decided]


def family_size(keys: Iterable[GroupKey], reference: str | None) -> int:
    """m: the non-reference, non-null groups that have a reference group at their point."""
    keys = list(keys)
    ref_points = {p for v, p in keys if v == reference}
    return sum(1 for v, p in keys if v not in (reference, NULL_VARIANT) and p in ref_points)


def look_alpha(design: Design, m: int) -> float:
    """Nominal two-sided level of each look of one comparison (Bonferroni over m, then the looks)."""
    alpha = stats.comparison_alpha(max(1, m))
    if design.schedule is None:
        return alpha
    return stats.sequential_alpha(design.schedule.looks(), alpha)


def compare_all(groups: dict[GroupKey, GroupOutcomes], reference: str | None, design: Design,
                with_planning: bool = True) -> Family:
    """Every group against the reference at its point, at the design's levels (``with_planning``: seeds
    needed and the leave-one-seed-out check too, which the round planner and simulations do not need)."""
    m = family_size(groups, reference)
    a_look = look_alpha(design, m)
    refs = {g.point: g for g in groups.values() if g.variant == reference}
    family: list[Comparison] = []
    null: list[Comparison] = []
    for g in groups.values():
        if g.variant == reference or g.point not in refs:
            continue
        c = compare(g, refs[g.point], design.smallest_effect, a_look, in_family=g.variant != NULL_VARIANT,
                    with_planning=with_planning)
        (family if c.in_family else null).append(c)
    return Family(design, m, stats.comparison_alpha(max(1, m)), a_look, family, null)


@dataclasses.dataclass(frozen=True)
class _Decision:
    seeds: list[int]
    diffs: list[float]
    interval: stats.Interval | None
    verdict: str
    note: str
    divergence: DivergenceTest | None


def _decision(group: GroupOutcomes, ref: GroupOutcomes, keep: set[int], smallest_effect: float,
              alpha_look: float) -> _Decision:
    """The verdict on the seeds in ``keep``: the t interval on pairs both finished with a loss, unless the
    groups diverged on different seeds; then the worst-rank composite decides (``DivergenceTest``)."""
    losses_g = {s: v for s, v in group.losses.items() if s in keep}
    losses_r = {s: v for s, v in ref.losses.items() if s in keep}
    seeds, diffs = stats.paired_differences(losses_g, losses_r)
    interval = None
    verdict, note = stats.UNDECIDED, "no finished pairs" if not seeds else stats.NO_INTERVAL
    if seeds:
        interval = stats.mean_interval(diffs, 1 - alpha_look)
        verdict, note = stats.decide(interval, smallest_effect)
    divergence = _divergence_test(group, ref, keep, alpha_look)
    if divergence is not None:
        verdict, note = divergence.verdict, _divergence_note(divergence, alpha_look)
    return _Decision(seeds, diffs, interval, verdict, note, divergence)


def _divergence_test(group: GroupOutcomes, ref: GroupOutcomes, keep: set[int],
                     alpha_look: float) -> DivergenceTest | None:
    """The worst-rank composite on the seeds both finished, when their divergences differ there; else None."""
    paired = sorted(group.finished & ref.finished & keep)
    dg, dr = set(group.diverged), set(ref.diverged)
    if all((s in dg) == (s in dr) for s in paired):
        return None
    composite = []
    for s in paired:
        if s in dg and s in dr:
            continue
        composite.append(math.inf if s in dg else -math.inf if s in dr else group.losses[s] - ref.losses[s])
    verdict, rank = stats.decide_composite(composite, alpha_look)
    variant_only = sum(1 for s in paired if s in dg and s not in dr)
    reference_only = sum(1 for s in paired if s in dr and s not in dg)
    return DivergenceTest(len(composite), variant_only, reference_only, sum(1 for s in paired if s in dg and s in dr),
                          rank, rank.smallest_p <= alpha_look / 2, stats.mcnemar_exact(variant_only, reference_only),
                          verdict)


def _divergence_note(d: DivergenceTest, alpha_look: float) -> str:
    counts = (f"diverged on {d.variant_only} / {d.reference_only} of {d.pairs} pair(s) (variant only / reference "
              f"only), McNemar exact p = {d.mcnemar_p:.3g}")
    if not d.reachable:
        return (f"{stats.DIVERGENCE_DIFFERS}: {counts}; no rank test on {d.pairs} pair(s) can reach "
                f"{percent_text(alpha_look)}")
    p = min(d.rank.p_less, d.rank.p_greater)
    rule = "by the worst-rank composite" if d.verdict != stats.UNDECIDED else stats.DIVERGENCE_DIFFERS
    return f"{rule}: {counts}; signed-rank one-sided p = {p:.3g}"


def compare(group: GroupOutcomes, ref: GroupOutcomes, smallest_effect: float, alpha_look: float,
            in_family: bool = True, with_planning: bool = True) -> Comparison:
    """One comparison at the look's two-sided level ``alpha_look``: paired differences on common seeds, their
    intervals, the verdict (the worst-rank composite's where divergences differ), planning at the same level
    and the leave-one-seed-out check (``with_planning``)."""
    everything = group.finished | ref.finished | set(group.losses) | set(ref.losses)
    d = _decision(group, ref, everything, smallest_effect, alpha_look)
    unadjusted = stats.mean_interval(d.diffs, stats.LEVEL) if d.seeds else None
    # The t test's planning does not apply to the composite (its note says how many pairs a rank test needs).
    planning = (plan(d.interval, smallest_effect, alpha_look) if with_planning and d.interval and d.divergence is None
                else None)
    fragile = False
    if with_planning and d.verdict in (stats.BETTER, stats.WORSE, stats.EQUIVALENT):
        fragile = any(_decision(group, ref, everything - {s}, smallest_effect, alpha_look).verdict != d.verdict
                      for s in sorted(group.finished & ref.finished))
    return Comparison(group.variant, ref.variant, group.point, in_family, smallest_effect, tuple(d.seeds),
                      tuple(d.diffs), d.interval, unadjusted, d.verdict, d.note, planning, group, ref, d.divergence,
                      fragile)


def plan(interval: stats.Interval, smallest_effect: float, alpha: float) -> Planning | None:
    """Seeds needed and detectable difference at the level the verdicts use (``alpha``: the look's two-sided
    level), from the sd's upper bound (never from the observed difference)."""
    if interval.sd is None:
        return None
    upper = stats.sd_upper_bound(interval.sd, interval.n)
    return Planning(upper, stats.seeds_for_difference(smallest_effect, upper, alpha),
                    stats.seeds_for_equivalence(smallest_effect, upper, alpha),
                    stats.detectable_difference(interval.n, upper, alpha))


def common_seed_means(groups: dict[GroupKey, GroupOutcomes]) -> dict[GroupKey, tuple[int, stats.Interval | None]]:
    """Per group: (pairs, mean interval) over the seeds every group at its point finished.

    The variants table uses these, so the gap between two rows is the mean paired difference on
    the same seeds, never an artefact of one group losing its worst seeds to divergence.
    """
    by_point: dict[Point, list[GroupOutcomes]] = {}
    for g in groups.values():
        by_point.setdefault(g.point, []).append(g)
    out = {}
    for members in by_point.values():
        common = set.intersection(*(set(g.losses) for g in members))
        for g in members:
            values = [g.losses[s] for s in sorted(common)]
            out[g.key] = (len(values), stats.mean_interval(values) if values else None)
    return out
