"""The report's figures, as PNGs in the grid dir: the forest plot of the verdicts, stage 1's loss against the
tuned value, the validation curves (against tokens and wall-clock time), loss against parameters, the ladder's
fits and trends (``blockyard.grid.trend_plots``), the evaluations' figures (``blockyard.eval.extrapolation``)
and noise.png (each comparison's detectable difference and paired sd along training).

Each writer returns whether it drew; ``write_plots`` returns (file name, caption) for each PNG written, in
the order the report shows them.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, NamedTuple

from blockyard import palette
from blockyard.grid import stats
from blockyard.grid.index import CellRow
from blockyard.grid.ladder import series_label
from blockyard.grid.noise import NoiseCurve
from blockyard.grid.report.results import GridResults, Group, TuningResults, axis_varies_size, mean_of
from blockyard.grid.status import cell_dir
from blockyard.grid.tuning import Tuning
from blockyard.grid.verdicts import Family, point_text
from blockyard.plotting import finish, label_token_axis, pyplot
from blockyard.rundir import METRICS_FILE, read_metrics
from blockyard.text import is_finite_number, percent_text

BAND = "line: mean over seeds; band: min to max over seeds"


FOREST = "verdicts.png"
TUNING_PLOT = "tuning.png"
LOSS_VS_N = "ladder_loss_vs_params.png"
GAP_VS_N = "ladder_gap_vs_params.png"
NOISE_PLOT = "noise.png"


class CurvePoint(NamedTuple):
    """One validation line of a cell."""

    tokens: float  # training tokens at this evaluation
    wall_s: float  # nan where the line has no time
    loss: float


def _val_curve(grid_dir: Path, row: CellRow) -> list[CurvePoint]:
    """The validation lines of a cell, in order."""
    lines = read_metrics(cell_dir(grid_dir, row["id"]) / METRICS_FILE)
    per_step = None
    for ln in lines:
        if ln.get("split") == "train" and ln.get("tokens") and ln.get("step"):
            per_step = ln["tokens"] / ln["step"]
    seen, steps = row["tokens_seen"], row["steps"]
    if per_step is None and seen and steps:
        per_step = seen / steps
    out = []
    for ln in lines:
        if ln.get("split") == "val" and is_finite_number(ln.get("loss")) and per_step:
            out.append(CurvePoint(ln["step"] * per_step, float(ln.get("wall_s") or math.nan), float(ln["loss"])))
    return out


def _band(curves: list[list[CurvePoint]]) -> tuple[list[float], list[float], list[float], list[float], list[float]]:
    """Over the evaluations every seed has: tokens, mean wall_s, and the mean, min and max of the loss."""
    common = sorted(set.intersection(*({p.tokens for p in curve} for curve in curves))) if curves else []
    xs: list[float] = []
    walls: list[float] = []
    means: list[float] = []
    lows: list[float] = []
    highs: list[float] = []
    for x in common:
        points = [next(p for p in curve if p.tokens == x) for curve in curves]
        losses = [p.loss for p in points]
        xs.append(x)
        walls.append(sum(p.wall_s for p in points) / len(points))
        means.append(sum(losses) / len(losses))
        lows.append(min(losses))
        highs.append(max(losses))
    return xs, walls, means, lows, highs


def write_plots(grid_dir: Path, res: GridResults) -> list[tuple[str, str]]:
    """PNG files in the grid dir, the forest plot first; returns (file name, caption) for each written."""
    plt = pyplot()
    written: list[tuple[str, str]] = []
    if forest_plot(plt, grid_dir / FOREST, res.family):
        written.append((FOREST, _forest_caption(res.family)))
    if res.tuning and res.tuning.groups and tuning_plot(plt, grid_dir / TUNING_PLOT, res.tuning):
        written.append((TUNING_PLOT, _tuning_caption(res.tuning.tuning)))
    written += _curve_plots(plt, grid_dir, res.groups)
    written += _ladder_plots(grid_dir, res)
    if res.ladder is None and axis_varies_size(res.groups) and _params_plot(plt, grid_dir / "final_loss_vs_params.png",
                                                                            res.groups):
        written.append(("final_loss_vs_params.png",
                        "Final validation loss vs non-embedding parameters (mean over seeds; bars: 95% t interval "
                        "of each group's own seeds)."))
    from blockyard.eval.extrapolation import (
        report_figures,  # length extrapolation (eval.json) and eval.probes, where present
    )

    written += report_figures(grid_dir, {g.label: [cell_dir(grid_dir, r["id"]) for r in g.done] for g in res.groups})
    return written


def _ladder_plots(grid_dir: Path, res: GridResults) -> list[tuple[str, str]]:
    """Loss against N per variant with its fit, and each gap against N with its line (blockyard.grid.trend_plots)."""
    lt = res.trends
    if lt is None:
        return []
    from blockyard.grid.trend_plots import plot_gap_vs_params, plot_loss_vs_params

    target = res.ladder.target if res.ladder else None
    written = []
    if lt.fits:
        points = {series_label(k): (s.n, s.per_rung()) for k, s in lt.loss_points.items()}
        fits = {series_label(k): f for k, f in lt.fits.items()}
        plot_loss_vs_params(fits, points, grid_dir / LOSS_VS_N, target=target)
        written.append((LOSS_VS_N, "Final validation loss against non-embedding parameters N (log axes), per "
                        "variant: dots are seeds, circles rung means, lines the fitted L(N) (see Ladder)."))
    if lt.trends:
        trends = {f"{series_label(k)} - {res.reference}": t for k, t in lt.trends.items()}
        plot_gap_vs_params(trends, grid_dir / GAP_VS_N)
        written.append((GAP_VS_N, "Paired gap (variant minus reference, nats/token) against the reference's N: rung "
                        "means, the least-squares line on log2 N, its 95% band (dark: mean gap; light: one new "
                        "pair), the 0 line; square: the gap at ladder_target with its prediction interval."))
    return written


def forest_plot(plt: Any, path: Path, family: Family) -> bool:
    """One row per comparison: the paired difference, its simultaneous interval (thick) and the unadjusted 95%
    one (thin), the +-smallest-effect band shaded, the verdict beside each row; the null control below, in grey."""
    rows = [c for c in family.comparisons + family.null if c.interval is not None]
    if not rows:
        return False
    delta = family.design.smallest_effect
    fig, ax = plt.subplots(figsize=(7.2, 1.2 + 0.42 * len(rows)))
    ax.axvspan(-delta, delta, color=palette.BAND, alpha=0.35, linewidth=0, label=f"±smallest effect ({delta:g})")
    ax.axvline(0, color="black", linewidth=0.8)
    colors = {stats.BETTER: palette.BETTER, stats.WORSE: palette.WORSE, stats.EQUIVALENT: palette.EQUIVALENT,
              stats.UNDECIDED: palette.UNDECIDED}
    for y, c in enumerate(reversed(rows)):
        color = palette.OUTSIDE if not c.in_family else colors[c.verdict]
        iv, un = c.interval, c.unadjusted
        assert iv is not None  # rows have intervals
        if iv.low is not None:
            ax.plot([iv.low, iv.high], [y, y], color=color, linewidth=3, solid_capstyle="butt")
        if un is not None and un.low is not None:
            ax.plot([un.low, un.high], [y, y], color=color, linewidth=1, alpha=0.7, marker="|", ms=9)
        ax.plot([iv.mean], [y], "o", color=color, ms=5)
        word = c.verdict + ("" if c.in_family else " (null control)")
        ax.annotate(word, xy=(1.01, y), xycoords=("axes fraction", "data"), va="center", fontsize=8, color=color)
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels([c.variant if not c.point else f"{c.variant} @ {c.point_text}" for c in reversed(rows)],
                       fontsize=8)
    ax.set_ylim(-0.7, len(rows) - 0.3)
    ax.set_xlabel(f"final val loss difference to {family_reference(family)} (nats/token; < 0 is better)")
    ax.grid(True, axis="x", alpha=0.3)
    ax.legend(fontsize=7, loc="lower right")
    finish(fig, path)
    return True


def tuning_plot(plt: Any, path: Path, tuned: TuningResults) -> bool:
    """Final validation loss (mean over tuning seeds) against the tuned value, one line per variant and point,
    each chosen value starred; values where a cell diverged or failed marked x at the top."""
    groups = tuned.groups or []
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    finite = [m for g in groups for m in g.means.values() if math.isfinite(m)]
    if not finite:
        plt.close(fig)
        return False
    top = max(finite) + 0.05 * (max(finite) - min(finite) or 1.0)
    for g in groups:
        label = g.variant if not g.point else f"{g.variant} ({point_text(g.point)})"
        xs = [v for v, m in g.means.items() if math.isfinite(m)]
        (line,) = ax.plot(xs, [g.means[v] for v in xs], marker="o", ms=3.5, label=label)
        bad = [v for v, m in g.means.items() if not math.isfinite(m)]
        if bad:
            ax.plot(bad, [top] * len(bad), "x", color=line.get_color(), ms=7)
        if math.isfinite(g.means[g.chosen]):
            ax.plot([g.chosen], [g.means[g.chosen]], "*", color=line.get_color(), ms=15, markeredgecolor="black")
    if all(v > 0 for g in groups for v in g.scores):
        ax.set_xscale("log")
    ax.set_xlabel(f"{tuned.tuning.key} (searched values)")
    ax.set_ylabel("final validation loss (nats/token)")
    ax.grid(True, alpha=0.3, which="both")
    ax.legend(fontsize=7)
    finish(fig, path)
    return True


def _tuning_caption(tuning: Tuning) -> str:
    return (f"Stage 1: final validation loss against {tuning.key} (mean over the tuning seeds "
            f"{', '.join(map(str, tuning.seeds))}); star: the value chosen for each variant; x at the top: a cell "
            "diverged or failed at that value.")


def family_reference(family: Family) -> str:
    return next((c.reference for c in family.comparisons + family.null), "the reference")


def _forest_caption(family: Family) -> str:
    return (f"Paired differences to the reference (variant minus reference; dot: mean). Thick: "
            f"{percent_text(stats.LEVEL)} simultaneous interval over the grid's {family.size} comparison(s) (what the "
            f"verdicts use); thin: unadjusted 95% interval. Shaded: ±{family.design.smallest_effect:g} nats/token, "
            "the smallest effect that matters.")


def _params_plot(plt: Any, path: Path, groups: list[Group]) -> bool:
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    plotted = False
    for g in groups:
        finals = [float(loss) for r in g.done if (loss := r["final_val_loss"]) is not None]
        params = mean_of([r["params_non_embedding"] for r in g.done])
        if not finals or params is None:
            continue
        iv = stats.mean_interval(finals)
        yerr = None if iv.half_width is None else [[iv.half_width], [iv.half_width]]
        ax.errorbar([params], [iv.mean], yerr=yerr, fmt="o", capsize=4, label=g.label)
        plotted = True
    if not plotted:
        plt.close(fig)
        return False
    ax.set_xscale("log")
    ax.set_xlabel("non-embedding parameters")
    ax.set_ylabel("final validation loss (nats/token)")
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7)
    finish(fig, path)
    return True


def _curve_plots(plt: Any, grid_dir: Path, groups: list[Group]) -> list[tuple[str, str]]:
    curves = {g.label: [_val_curve(grid_dir, r) for r in g.done] for g in groups}
    curves = {k: [c for c in v if c] for k, v in curves.items()}
    written: list[tuple[str, str]] = []
    fig_t, ax_t = plt.subplots(figsize=(6.4, 4.2))
    fig_w, ax_w = plt.subplots(figsize=(6.4, 4.2))
    any_curve = False
    for label, cs in curves.items():
        if not cs:
            continue
        xs, walls, means, lows, highs = _band(cs)
        if not xs:
            continue
        any_curve = True
        (line,) = ax_t.plot(xs, means, label=label, marker="o", ms=2.5)
        ax_t.fill_between(xs, lows, highs, color=line.get_color(), alpha=0.2, linewidth=0)
        if all(math.isfinite(w) for w in walls):
            ax_w.plot(walls, means, label=label, color=line.get_color(), marker="o", ms=2.5)
            ax_w.fill_between(walls, lows, highs, color=line.get_color(), alpha=0.2, linewidth=0)
    label_token_axis(ax_t.xaxis)
    for fig, ax, name, xlabel, caption in (
        (fig_t, ax_t, "val_loss_vs_tokens.png", "training tokens", f"Validation loss vs training tokens ({BAND})."),
        (fig_w, ax_w, "val_loss_vs_wall.png", "wall-clock seconds (mean over seeds)",
         f"Validation loss vs wall-clock time of each cell ({BAND}; time as measured on the machines that ran "
         "the cells, with the grid's parallelism)."),
    ):
        if any_curve:
            ax.set_xlabel(xlabel)
            ax.set_ylabel("validation loss (nats/token)")
            ax.grid(True, alpha=0.3)
            ax.legend(fontsize=7)
            finish(fig, grid_dir / name)
            written.append((name, caption))
        else:
            plt.close(fig)
    return written


def noise_plot(path: Path, curves: list[NoiseCurve], smallest_effect: float) -> bool:
    """noise.png: detectable difference and paired sd against training tokens, written atomically; False (nothing
    written) without two evaluations with tokens."""
    drawn = [c for c in curves if sum(p.sd is not None and p.tokens is not None for p in c.points) >= 2]
    if not drawn:
        return False
    from matplotlib.ticker import ScalarFormatter

    plt = pyplot()
    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4.2))
    for c in drawn:
        pts = [p for p in c.points if p.sd is not None and p.tokens is not None]
        xs = [p.tokens for p in pts]
        style = {"ls": "--", "color": "black"} if c.null_control else {}
        name = c.label
        if not c.null_control:
            left.plot(xs, [p.detectable for p in pts], marker="o", ms=3, label=name)
        right.plot(xs, [p.sd for p in pts], marker="o", ms=3, label=name, **style)
    left.axhline(smallest_effect, color="grey", ls=":", label=f"smallest effect {smallest_effect:g}")
    left.set_ylabel("detectable difference (nats/token)")
    right.set_ylabel("paired sd (nats/token)")
    for ax in (left, right):
        ax.set_xlabel("training tokens")
        label_token_axis(ax.xaxis)
        plain = ScalarFormatter(useOffset=False)
        plain.set_scientific(False)
        ax.yaxis.set_major_formatter(plain)
        ax.set_ylim(bottom=0)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7)
    finish(fig, path)
    return True
