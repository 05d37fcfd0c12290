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
  Interval for alpha: alpha +- t_{(1+level)/2, n-3} SE(alpha), SE from the covariance of the nonlinear
  least-squares fit (``curve_fit``'s pcov: the inverse Gauss-Newton Hessian scaled by the residual variance,
  Seber & Wild 1989, Nonlinear Regression, sec. 5.1; from memory), n the points over every seed; in the log
  form the OLS slope's SE with n - 2. At level 0.95 and 4 rungs x 3 seeds it covered the true alpha in
  94.8% of 500 simulated ladders (tests/test_trend_rung_level.py); the percentile bootstrap over seeds it
  replaces covered 87.7% (issue 27).
  Intervals for E and A: percentile bootstrap over seeds (Efron & Tibshirani 1993, ch. 13):
  resample the seeds within each rung with replacement (deviations from the rung mean inflated by
  sqrt(k / (k - 1)), see ``_resample``), refit, take the (1 -+ level) / 2 quantiles. A rung with one
  seed contributes no seed-to-seed variation; with one seed everywhere there is no interval.

Trend of a gap (``gap_trend``): a random-rung model of the per-seed paired differences d (variant -
reference, same seed): d_rs = a + b x_r + u_r + e_rs with x = log2 N, u_r a rung's own deviation (the
tuning noise every seed of a rung shares, a depth change between rungs; sd tau) and e_rs seed noise. The
slope b (change of the gap per doubling of N) is the weighted least-squares line through the rung means
m_r, weights 1/(tau^2 + s^2 / k_r) for rung r's k_r pairs, tau^2 by the method of moments (DerSimonian &
Laird 1986, Control. Clin. Trials 7:177; ``dersimonian_laird_tau2``) and s^2 the seed variance pooled over
the rungs: a rung's own s_r^2, from 2-3 seeds, made the weights so noisy that the interval covered 92.4%
with 7.1% false trends at tau = 0 (2000 simulated 4-rung x 3-seed ladders, measured once while building
this, not kept as a test; pooled: 95.6% and 4.4%). Its
interval b +- t_{(1+level)/2, R-2} SE(b) with SE from the WLS covariance scaled by the weighted residual
variance (Knapp & Hartung 2003, Stat. Med. 22:2693; the same as statsmodels' WLS). R rungs, not every
seed, carry the slope: pooling the seeds (n - 2 degrees of freedom) is exact only when tau = 0, and covered
89% at tau = 0.5 sigma, 80% at tau = sigma (issue 27); this covers 93-97% at 0, 0.5 and 1 sigma
(tests/test_trend_rung_level.py). A pure-error lack-of-fit F test (``lack_of_fit``) asks whether the rung
means stray from the line more than seed noise allows; with 4 rungs it has little to work with, and says so.
The verdict reads the slope's interval:
    no detectable trend   the interval contains 0;
    reverses              the fitted gap changes sign between the smallest and the largest rung (so only
                          with an interval that excludes 0; the crossing comes with its Fieller interval);
    shrinking             |gap| falls toward 0 as N grows: the slope has the opposite sign of the
                          fitted gap at the largest rung;
    growing               |gap| grows: the slope has the gap's sign.
For losses, d > 0 means the variant is worse; "shrinking" says nothing about who is ahead, only
that the distance closes. The gap at a target size comes with the interval of the mean gap and the
prediction interval of one new paired difference at a new rung of that size (variance of the fitted
value + tau^2 + the pooled seed variance); beyond one decade past the largest rung it carries a caution.
The crossover is where the fitted line meets 0, reported when the trend is detectable and it lies inside
the ladder or within 10x outside it (a reversal always lies inside), with its Fieller interval (Fieller
1954, J. R. Stat. Soc. B 16:175; ``fieller_interval``); when the slope's interval contains 0 that set is
unbounded and no crossover is given.
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
CROSSOVER_REACH = 10.0  # report a crossover inside the ladder or within this factor outside it
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
    raised the simulated coverage of the full form's 95% alpha interval, when the bootstrap still gave
    it (before issue 27), from 83% to 92-95% (60 simulated ladders each; noisy figures).
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
    n_boot: int  # bootstrap refits (for E and A) that converged
    n_boot_failed: int
    note: str  # why the form was chosen, why an interval is missing; "" when nothing to say


def power_law(n: np.ndarray | float, E: float, A: float, alpha: float) -> np.ndarray | float:
    """E + A * N^-alpha."""
    return E + A * np.power(n, -alpha)


def predict_loss(fit: PowerLawFit, n: np.ndarray | float) -> np.ndarray | float:
    """The fitted loss at N (E = 0 in the log-log form)."""
    return power_law(n, fit.E or 0.0, fit.A, fit.alpha)


def _fit_full(
    x: np.ndarray, y: np.ndarray, p0: tuple[float, float, float] | None
) -> tuple[tuple[float, float, float], np.ndarray]:
    """((E, B, alpha), covariance) of y = E + B x^-alpha by least squares, x already scaled to about 1.

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
    popt, pcov = optimize.curve_fit(
        power_law, x, y, p0=(e0, b0, a0), bounds=([0.0, 0.0, 0.0], [y_min, np.inf, 10.0]), maxfev=20000
    )
    return (float(popt[0]), float(popt[1]), float(popt[2])), pcov


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
                rows.append(_fit_full(x, ys, start)[0])
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
    alpha_se, dof = math.nan, len(x) - 2
    if len(n_arr) < MIN_RUNGS_FOR_E:
        notes.append(f"{len(n_arr)} rungs (< {MIN_RUNGS_FOR_E}): fitted log L on log N without E")
    else:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", optimize.OptimizeWarning)  # pcov inf: no interval, said below
                full, pcov = _fit_full(x, y, None)
            alpha_se, dof = float(math.sqrt(pcov[2, 2])) if pcov[2, 2] >= 0 else math.nan, len(x) - 3
        except (RuntimeError, ValueError) as err:
            notes.append(f"the E + A N^-alpha fit did not converge ({err}); fitted log L on log N without E")
    if full is None:
        b_fit, alpha_fit = _fit_log(x, y)
        e, b, alpha = 0.0, float(b_fit), float(alpha_fit)
        if dof >= 1:
            alpha_se = float(stats.linregress(np.log(x), np.log(y)).stderr)
    else:
        e, b, alpha = full
    al_lo = al_hi = math.nan
    if dof < 1 or not math.isfinite(alpha_se):
        notes.append(f"{len(x)} points leave no residual degrees of freedom for alpha's interval"
                     if dof < 1 else "no interval for alpha: the fit's covariance is not finite")
    else:
        half = float(stats.t.ppf((1 + level) / 2, dof)) * alpha_se
        al_lo, al_hi = alpha - half, alpha + half

    boots, failed = np.empty((0, 3)), 0
    if all(len(v) < 2 for v in vals):
        notes.append("one seed per rung: no bootstrap interval for E and A")
    elif n_boot > 0:
        boots, failed = _bootstrap(x, vals, full, n_boot, seed)
        if failed:
            notes.append(f"{failed} of {n_boot} bootstrap refits did not converge and were left out")
    e_lo, e_hi = _percentiles(boots[:, 0], level)
    a_lo, a_hi = _percentiles(boots[:, 1] * n0 ** boots[:, 2], level)
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
    """The random-rung line of the rung means of the paired gap on log2 N, its verdict and what it implies."""

    slope: float  # change of the gap per doubling of N
    slope_low: float
    slope_high: float
    intercept: float  # fitted gap at log2 N = 0
    trend: str  # "shrinking" | "growing" | "reverses" | "no detectable trend"
    level: float
    n_points: int  # paired differences over all rungs
    slope_df: int  # R - 2 for R rungs
    rung_sd: float  # tau: sd of a rung's own deviation from the line (NaN: no seed-to-seed variance to tell it)
    pair_var: float  # variance of one new paired difference about the line at a new rung (tau^2 + seed variance)
    cov: tuple[float, float, float]  # var(intercept), cov(intercept, slope), var(slope)
    t_crit: float
    rung_n: tuple[float, ...]
    rung_mean: tuple[float, ...]  # mean paired difference per rung
    rung_seeds: tuple[int, ...]
    rung_weight: tuple[float, ...]  # 1 / (tau^2 + s^2 / k_r), s^2 pooled: the WLS weight of each rung mean
    lof_f: float | None  # lack-of-fit F of the rung means against the seed-to-seed variance (None: no dof)
    lof_df: tuple[int, int] | None
    lof_p: float | None
    lof_note: str  # how much the lack-of-fit test can tell, or why there is none
    target: float | None
    gap_at_target: float | None
    gap_low: float | None  # prediction interval of one new paired difference at the target
    gap_high: float | None
    mean_low: float | None  # confidence interval of the mean gap at the target
    mean_high: float | None
    crossover: float | None  # N where the fitted gap is 0 (None: no detectable trend, or too far out)
    crossover_low: float | None  # Fieller interval of the crossover N
    crossover_high: float | None
    caution: str  # "" unless the target is beyond CAUTION_DECADES past the largest rung


METHOD = ("the rung means of the paired gap regressed on log2 N by weighted least squares, weights 1/(tau^2 + "
          "s^2/k_r) with s^2 the seed variance pooled over the rungs, k_r a rung's pairs and the rung-level "
          "variance tau^2 by the method of moments (DerSimonian & Laird 1986, "
          "Control. Clin. Trials 7:177), the slope's interval from the residual-scaled covariance with a t "
          "quantile on R - 2 degrees of freedom (Knapp & Hartung 2003, Stat. Med. 22:2693), the crossover's "
          "from Fieller's theorem (Fieller 1954, J. R. Stat. Soc. B 16:175)")


def gap_at(trend: GapTrend, n: np.ndarray | float) -> np.ndarray | float:
    """The fitted gap at N."""
    return trend.intercept + trend.slope * np.log2(n)


def gap_band(trend: GapTrend, n: np.ndarray | float, *, prediction: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """(low, high) at N: the interval of the mean gap, or with ``prediction`` of one new paired difference
    at a new rung of that size (which carries its own rung deviation, tau^2, and one seed's noise)."""
    x = np.log2(np.asarray(n, dtype=float))
    var_a, cov_ab, var_b = trend.cov
    var = var_a + 2 * x * cov_ab + x**2 * var_b + (trend.pair_var if prediction else 0.0)
    half = trend.t_crit * np.sqrt(var)
    fitted = trend.intercept + trend.slope * x
    return fitted - half, fitted + half


def dersimonian_laird_tau2(y: np.ndarray, v: np.ndarray, design: np.ndarray) -> float:
    """Method-of-moments variance between units of a meta-regression y = design @ beta + u + e, u ~ (0, tau^2),
    e ~ (0, v) with v known (DerSimonian & Laird 1986, Control. Clin. Trials 7:177, extended to covariates as in
    Raudenbush 2009, The Handbook of Research Synthesis, ch. 16; from memory):
        tau^2 = max(0, (Q - (R - p)) / (sum w - tr((X'WX)^-1 X'W^2 X))),  w = 1/v,
    Q the weighted residual sum of squares of the fixed-effect fit, R units, p columns."""
    w = 1.0 / v
    xtwx_inv = np.linalg.inv(design.T @ (w[:, None] * design))
    beta = xtwx_inv @ design.T @ (w * y)
    q = float(np.sum(w * (y - design @ beta) ** 2))
    denom = float(np.sum(w) - np.trace(xtwx_inv @ design.T @ ((w**2)[:, None] * design)))
    return max(0.0, (q - (len(y) - design.shape[1])) / denom)


def fieller_interval(a: float, b: float, cov: tuple[float, float, float], t: float) -> tuple[float, float] | None:
    """Fieller set of the root x0 = -a / b of the line a + b x (Fieller 1954, J. R. Stat. Soc. B 16:175):
    every x with (a + b x)^2 <= t^2 (var_a + 2 x cov_ab + x^2 var_b). None when that set is unbounded, which
    happens exactly when b's own interval b +- t SE(b) contains 0."""
    var_a, cov_ab, var_b = cov
    qa, qb, qc = b * b - t * t * var_b, 2 * (a * b - t * t * cov_ab), a * a - t * t * var_a
    if qa <= 0:
        return None
    disc = qb * qb - 4 * qa * qc  # >= 0 when qa > 0: x0 itself is in the set
    root = math.sqrt(max(disc, 0.0))
    return (-qb - root) / (2 * qa), (-qb + root) / (2 * qa)


def lack_of_fit(rung_x: np.ndarray, vals: list[np.ndarray]) -> tuple[float, tuple[int, int], float] | None:
    """Pure-error lack-of-fit F test of a line in x (Draper & Smith 1998, Applied Regression Analysis, sec. 2.1;
    from memory): the rung means' scatter about the least-squares line through every point, per its R - 2
    degrees of freedom, against the seed-to-seed variance (n - R). (F, (df1, df2), p); None when either is 0."""
    k = np.array([len(v) for v in vals])
    df1, df2 = len(vals) - 2, int(k.sum()) - len(vals)
    if df1 < 1 or df2 < 1:
        return None
    xs, ys = np.repeat(rung_x, k), np.concatenate(vals)
    slope, intercept = np.polyfit(xs, ys, 1)
    means = np.array([v.mean() for v in vals])
    ss_lof = float(np.sum(k * (means - intercept - slope * rung_x) ** 2))
    ss_pe = float(sum(np.sum((v - v.mean()) ** 2) for v in vals))
    if ss_pe <= 0:
        return None
    f = (ss_lof / df1) / (ss_pe / df2)
    return f, (df1, df2), float(stats.f.sf(f, df1, df2))


def _lof_note(n_rungs: int, lof: tuple[float, tuple[int, int], float] | None) -> str:
    if lof is None:
        return ("no lack-of-fit test: it needs 3 or more rungs and a rung with 2 or more seeds")
    left = n_rungs - 3
    if left <= 1:
        return (f"with {n_rungs} rungs only {left} degree{'s' if left != 1 else ''} of freedom "
                f"{'is' if left == 1 else 'are'} left for misfit once the line and the rung-level variance are "
                "fitted: the test cannot tell a curve from rung-to-rung scatter and has little power")
    return ""


def _pooled_variance(vals: list[np.ndarray]) -> float:
    """The seed-to-seed variance pooled over the rungs (0 when no rung has 2 seeds)."""
    extra = sum(len(v) - 1 for v in vals)
    return float(sum(np.sum((v - v.mean()) ** 2) for v in vals) / extra) if extra else 0.0


def _pow2(x: float) -> float:
    """2^x, inf past the float range (a Fieller bound can lie thousands of doublings out)."""
    return math.inf if x > 1023 else 2.0**x


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
    ``n[i]`` (the reference's non-embedding parameters). Needs at least 3 rungs: the slope's interval
    has R - 2 degrees of freedom.
    """
    n_arr, vals = _rungs(n, diffs)
    if target is not None and not target > 0:
        raise ValueError(f"target must be a positive parameter count, got {target!r}")
    if len(n_arr) < 3:
        raise ValueError("a slope with a rung-level interval needs at least 3 rungs")
    x = np.log2(n_arr)
    design = np.column_stack([np.ones_like(x), x])
    means = np.array([v.mean() for v in vals])
    k = np.array([len(v) for v in vals])
    pooled = _pooled_variance(vals)
    if pooled > 0:
        tau2 = dersimonian_laird_tau2(means, pooled / k, design)
        weights = 1.0 / (tau2 + pooled / k)
    else:  # no seed-to-seed variance anywhere: the rung means are all there is, weighted alike
        tau2, weights = math.nan, np.ones_like(x)
    xtwx_inv = np.linalg.inv(design.T @ (weights[:, None] * design))
    intercept, slope = (float(c) for c in xtwx_inv @ design.T @ (weights * means))
    dof = len(x) - 2
    scale = float(np.sum(weights * (means - intercept - slope * x) ** 2) / dof)
    cov_m = scale * xtwx_inv  # Knapp & Hartung 2003: the WLS covariance scaled by the residual variance
    cov = (float(cov_m[0, 0]), float(cov_m[0, 1]), float(cov_m[1, 1]))
    t_crit = float(stats.t.ppf((1 + level) / 2, dof))
    half = t_crit * math.sqrt(cov[2])
    low, high = slope - half, slope + half
    x_min, x_max = float(x.min()), float(x.max())
    trend = _verdict(low, high, intercept + slope * x_min, intercept + slope * x_max)
    crossover = cross_low = cross_high = None
    fieller = fieller_interval(intercept, slope, cov, t_crit)
    if trend != "no detectable trend" and fieller is not None:
        x0 = -intercept / slope
        if x_min - math.log2(CROSSOVER_REACH) <= x0 <= x_max + math.log2(CROSSOVER_REACH):
            crossover, cross_low, cross_high = _pow2(x0), _pow2(fieller[0]), _pow2(fieller[1])
    lof = lack_of_fit(x, vals)
    result = GapTrend(
        slope=slope, slope_low=low, slope_high=high, intercept=intercept, trend=trend, level=level,
        n_points=int(k.sum()), slope_df=dof, rung_sd=math.sqrt(tau2) if not math.isnan(tau2) else math.nan,
        pair_var=tau2 + pooled if pooled > 0 else scale, cov=cov, t_crit=t_crit,
        rung_n=tuple(float(v) for v in n_arr), rung_mean=tuple(float(m) for m in means),
        rung_seeds=tuple(int(v) for v in k), rung_weight=tuple(float(w) for w in weights),
        lof_f=None if lof is None else lof[0], lof_df=None if lof is None else lof[1],
        lof_p=None if lof is None else lof[2], lof_note=_lof_note(len(x), lof),
        target=None, gap_at_target=None, gap_low=None, gap_high=None, mean_low=None, mean_high=None,
        crossover=crossover, crossover_low=cross_low, crossover_high=cross_high, caution="",
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
    """One sentence: the slope with its interval, the verdict, the crossover with its Fieller interval (or why
    none), the lack-of-fit test and, where set, the target and its caution."""
    pct = round(100 * trend.level)
    text = (f"gap {trend.slope:+.4f} {unit} per doubling of N ({pct}% CI {trend.slope_low:+.4f} to "
            f"{trend.slope_high:+.4f}, {trend.slope_df} df over {len(trend.rung_n)} rungs"
            + ("" if math.isnan(trend.rung_sd) else f", rung-level sd {trend.rung_sd:.4f}") + f"): {trend.trend}")
    if trend.crossover is not None:
        text += (f"; the fitted gap crosses 0 at N={trend.crossover:.3g} ({pct}% Fieller interval "
                 f"{trend.crossover_low:.3g} to {trend.crossover_high:.3g})")
    elif trend.trend == "no detectable trend":
        text += "; no crossover given: the slope's interval includes 0, so the crossover's interval is unbounded"
    if trend.lof_f is not None and trend.lof_df is not None:
        text += (f"; lack of fit F({trend.lof_df[0]}, {trend.lof_df[1]}) = {trend.lof_f:.2f}, "
                 f"p = {trend.lof_p:.3g}")
    if trend.lof_note:
        text += f" ({trend.lof_note})"
    if trend.target is not None:
        text += (f"; at N={trend.target:.3g} the fitted gap is {trend.gap_at_target:+.4f} ({pct}% prediction "
                 f"interval {trend.gap_low:+.4f} to {trend.gap_high:+.4f})")
        if trend.caution:
            text += f" ({trend.caution})"
    return text
