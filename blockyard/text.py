"""Text every command prints the same way: aligned tables, counts, bytes, config values, axis points.

One place, so a count, a size or a table reads the same in ``blocks``, ``cost``, ``grid --dry-run``
and the report. Bytes have two writers under two names, because both conventions are in use:
``decimal_bytes`` (powers of 1000, what disk tools print) and ``binary_bytes`` (powers of 1024,
what memory sizes are quoted in). The lowest layer: imports nothing from the package.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, TypeGuard


def aligned_table(header: Sequence[Any], rows: Sequence[Sequence[Any]], right: bool = False,
                  indent: str = "") -> str:
    """Columns padded to their widest cell, two spaces apart, one line per row, header first.

    ``right`` right-aligns every column (numbers), keeping a short last column's padding; otherwise
    cells are left-aligned and each line's trailing spaces are stripped. ``indent`` prefixes every line.
    """
    table = [[str(c) for c in header], *([str(c) for c in r] for r in rows)]
    widths = [max(len(c) for c in col) for col in zip(*table, strict=True)]
    if right:
        return "\n".join(indent + "  ".join(c.rjust(w) for c, w in zip(r, widths, strict=True)) for r in table)
    return "\n".join((indent + "  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True))).rstrip() for r in table)


def count_text(n: float) -> str:
    """1234567 -> '1.23M' (SI prefixes k, M, G, T; three significant digits)."""
    for div, suffix in ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(n) >= div:
            return f"{n / div:.3g}{suffix}"
    return f"{n:.3g}" if isinstance(n, float) and not float(n).is_integer() else str(int(n))


def percent_text(fraction: float) -> str:
    """``0.975`` -> ``97.5%`` (four significant digits)."""
    return f"{100 * fraction:.4g}%"


def decimal_bytes(n: float) -> str:
    """``1536`` -> ``1.5 KB``: powers of 1000, as disk tools print free space."""
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if abs(n) < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    raise AssertionError("unreachable")


def binary_bytes(n: float) -> str:
    """``1536`` -> ``1.5 KiB``: powers of 1024, as memory sizes are quoted."""
    for div, suffix in ((2**40, "TiB"), (2**30, "GiB"), (2**20, "MiB"), (2**10, "KiB")):
        if n >= div:
            return f"{n / div:.3g} {suffix}"
    return f"{int(n)} B"


def value_text(v: Any) -> str:
    """A config value as a grid file writes it: lists in brackets, booleans as true / false."""
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(value_text(x) for x in v) + "]"
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


def is_finite_number(x: Any) -> TypeGuard[float]:
    """A real, finite number (a bool is not one): what a loss read from a record must be to count."""
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def axis_unit(top: float) -> tuple[float, str]:
    """(divisor, suffix) of the one unit an axis reaching ``top`` is labelled in: G, M, k or none."""
    for div, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(top) >= div:
            return div, suffix
    return 1.0, ""


def axis_point_text(x: float, top: float) -> str:
    """One tick label of an axis reaching ``top``: ``axis_point_text(4e5, 1.4e6)`` -> ``0.4M``."""
    div, suffix = axis_unit(top)
    return "0" if x == 0 else f"{x / div:.4g}{suffix}"
