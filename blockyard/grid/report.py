"""The grid report: what the cells say, with error bars, in GRID_DIR/report.md, report.html, results.csv.

Inputs are the grid index (every cell's status and final metrics) and each cell's
``metrics.jsonl`` (for the curves). Per group (variant x axis point) it gives the mean final
validation loss over seeds with a 95% Student-t interval; per non-reference group the paired
difference to the reference at the same axis point (same seeds) with its interval, a verdict in
plain words, and the seeds a difference of the observed size would need (see blockyard.grid.stats).
Cells that diverged, failed or have not finished are listed and left out of every statistic.
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

from blockyard.errors import UserError
from blockyard.grid import stats
from blockyard.grid.index import INDEX_NAME, open_index
from blockyard.grid.status import cell_dir, read_jsonl

CAUTION = (
    "These verdicts hold for this model size, this data and this training budget only. Effects seen in tiny "
    "models can shrink, vanish or reverse at scale: confirm at the scale you care about before relying on them."
)
BAND = "line: mean over seeds; band: min to max over seeds"


@dataclasses.dataclass
class Group:
    """The cells of one variant at one axis point."""

    variant: str
    point: tuple[tuple[str, Any], ...]
    rows: list[dict[str, Any]]

    @property
    def label(self) -> str:
        if not self.point:
            return self.variant
        return f"{self.variant} ({', '.join(f'{k}={_text(v)}' for k, v in self.point)})"

    @property
    def point_text(self) -> str:
        return ", ".join(f"{k}={_text(v)}" for k, v in self.point) or "-"

    @property
    def done(self) -> list[dict[str, Any]]:
        return [r for r in self.rows if r["status"] == "done" and _finite(r["final_val_loss"])]

    def finals(self) -> dict[int, float]:
        return {r["seed"]: float(r["final_val_loss"]) for r in self.done}


def _text(v: Any) -> str:
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_text(x) for x in v) + "]"
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


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


def _ci_text(iv: stats.Interval, signed: bool = False) -> str:
    if iv.low is None or iv.high is None:
        return stats.NO_INTERVAL
    f = _signed if signed else _fmt
    return f"[{f(iv.low)}, {f(iv.high)}]"


def _mean(values: list[float]) -> float | None:
    values = [v for v in values if _finite(v)]
    return sum(values) / len(values) if values else None


def group_cells(rows: list[dict[str, Any]]) -> list[Group]:
    groups: dict[tuple, Group] = {}
    for r in rows:
        key = (r["variant"], tuple(r["point"]))
        if key not in groups:
            groups[key] = Group(r["variant"], tuple(tuple(p) for p in r["point"]), [])
        groups[key].rows.append(r)
    return list(groups.values())


# ----------------------------------------------------------------------------- statistics


@dataclasses.dataclass(frozen=True)
class Comparison:
    group: Group
    reference: Group
    seeds: list[int]
    diff: stats.Interval | None
    verdict: str
    seeds_needed: int | None


def compare(group: Group, reference: Group) -> Comparison:
    seeds, diffs = stats.paired_differences(group.finals(), reference.finals())
    if not diffs:
        return Comparison(group, reference, [], None, "no finished pairs", None)
    iv = stats.mean_interval(diffs)
    needed = stats.seeds_to_detect(iv.mean, iv.sd) if iv.sd is not None else None
    return Comparison(group, reference, seeds, iv, stats.verdict(iv), needed)


def comparisons(groups: list[Group], reference: str | None) -> list[Comparison]:
    if reference is None:
        return []
    refs = {g.point: g for g in groups if g.variant == reference}
    return [compare(g, refs[g.point]) for g in groups if g.variant != reference and g.point in refs]


# ----------------------------------------------------------------------------- curves and plots


def _val_curve(grid_dir: Path, row: dict[str, Any]) -> list[tuple[float, float, float]]:
    """(tokens, wall_s, val loss) per validation line of a cell."""
    lines = read_jsonl(cell_dir(grid_dir, row["id"]) / "metrics.jsonl")
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


def write_plots(grid_dir: Path, groups: list[Group]) -> list[tuple[str, str]]:
    """PNG files in the grid dir; returns (file name, caption) for each written."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

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
            fig.savefig(grid_dir / name, dpi=110)
            written.append((name, caption))
        plt.close(fig)

    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    plotted = False
    for g in groups:
        finals = list(g.finals().values())
        params = _mean([r["params_non_embedding"] for r in g.done])
        if not finals or params is None:
            continue
        iv = stats.mean_interval(finals)
        yerr = None if iv.half_width is None else [[iv.half_width], [iv.half_width]]
        ax.errorbar([params], [iv.mean], yerr=yerr, fmt="o", capsize=4, label=g.label)
        plotted = True
    if plotted:
        ax.set_xlabel("non-embedding parameters")
        ax.set_ylabel("final validation loss (nats/token)")
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7)
        fig.tight_layout()
        fig.savefig(grid_dir / "final_loss_vs_params.png", dpi=110)
        written.append(("final_loss_vs_params.png",
                        "Final validation loss vs non-embedding parameters (mean over seeds; bars: 95% t interval)."))
    plt.close(fig)

    from blockyard.eval.extrapolation import (
        report_figures,  # length extrapolation (eval.json) and eval.probes, where present
    )

    written += report_figures(grid_dir, {g.label: [cell_dir(grid_dir, r["id"]) for r in g.done] for g in groups})
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
               "</style></head><body>"]
        for b in self.blocks:
            if b[0] == "h":
                out.append(f"<h{b[1]}>{e(b[2])}</h{b[1]}>")
            elif b[0] == "p":
                out.append(f"<p>{_inline_html(b[1])}</p>")
            elif b[0] == "ul":
                out.append("<ul>" + "".join(f"<li>{_inline_html(i)}</li>" for i in b[1]) + "</ul>")
            elif b[0] == "table":
                head = "".join(f"<th>{e(str(c))}</th>" for c in b[1])
                body = "".join("<tr>" + "".join(f"<td>{_inline_html(str(c))}</td>" for c in row) + "</tr>"
                               for row in b[2])
                out.append(f"<table><tr>{head}</tr>{body}</table>")
            elif b[0] == "img":
                data = base64.b64encode((grid_dir / b[1]).read_bytes()).decode()
                out.append(f"<figure><img alt='{e(b[2])}' src='data:image/png;base64,{data}'>"
                           f"<figcaption>{e(b[2])}</figcaption></figure>")
        out.append("</body></html>")
        return "\n".join(out)


def _inline_html(text: str) -> str:
    """Escape, then turn Markdown's **bold** and `code` into tags (the only inline marks we write)."""
    s = html.escape(text)
    s = re.sub(r"\*\*(.+?)\*\*", r"<b>\1</b>", s)
    return re.sub(r"`(.+?)`", r"<code>\1</code>", s)


# ----------------------------------------------------------------------------- the report


CSV_COLUMNS = ("id", "variant", "point", "seed", "status", "final_val_loss", "best_val_loss", "params_total",
               "params_non_embedding", "flops_per_token", "planned_tokens", "tokens_seen", "steps", "tokens_per_s",
               "wall_s", "adjustments", "config_hash", "message")


def write_csv(path: Path, rows: list[dict[str, Any]]) -> None:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for r in rows:
        values = []
        for c in CSV_COLUMNS:
            v = r.get(c)
            if c == "point":
                v = "; ".join(f"{k}={_text(x)}" for k, x in r["point"])
            elif c == "adjustments":
                v = "; ".join(f"{k}={x:g}" if isinstance(x, float) else f"{k}={x}" for k, x in r[c].items())
            values.append("" if v is None else v)
        writer.writerow(values)
    _atomic_write(path, buf.getvalue())


def _atomic_write(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text)
    tmp.replace(path)


def _adjust_text(adjustments: dict[str, Any]) -> str:
    if not adjustments:
        return "-"
    parts = []
    for k, v in adjustments.items():
        value = f"{v:.4g}" if isinstance(v, float) else f"{v:,d}" if isinstance(v, int) else str(v)
        parts.append(f"{k} = {value}")
    return "; ".join(parts)


def build_report(grid_dir: Path, rows: list[dict[str, Any]], meta: dict[str, str | None],
                 plots: list[tuple[str, str]]) -> Doc:
    groups = group_cells(rows)
    reference = meta.get("reference") or None
    match = meta.get("match") or "none"
    comps = comparisons(groups, reference)
    doc = Doc()
    doc.h(1, f"Grid {meta.get('name') or grid_dir.name}")
    if meta.get("description"):
        doc.p(meta["description"])
    status_counts: dict[str, int] = {}
    for r in rows:
        status_counts[r["status"]] = status_counts.get(r["status"], 0) + 1
    seeds = sorted({r["seed"] for r in rows})
    doc.p(f"{len(rows)} cells ({', '.join(f'{n} {s}' for s, n in sorted(status_counts.items()))}); "
          f"seeds {', '.join(map(str, seeds))}; reference: {reference or 'none (no variants)'}; "
          f"fairness: {_match_text(match)}.")

    doc.h(2, "Verdicts")
    if not comps:
        doc.p("No comparisons: the grid has no variants besides the reference, or no finished pairs.")
    else:
        doc.p(f"Final validation loss (nats/token), paired by seed: variant minus **{reference}** at the same "
              "axis point. Negative is better. Better / worse means the whole 95% interval is below / above 0.")
        doc.table(
            ["variant", "axis point", "pairs", "difference (mean)", "95% CI", "verdict", "seeds for 80% power"],
            [[c.group.variant, c.group.point_text, str(len(c.seeds)), _signed(c.diff.mean if c.diff else None),
              _ci_text(c.diff, signed=True) if c.diff else "-", f"**{c.verdict}**", _needed_text(c)]
             for c in comps],
        )

    doc.h(2, "Variants")
    table = []
    for g in groups:
        finals = list(g.finals().values())
        iv = stats.mean_interval(finals) if finals else None
        first = g.rows[0]
        fpt = first.get("flops_per_token")
        tokens = _mean([r["tokens_seen"] for r in g.done]) or first["planned_tokens"]
        table.append([
            g.variant + (" (reference)" if g.variant == reference else ""),
            g.point_text,
            f"{len(finals)}/{len(g.rows)}",
            _fmt(iv.mean) if iv else "-",
            _ci_text(iv) if iv else "-",
            _count(_mean([r["params_non_embedding"] for r in g.rows if r.get("params_non_embedding")])),
            _count(_mean([r["params_total"] for r in g.rows if r.get("params_total")])),
            _count(fpt),
            _count(tokens),
            _count(fpt * tokens if fpt is not None and tokens else None),
            _count(_mean([r["tokens_per_s"] for r in g.done])),
            _fmt(_mean([r["wall_s"] for r in g.done]), 1),
            _adjust_text(first["adjustments"]),
        ])
    doc.table(["variant", "axis point", "seeds done", "final val loss", "95% CI", "params (non-emb)", "params (total)",
               "FLOPs/token", "train tokens", "train FLOPs", "tokens/s", "wall s per cell", "fairness adjustment"],
              table)
    if match == "params":
        doc.p("Parameter matching changed `model.mlp_expansion` (the MLP hidden size) of every non-reference "
              "variant so that its non-embedding parameters are within 2% of the reference's; the column "
              "'fairness adjustment' gives the value used.")
    elif match == "flops":
        doc.p("FLOP matching changed `train.tokens` (the token budget) of every non-reference variant so that "
              "FLOPs/token x tokens equals the reference's training FLOPs (up to whole optimizer steps); the "
              "column 'fairness adjustment' gives the budget used.")
    if meta.get("cost_note"):
        doc.p(meta["cost_note"])

    excluded = [r for r in rows if not (r["status"] == "done" and _finite(r["final_val_loss"]))]
    doc.h(2, "Cells left out of the statistics")
    if not excluded:
        doc.p("None: every cell finished.")
    else:
        doc.p("These cells diverged, failed or have not finished; every statistic above leaves them out.")
        doc.table(["cell", "status", "exit code", "message"],
                  [[r["id"], r["status"], "-" if r["exit_code"] is None else str(r["exit_code"]),
                    (r["message"] or "-")[:200]] for r in excluded])

    if plots:
        doc.h(2, "Plots")
        for name, caption in plots:
            doc.img(name, caption)

    doc.h(2, "Method")
    doc.ul([
        "Final validation loss: the trainer's last evaluation on the fixed validation windows, in nats per token.",
        "Interval of a mean over n seeds: mean ± t(0.975, n−1) · sd / √n (Student t, scipy.stats.t); "
        "with one seed there is no interval (n=1: no interval).",
        "Paired difference: per seed, variant minus reference; cells with the same seed train on the same "
        "batches and are evaluated on the same validation windows. Its interval is the same t interval over "
        "the per-seed differences.",
        "Seeds for 80% power: the smallest number of seeds n ≥ 2 at which a two-sided paired t-test at the 5% "
        "level detects a true difference equal to the observed mean difference with probability ≥ 0.8, "
        "taking the observed paired sd as the true one (noncentral t, scipy.stats.nct). '-' where the "
        "observed difference is 0 or there is one pair; '>1000' past 1000 seeds.",
        f"Curves: {BAND}, over the evaluations every seed of a group has.",
        f"Fairness: {_match_text(match)}.",
        "Diverged or failed cells are listed above and excluded from all statistics.",
    ])
    doc.h(2, "Caution")
    doc.p(CAUTION)
    return doc


def _needed_text(c: Comparison) -> str:
    if c.diff is None or c.diff.sd is None or c.diff.mean == 0:
        return "-"
    return ">1000" if c.seeds_needed is None else str(c.seeds_needed)


def _match_text(match: str) -> str:
    return {
        "none": "none (variants as configured)",
        "params": "parameters matched by adjusting model.mlp_expansion (non-embedding params within 2%)",
        "flops": "training FLOPs matched by adjusting train.tokens",
    }.get(match, match)


def write_report(grid_dir: str | Path) -> Path:
    """Write report.md, report.html, results.csv and the PNG plots into ``grid_dir``; returns report.md."""
    grid_dir = Path(grid_dir)
    if not (grid_dir / INDEX_NAME).exists():
        raise UserError(f"{grid_dir}: no grid here (no {INDEX_NAME}); pass the dir a grid was run in")
    with open_index(grid_dir, readonly=True) as index:
        rows = index.cells()
        meta = {k: index.get_meta(k) for k in ("name", "description", "reference", "match", "cost_note")}
    if not rows:
        raise UserError(f"{grid_dir}: the grid index holds no cells")
    plots = write_plots(grid_dir, group_cells(rows))
    doc = build_report(grid_dir, rows, meta, plots)
    _atomic_write(grid_dir / "report.md", doc.markdown())
    _atomic_write(grid_dir / "report.html", doc.html(grid_dir, f"Grid {meta.get('name') or grid_dir.name}"))
    write_csv(grid_dir / "results.csv", rows)
    return grid_dir / "report.md"
