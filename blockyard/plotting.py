"""What every figure of the package shares: a headless pyplot in our palette, atomic PNGs, token axes.

The grid report, its Noise section and the ladder's trend plots draw through these, so a token axis
reads the same everywhere (0.2M ... 1.4M, one unit, never matplotlib's "1e6" offset) and a full disk
leaves the old plot rather than half a new one. matplotlib is imported when a figure is drawn, not
when this module is.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from blockyard import fs, palette
from blockyard.text import axis_point_text


def pyplot() -> Any:
    """matplotlib.pyplot on the headless Agg backend, with our palette as the colour cycle."""
    import matplotlib

    matplotlib.use("Agg")
    palette.use_palette(matplotlib)
    import matplotlib.pyplot as plt

    return plt


def save_png(fig: Any, path: Path, dpi: int = 110) -> None:
    """A matplotlib figure as a PNG, written atomically (a full disk leaves the old plot, not half a new one)."""
    fs.atomic_write(path, lambda f: fig.savefig(f, format="png", dpi=dpi), what="a report plot")


def finish(fig: Any, path: str | Path, dpi: int = 110) -> Path:
    """Lay the figure out tightly, write it as a PNG at ``path`` (atomically, folders created), close it;
    returns the path."""
    import matplotlib.pyplot as plt

    out = Path(path)
    fig.tight_layout()
    out.parent.mkdir(parents=True, exist_ok=True)
    save_png(fig, out, dpi)
    plt.close(fig)
    return out


def label_token_axis(axis: Any) -> None:
    """Tick labels such as 0.2M ... 1.4M, one unit for the whole axis, instead of matplotlib's offset ("1e6")."""
    from matplotlib.ticker import FuncFormatter

    def text(x: float, _pos: Any) -> str:
        return axis_point_text(x, max(abs(v) for v in axis.get_view_interval()))

    axis.set_major_formatter(FuncFormatter(text))
