"""Plan a grid's budget before spending it: what its worst case can decide, and ``seeds: {most: auto}``.

Pure functions over numbers (the dry run (``blockyard.grid.dryrun``) measures the times and reads
the noise, ``blockyard.grid.noise_files``):

- The paired sd of a comparison comes from an earlier grid of similar models (``--noise-from``;
  pooled over its comparisons' final evaluations) or, failing that, is the assumption
  ``ASSUMED_PAIRED_SD``.
- What a design can decide at n pairs, at the level its verdicts use at the last look
  (``verdicts.look_alpha``): a true difference of ±d is found with 80% power (Cohen 1988, ch. 2,
  the paired t test's power), and equivalence inside ±d is shown with 80% power when the truth is
  0 (``stats.seeds_for_equivalence``). The design decides a smallest effect when both hold;
  the smallest such d is its *decidable effect*.
- ``most: auto``: the largest ``first + k * step`` whose worst case (every round to the last)
  fits in ``budget_hours`` on these workers, from the dry run's measured time per cell. The
  sequential level is then planned for those looks, as for a written ``most``.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable

from blockyard.errors import UserError
from blockyard.grid import stats
from blockyard.grid.spec import Design, GridSpec, SeedSchedule
from blockyard.grid.verdicts import look_alpha

# Paired sd (nats/token) of the default grid's comparisons at their final evaluation at the trainer's default
# learning rate (3e-3), pooled over its two comparisons, 8 seeds each, weights drawn by path (scripts/noise_levers.py,
# README "What cuts the noise"). The larger of the measured values, so a plan made with it errs towards more seeds:
# the default grid itself trains at 1.5e-3, where the measured sds are 0.0097 and 0.0135.
ASSUMED_PAIRED_SD = 0.030
ASSUMED_SOURCE = ("the default grid's models' paired sd at their final evaluation at the trainer's learning rate "
                  "3e-3 (configs/grids/default.yaml, 8 seeds, scripts/noise_levers.py; 0.010-0.014 at its 1.5e-3)")
# The sequential level is simulated over (simulations x looks) numbers (stats.sequential_alpha): a cap on the
# rounds ``most: auto`` (and the plan's search) may use keeps that cheap. Measured here for 12 looks: 2.2 s and
# 410 MB peak (24 looks: 12 s and 710 MB).
MAX_AUTO_LOOKS = 12


@dataclasses.dataclass(frozen=True)
class NoiseEstimate:
    """The paired sd a plan assumes: measured (with its degrees of freedom and source) or assumed."""

    sd: float
    df: int | None  # None: an assumption, not a measurement
    source: str

    @property
    def measured(self) -> bool:
        return self.df is not None


def pooled_sd(sds: list[tuple[float, int]]) -> tuple[float, int]:
    """(pooled sd, degrees of freedom) of several paired sds, each (sd, pairs): sqrt(sum (n-1) sd^2 / sum (n-1))."""
    df = sum(n - 1 for _, n in sds if n >= 2)
    if df < 1:
        raise ValueError("pooling needs an sd from at least two pairs")
    return math.sqrt(sum((n - 1) * sd**2 for sd, n in sds if n >= 2) / df), df


# ----------------------------------------------------------------------------- what a design decides


def design_alpha(design: Design, m: int, most: int | None = None) -> float:
    """The two-sided level of one comparison at each look (Bonferroni over m, then the design's looks; ``most``
    replaces the schedule's)."""
    if most is not None and design.schedule is not None:
        design = dataclasses.replace(design, schedule=dataclasses.replace(design.schedule, most=most))
    return look_alpha(design, m)


def last_look(design: Design, fixed_seeds: int) -> int:
    """Pairs at the worst case's last look: ``seeds.most``, or every seed of a fixed list."""
    return design.schedule.most if design.schedule is not None else fixed_seeds


def decides(effect: float, n: int, sd: float, alpha: float) -> bool:
    """Whether n pairs at ``alpha`` find a true ±effect and show equivalence inside ±effect, each with 80% power."""
    return (stats.seeds_for_difference(effect, sd, alpha, n_max=n) is not None
            and stats.seeds_for_equivalence(effect, sd, alpha, n_max=n) is not None)


def decidable_effect(n: int, sd: float, alpha: float) -> float:
    """The smallest effect n pairs at ``alpha`` decide either way (``decides``), by bisection to 0.1%."""
    if n < 2:
        return math.inf
    low = stats.detectable_difference(n, sd, alpha) or 0.0  # a lower bound: the difference half alone
    high = max(low, sd) * 2
    while not decides(high, n, sd, alpha):
        high *= 2
    while high - low > 1e-3 * high:
        mid = (low + high) / 2
        low, high = (low, mid) if decides(mid, n, sd, alpha) else (mid, high)
    return high


def seeds_needed(effect: float, sd: float, alpha: float) -> int | None:
    """Pairs that decide ``effect`` either way at ``alpha`` (80% power each way); None past stats.MAX_SEEDS."""
    for_difference = stats.seeds_for_difference(effect, sd, alpha)
    for_equivalence = stats.seeds_for_equivalence(effect, sd, alpha)
    if for_difference is None or for_equivalence is None:
        return None
    return max(for_difference, for_equivalence)


def most_needed(design: Design, m: int, effect: float, sd: float, fixed_seeds: int) -> tuple[int | None, bool]:
    """(pairs per group whose last look decides ``effect``, whether that is exact).

    A fixed list: the seeds needed at its level. A schedule: the smallest ``first + k * step`` whose
    sequential level (planned for its own looks) decides it; past ``MAX_AUTO_LOOKS`` looks the fixed
    level's figure is returned as a lower bound (False).
    """
    fixed_alpha = stats.comparison_alpha(max(1, m), stats.LEVEL)
    lower = seeds_needed(effect, sd, fixed_alpha)
    schedule = design.schedule
    if schedule is None or lower is None:
        return lower, schedule is None
    k = max(0, math.ceil((lower - schedule.first) / schedule.step))
    while True:
        most = schedule.first + k * schedule.step
        if len(SeedSchedule(schedule.first, most, schedule.step).looks()) > MAX_AUTO_LOOKS:
            return lower, False
        if decides(effect, most, sd, design_alpha(design, m, most)):
            return most, True
        k += 1


# ----------------------------------------------------------------------------- time


def worst_case_wall(first: int, most: int, step: int, round_wall: Callable[[int], float]) -> float:
    """Wall seconds of every round to ``most``: ``round_wall(k)`` is one round that adds k seeds to every group."""
    looks = SeedSchedule(first, most, step).looks()
    return sum(round_wall(b - a) for a, b in zip((0, *looks), looks, strict=False))


def fit_most(schedule: SeedSchedule, budget_s: float, round_wall: Callable[[int], float],
             cap: int | None = None) -> int:
    """The largest ``first + k * step`` (at most ``cap`` seeds, default stats.MAX_SEEDS, and ``MAX_AUTO_LOOKS``
    rounds) whose worst case fits in ``budget_s``; a budget that round 1 alone exceeds is a user error naming what
    it needs."""
    first, step = schedule.first, schedule.step
    cap = stats.MAX_SEEDS if cap is None else min(cap, stats.MAX_SEEDS)
    need = round_wall(first)
    if need > budget_s:
        raise UserError(f"budget_hours: {budget_s / 3600:.3g} h (after any tuning stage) does not fit round 1 ({first} "
                        f"seeds per group take about {need / 3600:.3g} h here); allowed: more than {need / 3600:.3g} "
                        "plus the tuning stage, or a smaller seeds.first")
    most = first
    while most + step <= cap and len(SeedSchedule(first, most + step, step).looks()) <= MAX_AUTO_LOOKS:
        need += round_wall(step)
        if need > budget_s:
            break
        most += step
    return most


def with_most(spec: GridSpec, most: int) -> GridSpec:
    """``spec`` with its ``most: auto`` schedule resolved to ``most`` (potential seeds start .. start + most - 1)."""
    schedule = spec.design.schedule
    assert schedule is not None
    resolved = dataclasses.replace(schedule, most=most)
    design = dataclasses.replace(spec.design, schedule=resolved)
    return dataclasses.replace(spec, seeds=resolved.seed_order(), design=design)


def resolve_most(schedule: SeedSchedule, recorded: Design | None, fit: Callable[[], int]) -> tuple[int, bool]:
    """(``most`` of a ``most: auto`` schedule, whether it came from the grid dir's record).

    A grid dir that recorded this same auto schedule (first, step, budget_hours) keeps its ``most``, so a
    resumed grid replays the same rounds even on a slower machine; otherwise ``fit()`` measures it.
    """
    old = recorded.schedule if recorded is not None else None
    if (old is not None and old.auto and (old.first, old.step, old.budget_hours)
            == (schedule.first, schedule.step, schedule.budget_hours)):
        return old.most, True
    return fit(), False


# ----------------------------------------------------------------------------- the dry run's words


def _hours(seconds: float) -> str:
    from blockyard.rundir import format_duration

    return format_duration(seconds)


def plan_lines(design: Design, m: int, fixed_seeds: int, noise: NoiseEstimate,
               round_wall: Callable[[int], float]) -> list[str]:
    """The dry run's budget plan: the noise it assumes, what the worst case decides, what ``smallest_effect`` needs,
    and, when the worst case cannot decide it, one block with the options."""
    delta, sd = design.smallest_effect, noise.sd
    n = last_look(design, fixed_seeds)
    alpha = design_alpha(design, m)
    schedule = design.schedule
    lines = ["", "Budget plan (before training):"]
    if noise.measured:
        lines.append(f"  paired sd {sd:.4f} nats/token, {noise.source} ({noise.df} degrees of freedom; a point "
                     "estimate: the real sd may be larger)")
    else:
        lines.append(f"  paired sd {sd:.4f} nats/token is an ASSUMPTION: {noise.source}; pass --noise-from GRID_DIR "
                     "(an earlier grid of similar models) to plan with a measured one")
    looks = (f"{len(schedule.looks())} looks at {', '.join(map(str, schedule.looks()))} seeds" if schedule
             else "one look")
    lines.append(f"  level per comparison: {alpha:.4g} two-sided ({m} comparison(s), {looks}"
                 + (f"; most: auto from budget_hours {schedule.budget_hours:g}" if schedule and schedule.auto else "")
                 + ")")
    can = decidable_effect(n, sd, alpha)
    lines.append(f"  worst case, {n} seed(s) per group: " + (
        f"decides a smallest effect of {can:.4f} nats/token (finds a true difference of ±{can:.4f}, or shows "
        "equivalence inside it, with 80% power)" if n >= 2 else "no interval (a paired sd needs 2 pairs)"))
    needed, exact = most_needed(design, m, delta, sd, fixed_seeds)
    more = "" if needed is None else f"seeds.most: {needed}" if schedule else f"a list of {needed} seeds"
    if needed is None:
        lines.append(f"  smallest_effect {delta:g} needs more than {stats.MAX_SEEDS} seeds per group")
    else:
        first, step = (schedule.first, schedule.step) if schedule else (needed, 1)
        wall = worst_case_wall(first, max(first, needed), step, round_wall)
        bound = "" if exact else (f" or more (more than {MAX_AUTO_LOOKS} looks: the one-look figure; their "
                                  "sequential level is stricter)")
        lines.append(f"  smallest_effect {delta:g} needs {more}{bound}, {_hours(wall)} worst case here")
    if can <= delta:
        return lines
    if n < 2:
        return [*lines, "", f"CANNOT DECIDE: {n} seed per group gives no interval. Option: more seeds: "
                f"{more or 'many'}"]
    lines += ["", f"CANNOT DECIDE: at {n} seeds per group this grid decides only effects of {can:.4f} nats/token or "
                  f"more, not smallest_effect {delta:g}. Options:",
              "  - more seeds: " + (more if needed is not None else f"more than {stats.MAX_SEEDS} (not practical)"),
              f"  - longer training: only if it lowers the paired sd to about {sd * delta / can:.4f} (from {sd:.4f}); "
              "see the Noise section of an earlier grid's report for how the sd moves with tokens",
              f"  - a larger smallest effect: smallest_effect: {_round_up(can)} is what this budget decides"]
    return lines


def _round_up(x: float) -> str:
    """``x`` rounded up to two significant digits (a value to write in the grid file)."""
    digits = 1 - math.floor(math.log10(x))
    return f"{math.ceil(x * 10**digits) / 10**digits:g}"
