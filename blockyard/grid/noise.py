"""The noise of a grid's comparisons along training: pure functions over per-seed loss curves.

Every cell logs its validation loss at each evaluation, so every pair (variant and reference at
one axis point, same seed) has a curve of differences at no extra cost. At each evaluation step
this gives, over the seeds both groups finished (the pairs the verdicts use):

- the mean paired difference and the paired sd (n - 1 degrees of freedom);
- the smallest true difference those pairs find with 80% power at the level the verdicts use
  (``stats.detectable_difference``: the paired t test's power, Cohen 1988, ch. 2).

Whether longer training or more seeds buys resolution (``resolution``): over the last
evaluations, sd ~ tokens^b (least squares on logs), so doubling the tokens scales the detectable
difference by about 2^b; doubling the seeds scales it by detectable(2n) / detectable(n) (about
1/sqrt(2), more at few seeds: the t quantile shrinks too). Both double the compute, so the
smaller factor is the better buy. The trend's exponent carries a 95% interval (the least-squares
slope's t interval, k - 2 degrees of freedom over k evaluations); longer training is called the
better buy only when the whole interval beats more seeds, and more seeds only when the whole
interval loses; else, or with only 2 evaluations (no interval), the sentence says the trend
cannot tell (at 5 seeds, 4 evaluations swung the point estimate from -67% to +87% per doubling
between two runs of one design). A trend fitted over a few evaluations describes this run, not a
law (the mean difference moves with training too).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping

import numpy as np
import scipy.stats

from blockyard.grid import stats
from blockyard.grid.verdicts import Family, GroupKey, point_text

# seed -> evaluation step -> validation loss, for one group
Curves = Mapping[int, Mapping[int, float]]
TREND_EVALUATIONS = 4  # evaluations at the end of training that the sd trend is fitted over


@dataclasses.dataclass(frozen=True)
class NoisePoint:
    """One comparison at one evaluation step."""

    step: int
    tokens: float | None  # training tokens at that step (None when the cells do not say)
    pairs: int
    mean_diff: float
    sd: float | None  # paired sd, n - 1 degrees of freedom (None below 2 pairs)
    detectable: float | None  # smallest true difference found with 80% power at ``alpha`` (None below 2 pairs)


@dataclasses.dataclass(frozen=True)
class NoiseCurve:
    """A comparison's noise at every evaluation step its pairs share."""

    variant: str
    reference: str
    point: tuple
    null_control: bool
    alpha: float  # the two-sided level of its verdict's interval
    points: tuple[NoisePoint, ...]

    @property
    def label(self) -> str:
        """The comparison in words; the null control's marked as the A/A comparison it is."""
        return (self.variant + (" (A/A)" if self.null_control else "")
                + (f" at {point_text(self.point)}" if self.point else ""))

    @property
    def final(self) -> NoisePoint | None:
        """The last step with a paired sd."""
        return next((p for p in reversed(self.points) if p.sd is not None), None)


def paired_points(variant: Curves, reference: Curves, seeds: list[int], alpha: float,
                  tokens_per_step: float | None) -> tuple[NoisePoint, ...]:
    """The noise at each step where both curves of at least one of ``seeds`` have a value."""
    steps = sorted({s for seed in seeds for s in variant.get(seed, {}) if s in reference.get(seed, {})})
    out = []
    for step in steps:
        diffs = np.array([variant[seed][step] - reference[seed][step] for seed in seeds
                          if step in variant.get(seed, {}) and step in reference.get(seed, {})])
        sd = float(np.std(diffs, ddof=1)) if len(diffs) >= 2 else None
        out.append(NoisePoint(step, None if tokens_per_step is None else step * tokens_per_step, len(diffs),
                              float(np.mean(diffs)), sd,
                              None if sd is None else stats.detectable_difference(len(diffs), sd, alpha)))
    return tuple(out)


def noise_curves(family: Family, curves: Mapping[GroupKey, Curves],
                 tokens_per_step: Mapping[GroupKey, float]) -> list[NoiseCurve]:
    """Every comparison of ``family`` (the null control's last), on the seeds its verdict paired, at its look level."""
    out = []
    for c in [*family.comparisons, *family.null]:
        ref_key = (c.reference, c.point)
        out.append(NoiseCurve(c.variant, c.reference, c.point, not c.in_family, family.look_alpha,
                              paired_points(curves.get(c.key, {}), curves.get(ref_key, {}), list(c.seeds),
                                            family.look_alpha, tokens_per_step.get(c.key))))
    return out


# ----------------------------------------------------------------------------- what buys resolution


TREND_CONFIDENCE = 0.95  # of the interval on the sd trend's exponent


@dataclasses.dataclass(frozen=True)
class Exponent:
    """b of sd ~ tokens^b with its ``TREND_CONFIDENCE`` interval (None with only 2 points: no degrees of freedom)."""

    b: float
    low: float | None
    high: float | None


def sd_exponent(tokens: list[float], sds: list[float]) -> Exponent | None:
    """b of sd ~ tokens^b, least squares on logs over the points given (None with fewer than 2 or a zero sd).

    The interval is the slope's t interval (scipy's ``linregress`` standard error, k - 2 df)."""
    if len(tokens) < 2 or any(s <= 0 for s in sds) or len(set(tokens)) < 2:
        return None
    y = np.log(sds)
    fit = scipy.stats.linregress(np.log(tokens), y)
    if len(tokens) < 3:
        return Exponent(float(fit.slope), None, None)
    stderr = 0.0 if np.ptp(y) == 0 else float(fit.stderr)  # a constant sd: linregress gives nan (r is 0/0)
    half = float(scipy.stats.t.ppf(0.5 + TREND_CONFIDENCE / 2, len(tokens) - 2)) * stderr
    return Exponent(float(fit.slope), float(fit.slope) - half, float(fit.slope) + half)


@dataclasses.dataclass(frozen=True)
class Resolution:
    """Per doubling of compute: the factor on the detectable difference from more tokens and from more seeds."""

    longer: float | None  # 2^b from the sd trend over the last evaluations (None: no trend)
    longer_low: float | None  # 2^b's interval (None: too few evaluations for one)
    longer_high: float | None
    more_seeds: float  # detectable(2n) / detectable(n) at the same sd and level
    evaluations: int  # evaluations the trend was fitted over

    @property
    def better_buy(self) -> str:
        """"more seeds", "longer training", or "unclear" when the trend's interval straddles the seeds' factor
        or there is none (2 evaluations fit a line exactly: no degrees of freedom left to judge it)."""
        if self.longer is None:
            return "more seeds"
        if self.longer_low is None or self.longer_high is None:
            return "unclear"
        if self.longer_high < self.more_seeds:
            return "longer training"
        if self.longer_low >= self.more_seeds:
            return "more seeds"
        return "unclear"


def resolution(curve: NoiseCurve, last: int = TREND_EVALUATIONS) -> Resolution | None:
    """What doubling the tokens or the seeds does to ``curve``'s detectable difference at its last evaluation."""
    usable = [p for p in curve.points if p.sd is not None and p.tokens is not None]
    if not usable:
        return None
    end = usable[-1]
    tail = [p for p in usable if p.pairs == end.pairs][-last:]
    e = sd_exponent([p.tokens for p in tail], [p.sd for p in tail])  # type: ignore[misc]
    now = stats.detectable_difference(end.pairs, 1.0, curve.alpha)
    doubled = stats.detectable_difference(2 * end.pairs, 1.0, curve.alpha)
    assert now is not None and doubled is not None
    if e is None:
        return Resolution(None, None, None, doubled / now, len(tail))
    return Resolution(2.0**e.b, None if e.low is None else 2.0**e.low, None if e.high is None else 2.0**e.high,
                      doubled / now, len(tail))


def resolution_text(curve: NoiseCurve, label: str) -> str | None:
    """One plain sentence: whether longer training or more seeds would buy this comparison resolution."""
    r = resolution(curve)
    end = curve.final
    if r is None or end is None or end.detectable is None:
        return None
    seeds = (f"doubling the seeds ({end.pairs} -> {2 * end.pairs}) would cut its detectable difference "
             f"{end.detectable:.4f} by {1 - r.more_seeds:.0%}")
    if r.longer is None:
        return f"{label}: {seeds}; too few evaluations to tell what longer training does."
    moved = "fell" if r.longer < 1 else "rose"
    interval = (" (2 evaluations: no interval)" if r.longer_low is None or r.longer_high is None else
                f" ({TREND_CONFIDENCE:.0%} CI {r.longer_low - 1:+.0%} to {r.longer_high - 1:+.0%})")
    longer = (f"over its last {r.evaluations} evaluations the paired sd {moved} by {abs(1 - r.longer):.0%} per "
              f"doubling of tokens{interval}")
    verdict = {"more seeds": "more seeds buy more resolution than longer training",
               "longer training": "longer training buys more resolution than more seeds (if the trend holds)",
               "unclear": "the trend is too uncertain to say whether longer training buys more than more seeds"
               }[r.better_buy]
    return f"{label}: {longer}, while {seeds}; at equal compute, {verdict}."

