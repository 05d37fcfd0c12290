"""Reading a grid dir's noise: every cell's validation curve (for the report's Noise section and noise.csv), and
an earlier grid's final paired sds (``blockyard grid --dry-run --noise-from GRID_DIR``).

Cells are read with ``blockyard.rundir`` (no torch); the statistics are ``blockyard.grid.noise``'s
and ``blockyard.grid.verdicts``'.
"""

from __future__ import annotations

from pathlib import Path

from blockyard.errors import UserError
from blockyard.grid.budget import NoiseEstimate, pooled_sd
from blockyard.grid.index import INDEX_NAME, CellRow, open_index
from blockyard.grid.spec import Design
from blockyard.grid.status import cell_dir
from blockyard.grid.verdicts import GroupKey, compare_all, group_outcomes, point_text
from blockyard.rundir import METRICS_FILE, read_metrics
from blockyard.text import is_finite_number


def _key(row: CellRow) -> GroupKey:
    return (row["variant"], tuple(tuple(p) for p in row["point"]))


def val_curve(run_dir: Path) -> tuple[dict[int, float], float | None]:
    """(step -> validation loss for every finite val line, training tokens per step from the train lines)."""
    curve: dict[int, float] = {}
    per_step = None
    for line in read_metrics(run_dir / METRICS_FILE):
        step, loss = line.get("step"), line.get("loss")
        if line.get("split") == "train" and line.get("tokens") and step:
            per_step = line["tokens"] / step
        elif line.get("split") == "val" and is_finite_number(loss) and step is not None:
            curve[int(step)] = float(loss)
    return curve, per_step


def grid_curves(grid_dir: Path, rows: list[CellRow]) -> tuple[dict[GroupKey, dict[int, dict[int, float]]],
                                                                     dict[GroupKey, float]]:
    """Per group: seed -> step -> val loss of its done cells; and the group's training tokens per step."""
    curves: dict[GroupKey, dict[int, dict[int, float]]] = {}
    tokens: dict[GroupKey, float] = {}
    for r in rows:
        if r["status"] != "done":
            continue
        curve, per_step = val_curve(cell_dir(grid_dir, r["id"]))
        curves.setdefault(_key(r), {})[r["seed"]] = curve
        if per_step:
            tokens.setdefault(_key(r), per_step)
    return curves, tokens


def read_noise_from(grid_dir: str | Path) -> NoiseEstimate:
    """The pooled final paired sd of an earlier grid's comparisons (the null control's left out: it measures A/A)."""
    grid_dir = Path(grid_dir)
    if not (grid_dir / INDEX_NAME).is_file():
        raise UserError(f"--noise-from {grid_dir}: not a grid dir (no {INDEX_NAME}); allowed: a dir an earlier "
                        "`blockyard grid` ran in")
    with open_index(grid_dir, readonly=True) as index:
        rows = index.cells()
        reference = index.get_meta("reference") or None
        design = Design.from_json(index.get_meta("design"))
    family = compare_all(group_outcomes(rows), reference, design, with_planning=False)
    sds = [(c.interval.sd, c.interval.n) for c in family.comparisons
           if c.interval is not None and c.interval.sd is not None]
    if not sds:
        raise UserError(f"--noise-from {grid_dir}: no comparison there has 2 finished pairs to measure a paired sd; "
                        "allowed: a grid dir with finished comparisons")
    sd, df = pooled_sd(sds)
    where = ", ".join(c.variant + (f" at {point_text(c.point)}" if c.point else "") for c in family.comparisons[:3])
    many = f" ({len(sds)} comparisons pooled: {where}{', ...' if len(family.comparisons) > 3 else ''})"
    return NoiseEstimate(sd, df, f"measured in {grid_dir} at the final evaluation" + (many if len(sds) > 1 else ""))
