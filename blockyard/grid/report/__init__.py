"""The grid report: verdicts with simultaneous error bars (report.md / .html, verdicts.csv, results.csv, plots).

Inputs are the grid index (every cell's status and final metrics, the grid's design) and each
cell's ``metrics.jsonl`` (for the curves). The statistics come from ``blockyard.grid.verdicts``
(comparisons, family, divergence) and ``blockyard.grid.stats`` (pure numbers); this package only
lays them out: the verdicts and their forest plot first, then the noise floor (null control),
the variants with their costs, the cells left out, the curves, and the method in plain words.
A grid with a ladder of sizes also gets a Ladder section (``blockyard.grid.ladder``: a loss fit per
variant, the trend of each gap), trend.csv, fits.csv and two plots.

One job a module: ``results`` (index rows -> groups, family, tuning, ladder), ``figures`` (PNGs),
``tables`` (CSVs), ``sections`` (the prose), ``document`` (Markdown and HTML). ``write_report`` runs them.
"""

from __future__ import annotations

from pathlib import Path

from blockyard.grid.noise import noise_curves
from blockyard.grid.noise_files import grid_curves
from blockyard.grid.report.document import Doc, write_document
from blockyard.grid.report.figures import FOREST, GAP_VS_N, LOSS_VS_N, NOISE_PLOT, TUNING_PLOT, noise_plot, write_plots
from blockyard.grid.report.results import (
    GridMeta,
    GridResults,
    Group,
    grid_results,
    load_results,
    read_levers,
    read_meta,
    read_token_local,
)
from blockyard.grid.report.sections import CAUTION, SKEW_FAMILY_ERROR, build_report, lever_items
from blockyard.grid.report.tables import (
    CSV_COLUMNS,
    NOISE_COLUMNS,
    VERDICT_COLUMNS,
    noise_rows,
    write_table,
    write_tables,
)
from blockyard.plotting import label_token_axis

__all__ = ["CAUTION", "CSV_COLUMNS", "FOREST", "GAP_VS_N", "LOSS_VS_N", "SKEW_FAMILY_ERROR", "TUNING_PLOT",
           "VERDICT_COLUMNS", "Doc", "GridMeta", "GridResults", "Group", "build_report", "grid_results",
           "label_token_axis", "lever_items", "load_results", "read_levers", "read_meta", "read_token_local",
           "write_report"]


def write_report(grid_dir: str | Path) -> Path:
    """Write report.md, report.html, verdicts.csv, results.csv, noise.csv and the plots into ``grid_dir``; returns
    report.md."""
    grid_dir = Path(grid_dir)
    res = load_results(grid_dir)
    plots = write_plots(grid_dir, res)
    noise = noise_curves(res.family, *grid_curves(grid_dir, res.rows))
    write_table(grid_dir / "noise.csv", NOISE_COLUMNS, noise_rows(noise))
    plotted = noise_plot(grid_dir / NOISE_PLOT, noise, res.design.smallest_effect)
    report = write_document(grid_dir, build_report(grid_dir, res, plots, (noise, plotted)), f"Grid {res.name}")
    write_tables(grid_dir, res)
    return report
