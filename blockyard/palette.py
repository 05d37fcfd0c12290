"""The colours of every figure blockyard draws: a palette of our own.

Series colours are ordered so that neighbours differ in hue and in lightness (the first four stay
apart in greyscale too). Verdict colours: better green, worse red, equivalent blue, undecided grey.
Choosing colours that differ in hue and lightness is common practice, no source.
"""

from __future__ import annotations

from typing import Any

SERIES = ("#2d5f8b", "#c4572e", "#3f8a55", "#8b5ea6", "#c99a2e", "#3f9ea3", "#a3436f", "#676767")
BETTER = "#3f8a55"
WORSE = "#b8402a"
EQUIVALENT = "#2d5f8b"
UNDECIDED = "#5e5e5e"
OUTSIDE = "#9b9b9b"  # what stands apart from the verdicts (the null control)
BAND = "#bcd2e6"  # a shaded region such as +-smallest effect


def use_palette(matplotlib: Any) -> None:
    """Make ``SERIES`` the colour cycle of every axes drawn after this call (``matplotlib``: the module)."""
    from cycler import cycler

    matplotlib.rcParams["axes.prop_cycle"] = cycler(color=list(SERIES))
