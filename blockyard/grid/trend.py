"""Trends across a ladder of model sizes: a loss-vs-parameters fit per variant, the trend of each gap.

Pure functions over per-seed numbers (no I/O): a rung is one model size; ``n`` holds each rung's
non-embedding parameter count N and ``values`` one array of per-seed numbers per rung.

Loss fit per variant (``fit_power_law``):
    L(N) = E + A * N^(-alpha)       with 4 or more rungs (the form of Hoffmann et al. 2022, eq. 2,
                                    in N alone), least squares over every seed's point with
                                    ``scipy.optimize.curve_fit``, E in [0, min L], A > 0, alpha > 0;
    log L = log A - alpha * log N   with 2-3 rungs: three parameters from three sizes would fit any
                                    noise exactly, so E is left out (taken as 0: Kaplan et al. 2020's
                                    pure power law) and the result says so.
  Intervals for alpha, E and A: percentile bootstrap over seeds (Efron & Tibshirani 1993, ch. 13):
  resample the seeds within each rung with replacement (deviations from the rung mean inflated by
  sqrt(k / (k - 1)), see ``_resample``), refit, take the (1 -+ level) / 2 quantiles. A rung with one
  seed contributes no seed-to-seed variation; with one seed everywhere there is no interval. With
  few seeds the intervals are approximate: at level 0.95 and 4 seeds per rung they covered the true
  alpha in 90% (log form, 1000 simulated ladders) and 92% (full form, 60) of simulations
  (tests/test_trend.py).

Trend of a gap (``gap_trend``): the per-seed paired differences d (variant - reference, same seed)
at every rung, regressed by ordinary least squares on x = log2 N: d = a + b x. The slope b is the
change of the gap per doubling of N; its interval b +- t_{(1+level)/2, n-2} SE(b) (any regression
text). The verdict reads that interval:
    no detectable trend   the interval contains 0;
    reverses              the fitted gap changes sign between the smallest and the largest rung;
    shrinking             |gap| falls toward 0 as N grows: the slope has the opposite sign of the
                          fitted gap at the largest rung;
    growing               |gap| grows: the slope has the gap's sign.
For losses, d > 0 means the variant is worse; "shrinking" says nothing about who is ahead, only
that the distance closes. The gap at a target size comes with the OLS prediction interval of one
new paired difference, a +- t SE sqrt(1 + 1/n + (x0 - mean x)^2 / Sxx) (and the narrower interval
of the mean gap); beyond one decade past the largest rung it carries a caution. The crossover is
where the fitted line meets 0, reported when the trend is detectable and it lies within 10x of the
largest rung (either side).
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Sequence

import numpy as np
from scipy import optimize, stats

LEVEL = 0.95
MIN_RUNGS_FOR_E = 4
N_BOOT = 1000
CROSSOVER_REACH = 10.0  # report a crossover within this factor of the largest rung
CAUTION_DECADES = 1.0  # extrapolating further than this many decades beyond the largest rung earns a caution

FULL_FORM = "E + A * N^-alpha"
LOG_FORM = "A * N^-alpha (log L on log N, no E)"


# ----------------------------------------------------------------------------- inputs


def _rungs(n: Sequence[float], values: Sequence[Sequence[float]]) -> tuple[np.ndarray, list[np.ndarray]]:
    """Checked arrays: N per rung (> 0, distinct) and the finite per-seed values of each rung."""
    n_arr = np.asarray(n, dtype=float)
    if n_arr.ndim != 1 or len(n_arr) != len(values):
        raise ValueError(f"{len(n_arr)} sizes but {len(values)} rungs of values")
    if len(n_arr) < 2:
        raise ValueError("a trend needs at least 2 rungs")
    if np.any(n_arr <= 0) or len(np.unique(n_arr)) != len(n_arr):
        raise ValueError(f"sizes must be positive and distinct, got {n_arr.tolist()}")
    vals = [np.asarray(v, dtype=float).ravel() for v in values]
    for i, v in enumerate(vals):
        if len(v) == 0 or not np.all(np.isfinite(v)):
            raise ValueError(f"rung {i} (N={n_arr[i]:g}) needs at least one finite value")
    return n_arr, vals


def _points(n: np.ndarray, vals: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """One (N, value) point per seed and rung."""
    return np.repeat(n, [len(v) for v in vals]), np.concatenate(vals)


def _resample(vals: list[np.ndarray], n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """``(n_boot, points)``: each row draws every rung's seeds with replacement, in ``_points`` order.

    A draw's deviations from its rung's mean are inflated by sqrt(k / (k - 1)) for a rung of k
    seeds, so that the bootstrap variance of a rung mean is s^2 / k, not the plain bootstrap's
    (k - 1) / k of it (Efron & Tibshirani 1993, ch. 5; from memory): with 4 seeds per rung that
    raised the simulated coverage of the full form's 95% alpha interval from 83% to 92-95% (60
    simulated ladders each; noisy figures).
    """
    rows = []
    for v in vals:
        draw = v[rng.integers(0, len(v), (n_boot, len(v)))]
        if len(v) > 1:
            draw = v.mean() + (draw - v.mean()) * math.sqrt(len(v) / (len(v) - 1))
        rows.append(draw)
    return np.concatenate(rows, axis=1)


def _percentiles(samples: np.ndarray, level: float) -> tuple[float, float]:
    if len(samples) < 2:
        return math.nan, math.nan
    lo, hi = np.quantile(samples, [(1 - level) / 2, (1 + level) / 2])
    return float(lo), float(hi)


# ----------------------------------------------------------------------------- loss vs N


@dataclasses.dataclass(frozen=True)
class PowerLawFit:
    """L(N) = E + A N^-alpha (``E`` is None in the log-log form); intervals are NaN where none exists."""

    form: str
    E: float | None
    A: float
    alpha: float
    E_low: float | None
    E_high: float | None
    A_low: float
    A_high: float
    alpha_low: float
    alpha_high: float
    level: float
    n_rungs: int
    n_min: float
    n_max: float
    n_boot: int  # bootstrap refits that converged
    n_boot_failed: int
    note: str  # why the form was chosen, why an interval is missing; "" when nothing to say


def power_law(n: np.ndarray | float, E: float, A: float, alpha: float) -> np.ndarray | float:
    """E + A * N^-alpha."""
    return E + A * np.power(n, -alpha)


def predict_loss(fit: PowerLawFit, n: np.ndarray | float) -> np.ndarray | float:
    """The fitted loss at N (E = 0 in the log-log form)."""
    return power_law(n, fit.E or 0.0, fit.A, fit.alpha)


def _fit_full(x: np.ndarray, y: np.ndarray, p0: tuple[float, float, float] | None) -> tuple[float, float, float]:
    """(E, B, alpha) of y = E + B x^-alpha by least squares, x already scaled to about 1.

    Without a start, alpha is first searched on a grid with E and B solved linearly for each
    alpha (the model is linear in them), so curve_fit starts near the optimum.
    """
    y_min = float(y.min())
    if p0 is None:
        best = (math.inf, (0.0, 1.0, 0.5))
        for alpha in np.geomspace(1e-3, 4.0, 200):
            basis = np.power(x, -alpha)
            design = np.column_stack([np.ones_like(x), basis])
            (e, b), *_ = np.linalg.lstsq(design, y, rcond=None)
            if e < 0 or e > y_min:  # outside the bounds: the E = clip value, B refitted
                e = min(max(e, 0.0), y_min)
                b = float(basis @ (y - e) / (basis @ basis))
            rss = float(np.sum((y - e - b * basis) ** 2))
            if b > 0 and rss < best[0]:
                best = (rss, (float(e), float(b), float(alpha)))
        p0 = best[1]
    # Keep the start strictly inside the bounds (curve_fit's trust-region method requires it).
    e0 = min(max(p0[0], 1e-12), y_min * (1 - 1e-9))
    b0, a0 = max(p0[1], 1e-12), min(max(p0[2], 1e-6), 9.99)
    popt, _ = optimize.curve_fit(
        power_law, x, y, p0=(e0, b0, a0), bounds=([0.0, 0.0, 0.0], [y_min, np.inf, 10.0]), maxfev=20000
    )
    return float(popt[0]), float(popt[1]), float(popt[2])


def _fit_log(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(B, alpha) of log y = log B - alpha log x by OLS; ``y`` may hold one sample per row."""
    if np.any(y <= 0):
        raise ValueError("the log-log fit needs positive losses")
    lx, ly = np.log(x), np.log(y)
    dx = lx - lx.mean()
    slope = (ly - ly.mean(axis=-1, keepdims=True)) @ dx / (dx @ dx)
    intercept = ly.mean(axis=-1) - slope * lx.mean()
    return np.exp(intercept), -slope


def _bootstrap(
    x: np.ndarray, vals: list[np.ndarray], start: tuple[float, float, float] | None, n_boot: int, seed: int
) -> tuple[np.ndarray, int]:
    """``(refits (k, 3) of (E, B, alpha), failures)`` over resampled seeds; ``start`` None: the log form."""
    samples = _resample(vals, n_boot, np.random.default_rng(seed))
    if start is None:
        ok = np.all(samples > 0, axis=1)  # an inflated draw can in principle leave the log's domain
        b, alpha = _fit_log(x, samples[ok])
        return np.column_stack([np.zeros(len(b)), b, alpha]), int(n_boot - ok.sum())
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", optimize.OptimizeWarning)
        for ys in samples:
            try:
                rows.append(_fit_full(x, ys, start))
            except (RuntimeError, ValueError):
                pass
    return np.asarray(rows).reshape(-1, 3), n_boot - len(rows)


def fit_power_law(
    n: Sequence[float],
    losses: Sequence[Sequence[float]],
    *,
    level: float = LEVEL,
    n_boot: int = N_BOOT,
    seed: int = 0,
) -> PowerLawFit:
    """Fit a variant's loss against its non-embedding parameters N over the rungs (see the module doc).

    ``losses[i]`` holds the per-seed losses of rung i; ``seed`` seeds the bootstrap.
    """
    n_arr, vals = _rungs(n, losses)
    # N is scaled by its geometric mean so that B = A * n0^-alpha is of the order of the losses.
    n0 = float(np.exp(np.mean(np.log(n_arr))))
    x, y = _points(n_arr / n0, vals)
    notes = []
    full: tuple[float, float, float] | None = None
    if len(n_arr) < MIN_RUNGS_FOR_E:
        notes.append(f"{len(n_arr)} rungs (< {MIN_RUNGS_FOR_E}): fitted log L on log N without E")
    else:
        try:
            full = _fit_full(x, y, None)
        except (RuntimeError, ValueError) as e:
            notes.append(f"the E + A N^-alpha fit did not converge ({e}); fitted log L on log N without E")
    if full is None:
        b, alpha = _fit_log(x, y)
        e, b, alpha = 0.0, float(b), float(alpha)
    else:
        e, b, alpha = full

    boots, failed = np.empty((0, 3)), 0
    if all(len(v) < 2 for v in vals):
        notes.append("one seed per rung: no bootstrap interval")
    elif n_boot > 0:
        boots, failed = _bootstrap(x, vals, full, n_boot, seed)
        if failed:
            notes.append(f"{failed} of {n_boot} bootstrap refits did not converge and were left out")
    e_lo, e_hi = _percentiles(boots[:, 0], level)
    a_lo, a_hi = _percentiles(boots[:, 1] * n0 ** boots[:, 2], level)
    al_lo, al_hi = _percentiles(boots[:, 2], level)
    return PowerLawFit(
        form=LOG_FORM if full is None else FULL_FORM,
        E=None if full is None else e,
        A=b * n0**alpha,
        alpha=alpha,
        E_low=None if full is None else e_lo,
        E_high=None if full is None else e_hi,
        A_low=a_lo,
        A_high=a_hi,
        alpha_low=al_lo,
        alpha_high=al_hi,
        level=level,
        n_rungs=len(n_arr),
        n_min=float(n_arr.min()),
        n_max=float(n_arr.max()),
        n_boot=len(boots),
        n_boot_failed=failed,
        note="; ".join(notes),
    )


# ----------------------------------------------------------------------------- gap vs N


@dataclasses.dataclass(frozen=True)
class GapTrend:
    """The OLS line of per-seed paired differences on log2 N, its verdict and what it implies."""

    slope: float  # change of the gap per doubling of N
    slope_low: float
    slope_high: float
    intercept: float  # fitted gap at log2 N = 0
    trend: str  # "shrinking" | "growing" | "reverses" | "no detectable trend"
    level: float
    n_points: int
    x_mean: float  # mean of log2 N over the points
    sxx: float  # sum of squared deviations of log2 N
    resid_sd: float  # residual standard deviation (n - 2 degrees of freedom)
    t_crit: float
    rung_n: tuple[float, ...]
    rung_mean: tuple[float, ...]  # mean paired difference per rung
    rung_seeds: tuple[int, ...]
    target: float | None
    gap_at_target: float | None
    gap_low: float | None  # prediction interval of one new paired difference at the target
    gap_high: float | None
    mean_low: float | None  # confidence interval of the mean gap at the target
    mean_high: float | None
    crossover: float | None  # N where the fitted gap is 0 (None: no detectable trend, or too far)
    caution: str  # "" unless the target is beyond CAUTION_DECADES past the largest rung


def gap_at(trend: GapTrend, n: np.ndarray | float) -> np.ndarray | float:
    """The fitted gap at N."""
    return trend.intercept + trend.slope * np.log2(n)


def gap_band(trend: GapTrend, n: np.ndarray | float, *, prediction: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """(low, high) at N: the interval of the mean gap, or with ``prediction`` of one new paired difference."""
    x = np.log2(np.asarray(n, dtype=float))
    inner = 1.0 / trend.n_points + (x - trend.x_mean) ** 2 / trend.sxx + (1.0 if prediction else 0.0)
    half = trend.t_crit * trend.resid_sd * np.sqrt(inner)
    fitted = trend.intercept + trend.slope * x
    return fitted - half, fitted + half


def _verdict(low: float, high: float, gap_small: float, gap_large: float) -> str:
    if low <= 0.0 <= high:
        return "no detectable trend"
    if gap_small * gap_large < 0:
        return "reverses"
    slope_sign = 1.0 if low > 0 else -1.0
    return "growing" if slope_sign * gap_large > 0 else "shrinking"


def gap_trend(
    n: Sequence[float],
    diffs: Sequence[Sequence[float]],
    *,
    target: float | None = None,
    level: float = LEVEL,
) -> GapTrend:
    """Trend of a paired difference over the rungs (see the module doc); ``target`` is an N to extrapolate to.

    ``diffs[i]`` holds the per-seed paired differences (variant - reference) at rung i, whose N is
    ``n[i]`` (the reference's non-embedding parameters). Needs at least 3 points in all.
    """
    n_arr, vals = _rungs(n, diffs)
    if target is not None and not target > 0:
        raise ValueError(f"target must be a positive parameter count, got {target!r}")
    xs, ys = _points(np.log2(n_arr), vals)
    if len(xs) < 3:
        raise ValueError("a slope with an interval needs at least 3 paired differences")
    fit = stats.linregress(xs, ys)
    dof = len(xs) - 2
    resid = ys - (fit.intercept + fit.slope * xs)
    resid_sd = float(math.sqrt(np.sum(resid**2) / dof))
    t_crit = float(stats.t.ppf((1 + level) / 2, dof))
    slope, intercept = float(fit.slope), float(fit.intercept)
    low, high = slope - t_crit * float(fit.stderr), slope + t_crit * float(fit.stderr)
    x_min, x_max = float(np.log2(n_arr.min())), float(np.log2(n_arr.max()))
    trend = _verdict(low, high, intercept + slope * x_min, intercept + slope * x_max)
    crossover = None
    if trend != "no detectable trend" and slope != 0.0:
        x0 = -intercept / slope
        if abs(x0 - x_max) <= math.log2(CROSSOVER_REACH):
            crossover = float(2.0**x0)
    result = GapTrend(
        slope=slope, slope_low=low, slope_high=high, intercept=intercept, trend=trend, level=level,
        n_points=len(xs), x_mean=float(xs.mean()), sxx=float(np.sum((xs - xs.mean()) ** 2)),
        resid_sd=resid_sd, t_crit=t_crit, rung_n=tuple(float(v) for v in n_arr),
        rung_mean=tuple(float(v.mean()) for v in vals), rung_seeds=tuple(len(v) for v in vals),
        target=None, gap_at_target=None, gap_low=None, gap_high=None, mean_low=None, mean_high=None,
        crossover=crossover, caution="",
    )
    if target is None:
        return result
    p_low, p_high = gap_band(result, target, prediction=True)
    m_low, m_high = gap_band(result, target)
    decades = math.log10(target / float(n_arr.max()))
    caution = ""
    if decades > CAUTION_DECADES:
        caution = (f"caution: {decades:.1f} decades beyond the largest rung (N={n_arr.max():.3g}); "
                   "a straight line in log N this far out is a guess, not a measurement")
    return dataclasses.replace(
        result, target=float(target), gap_at_target=float(gap_at(result, target)), gap_low=float(p_low),
        gap_high=float(p_high), mean_low=float(m_low), mean_high=float(m_high), caution=caution,
    )


def describe(trend: GapTrend, unit: str = "nats/token") -> str:
    """One sentence: the slope with its interval, the verdict and, where set, the target and its caution."""
    pct = round(100 * trend.level)
    text = (f"gap {trend.slope:+.4f} {unit} per doubling of N ({pct}% CI {trend.slope_low:+.4f} to "
            f"{trend.slope_high:+.4f}): {trend.trend}")
    if trend.crossover is not None:
        text += f"; the fitted gap crosses 0 at N={trend.crossover:.3g}"
    if trend.target is not None:
        text += (f"; at N={trend.target:.3g} the fitted gap is {trend.gap_at_target:+.4f} ({pct}% prediction "
                 f"interval {trend.gap_low:+.4f} to {trend.gap_high:+.4f})")
        if trend.caution:
            text += f" ({trend.caution})"
    return text
