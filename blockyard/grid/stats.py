"""Statistics of a grid, as pure functions over numbers: intervals, verdicts, seeds needed, sequential levels.

- Interval of a mean over n seeds: mean +- t_{1-a/2, n-1} * sd / sqrt(n), sd with n-1 degrees of
  freedom (Student 1908; any statistics text). n = 1 gives no interval.
- Paired difference: per seed, variant - reference (same seed = same batches and validation
  windows), then the interval of that mean.
- Family: the m comparisons of a grid share one error budget 1 - level. Each comparison's
  interval is taken at two-sided level a = (1 - level) / m (Bonferroni), so all m intervals cover
  their true differences at once with probability >= level, whatever the correlation between the
  comparisons (they share the reference). Every verdict read off covering intervals is right, so
  the chance of any wrong verdict in the grid is <= 1 - level.
- Four verdicts against a smallest effect that matters, delta (loss: lower is better): better
  (interval wholly below 0), worse (wholly above 0), equivalent (wholly inside -delta..+delta),
  undecided (otherwise). An interval at two-sided level a inside the band is the two one-sided
  tests of Schuirmann (1987, J. Pharmacokinet. Biopharm. 15:657) each at level a/2.
- Sequential looks (repeated confidence intervals, Jennison & Turnbull 2000, "Group Sequential
  Methods with Applications to Clinical Trials", ch. 9): with looks after n_1 < ... < n_K pairs,
  every look uses one nominal level a_nom (Pocock 1977, Biometrika 64:191, constant nominal level)
  chosen so that, for normal paired differences, the t intervals of *all* looks cover the true
  mean at once with probability 1 - a. The t statistics of the looks are pivotal (their joint law
  depends on neither the mean nor the sd), so a_nom is found exactly up to Monte Carlo error by
  simulating them (Jennison & Turnbull 2000, ch. 11, apply normal-theory levels to t statistics;
  simulating the t statistics themselves removes that approximation). Stopping at any look
  keeps the guarantee, since coverage holds at all looks at once.
- Assumptions: the paired differences are independent across seeds and close to normal. Right skew
  breaks the bound (tests/test_divergence_verdicts.py measures a family error near 10% with lognormal
  differences at 5 pairs); the report's Method says so.
- Divergence (a run that blew up has no loss): when two groups diverged on different seeds, a
  worst-rank composite (Lachin 1999, Stat. Med. 18:1867: a diverged cell ranks worse than every
  finished loss) is tested by the exact Wilcoxon signed-rank test (Wilcoxon 1945), and the counts by
  McNemar's exact test (McNemar 1947).
- Seeds needed (planning, Cohen 1988 ch. 2): the paired t test's sample size from statsmodels'
  power solver, at an upper confidence bound of the paired sd (chi-square bound; a pilot sd is
  biased low in what it implies for planning, Browne 1995, Stat. Med. 14:1933, from memory),
  never the observed difference (observed power says nothing beyond the p-value: Hoenig & Heisey
  2001, Am. Stat. 55:19).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable, Sequence

import numpy as np
from scipy import optimize, stats

LEVEL = 0.95  # family-wise confidence of a grid's verdicts
POWER = 0.8  # planning power of "seeds needed"
SD_BOUND_CONFIDENCE = 0.8  # one-sided confidence of the paired-sd upper bound used for planning
MAX_SEEDS = 1000
SEQUENTIAL_SIMULATIONS = 400_000  # Monte Carlo error of the nominal level: ~1.5% of it at a = 0.05
SEQUENTIAL_SIM_SEED = 20_000_000  # fixed: the same looks always get the same boundary

BETTER = "better"
WORSE = "worse"
EQUIVALENT = "equivalent"
UNDECIDED = "undecided"
NO_INTERVAL = "n<2: no interval"
DIVERGENCE_DIFFERS = "divergence differs"
VERDICTS = (BETTER, WORSE, EQUIVALENT, UNDECIDED)
LOWER_BY_LESS = "lower by less than the smallest effect"
HIGHER_BY_LESS = "higher by less than the smallest effect"


@dataclasses.dataclass(frozen=True)
class Interval:
    """A mean over n values with its confidence interval at ``confidence`` (low/high None when n < 2)."""

    n: int
    mean: float
    sd: float | None
    low: float | None
    high: float | None
    confidence: float = LEVEL

    @property
    def half_width(self) -> float | None:
        return None if self.low is None or self.high is None else (self.high - self.low) / 2

    def contains(self, x: float) -> bool | None:
        if self.low is None or self.high is None:
            return None
        return self.low <= x <= self.high


@functools.lru_cache(maxsize=4096)
def t_critical(n: int, level: float = LEVEL) -> float:
    """Two-sided Student-t critical value for a mean of n values: t_{(1+level)/2, n-1}."""
    if n < 2:
        raise ValueError("a t interval needs at least two values")
    return float(stats.t.ppf((1 + level) / 2, n - 1))


def mean_interval(values: Sequence[float], level: float = LEVEL) -> Interval:
    """The mean of ``values`` and its two-sided Student-t confidence interval at ``level``."""
    n = len(values)
    if n == 0:
        raise ValueError("no values")
    mean = math.fsum(values) / n
    if n < 2:
        return Interval(n=1, mean=mean, sd=None, low=None, high=None, confidence=level)
    sd = math.sqrt(math.fsum((v - mean) ** 2 for v in values) / (n - 1))
    half = t_critical(n, level) * sd / math.sqrt(n)
    return Interval(n=n, mean=mean, sd=sd, low=mean - half, high=mean + half, confidence=level)


def paired_differences(variant: dict[int, float], reference: dict[int, float]) -> tuple[list[int], list[float]]:
    """Seeds present in both, and variant - reference for each (sorted by seed)."""
    seeds = sorted(set(variant) & set(reference))
    return seeds, [variant[s] - reference[s] for s in seeds]


def comparison_alpha(m: int, level: float = LEVEL) -> float:
    """Two-sided error level of one of m comparisons whose intervals hold jointly at ``level`` (Bonferroni)."""
    if m < 1:
        raise ValueError("a family has at least one comparison")
    return (1 - level) / m


def decide(iv: Interval, smallest_effect: float) -> tuple[str, str]:
    """(verdict, note) of a loss difference's interval (variant - reference; lower is better).

    Better / worse when the interval excludes 0; equivalent when it lies strictly inside
    (-smallest_effect, +smallest_effect), which takes precedence (the note says which side it leans).
    """
    if smallest_effect <= 0:
        raise ValueError("smallest_effect must be > 0")
    if iv.low is None or iv.high is None:
        return UNDECIDED, NO_INTERVAL
    if -smallest_effect < iv.low and iv.high < smallest_effect:
        note = LOWER_BY_LESS if iv.high < 0 else HIGHER_BY_LESS if iv.low > 0 else ""
        return EQUIVALENT, note
    if iv.high < 0:
        return BETTER, ""
    if iv.low > 0:
        return WORSE, ""
    return UNDECIDED, ""


# ----------------------------------------------------------------------------- planning


def sd_upper_bound(sd: float, n: int, confidence: float = SD_BOUND_CONFIDENCE) -> float:
    """One-sided upper confidence bound of a normal sd from n values: sd * sqrt((n-1) / chi2_{1-c, n-1})."""
    if n < 2:
        raise ValueError("an sd bound needs at least two values")
    return sd * math.sqrt((n - 1) / float(stats.chi2.ppf(1 - confidence, n - 1)))


def t_test_power(effect: float, n: int, alpha: float, alternative: str = "two-sided") -> float:
    """Power of the one-sample (= paired) t test with n values against effect size mean/sd (statsmodels).

    statsmodels returns nan far in the noncentral t's tail (power ~1 at a large effect and small n);
    there scipy's noncentral t gives the value (Cohen 1988, ch. 2: the same noncentral t formula).
    """
    from statsmodels.stats.power import TTestPower

    value = float(TTestPower().power(effect_size=effect, nobs=n, alpha=alpha, alternative=alternative))
    if math.isfinite(value):
        return value
    df, nc = n - 1, effect * math.sqrt(n)
    crit = float(stats.t.ppf(1 - (alpha if alternative == "larger" else alpha / 2), df))
    upper = _finite_or(float(stats.nct.sf(crit, df, nc)), lambda: _finite_or(
        1 - float(stats.nct.cdf(crit, df, nc)), lambda: float(stats.norm.sf(crit - nc))))
    if alternative == "larger":
        return upper
    # The wrong-side rejection: negligible exactly where scipy cannot compute it (deep in the tail).
    return upper + _finite_or(float(stats.nct.cdf(-crit, df, nc)), lambda: 0.0)


def _finite_or(value: float, fallback: Callable[[], float]) -> float:
    return value if math.isfinite(value) else fallback()


def _solve_nobs(effect: float, alpha: float, power: float, alternative: str, n_max: int) -> int | None:
    """Smallest whole n >= 2 whose one-sample t test reaches ``power`` (the power function bisected over whole
    n: statsmodels' own root finder can fail to converge at small n); None past ``n_max``."""
    if effect == math.inf:
        return 2

    def reaches(n: int) -> bool:
        return t_test_power(effect, n, alpha, alternative) >= power

    if not reaches(n_max):
        return None
    lo, hi = 2, n_max  # power grows with n (noncentrality and degrees of freedom both do)
    while lo < hi:
        mid = (lo + hi) // 2
        if reaches(mid):
            hi = mid
        else:
            lo = mid + 1
    return lo


def seeds_for_difference(smallest_effect: float, sd: float, alpha: float, power: float = POWER,
                         n_max: int = MAX_SEEDS) -> int | None:
    """Pairs for a two-sided paired t test at ``alpha`` to find a true difference of +-smallest_effect."""
    effect = math.inf if sd == 0 else smallest_effect / sd
    return _solve_nobs(effect, alpha, power, "two-sided", n_max)


def seeds_for_equivalence(smallest_effect: float, sd: float, alpha: float, power: float = POWER,
                          n_max: int = MAX_SEEDS) -> int | None:
    """Pairs for the interval at two-sided ``alpha`` to land inside +-smallest_effect when the true difference is 0.

    Each one-sided test (level alpha/2) must pass; asking each for power 1 - (1 - power)/2 gives
    both at once with probability >= power (union bound; Chow, Shao & Wang 2008, "Sample Size
    Calculations in Clinical Research", sec. 3.2, give the normal form of this rule, from memory).
    """
    effect = math.inf if sd == 0 else smallest_effect / sd
    return _solve_nobs(effect, alpha / 2, 1 - (1 - power) / 2, "larger", n_max)


def detectable_difference(n: int, sd: float, alpha: float, power: float = POWER) -> float | None:
    """Smallest true difference a two-sided paired t test with n pairs at ``alpha`` finds with ``power``."""
    if n < 2:
        return None
    if sd == 0:
        return 0.0
    def gap(effect: float) -> float:
        return t_test_power(effect, n, alpha) - power

    # The effect size where power crosses the target (power rises with it); scipy's root finder.
    hi = 1.0
    while gap(hi) < 0:
        hi *= 4
    effect = optimize.brentq(gap, 0.0, hi, xtol=1e-10)
    return effect * sd


def decision_probability(true_diff: float, sd: float, n: int, alpha: float, smallest_effect: float) -> float:
    """Chance that the t interval at two-sided ``alpha`` over n normal pairs decides (``decide``: better, worse or
    equivalent) when the true difference is ``true_diff``. Given the sample sd s, the mean m ~ N(true_diff,
    sd^2 / n) is undecided exactly when max(delta - h, 0) <= |m| <= h, h = t * s / sqrt(n); integrated over
    (n - 1) s^2 / sd^2 ~ chi2(n - 1) (the t interval's own sampling law; any statistics text)."""
    from scipy import integrate

    if n < 2:
        return 0.0
    se, crit, df = sd / math.sqrt(n), t_critical(n, 1 - alpha), n - 1

    def undecided(x: float) -> float:
        h = crit * sd * math.sqrt(x / df) / math.sqrt(n)
        a = max(smallest_effect - h, 0.0)
        if a >= h:
            return 0.0
        inner = stats.norm.cdf((h - true_diff) / se) - stats.norm.cdf((a - true_diff) / se)
        outer = stats.norm.cdf((-a - true_diff) / se) - stats.norm.cdf((-h - true_diff) / se)
        return (inner + outer) * float(stats.chi2.pdf(x, df))

    hi = float(stats.chi2.ppf(1 - 1e-12, df))
    return 1.0 - integrate.quad(undecided, 0.0, hi, limit=200)[0]


# ----------------------------------------------------------------------------- sequential looks


def _look_t_statistics(looks: tuple[int, ...], sims: int, seed: int) -> np.ndarray:
    """(sims, K) t statistics of the first n_k of the same N(0, 1) values, for each look n_k.

    Drawn from sufficient statistics per block of new values (its sum ~ N(0, g) and its sum of
    squares about the block mean ~ chi2(g - 1), independent), so the cost does not grow with n.
    """
    rng = np.random.default_rng(seed)
    sizes = np.diff((0,) + looks)
    block_sum = rng.standard_normal((sims, len(looks))) * np.sqrt(sizes)
    within = np.where(sizes > 1, rng.chisquare(np.maximum(sizes - 1, 1), (sims, len(looks))), 0.0)
    total = np.cumsum(block_sum, axis=1)
    squares = np.cumsum(within + block_sum**2 / sizes, axis=1)  # sum of x^2 over the first n_k values
    n = np.asarray(looks, dtype=float)
    ss = np.maximum(squares - total**2 / n, 1e-300)
    return (total / n) / np.sqrt(ss / (n - 1) / n)


@functools.lru_cache(maxsize=64)
def sequential_alpha(looks: tuple[int, ...], alpha: float, sims: int = SEQUENTIAL_SIMULATIONS,
                     seed: int = SEQUENTIAL_SIM_SEED) -> float:
    """Nominal two-sided level of each look so that the t intervals of all looks hold jointly at 1 - alpha.

    ``looks``: the planned numbers of pairs (increasing, each >= 2). One look gives ``alpha``.
    """
    if not looks or any(n < 2 for n in looks) or any(b <= a for a, b in zip(looks, looks[1:], strict=False)):
        raise ValueError(f"looks must be increasing numbers of pairs >= 2, got {looks}")
    if len(looks) == 1:
        return alpha
    t = _look_t_statistics(looks, sims, seed)
    df = np.asarray(looks) - 1
    smallest_p = (2 * stats.t.sf(np.abs(t), df)).min(axis=1)
    return float(np.quantile(smallest_p, alpha))


def clopper_pearson(successes: int, trials: int, level: float = LEVEL) -> tuple[float, float]:
    """Exact binomial interval (Clopper & Pearson 1934), via statsmodels."""
    from statsmodels.stats.proportion import proportion_confint

    low, high = proportion_confint(successes, trials, alpha=1 - level, method="beta")
    return float(low), float(high)


# ----------------------------------------------------------------------------- divergence as an outcome


@dataclasses.dataclass(frozen=True)
class SignedRank:
    """Exact Wilcoxon signed-rank test of paired differences (zeros dropped, ties at mid-ranks)."""

    n: int  # non-zero differences ranked
    r_plus: float  # sum of the ranks of the positive differences
    p_less: float  # one-sided p that the differences sit below 0 (P(R+ <= r_plus) under the null)
    p_greater: float  # one-sided p that they sit above 0 (P(R+ >= r_plus))

    @property
    def smallest_p(self) -> float:
        """The smallest one-sided p any sign pattern of these ranks can give: 2^-n (all of one sign)."""
        return 0.5**self.n


def signed_rank_test(diffs: Sequence[float]) -> SignedRank:
    """Exact signed-rank test (Wilcoxon 1945) of ``diffs``; +-inf allowed (they rank above every finite one).

    The null law of R+ is conditional on the ranks (each sign + or - with probability 1/2, Pratt &
    Gibbons 1981, "Concepts of Nonparametric Theory", ch. 5, from memory), so tied mid-ranks stay
    exact; it is built by convolving the ranks one at a time (the generating-function recursion), so the
    cost is n^3 at worst, not 2^n. Zero differences are dropped (Wilcoxon's own rule).
    """
    d = np.asarray([x for x in diffs if x != 0], dtype=float)
    if np.isnan(d).any():
        raise ValueError("a difference is nan")
    n = len(d)
    if n == 0:
        return SignedRank(0, 0.0, 1.0, 1.0)
    ranks = stats.rankdata(np.abs(d))  # +inf gets the top ranks, ties their mid-rank
    doubled = np.rint(2 * ranks).astype(int)  # mid-ranks are multiples of 1/2
    law = np.zeros(int(doubled.sum()) + 1)
    law[0] = 1.0
    top = 0
    for r in doubled:
        law[r: top + r + 1] = 0.5 * law[r: top + r + 1] + 0.5 * law[: top + 1]
        law[:r] *= 0.5
        top += r
    observed = int(doubled[d > 0].sum())
    return SignedRank(n, observed / 2, float(min(1.0, law[: observed + 1].sum())),
                      float(min(1.0, law[observed:].sum())))


def mcnemar_exact(variant_only: int, reference_only: int) -> float:
    """Two-sided exact McNemar p (McNemar 1947) of paired yes/no outcomes from the discordant counts
    (statsmodels' binomial form); 1 when no pair is discordant."""
    from statsmodels.stats.contingency_tables import mcnemar

    if variant_only + reference_only == 0:
        return 1.0
    return float(mcnemar([[0, variant_only], [reference_only, 0]], exact=True).pvalue)


def decide_composite(diffs: Sequence[float], alpha: float) -> tuple[str, SignedRank]:
    """Verdict on worst-rank composite differences (a diverged cell: worse than every finished loss,
    Lachin 1999, Stat. Med. 18:1867; paired form: +inf when only the variant diverged, -inf when only the
    reference did). Better / worse when the one-sided signed-rank p is <= alpha / 2 (the two-sided level
    ``alpha`` of the t intervals); never equivalent: a diverged cell has no loss to put inside a band.
    Undecided when no sign pattern could reach alpha / 2 at this n (the caller says why)."""
    test = signed_rank_test(diffs)
    if test.smallest_p > alpha / 2:
        return UNDECIDED, test
    if test.p_less <= alpha / 2:
        return BETTER, test
    if test.p_greater <= alpha / 2:
        return WORSE, test
    return UNDECIDED, test


def null_flag_rate(alpha: float, null_comparisons: int) -> float:
    """Chance that at least one of ``null_comparisons`` independent null-control comparisons, each at
    two-sided level ``alpha``, comes out better or worse under a true null: 1 - (1 - alpha)^k."""
    return 1 - (1 - alpha) ** null_comparisons
