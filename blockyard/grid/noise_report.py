"""The report's Noise section, GRID_DIR/noise.csv rows and noise.png (``blockyard.grid.noise`` laid out).

The section says, for every comparison, how its paired sd and detectable difference moved over
training, and in plain words whether longer training or more seeds would buy resolution; the
plot draws the detectable difference against training tokens (one line per comparison, the
smallest effect as a horizontal line) beside the paired sd, with the null control's A/A sd.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Protocol

from blockyard.grid.noise import NoiseCurve, resolution_text
from blockyard.grid.verdicts import point_text
from blockyard.plotting import finish, label_token_axis, pyplot

NOISE_PLOT = "noise.png"
NOISE_COLUMNS = ("variant", "reference", "point", "null_control", "step", "tokens", "pairs", "mean_diff",
                 "paired_sd", "detectable_80", "alpha")


class _Doc(Protocol):  # blockyard.grid.report.document.Doc (importing it from there would be a cycle)
    def h(self, level: int, text: str) -> None: ...
    def p(self, text: str) -> None: ...
    def ul(self, items: list[str]) -> None: ...
    def table(self, header: list[str], rows: list[list[str]]) -> None: ...
    def img(self, name: str, caption: str) -> None: ...


def label(curve: NoiseCurve) -> str:
    """The comparison in words; the null control's marked as the A/A comparison it is."""
    return (curve.variant + (" (A/A)" if curve.null_control else "")
            + (f" at {point_text(curve.point)}" if curve.point else ""))


def noise_rows(curves: list[NoiseCurve]) -> list[list[Any]]:
    """noise.csv: one row per comparison and evaluation step."""
    return [[c.variant, c.reference, "; ".join(f"{k}={v}" for k, v in c.point), c.null_control, p.step, p.tokens,
             p.pairs, p.mean_diff, p.sd, p.detectable, c.alpha] for c in curves for p in c.points]


def _tokens_text(tokens: float | None) -> str:
    return "-" if tokens is None else f"{tokens / 1e6:.3g}M"


def noise_section(doc: _Doc, curves: list[NoiseCurve], smallest_effect: float, plotted: bool) -> None:
    """The Noise section: each comparison's paired sd and detectable difference, first and last evaluation."""
    measured = [c for c in curves if c.final is not None]
    if not measured:
        return
    doc.h(2, "Noise")
    doc.p("Every pair of cells (variant and reference, same seed) logs its validation loss at each evaluation, so "
          "the noise of each comparison is known along training at no extra cost. Paired sd: the sd over seeds of "
          "variant minus reference (nats/token); detectable: the smallest true difference these pairs find with "
          "80% power at the level the verdict uses. Every step is in noise.csv.")
    rows = []
    for c in measured:
        first = next(p for p in c.points if p.sd is not None)
        end = c.final
        assert end is not None
        rows.append([label(c), str(end.pairs),
                     f"{_tokens_text(first.tokens)} -> {_tokens_text(end.tokens)}",
                     f"{first.sd:.4f} -> {end.sd:.4f}", f"{first.mean_diff:+.4f} -> {end.mean_diff:+.4f}",
                     f"±{first.detectable:.4f} -> ±{end.detectable:.4f}",
                     "yes" if end.detectable is not None and end.detectable <= smallest_effect else "no"])
    doc.table(["comparison", "pairs", "tokens (first -> last evaluation)", "paired sd", "mean difference",
               "detectable (80% power)", f"detects {smallest_effect:g}?"], rows)
    advice = [t for c in measured if not c.null_control and (t := resolution_text(c, label(c)))]
    if advice:
        doc.ul(advice)
    if plotted:
        doc.img(NOISE_PLOT, "Left: detectable difference (80% power, at the verdicts' level) against training tokens, "
                "one line per comparison; dotted: the smallest effect. Right: the paired sd; dashed: the null "
                "control's A/A sd, where the grid has one.")


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
        name = label(c)
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
