"""The grid report: verdicts with simultaneous error bars (report.md / .html, verdicts.csv, results.csv, plots).

Inputs are the grid index (every cell's status and final metrics, the grid's design) and each
cell's ``metrics.jsonl`` (for the curves). The statistics come from ``blockyard.grid.verdicts``
(comparisons, family, divergence) and ``blockyard.grid.stats`` (pure numbers); this module only
lays them out: the verdicts and their forest plot first, then the noise floor (null control),
the variants with their costs, the cells left out, the curves, and the method in plain words.
A grid with a ladder of sizes also gets a Ladder section (``blockyard.grid.ladder``: a loss fit per
variant, the trend of each gap), trend.csv, fits.csv and two plots.
"""

from __future__ import annotations

import base64
import csv
import dataclasses
import html
import io
import math
import re
from pathlib import Path
from typing import Any

from blockyard import fs, palette
from blockyard.errors import UserError
from blockyard.grid import stats
from blockyard.grid.fairness import MATCH_TOLERANCE
from blockyard.grid.index import INDEX_NAME, open_index
from blockyard.grid.ladder import (
    FIT_COLUMNS,
    TREND_COLUMNS,
    Ladder,
    LadderTrends,
    fit_rows,
    ladder_trends,
    rung_of,
    series_label,
    trend_rows,
)
from blockyard.grid.ladder import split_point as split_rung
from blockyard.grid.noise import NoiseCurve, noise_curves
from blockyard.grid.noise_files import grid_curves
from blockyard.grid.noise_report import NOISE_COLUMNS, NOISE_PLOT, noise_plot, noise_rows, noise_section
from blockyard.grid.rounds import plan_rounds
from blockyard.grid.spec import NULL_INIT_OFFSET, NULL_VARIANT, Design
from blockyard.grid.status import cell_dir
from blockyard.grid.tuning import TUNING_DIR, TunedGroup, Tuning, shared_value_differences, split_point, tuned_groups
from blockyard.grid.verdicts import (
    Comparison,
    Family,
    common_seed_means,
    compare_all,
    group_outcomes,
    point_text,
    value_text,
)
from blockyard.rundir import METRICS_FILE, read_metrics

CAUTION = (
    "These verdicts hold for this model size, this data and this training budget only. Effects seen in tiny "
    "models can shrink, vanish or reverse at scale: confirm at the scale you care about before relying on them."
)
BAND = "line: mean over seeds; band: min to max over seeds"
# Measured in tests/test_divergence_verdicts.py (test_right_skewed_null_family_error); the Method quotes it.
SKEW_FAMILY_ERROR = "about 10% at 5 pairs and 8% at 10 pairs"
FOREST = "verdicts.png"
TUNING_PLOT = "tuning.png"
LOSS_VS_N = "ladder_loss_vs_params.png"
GAP_VS_N = "ladder_gap_vs_params.png"


@dataclasses.dataclass
class Group:
    """The cells of one variant at one axis point (for curves and costs)."""

    variant: str
    point: tuple[tuple[str, Any], ...]
    rows: list[dict[str, Any]]

    @property
    def key(self) -> tuple[str, tuple[tuple[str, Any], ...]]:
        return (self.variant, self.point)

    @property
    def label(self) -> str:
        return self.variant if not self.point else f"{self.variant} ({point_text(self.point)})"

    @property
    def point_text(self) -> str:
        return point_text(self.point)

    @property
    def done(self) -> list[dict[str, Any]]:
        return [r for r in self.rows if r["status"] == "done" and _finite(r["final_val_loss"])]


def _finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and math.isfinite(x)


def _fmt(x: float | None, digits: int = 4) -> str:
    return "-" if x is None or not math.isfinite(x) else f"{x:.{digits}f}"


def _signed(x: float | None, digits: int = 4) -> str:
    return "-" if x is None or not math.isfinite(x) else f"{x:+.{digits}f}"


def _count(n: float | None) -> str:
    if n is None or not math.isfinite(n):
        return "-"
    for div, suffix in ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(n) >= div:
            return f"{n / div:.3g}{suffix}"
    return f"{n:.3g}"


def _ci_text(iv: stats.Interval | None, signed: bool = False) -> str:
    if iv is None:
        return "-"
    if iv.low is None or iv.high is None:
        return stats.NO_INTERVAL
    f = _signed if signed else _fmt
    return f"[{f(iv.low)}, {f(iv.high)}]"


def _mean(values: list[float]) -> float | None:
    values = [v for v in values if _finite(v)]
    return sum(values) / len(values) if values else None


def _pct(x: float) -> str:
    return f"{100 * x:.4g}%"


def group_cells(rows: list[dict[str, Any]]) -> list[Group]:
    groups: dict[tuple, Group] = {}
    for r in rows:
        key = (r["variant"], tuple(tuple(p) for p in r["point"]))
        if key not in groups:
            groups[key] = Group(r["variant"], key[1], [])
        groups[key].rows.append(r)
    return list(groups.values())


# ----------------------------------------------------------------------------- inputs


@dataclasses.dataclass(frozen=True)
class GridResults:
    """Everything the report says, computed once from the index rows and the recorded design."""

    name: str
    description: str
    reference: str | None
    match: str
    design: Design
    design_changed: bool
    cost_note: str  # which cost figures were measured rather than computed (plugin mixers)
    rows: list[dict[str, Any]]
    groups: list[Group]
    family: Family
    rounds: str | None  # "N rounds ran; <why it stopped>" with a seed schedule
    tuning: TuningResults | None = None  # stage 1 of a grid with a ``tune`` block
    ladder: Ladder | None = None
    trends: LadderTrends | None = None  # with a ladder
    # variant -> model.parametrization of its cells ("mixed" when they differ); read only under tune.rungs: first
    parametrizations: dict[str, str] = dataclasses.field(default_factory=dict)
    # variants whose cells use a plugin mixer declared token-local (no mixing in time, on purpose)
    token_local: frozenset[str] = frozenset()
    # the noise levers the cells' configs used: model.init_draws and train.ema_half_life -> the values seen
    levers: dict[str, frozenset[Any]] = dataclasses.field(default_factory=dict)


@dataclasses.dataclass(frozen=True)
class TuningResults:
    """Stage 1: the block, its cells' records, and each (variant, point)'s choice (None while cells may train)."""

    tuning: Tuning
    rows: list[dict[str, Any]]
    groups: list[TunedGroup] | None

    def chosen(self, variant: str, point: tuple) -> float | None:
        return next((g.chosen for g in self.groups or () if g.variant == variant
                     and g.point == self.tuning.tuned_point(point)), None)


def grid_results(rows: list[dict[str, Any]], meta: dict[str, str | None], default_name: str,
                 tuning_rows: list[dict[str, Any]] | None = None,
                 parametrizations: dict[str, str] | None = None) -> GridResults:
    reference = meta.get("reference") or None
    design = Design.from_json(meta.get("design"))
    tuning = Tuning.from_json(meta.get("tuning"))
    tuned = None
    if tuning is not None:
        tuned = TuningResults(tuning, tuning_rows or [], tuned_groups(tuning_rows or [], tuning,
                                                                      design.smallest_effect))
    outcomes = group_outcomes(rows)
    family = compare_all(outcomes, reference, design)
    rounds = None
    if design.schedule is not None:
        state = plan_rounds(design, list(outcomes), reference, design.schedule.seed_order(), outcomes)
        rounds = (f"{state.rounds} round(s) ran; {state.reason}" if state.complete
                  else f"round {state.rounds} still running, {state.reason}")
    groups = group_cells(rows)
    ladder = Ladder.from_json(meta.get("ladder"))
    trends = None
    if ladder is not None:
        params = {g.key: p for g in groups if (p := _mean([r["params_non_embedding"] for r in g.rows
                                                           if r.get("params_non_embedding")])) is not None}
        trends = ladder_trends(ladder, reference, {k: g.losses for k, g in outcomes.items()}, params,
                               skip=(NULL_VARIANT,))
    return GridResults(meta.get("name") or default_name, meta.get("description") or "", reference,
                       meta.get("match") or "none", design, meta.get("design_changed") == "1",
                       meta.get("cost_note") or "", rows,
                       groups, family, rounds, tuned, ladder, trends, parametrizations or {})


def read_parametrizations(grid_dir: Path, rows: list[dict[str, Any]]) -> dict[str, str]:
    """Variant -> ``model.parametrization`` of its cells' configs (GRID_DIR/configs/), one config read per group;
    "mixed" when its groups differ; a variant with no readable config is left out."""
    from blockyard.config import read_yaml

    seen: dict[str, set[str]] = {}
    for g in group_cells(rows):
        try:
            model = read_yaml(grid_dir / "configs" / f"{g.rows[0]['id']}.yaml").get("model") or {}
        except UserError:
            continue
        seen.setdefault(g.variant, set()).add(str(model.get("parametrization", "standard")))
    return {v: next(iter(p)) if len(p) == 1 else "mixed" for v, p in seen.items()}


LEVER_KEYS = (("model", "init_draws", "by_path"), ("train", "ema_half_life", 0.0))


def read_levers(grid_dir: Path, rows: list[dict[str, Any]]) -> dict[str, frozenset[Any]]:
    """``model.init_draws`` and ``train.ema_half_life`` -> the values the cells' configs (GRID_DIR/configs/) use,
    one config read per group; a config without the key (written before it existed) counts as its default."""
    from blockyard.config import read_yaml

    seen: dict[str, set[Any]] = {f"{sec}.{key}": set() for sec, key, _ in LEVER_KEYS}
    for g in group_cells(rows):
        try:
            cfg = read_yaml(grid_dir / "configs" / f"{g.rows[0]['id']}.yaml")
        except UserError:
            continue
        for sec, key, default in LEVER_KEYS:
            seen[f"{sec}.{key}"].add((cfg.get(sec) or {}).get(key, default))
    return {k: frozenset(v) for k, v in seen.items()}


def lever_items(levers: dict[str, frozenset[Any]]) -> list[str]:
    """The Method's sentences on what the noise levers change about what is measured."""
    items = []
    draws = levers.get("model.init_draws", frozenset())
    if draws == {"by_path"}:
        items.append(
            "Initialisation (`model.init_draws: by_path`): every weight is drawn from a generator keyed by the init "
            "seed and its path in the model (MLPs unit by unit), so at the same seed the modules two variants share "
            "start identical and only what differs starts differently (common random numbers). The null control "
            "runs under another init seed and shares nothing, so its spread is an upper bound of a pair's.")
    elif draws == {"stream"}:
        items.append("Initialisation (`model.init_draws: stream`): one random stream in module order, so two "
                     "variants at the same seed start differently in every module after the first that differs.")
    elif len(draws) > 1:
        items.append("Initialisation: the cells mix `model.init_draws` values; pairs across them share less.")
    ema = sorted(float(v) for v in levers.get("train.ema_half_life", frozenset()))
    if any(v > 0 for v in ema):
        items.append(
            "Weight average (`train.ema_half_life` " + ", ".join(f"{v:g}" for v in ema) + " of the run): the loss "
            "is that of an exponential moving average of the weights, not of the last trained weights (whose loss "
            "is `raw_loss` in each run's metrics). It measures the averaged model, which lags the trained one.")
    return items


def read_token_local(grid_dir: Path, rows: list[dict[str, Any]]) -> frozenset[str]:
    """Variants whose first cell's env.json says the contract gate found a mixer declared token-local."""
    from blockyard.check import TOKEN_LOCAL_MARK
    from blockyard.rundir import ENV_FILE, read_json

    return frozenset(g.variant for g in group_cells(rows)
                     if TOKEN_LOCAL_MARK in str((read_json(cell_dir(grid_dir, g.rows[0]["id"]) / ENV_FILE) or {})
                                                .get("mixer_check", "")))


# ----------------------------------------------------------------------------- curves and plots


def _val_curve(grid_dir: Path, row: dict[str, Any]) -> list[tuple[float, float, float]]:
    """(tokens, wall_s, val loss) per validation line of a cell."""
    lines = read_metrics(cell_dir(grid_dir, row["id"]) / METRICS_FILE)
    per_step = None
    for ln in lines:
        if ln.get("split") == "train" and ln.get("tokens") and ln.get("step"):
            per_step = ln["tokens"] / ln["step"]
    if per_step is None and row.get("tokens_seen") and row.get("steps"):
        per_step = row["tokens_seen"] / row["steps"]
    out = []
    for ln in lines:
        if ln.get("split") == "val" and _finite(ln.get("loss")) and per_step:
            out.append((ln["step"] * per_step, float(ln.get("wall_s") or math.nan), float(ln["loss"])))
    return out


def _band(curves: list[list[tuple[float, float, float]]]) -> tuple[list[float], list[float], list[float], list[float],
                                                                 list[float]]:
    """Over the steps every seed has: x (tokens), mean wall_s, mean, min, max of the loss."""
    common = sorted(set.intersection(*(set(c[0] for c in curve) for curve in curves))) if curves else []
    xs, walls, means, lows, highs = [], [], [], [], []
    for x in common:
        points = [next(p for p in curve if p[0] == x) for curve in curves]
        losses = [p[2] for p in points]
        xs.append(x)
        walls.append(sum(p[1] for p in points) / len(points))
        means.append(sum(losses) / len(losses))
        lows.append(min(losses))
        highs.append(max(losses))
    return xs, walls, means, lows, highs


def write_plots(grid_dir: Path, res: GridResults) -> list[tuple[str, str]]:
    """PNG files in the grid dir, the forest plot first; returns (file name, caption) for each written."""
    import matplotlib

    matplotlib.use("Agg")
    palette.use_palette(matplotlib)
    import matplotlib.pyplot as plt

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
    fig.tight_layout()
    save_png(fig, path)
    plt.close(fig)
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
    fig.tight_layout()
    save_png(fig, path)
    plt.close(fig)
    return True


def _tuning_caption(tuning: Tuning) -> str:
    return (f"Stage 1: final validation loss against {tuning.key} (mean over the tuning seeds "
            f"{', '.join(map(str, tuning.seeds))}); star: the value chosen for each variant; x at the top: a cell "
            "diverged or failed at that value.")


def family_reference(family: Family) -> str:
    return next((c.reference for c in family.comparisons + family.null), "the reference")


def _forest_caption(family: Family) -> str:
    return (f"Paired differences to the reference (variant minus reference; dot: mean). Thick: "
            f"{_pct(stats.LEVEL)} simultaneous interval over the grid's {family.size} comparison(s) (what the "
            f"verdicts use); thin: unadjusted 95% interval. Shaded: ±{family.design.smallest_effect:g} nats/token, "
            "the smallest effect that matters.")


def axis_varies_size(groups: list[Group]) -> bool:
    """True when the mean non-embedding parameters differ across axis points by more than the matching tolerance."""
    by_point: dict[tuple, list[float]] = {}
    for g in groups:
        params = _mean([r["params_non_embedding"] for r in g.rows if r.get("params_non_embedding")])
        if params:
            by_point.setdefault(g.point, []).append(params)
    means = [sum(v) / len(v) for v in by_point.values()]
    return len(means) > 1 and max(means) > (1 + MATCH_TOLERANCE) * min(means)


def _params_plot(plt: Any, path: Path, groups: list[Group]) -> bool:
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    plotted = False
    for g in groups:
        finals = [float(r["final_val_loss"]) for r in g.done]
        params = _mean([r["params_non_embedding"] for r in g.done])
        if not finals or params is None:
            continue
        iv = stats.mean_interval(finals)
        yerr = None if iv.half_width is None else [[iv.half_width], [iv.half_width]]
        ax.errorbar([params], [iv.mean], yerr=yerr, fmt="o", capsize=4, label=g.label)
        plotted = True
    if plotted:
        ax.set_xscale("log")
        ax.set_xlabel("non-embedding parameters")
        ax.set_ylabel("final validation loss (nats/token)")
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7)
        fig.tight_layout()
        save_png(fig, path)
    plt.close(fig)
    return plotted


def token_unit(top: float) -> tuple[float, str]:
    """(divisor, suffix) of the one unit a token axis reaching ``top`` is labelled in: G, M, k or none."""
    for div, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(top) >= div:
            return div, suffix
    return 1.0, ""


def label_token_axis(axis: Any) -> None:
    """Tick labels such as 0.2M ... 1.4M, one unit for the whole axis, instead of matplotlib's offset ("1e6")."""
    from matplotlib.ticker import FuncFormatter

    def text(x: float, _pos: Any) -> str:
        div, suffix = token_unit(max(abs(v) for v in axis.get_view_interval()))
        return "0" if x == 0 else f"{x / div:.4g}{suffix}"

    axis.set_major_formatter(FuncFormatter(text))


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
            fig.tight_layout()
            save_png(fig, grid_dir / name)
            written.append((name, caption))
        plt.close(fig)
    return written


# ----------------------------------------------------------------------------- document


@dataclasses.dataclass
class Doc:
    """A report as blocks, rendered both as Markdown and as self-contained HTML."""

    blocks: list[tuple] = dataclasses.field(default_factory=list)

    def h(self, level: int, text: str) -> None:
        self.blocks.append(("h", level, text))

    def p(self, text: str) -> None:
        self.blocks.append(("p", text))

    def ul(self, items: list[str]) -> None:
        self.blocks.append(("ul", items))

    def table(self, header: list[str], rows: list[list[str]]) -> None:
        self.blocks.append(("table", header, rows))

    def img(self, name: str, caption: str) -> None:
        self.blocks.append(("img", name, caption))

    def markdown(self) -> str:
        out: list[str] = []
        for b in self.blocks:
            if b[0] == "h":
                out.append("#" * b[1] + " " + b[2])
            elif b[0] == "p":
                out.append(b[1])
            elif b[0] == "ul":
                out.append("\n".join(f"- {item}" for item in b[1]))
            elif b[0] == "table":
                cell = lambda s: str(s).replace("|", "\\|")
                lines = ["| " + " | ".join(cell(c) for c in b[1]) + " |", "|" + "---|" * len(b[1])]
                lines += ["| " + " | ".join(cell(c) for c in row) + " |" for row in b[2]]
                out.append("\n".join(lines))
            elif b[0] == "img":
                out.append(f"![{b[2]}]({b[1]})\n\n*{b[2]}*")
        return "\n\n".join(out) + "\n"

    def html(self, grid_dir: Path, title: str) -> str:
        e = html.escape
        out = [f"<!doctype html><html><head><meta charset='utf-8'><title>{e(title)}</title><style>"
               "body{font-family:sans-serif;max-width:70em;margin:2em auto;padding:0 1em;line-height:1.4}"
               "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #ccc;padding:.25em .6em;"
               "text-align:left}th{background:#f3f3f3}img{max-width:100%}figcaption{font-style:italic}"
               ".wide{overflow-x:auto;max-width:100%}"
               "</style></head><body>"]
        for b in self.blocks:
            if b[0] == "h":
                out.append(f"<h{b[1]}>{_inline_html(b[2])}</h{b[1]}>")
            elif b[0] == "p":
                out.append(f"<p>{_inline_html(b[1])}</p>")
            elif b[0] == "ul":
                out.append("<ul>" + "".join(f"<li>{_inline_html(i)}</li>" for i in b[1]) + "</ul>")
            elif b[0] == "table":
                head = "".join(f"<th>{e(str(c))}</th>" for c in b[1])
                body = "".join("<tr>" + "".join(f"<td>{_inline_html(str(c))}</td>" for c in row) + "</tr>"
                               for row in b[2])
                # A table wider than the page scrolls inside it instead of running off its right edge.
                out.append(f"<div class='wide'><table><tr>{head}</tr>{body}</table></div>")
            elif b[0] == "img":
                data = base64.b64encode((grid_dir / b[1]).read_bytes()).decode()
                out.append(f"<figure><img alt='{e(b[2])}' src='data:image/png;base64,{data}'>"
                           f"<figcaption>{_inline_html(b[2])}</figcaption></figure>")
        out.append("</body></html>")
        return "\n".join(out)


_CODE = re.compile(r"`([^`]+)`")
_STRONG = re.compile(r"\*\*(?=\S)(.+?)(?<=\S)\*\*")
# *x*: a star not touching a word or another star on its outer side, and no space on its inner side,
# so products such as ``2*3`` or ``a * b`` stay as written.
_EM = re.compile(r"(?<![\w*])\*(?=[^\s*])(.+?)(?<=[^\s*])\*(?![\w*])")


def _inline_html(text: str) -> str:
    """Escape, then turn Markdown's `code`, **strong** and *emphasis* into tags (the only inline marks we
    write); nothing inside a code span is read as emphasis."""
    parts = _CODE.split(text)  # odd positions are the insides of code spans
    out = []
    for i, part in enumerate(parts):
        s = html.escape(part)
        if i % 2:
            out.append(f"<code>{s}</code>")
        else:
            out.append(_EM.sub(r"<em>\1</em>", _STRONG.sub(r"<strong>\1</strong>", s)))
    return "".join(out)


# ----------------------------------------------------------------------------- the report


CSV_COLUMNS = ("id", "variant", "point", "seed", "status", "final_val_loss", "best_val_loss", "params_total",
               "params_non_embedding", "flops_per_token", "planned_tokens", "tokens_seen", "steps", "tokens_per_s",
               "wall_s", "adjustments", "config_hash", "message")
VERDICT_COLUMNS = ("variant", "point", "pairs", "mean_diff", "low", "high", "low_unadjusted", "high_unadjusted",
                   "paired_sd", "smallest_effect", "verdict", "seeds_needed", "diverged_variant",
                   "diverged_reference", "note", "in_family", "confidence", "family_size", "sd_upper",
                   "seeds_for_difference", "seeds_for_equivalence", "detectable_diff", "failed_variant",
                   "failed_reference", "composite_verdict", "composite_p_better", "composite_p_worse",
                   "divergence_mcnemar_p", "seeds", "fragile")


def write_csv(path: Path, rows: list[dict[str, Any]]) -> None:
    """results.csv: one row per cell."""
    table = []
    for r in rows:
        values = []
        for c in CSV_COLUMNS:
            v = r.get(c)
            if c == "point":
                v = "; ".join(f"{k}={value}" for k, value in (_point_items(r["point"])))
            elif c == "adjustments":
                v = "; ".join(f"{k}={x:g}" if isinstance(x, float) else f"{k}={x}" for k, x in r[c].items())
            values.append(v)
        table.append(values)
    _write_table(path, CSV_COLUMNS, table)


def _point_items(point: Any) -> list[tuple[str, str]]:
    return [(k, value_text(v)) for k, v in point]


def verdict_table(family: Family) -> list[list[Any]]:
    """verdicts.csv rows: every comparison of the family, then the null control's."""
    out = []
    for c in family.comparisons + family.null:
        iv, un, pl, div = c.interval, c.unadjusted, c.planning, c.divergence
        out.append([
            c.variant, "; ".join(f"{k}={v}" for k, v in _point_items(c.point)), len(c.seeds),
            iv.mean if iv else None, iv.low if iv else None, iv.high if iv else None,
            un.low if un else None, un.high if un else None, iv.sd if iv else None, c.smallest_effect, c.verdict,
            pl.seeds_needed if pl else None, len(c.variant_outcomes.diverged), len(c.reference_outcomes.diverged),
            c.note, c.in_family, 1 - family.look_alpha, family.size, pl.sd_upper if pl else None,
            pl.seeds_for_difference if pl else None, pl.seeds_for_equivalence if pl else None,
            pl.detectable if pl else None, len(c.variant_outcomes.failed), len(c.reference_outcomes.failed),
            div.verdict if div else None, div.rank.p_less if div else None, div.rank.p_greater if div else None,
            div.mcnemar_p if div else None, " ".join(map(str, c.seeds)), c.fragile,
        ])
    return out


def _write_table(path: Path, header: tuple[str, ...], rows: list[list[Any]]) -> None:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow(["" if v is None else repr(v) if isinstance(v, float) else v for v in row])
    fs.atomic_write_text(path, buf.getvalue(), what="a report table")


def save_png(fig: Any, path: Path) -> None:
    """A matplotlib figure as a PNG, written atomically (a full disk leaves the old plot, not half a new one)."""
    fs.atomic_write(path, lambda f: fig.savefig(f, format="png", dpi=110), what="a report plot")


def _adjust_text(adjustments: dict[str, Any]) -> str:
    if not adjustments:
        return "-"
    parts = []
    for k, v in adjustments.items():
        value = f"{v:.4g}" if isinstance(v, float) else f"{v:,d}" if isinstance(v, int) else str(v)
        parts.append(f"{k} = {value}")
    return "; ".join(parts)


def build_report(grid_dir: Path, res: GridResults, plots: list[tuple[str, str]],
                 noise: tuple[list[NoiseCurve], bool] = ([], False)) -> Doc:
    """The report, section by section: verdicts first (what a reader acts on), the method last; ``noise``: each
    comparison's noise along training and whether noise.png was written (blockyard.grid.noise_report)."""
    doc = Doc()
    doc.h(1, f"Grid {res.name}")
    if res.description:
        doc.p(res.description)
    _summary_section(doc, res)
    _verdicts_section(doc, res)
    _null_section(doc, res.family)
    noise_section(doc, noise[0], res.design.smallest_effect, noise[1])
    _tuning_section(doc, res, plots)
    _ladder_section(doc, res)
    _variants_section(doc, res)
    _excluded_section(doc, res.rows)
    plots = [p for p in plots if p[0] != TUNING_PLOT]  # shown in the Tuning section
    if plots:
        doc.h(2, "Plots")
        for name, caption in plots:
            doc.img(name, caption)
    _method_section(doc, res)
    doc.h(2, "Caution")
    doc.p(CAUTION if res.ladder is None else CAUTION + " The Ladder section measures how each gap moved over the "
          "rungs run; a trend is a line through a few small sizes, and the further past the largest rung, the "
          "more it is a guess.")
    return doc


def _summary_section(doc: Doc, res: GridResults) -> None:
    counts: dict[str, int] = {}
    for r in res.rows:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    seeds = sorted({r["seed"] for r in res.rows})
    schedule = res.design.schedule
    most = f"{schedule.most} (auto, budget_hours {schedule.budget_hours:g})" if schedule and schedule.auto else (
        schedule.most if schedule else None)
    seeds_text = (f"seeds until decided (first {schedule.first}, most {most}, {schedule.step} per round; "
                  f"seeds run: {', '.join(map(str, seeds))})" if schedule else f"seeds {', '.join(map(str, seeds))}")
    doc.p(f"{len(res.rows)} cells ({', '.join(f'{n} {s}' for s, n in sorted(counts.items()))}); {seeds_text}; "
          f"reference: {res.reference or 'none (no variants)'}; fairness: {_match_text(res.match)}; smallest effect "
          f"that matters: {res.design.smallest_effect:g} nats/token.")
    if res.rounds:
        doc.p(f"Rounds: {res.rounds}.")
    if res.design_changed:
        doc.p("**Note:** the verdict rules (smallest effect, seed schedule or null control) were changed with "
              "--force after cells had run; the error guarantee below assumes they were fixed in advance.")


def _verdict_cell(c: Comparison) -> str:
    marks = [m for m in (c.note, "fragile" if c.fragile else "") if m]
    return f"**{c.verdict}**" + (f" ({'; '.join(marks)})" if marks else "")


def _needed_text(c: Comparison) -> str:
    if c.planning is None:
        return "-"
    return f">{stats.MAX_SEEDS}" if c.planning.seeds_needed is None else str(c.planning.seeds_needed)


def _diverged_text(c: Comparison) -> str:
    return f"{len(c.variant_outcomes.diverged)} / {len(c.reference_outcomes.diverged)}"


def _comparison_row(c: Comparison) -> list[str]:
    detectable = c.planning.detectable if c.planning else None
    return [c.variant, c.point_text, str(len(c.seeds)), _signed(c.mean_diff), _ci_text(c.interval, signed=True),
            _verdict_cell(c), _ci_text(c.unadjusted, signed=True), _needed_text(c),
            "-" if detectable is None else f"±{detectable:.4f}", _diverged_text(c)]


COMPARISON_HEADER = ["variant", "axis point", "pairs", "difference (mean)", f"{_pct(stats.LEVEL)} simultaneous CI",
                     "verdict", "unadjusted 95% CI", "seeds needed", "detectable (80% power)",
                     "diverged (variant / ref)"]


def _verdicts_section(doc: Doc, res: GridResults) -> None:
    fam = res.family
    doc.h(2, "Verdicts")
    if not fam.comparisons:
        doc.p("No comparisons: the grid has no variants besides the reference.")
        return
    counts = {v: sum(c.verdict == v for c in fam.comparisons) for v in stats.VERDICTS}
    doc.p(f"**{sum(counts[v] for v in stats.VERDICTS[:3])} of {fam.size} comparison(s) decided**: "
          + ", ".join(f"{n} {v}" for v, n in counts.items() if n) + ".")
    doc.p(f"Final validation loss (nats/token), paired by seed: variant minus **{res.reference}** at the same axis "
          f"point, on the seeds both finished; negative is better. The {fam.size} comparison(s) share one "
          f"{_pct(stats.LEVEL)} error budget: each interval is a {_pct(1 - fam.look_alpha)} paired t interval, so all "
          f"hold at once with probability ≥ {_pct(stats.LEVEL)} (see Method). Better / worse: the whole interval below "
          f"/ above 0. Equivalent: the whole interval inside ±{res.design.smallest_effect:g}. Otherwise undecided. "
          "Where the two groups diverged on different seeds, a rank test on the worst-rank composite decides "
          "instead (a diverged cell ranks worse than every finished loss; never equivalent). **Fragile**: the "
          "verdict changes when some single seed is left out.")
    doc.table(COMPARISON_HEADER, [_comparison_row(c) for c in fam.comparisons])
    notes = [n for c in fam.comparisons for n in _comparison_notes(c)]
    if notes:
        doc.ul(notes)


def _who(c: Comparison) -> str:
    return f"{c.variant}" + (f" at {c.point_text}" if c.point else "")


def _comparison_notes(c: Comparison) -> list[str]:
    notes = []
    d = c.divergence
    if d is not None:
        v, r = c.variant_outcomes, c.reference_outcomes
        line = (f"{_who(c)}: diverged on {len(v.diverged)} seed(s), the reference on {len(r.diverged)}. The verdict "
                f"is the worst-rank composite's: on {d.pairs} pair(s), {d.variant_only} where only the variant "
                f"diverged, {d.reference_only} where only the reference did; exact signed-rank p = "
                f"{d.rank.p_less:.3g} (better) / {d.rank.p_greater:.3g} (worse), McNemar exact p of the counts "
                f"alone {d.mcnemar_p:.3g}.")
        if not d.reachable:
            line += (f" No rank test on {d.pairs} pair(s) can reach the look's level: the smallest one-sided p is "
                     f"{d.rank.smallest_p:.3g}, above {_pct(c_alpha(c) / 2)}; at least "
                     f"{math.ceil(math.log2(2 / c_alpha(c)))} pairs not lost by both are needed.")
        notes.append(line)
    if c.fragile:
        notes.append(f"{_who(c)}: **fragile**: leaving out one of its seeds changes the verdict "
                     f"{c.verdict}; read it as resting on that seed.")
    if not c.decided and c.planning is not None:
        pl = c.planning
        need = lambda n: f">{stats.MAX_SEEDS}" if n is None else str(n)  # noqa: E731
        notes.append(f"{_who(c)} is undecided at {len(c.seeds)} pairs: about {need(pl.seeds_needed)} seeds per group "
                     f"would decide it with 80% power if the true difference is 0 (equivalent; "
                     f"{need(pl.seeds_for_equivalence)} seeds) or at least ±{c.smallest_effect:g} (better or worse; "
                     f"{need(pl.seeds_for_difference)} seeds){_halfway_text(c)}. Planned at the level the verdicts use "
                     f"({_pct(c_alpha(c))} two-sided), with the paired sd's upper bound {pl.sd_upper:.4f}.")
    elif c.planning is None and not c.decided and d is None:
        notes.append(f"{_who(c)}: {c.note}; at least 2 finished pairs are needed for an interval.")
    return notes


def c_alpha(c: Comparison) -> float:
    """The two-sided level a comparison's verdict used (the look's): 1 - its interval's confidence."""
    return 1 - c.interval.confidence if c.interval is not None else 1 - stats.LEVEL


def _halfway_text(c: Comparison) -> str:
    """'; at a true difference of +-delta/2 the chance is only X%': the power sentence's blind spot."""
    pl = c.planning
    if pl is None or pl.seeds_needed is None or not pl.sd_upper:
        return ""
    chance = stats.decision_probability(c.smallest_effect / 2, pl.sd_upper, pl.seeds_needed, c_alpha(c),
                                        c.smallest_effect)
    return (f"; at a true difference in between, ±{c.smallest_effect / 2:g}, the chance with {pl.seeds_needed} seeds "
            f"is {_pct(chance)}")


def _null_section(doc: Doc, fam: Family) -> None:
    if not fam.null:
        return
    doc.h(2, "Noise floor (null control)")
    doc.p("`null_control: true`: the reference trained again with another initialisation seed (`train.init_seed`) "
          "on the same data seeds, so its true difference to the reference is 0. It is not part of the family "
          "above; its interval uses the same per-comparison level, so it shows what this design calls noise.")
    doc.table(COMPARISON_HEADER, [_comparison_row(c) for c in fam.null])
    rate = stats.null_flag_rate(fam.comparison_alpha, len(fam.null))  # sequential: the looks hold it at most this
    for c in fam.null:
        if c.interval is None or c.interval.sd is None:
            continue
        where = f" at {c.point_text}" if c.point else ""
        line = (f"Two runs of the same model{where} differ by {_signed(c.interval.mean)} nats/token on average "
                f"(interval {_ci_text(c.interval, signed=True)}; paired sd {c.interval.sd:.4f}).")
        if c.verdict in (stats.BETTER, stats.WORSE):
            line = (f"**Flagged:** the null control{where} came out **{c.verdict}**, a false positive. " + line +
                    " Under a true null this happens in at most "
                    f"{_pct(rate)} of grids (about 1 in {1 / rate:,.0f}): {len(fam.null)} null comparison(s), each at "
                    f"the per-comparison level {_pct(fam.comparison_alpha)} = {_pct(1 - stats.LEVEL)} / {fam.size}. "
                    "If it comes up more often than that, the cells are probably not exchangeable across seeds "
                    "(e.g. a run depends on the init seed in another way) or the paired differences are far from "
                    "normal (see Method), and the verdicts are suspect.")
        doc.p(line)


def _tuning_section(doc: Doc, res: GridResults, plots: list[tuple[str, str]]) -> None:
    """Stage 1: each variant's chosen value, the loss-vs-value plot, edge and basin, and the exploratory
    comparison at shared values."""
    if res.tuning is None:
        return
    t, groups = res.tuning.tuning, res.tuning.groups
    delta = res.design.smallest_effect
    doc.h(2, "Tuning")
    doc.p(f"Stage 1 trained every variant at {len(t.values)} values of `{t.key}` with tuning seeds "
          f"{', '.join(map(str, t.seeds))} ({_pct(t.budget)} of the verdict cells' token budget) and chose, for "
          "each variant and axis point, **the value with the lowest mean final validation loss over the tuning "
          "seeds among the values whose next larger value did not diverge or fail on any tuning seed** (a "
          "one-step stability margin, which assumes, as for a learning rate, that larger values are the less stable "
          "ones). The largest value searched has no larger neighbour to vouch for it and is "
          "never chosen; a value that diverged on some seed is not chosen either; ties go to the smaller value; "
          "with no such value, the smallest value searched. Why: the lowest mean alone picks the largest value "
          "that happened to survive the few tuning seeds, the edge of a stability cliff, which then diverges on "
          "the verdict seeds. The verdict cells above "
          "ran at these values on seeds disjoint from the tuning seeds, so the verdicts are not measured on the "
          "noise the choice used.")
    if t.carried:
        _carried_text(doc, res, t)
    if groups is None:
        doc.p("Stage 1 has not finished: no value is chosen yet.")
        return
    header = ["variant", "axis point", f"chosen {t.key}", f"basin (within {delta:g} of the best)"]
    header += [f"loss at {v:g}" for v in t.values]
    table = []
    for g in groups:
        means = g.means
        table.append([g.variant + (" (reference)" if g.variant == res.reference else ""), point_text(g.point),
                      f"{g.chosen:g}", _basin_text(g)]
                     + [("**" if v == g.chosen else "") + (_fmt(means.get(v)) if math.isfinite(means.get(v, math.inf))
                                                           else "diverged/failed") + ("**" if v == g.chosen else "")
                        for v in t.values])
    doc.table(header, table)
    if t.carried and res.ladder is not None:
        _carried_table(doc, res.ladder, groups, t, res.reference)
    warnings = [w for g in groups for w in _tuning_warnings(g, t)]
    if warnings:
        doc.ul(warnings)
    for name, caption in plots:
        if name == TUNING_PLOT:
            doc.img(name, caption)
    if len(t.seeds) >= 2 and res.reference is not None:
        _shared_value_table(doc, res, groups)


def _carried_text(doc: Doc, res: GridResults, t: Tuning) -> None:
    """``tune.rungs: first``: where the values were tuned, and whether the parametrization lets them transfer."""
    rung1 = f" ({res.ladder.overrides_text(1)})" if res.ladder is not None else ""
    doc.p(f"**Tuned on rung 1 only** (grid key `tune.rungs: first`): stage 1 ran on the smallest rung of the "
          f"ladder{rung1} alone, and each variant's chosen `{t.key}` was carried up the ladder: its verdict cells "
          "at every rung ran at the value chosen on rung 1, not at a value tuned at that rung.")
    variants = [v for v in dict.fromkeys(g.variant for g in res.groups) if v != NULL_VARIANT]
    standard = [v for v in variants if res.parametrizations.get(v) != "mup"]
    if standard:
        who = "no variant ran" if len(standard) == len(variants) else f"{', '.join(standard)} did not run"
        doc.p(f"**Caution:** {who} under `model.parametrization: mup`. A learning rate tuned at one width need not "
              "transfer to other widths under the standard parametrization: its best value drifts with width, "
              "which muP is built to prevent (Yang et al. 2022, arXiv:2203.03466). At the larger rungs a variant "
              f"may have trained far from its best `{t.key}`, and unequally so for different variants, which bends "
              "the gaps and trends of the Ladder section.")


def _carried_table(doc: Doc, ladder: Ladder, groups: list[TunedGroup], t: Tuning, reference: str | None) -> None:
    """Each variant's value at every rung under ``tune.rungs: first``: chosen on rung 1, carried to the others."""
    rows = []
    for g in groups:
        _, rest = split_rung(g.point)
        for k in range(1, len(ladder.rungs) + 1):
            rows.append([g.variant + (" (reference)" if g.variant == reference else ""), str(k),
                         ladder.overrides_text(k), point_text(rest) or "-", f"{g.chosen:g}",
                         "tuned on rung 1" if k == 1 else "carried from rung 1"])
    doc.p(f"`{t.key}` used at each rung:")
    doc.table(["variant", "rung", "overrides", "other axes", t.key, "how"], rows)


def _basin_text(g: TunedGroup) -> str:
    low, high = g.basin
    if not math.isfinite(g.means[g.chosen]):
        return "-"
    if low == high:
        return f"{low:g} only (narrower than the spacing of the values)"
    factor = f"; a factor {high / low:.3g}" if low > 0 else ""
    return f"{low:g} to {high:g}{factor}"


def _tuning_warnings(g: TunedGroup, t: Tuning) -> list[str]:
    who = g.variant + (f" at {point_text(g.point)}" if g.point else "")
    if g.all_failed:
        return [f"**{who}**: every searched value diverged or failed; the verdict cells ran at the smallest "
                f"({g.chosen:g}): search smaller values of `{t.key}`."]
    if g.no_margin:
        return [f"**{who}**: no searched value had a larger neighbour that survived every tuning seed; the verdict "
                f"cells ran at the smallest ({g.chosen:g}): search smaller values of `{t.key}`."]
    if g.best_at_largest:
        return [f"**{who}**: the lowest loss was at the largest value searched ({max(g.scores):g}), which the "
                f"stability margin never chooses; the verdict cells ran at {g.chosen:g}: widen `values` upwards."]
    if g.at_edge:
        return [f"**{who}**: the chosen {t.key} {g.chosen:g} is the smallest value searched: the optimum may lie "
                "outside: widen `values`."]
    return []


def _shared_value_table(doc: Doc, res: GridResults, groups: list[TunedGroup]) -> None:
    assert res.tuning is not None and res.reference is not None
    t = res.tuning.tuning
    doc.h(3, "At a shared value (exploratory)")
    doc.p(f"Each variant against **{res.reference}** with both at the same `{t.key}`, paired by tuning seed "
          "(variant minus reference; negative is better). **Exploratory**: measured on the tuning seeds, the same "
          "noise the choice used; plain 95% intervals, not adjusted for the many values; not part of the verdict "
          "family. It shows whether the verdict depends on the tuning: a sign that flips across values means the "
          "comparison at any one shared value would depend on which value was picked.")
    rows = []
    for d in shared_value_differences(groups, res.reference):
        iv = stats.mean_interval(list(d.diffs)) if d.diffs else None
        rows.append([d.variant, point_text(d.point), f"{d.value:g}", str(len(d.seeds)),
                     _signed(iv.mean) if iv else "-", _ci_text(iv, signed=True)])
    doc.table(["variant", "axis point", t.key, "pairs", "difference (mean)", "95% CI (unadjusted)"], rows)
def _ladder_section(doc: Doc, res: GridResults) -> None:
    """Does the gap close with size: each variant's fit over the rungs, each gap's trend in one sentence."""
    lad, lt = res.ladder, res.trends
    if lad is None or lt is None:
        return
    from blockyard.grid.trend import METHOD, describe

    doc.h(2, "Ladder: does the gap close with size?")
    budget = (f"each rung trains on {lad.tokens_per_param:g} tokens per non-embedding parameter of the reference"
              if lad.tokens_per_param is not None else "every rung keeps the base's training budget")
    doc.p(f"{len(lad.rungs)} rungs of model size, {budget}; every rung is an axis point of the verdicts above. "
          f"N is a group's non-embedding parameter count. {_ladder_tuning_text(res.tuning)}")
    by_rung: dict[int, list[str]] = {}
    for g in res.groups:
        k = rung_of(g.point)
        n = _mean([r["params_non_embedding"] for r in g.rows if r.get("params_non_embedding")])
        if k is not None and g.variant != NULL_VARIANT:
            by_rung.setdefault(k, []).append(f"{g.variant} {_count(n)}")
    tokens = {rung_of(tuple(tuple(p) for p in r["point"])): r["planned_tokens"] for r in res.rows
              if r["variant"] == res.reference}
    doc.table(["rung", "overrides", "N per variant", "tokens (reference)"],
              [[str(k), lad.overrides_text(k), ", ".join(dict.fromkeys(by_rung.get(k, []))),
                _count(tokens.get(k))] for k in range(1, len(lad.rungs) + 1)])
    if lt.fits:
        doc.p("Loss against size, per variant (fits.csv): L(N) = E + A·N^-alpha by least squares over every seed "
              "with 4 or more rungs; with fewer, log L on log N without E (3 parameters from 3 sizes would fit any "
              "noise). alpha's interval: alpha ± t(n−3)·SE from the least-squares covariance (n−2 and the OLS slope in "
              "the log form); E's and A's: percentile bootstrap over seeds within each rung.")
        doc.table(["variant", "form", "alpha", "interval", "E", "interval", "A", "rungs", "note"],
                  [[series_label(k), f.form, f"{f.alpha:.4f}", _pair(f.alpha_low, f.alpha_high),
                    "-" if f.E is None else f"{f.E:.4f}", "-" if f.E is None else _pair(f.E_low, f.E_high),
                    f"{f.A:.4g}", str(f.n_rungs), f.note or "-"] for k, f in lt.fits.items()])
    if lt.trends:
        doc.p(f"Trend of each gap to {res.reference} (trend.csv): {METHOD}. The rungs, not the seeds, carry the "
              "slope, so a rung's own deviation (tuning noise shared by its seeds, a depth change) widens the "
              "interval instead of faking a trend. The slope is the change of the gap per doubling of parameters, "
              "with its 95% interval (per comparison, not simultaneous). Shrinking / growing: the interval excludes "
              "0 and |gap| falls / rises with N; reverses: it excludes 0 and the fitted gap changes sign inside the "
              "ladder; a positive gap means the variant is worse.")
        doc.ul([f"**{series_label(k)}** vs {res.reference}: {describe(t)}." for k, t in lt.trends.items()])
    if lt.notes:
        doc.ul(lt.notes)


def _ladder_tuning_text(tuned: TuningResults | None) -> str:
    """Which tuning the fits and trends below rest on."""
    if tuned is None:
        return "No tuning: every variant ran at its configured values at every rung."
    key = tuned.tuning.key
    if tuned.tuning.carried:
        return (f"Tuning: each variant's `{key}` was tuned on rung 1 only and carried up the ladder "
                "(`tune.rungs: first`), so the fits and trends compare the variants at their rung-1 values at "
                "every rung.")
    return (f"Tuning: each variant's `{key}` was tuned at every rung on its own (`tune.rungs: all`), so the fits "
            "and trends compare each variant at its best searched value at each size.")


def _pair(low: float | None, high: float | None) -> str:
    if low is None or high is None or not (math.isfinite(low) and math.isfinite(high)):
        return "-"
    return f"[{low:.4g}, {high:.4g}]"


def _variants_section(doc: Doc, res: GridResults) -> None:
    outcomes = group_outcomes(res.rows)
    means = common_seed_means(outcomes)
    table = []
    for g in res.groups:
        o = outcomes[g.key]
        pairs, iv = means[g.key]
        first = g.rows[0]
        fpt = first.get("flops_per_token")
        tokens = _mean([r["tokens_seen"] for r in g.done]) or first["planned_tokens"]
        name = g.variant + (" (reference)" if g.variant == res.reference else "") + \
            (" (token-local)" if g.variant in res.token_local else "")
        table.append([
            name, g.point_text, f"{len(o.losses)} / {len(o.diverged)} / {len(o.failed)}", str(pairs),
            _fmt(iv.mean) if iv else "-", _ci_text(iv) if iv else "-",
            _count(_mean([r["params_non_embedding"] for r in g.rows if r.get("params_non_embedding")])),
            _count(_mean([r["params_total"] for r in g.rows if r.get("params_total")])),
            _count(fpt), _count(tokens), _count(fpt * tokens if fpt is not None and tokens else None),
            _count(_mean([r["tokens_per_s"] for r in g.done])), _fmt(_mean([r["wall_s"] for r in g.done]), 1),
            _adjust_text(first["adjustments"]),
        ])
    doc.h(2, "Variants")
    doc.p("Final validation loss: mean over the seeds that *every* group at the same axis point finished (column "
          "'common seeds'), so the gap between two rows is the mean paired difference on the same seeds; a group "
          "that lost its worst seeds to divergence cannot look better for it.")
    doc.table(["variant", "axis point", "seeds done / diverged / failed", "common seeds", "final val loss", "95% CI",
               "params (non-emb)", "params (total)", "FLOPs/token", "train tokens", "train FLOPs", "tokens/s",
               "wall s per cell", "fairness adjustment"], table)
    if res.match == "params":
        doc.p("Parameter matching changed `model.mlp_expansion` (the MLP hidden size) of every non-reference "
              f"variant so that its non-embedding parameters are within {MATCH_TOLERANCE:.0%} of the reference's; "
              "the column 'fairness adjustment' gives the value used.")
    elif res.match == "flops":
        doc.p("FLOP matching changed `train.tokens` (the token budget) of every non-reference variant so that "
              "FLOPs/token x tokens equals the reference's training FLOPs (up to whole optimizer steps); the "
              "column 'fairness adjustment' gives the budget used.")
    if res.cost_note:
        doc.p(res.cost_note)
    if res.token_local:
        doc.p("Variants marked (token-local) use a block that declares it mixes nothing in time (output t depends "
              "on input t alone): a no-mixing baseline on purpose, not a block that failed to mix.")


def _excluded_section(doc: Doc, rows: list[dict[str, Any]]) -> None:
    excluded = [r for r in rows if not (r["status"] == "done" and _finite(r["final_val_loss"]))]
    doc.h(2, "Cells without a final loss")
    if not excluded:
        doc.p("None: every cell finished.")
        return
    doc.p("These cells diverged, failed or have not finished. Diverged cells are outcomes: they are counted per "
          "group above, and where the compared groups diverged on different seeds the verdict comes from the "
          "worst-rank composite, in which a diverged cell ranks worse than every finished loss (see Method). Failed "
          "cells (an error, not the training) are retried by a rerun and are not outcomes.")
    doc.table(["cell", "status", "exit code", "message"],
              [[r["id"], r["status"], "-" if r["exit_code"] is None else str(r["exit_code"]),
                (r["message"] or "-")[:200]] for r in excluded])


def _method_section(doc: Doc, res: GridResults) -> None:
    fam, design = res.family, res.design
    items = [
        "Final validation loss: the trainer's last evaluation on the fixed validation windows, in nats per token.",
        "Pairing: a cell's seed sets its initialisation, its batches and its validation windows; variants are "
        "compared seed by seed (variant minus reference at the same axis point), on the seeds both finished. "
        "Grids may not override `train.seed`, `train.data_seed` or `train.init_seed`, so pairs stay pairs.",
        f"Family: the grid's {fam.size} comparison(s) (every non-reference variant at every axis point) share one "
        f"error budget of {_pct(1 - stats.LEVEL)}. Bonferroni: each comparison gets {_pct(fam.comparison_alpha)} "
        "(two-sided), so the chance that any interval in the grid misses its true difference is at most "
        f"{_pct(1 - stats.LEVEL)}, whatever the correlation between comparisons (they share the reference). Every "
        "verdict read off intervals that all cover is right, so this bounds the chance of any wrong verdict.",
        f"Interval: mean ± t · sd / √n over the n paired differences (Student t, n−1 degrees of freedom), at "
        f"{_pct(1 - fam.look_alpha)} per comparison. The unadjusted column is the plain 95% interval, "
        "for reading one comparison alone; verdicts never use it.",
        "Assumptions of the error bound: the paired differences are independent across seeds (each seed its own "
        "run) and close enough to normal for the t interval. Skew breaks it: in the project's simulation with "
        "right-skewed (lognormal, σ 0.5) paired differences, no true difference and 6 comparisons, the "
        f"family error was {SKEW_FAMILY_ERROR} instead of ≤ 5%, nearly all false 'better' (tests/"
        "test_divergence_verdicts.py). A few seeds far from the rest (see the curves) are the warning sign; the "
        "fragile mark shows verdicts that rest on one seed.",
        f"Verdicts, at the smallest effect that matters δ = {design.smallest_effect:g} nats/token (grid key "
        "`smallest_effect`): **better** when the whole interval is below 0, **worse** when above 0, **equivalent** "
        "when it lies inside −δ..+δ (two one-sided tests, Schuirmann 1987; this wins when both hold, and the note "
        "says 'lower by less than the smallest effect'), **undecided** otherwise. Undecided is not 'no difference'.",
    ]
    items += lever_items(res.levers)
    if design.schedule is not None:
        sch = design.schedule
        items.append(
            f"Seeds until decided: round 1 trains {sch.first} seeds per group; each further round adds {sch.step} "
            "seed(s) to every undecided variant and to the reference (and null control) at its axis point, until "
            f"every comparison is decided or {sch.most} seeds are reached (looks after "
            f"{', '.join(map(str, sch.looks()))} pairs). Looking several times would inflate the error, so every "
            f"look uses one nominal level ({_pct(fam.look_alpha)}, Pocock 1977) chosen so that the intervals of all "
            "looks hold at once (repeated confidence intervals, Jennison & Turnbull 2000, ch. 9); it is computed by "
            "simulating the looks' t statistics, whose joint law under normal differences depends on neither mean "
            "nor sd. A comparison's verdict is final once decided: it gets no more seeds.")
    if res.tuning is not None:
        t = res.tuning.tuning
        items.append(
            f"Tuning (grid key `tune`): each variant's `{t.key}` was chosen in stage 1 (see Tuning, which states the "
            "rule: the lowest mean among values whose next larger value never diverged) on tuning seeds "
            f"{', '.join(map(str, t.seeds))}, disjoint from the verdict seeds: choosing and measuring on the same "
            "seeds would bias the verdict towards the variant whose noise flattered it (the winner's curse). "
            "Fairness matching was done before tuning, on the untuned configs. The verdicts compare each variant "
            "at its own chosen value; the exploratory table at shared values is outside the family."
            + (" With `tune.rungs: first` only rung 1 was tuned; every other rung ran at its variant's rung-1 "
               "value." if t.carried else ""))
    items += [
        f"Seeds needed: the pairs at which a paired t test at the level the verdicts use ({_pct(fam.look_alpha)}, "
        "the look's level) reaches 80% power, both to call better/worse if the true difference is at least δ in "
        "size and to call equivalent if it is 0 (the larger is shown; for a true difference between 0 and δ the "
        "chance is lower, and the undecided notes say how much at δ/2), "
        f"from the power solver of statsmodels (TTestPower). The sd is the {_pct(stats.SD_BOUND_CONFIDENCE)} upper "
        "confidence bound of the paired sd (chi-square), not its estimate, and never the observed difference "
        "(observed power only restates the p-value). 'Detectable': the smallest true difference these pairs find "
        f"with 80% power, same sd bound. '>{stats.MAX_SEEDS}': beyond {stats.MAX_SEEDS} seeds.",
        "Divergence is an outcome, counted per group. Where the compared groups diverged on the same seeds (or "
        "on none), the verdict uses the seeds both finished with a loss. Where they diverged on different seeds, "
        "dropping those seeds would hide the variant's worst runs, so the verdict comes from a worst-rank "
        "composite (Lachin 1999, Stat. Med. 18:1867): on every seed both finished, a diverged cell ranks worse "
        "than every finished loss (only the variant diverged: +∞; only the reference: −∞; both: left out), "
        "tested by the exact Wilcoxon signed-rank test (Wilcoxon 1945), one-sided at half the look's two-sided "
        "level. It gives better or worse, never equivalent (a diverged run has no loss to put inside a band), "
        "and no loss is imputed. When no sign pattern of so few pairs could reach that level the verdict is "
        "undecided (divergence differs), with the counts and McNemar's exact test of them (McNemar 1947); "
        "more seeds can decide it.",
        "Fragile: the verdict is computed again with each seed left out in turn (same level, same rule); a "
        "decided verdict that changes for some left-out seed is marked fragile.",
        f"Curves: {BAND}, over the evaluations every seed of a group has.",
        f"Fairness: {_match_text(res.match)}.",
    ]
    if fam.null:
        items.append(f"Null control: the reference again under init seed {NULL_INIT_OFFSET:,d} + seed and the same "
                     "data seeds (a true null), shown apart from the family.")
    doc.h(2, "Method")
    doc.ul(items)


def _match_text(match: str) -> str:
    return {
        "none": "none (variants as configured)",
        "params": f"parameters matched by adjusting model.mlp_expansion (non-embedding params within "
                  f"{MATCH_TOLERANCE:.0%})",
        "flops": "training FLOPs matched by adjusting train.tokens",
    }.get(match, match)


def write_report(grid_dir: str | Path) -> Path:
    """Write report.md, report.html, verdicts.csv, results.csv, noise.csv and the plots into ``grid_dir``; returns
    report.md."""
    grid_dir = Path(grid_dir)
    if not (grid_dir / INDEX_NAME).exists():
        raise UserError(f"{grid_dir}: no grid here (no {INDEX_NAME}); pass the dir a grid was run in")
    with open_index(grid_dir, readonly=True) as index:
        rows = index.cells()
        meta = {k: index.get_meta(k) for k in ("name", "description", "reference", "match", "design",
                                               "design_changed", "cost_note", "tuning", "ladder")}
    if not rows:
        raise UserError(f"{grid_dir}: the grid index holds no cells")
    tuning_rows = None
    if (grid_dir / TUNING_DIR / INDEX_NAME).exists():
        with open_index(grid_dir / TUNING_DIR, readonly=True) as index:
            tuning_rows = index.cells()
    tuning = Tuning.from_json(meta.get("tuning"))
    parametrizations = read_parametrizations(grid_dir, rows) if tuning is not None and tuning.carried else None
    res = grid_results(rows, meta, grid_dir.name, tuning_rows, parametrizations)
    res = dataclasses.replace(res, token_local=read_token_local(grid_dir, rows), levers=read_levers(grid_dir, rows))
    plots = write_plots(grid_dir, res)
    noise = noise_curves(res.family, *grid_curves(grid_dir, rows))
    _write_table(grid_dir / "noise.csv", NOISE_COLUMNS, noise_rows(noise))
    doc = build_report(grid_dir, res, plots, (noise, noise_plot(grid_dir / NOISE_PLOT, noise,
                                                                res.design.smallest_effect, save_png)))
    fs.atomic_write_text(grid_dir / "report.md", doc.markdown(), what="the report")
    fs.atomic_write_text(grid_dir / "report.html", doc.html(grid_dir, f"Grid {res.name}"), what="the report")
    write_csv(grid_dir / "results.csv", rows)
    columns, table = VERDICT_COLUMNS, verdict_table(res.family)
    if res.tuning is not None:
        columns, table = (*columns, *TUNED_COLUMNS), [row + _tuned_values(res.tuning, c, res.reference)
                                                      for row, c in zip(table, res.family.comparisons + res.family.null,
                                                                        strict=True)]
        write_tuning_csv(grid_dir / "tuning.csv", res.tuning)
    _write_table(grid_dir / "verdicts.csv", columns, table)
    if res.trends is not None:
        _write_table(grid_dir / "fits.csv", FIT_COLUMNS, fit_rows(res.trends))
        _write_table(grid_dir / "trend.csv", TREND_COLUMNS, trend_rows(res.trends))
    return grid_dir / "report.md"


TUNED_COLUMNS = ("tuned_key", "tuned_value", "reference_tuned_value")
TUNING_CSV_COLUMNS = ("id", "variant", "point", "key", "value", "seed", "status", "final_val_loss", "score",
                      "mean_score", "chosen", "planned_tokens", "tokens_seen", "wall_s", "config_hash", "message")


def _tuned_values(tuned: TuningResults, c: Comparison, reference: str | None) -> list[Any]:
    """verdicts.csv: the tuned key, the variant's chosen value (the null control's is the reference's) and the
    reference's."""
    ref = tuned.chosen(reference or "", c.point)
    own = ref if c.variant == NULL_VARIANT else tuned.chosen(c.variant, c.point)
    return [tuned.tuning.key, own, ref]


def write_tuning_csv(path: Path, tuned: TuningResults) -> None:
    """tuning.csv: one row per tuning cell, with its selection score and whether its value was chosen."""
    groups = {g.key: g for g in tuned.groups or ()}
    table = []
    for r in tuned.rows:
        point, value = split_point(r, tuned.tuning.key)
        g = groups.get((r["variant"], point))
        score = g.scores[value].get(r["seed"]) if g else None
        table.append([r["id"], r["variant"], "; ".join(f"{k}={v}" for k, v in _point_items(point)), tuned.tuning.key,
                      value, r["seed"], r["status"], r["final_val_loss"], score, g.means[value] if g else None,
                      (g.chosen == value) if g else None, r["planned_tokens"], r["tokens_seen"], r["wall_s"],
                      r["config_hash"], r["message"]])
    _write_table(path, TUNING_CSV_COLUMNS, table)
