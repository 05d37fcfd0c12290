"""Pictures of a ladder's trends (blockyard/grid/trend.py results), as PNGs for the grid report.

    plot_loss_vs_params   loss against non-embedding parameters N on log axes, per variant: every
                          seed, the rung means and the fitted curve (extended to the target size)
    plot_gap_vs_params    each comparison's paired gap against N (log x): rung means, the fitted
                          line, its 95% band (mean) and prediction band, the 0 line, the target,
                          the crossover with its Fieller interval
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from blockyard.grid.trend import GapTrend, PowerLawFit, gap_at, gap_band, predict_loss
from blockyard.plotting import finish, pyplot


def _span(n_min: float, n_max: float, target: float | None) -> np.ndarray:
    """N values for a smooth curve from a bit below the smallest rung to the target or a bit past the largest."""
    top = max(n_max * 1.3, target or 0.0)
    return np.geomspace(n_min / 1.3, top, 200)


def plot_loss_vs_params(
    fits: Mapping[str, PowerLawFit],
    points: Mapping[str, tuple[Sequence[float], Sequence[Sequence[float]]]],
    path: str | Path,
    *,
    target: float | None = None,
    ylabel: str = "validation loss (nats/token)",
) -> Path:
    """PNG: per variant (key of ``fits``), ``points[variant] = (n per rung, per-seed losses per rung)``."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for label, fit in fits.items():
        n, losses = points[label]
        xs = np.concatenate([np.full(len(v), x) for x, v in zip(n, losses, strict=True)])
        ys = np.concatenate([np.asarray(v, dtype=float) for v in losses])
        (dots,) = ax.plot(xs, ys, ".", alpha=0.35)
        color = dots.get_color()
        ax.plot(n, [float(np.mean(v)) for v in losses], "o", color=color)
        curve_n = _span(fit.n_min, fit.n_max, target)
        interval = "" if np.isnan(fit.alpha_low) else f" [{fit.alpha_low:.3f}, {fit.alpha_high:.3f}]"
        e_text = f", E={fit.E:.3g}" if fit.E is not None else " (no E)"
        ax.plot(curve_n, predict_loss(fit, curve_n), "-", color=color,
                label=f"{label}: alpha={fit.alpha:.3f}{interval}{e_text}")
    if target is not None:
        ax.axvline(target, color="grey", ls=":", lw=1, label=f"target N={target:.3g}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("non-embedding parameters N")
    ax.set_ylabel(ylabel)
    ax.set_title("loss against size: dots = seeds, circles = rung means, lines = fits")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7)
    return finish(fig, path, dpi=120)


def plot_gap_vs_params(
    trends: Mapping[str, GapTrend], path: str | Path, *, unit: str = "nats/token"
) -> Path:
    """PNG: per comparison (key), the paired gap (variant - reference) against N with its fitted line."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(7, 4.5))
    ax.axhline(0.0, color="black", lw=1)
    for label, tr in trends.items():
        n = np.asarray(tr.rung_n)
        (dots,) = ax.plot(n, tr.rung_mean, "o")
        color = dots.get_color()
        curve_n = _span(float(n.min()), float(n.max()), tr.target)
        low, high = gap_band(tr, curve_n)
        p_low, p_high = gap_band(tr, curve_n, prediction=True)
        ax.fill_between(curve_n, p_low, p_high, color=color, alpha=0.08)
        ax.fill_between(curve_n, low, high, color=color, alpha=0.25)
        ax.plot(curve_n, gap_at(tr, curve_n), "-", color=color,
                label=f"{label}: {tr.slope:+.4f}/doubling [{tr.slope_low:+.4f}, {tr.slope_high:+.4f}], {tr.trend}")
        if tr.target is not None:
            gap, gap_low, gap_high = tr.gap_at_target, tr.gap_low, tr.gap_high
            assert gap is not None and gap_low is not None and gap_high is not None  # set with the target
            ax.errorbar([tr.target], [gap], yerr=[[gap - gap_low], [gap_high - gap]], fmt="s", color=color, capsize=3)
        if tr.crossover is not None:
            ax.plot([tr.crossover], [0.0], "x", color=color, ms=9)
            ax.plot([max(tr.crossover_low, curve_n[0]), min(tr.crossover_high, curve_n[-1])], [0.0, 0.0], "-",
                    color=color, lw=3, alpha=0.5)  # its Fieller interval, cut to the drawn span
    ax.set_xscale("log")
    ax.set_xlabel("non-embedding parameters N (reference)")
    ax.set_ylabel(f"paired gap, variant - reference ({unit})")
    ax.set_title("gap against size: circles = rung means, bands = interval of the mean (dark) and prediction\n"
                 "interval (light) at each trend's level, x = crossover (bar: its interval), square = target",
                 fontsize=9)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7)
    return finish(fig, path, dpi=120)
