"""Statistics of a grid: Student-t intervals over seeds, paired differences, verdicts, seeds needed.

- Interval of a mean over n seeds: mean +- t_{(1+level)/2, n-1} * sd / sqrt(n), sd with n-1
  degrees of freedom (Student 1908; any statistics text). n = 1 gives no interval.
- Paired difference: per seed, variant - reference (same seed = same batches and validation
  windows), then the interval of that mean. Pairing removes the seed-to-seed variation the two
  share, which is usually most of it.
- Verdict for a loss (lower is better): better when the whole interval is below 0, worse when
  it is above 0, otherwise no detectable difference at this budget.
- Seeds needed: the smallest n >= 2 whose two-sided paired t-test at level 0.05 has power >= 0.8
  against a true difference delta, given the observed paired sd; power from the noncentral t
  distribution with n - 1 degrees of freedom and noncentrality delta * sqrt(n) / sd (Cohen 1988,
  ch. 2; scipy.stats.nct).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence

from scipy import stats

LEVEL = 0.95
POWER = 0.8
MAX_SEEDS = 1000


@dataclasses.dataclass(frozen=True)
class Interval:
    """A mean over n values with its confidence interval (low/high are None when n < 2)."""

    n: int
    mean: float
    sd: float | None
    low: float | None
    high: float | None

    @property
    def half_width(self) -> float | None:
        return None if self.low is None or self.high is None else (self.high - self.low) / 2

    def contains(self, x: float) -> bool | None:
        if self.low is None or self.high is None:
            return None
        return self.low <= x <= self.high


def t_critical(n: int, level: float = LEVEL) -> float:
    """Two-sided Student-t critical value for a mean of n values: t_{(1+level)/2, n-1}."""
    if n < 2:
        raise ValueError("a t interval needs at least two values")
    return float(stats.t.ppf((1 + level) / 2, n - 1))


def mean_interval(values: Sequence[float], level: float = LEVEL) -> Interval:
    """The mean of ``values`` and its Student-t confidence interval."""
    n = len(values)
    if n == 0:
        raise ValueError("no values")
    mean = math.fsum(values) / n
    if n < 2:
        return Interval(n=1, mean=mean, sd=None, low=None, high=None)
    sd = math.sqrt(math.fsum((v - mean) ** 2 for v in values) / (n - 1))
    half = t_critical(n, level) * sd / math.sqrt(n)
    return Interval(n=n, mean=mean, sd=sd, low=mean - half, high=mean + half)


def paired_differences(variant: dict[int, float], reference: dict[int, float]) -> tuple[list[int], list[float]]:
    """Seeds present in both, and variant - reference for each (sorted by seed)."""
    seeds = sorted(set(variant) & set(reference))
    return seeds, [variant[s] - reference[s] for s in seeds]


BETTER = "better"
WORSE = "worse"
NO_DIFFERENCE = "no detectable difference at this budget"
NO_INTERVAL = "n=1: no interval"


def verdict(diff: Interval) -> str:
    """Plain-words verdict on a paired loss difference (variant - reference; lower is better)."""
    if diff.low is None or diff.high is None:
        return NO_INTERVAL
    if diff.high < 0:
        return BETTER
    if diff.low > 0:
        return WORSE
    return NO_DIFFERENCE


def paired_t_power(n: int, delta: float, sd: float, level: float = LEVEL) -> float:
    """Power of the two-sided paired t-test with n pairs against a true mean difference delta."""
    if n < 2:
        return 0.0
    df = n - 1
    crit = stats.t.ppf((1 + level) / 2, df)
    if sd == 0:
        return 1.0 if delta != 0 else 1 - level
    nc = abs(delta) * math.sqrt(n) / sd
    upper = float(stats.nct.sf(crit, df, nc))
    lower = float(stats.nct.cdf(-crit, df, nc))
    # scipy's noncentral t returns nan far in its tails (large nc); the normal limit is exact enough there.
    if math.isnan(upper):
        upper = float(stats.norm.sf(crit - nc))
    if math.isnan(lower):
        lower = float(stats.norm.cdf(-crit - nc))
    return upper + lower


def seeds_to_detect(delta: float, sd: float | None, power: float = POWER, level: float = LEVEL,
                    n_max: int = MAX_SEEDS) -> int | None:
    """Smallest n >= 2 with paired_t_power(n) >= power; None when delta is 0, sd unknown or n > n_max."""
    if sd is None or delta == 0 or not math.isfinite(delta):
        return None
    # Power grows with n (both the noncentrality and the degrees of freedom do): double, then bisect.
    hi = 2
    while paired_t_power(hi, delta, sd, level) < power:
        if hi >= n_max:
            return None
        hi = min(2 * hi, n_max)
    lo = max(2, hi // 2)
    while lo < hi:
        mid = (lo + hi) // 2
        if paired_t_power(mid, delta, sd, level) >= power:
            hi = mid
        else:
            lo = mid + 1
    return lo
