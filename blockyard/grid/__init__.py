"""Ablation grids: a base config crossed with variants, axes and seeds; run, resumed, and reported.

- ``spec``: the grid file format and its expansion into cells.
- ``fairness``: params / FLOPs per cell, and matching variants on parameters or FLOPs.
- ``plan``: the cells with fairness and threads applied, costs, hashes, time estimates; ``dryrun``: ``--dry-run``'s
  text; ``griddir``: the grid dir's lock and refusals, superseded cells moved aside.
- ``run``: rounds of cells trained, resume, the index updates; ``executors``: local processes or Ray tasks.
- ``index``: the SQLite record of every cell; ``status``: the progress line.
- ``stats``: pure statistics (intervals, verdict rule, power, sequential levels); ``verdicts``: the
  comparisons of a grid and their family; ``rounds``: seeds added until decided.
- ``report``: verdicts, forest plot, plots, report.md / .html, verdicts.csv, results.csv.
"""

from typing import Any

from blockyard.grid.run import run_grid
from blockyard.grid.spec import Cell, GridSpec, expand_cells, load_grid
from blockyard.grid.status import status_text

__all__ = ["Cell", "GridSpec", "expand_cells", "load_grid", "run_grid", "status_text", "write_report"]


def __getattr__(name: str) -> Any:
    # The report pulls in scipy (~60 MB resident): loaded on first use, not in every grid parent.
    if name == "write_report":
        from blockyard.grid.report import write_report

        return write_report
    raise AttributeError(f"module 'blockyard.grid' has no attribute {name!r}")
