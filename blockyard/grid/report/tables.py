"""The report's CSV files: results.csv (one row per cell), verdicts.csv (one per comparison), tuning.csv (one
per stage-1 cell), noise.csv (one per comparison and evaluation step), and the ladder's fits.csv and trend.csv.

Column names and formats are part of the output others read: floats keep every digit (repr), a missing
value is an empty cell.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from blockyard import fs
from blockyard.grid.index import CellRow
from blockyard.grid.ladder import FIT_COLUMNS, TREND_COLUMNS, fit_rows, trend_rows
from blockyard.grid.noise import NoiseCurve
from blockyard.grid.report.results import GridResults, TuningResults
from blockyard.grid.spec import NULL_VARIANT
from blockyard.grid.tuning import split_point
from blockyard.grid.verdicts import Comparison, Family
from blockyard.text import value_text

CSV_COLUMNS = ("id", "variant", "point", "seed", "status", "final_val_loss", "best_val_loss", "params_total",
               "params_non_embedding", "flops_per_token", "planned_tokens", "tokens_seen", "steps", "tokens_per_s",
               "wall_s", "adjustments", "config_hash", "message")
VERDICT_COLUMNS = ("variant", "point", "pairs", "mean_diff", "low", "high", "low_unadjusted", "high_unadjusted",
                   "paired_sd", "smallest_effect", "verdict", "seeds_needed", "diverged_variant",
                   "diverged_reference", "note", "in_family", "confidence", "family_size", "sd_upper",
                   "seeds_for_difference", "seeds_for_equivalence", "detectable_diff", "failed_variant",
                   "failed_reference", "composite_verdict", "composite_p_better", "composite_p_worse",
                   "divergence_mcnemar_p", "seeds", "fragile")


NOISE_COLUMNS = ("variant", "reference", "point", "null_control", "step", "tokens", "pairs", "mean_diff",
                 "paired_sd", "detectable_80", "alpha")


def noise_rows(curves: list[NoiseCurve]) -> list[list[Any]]:
    """noise.csv: one row per comparison and evaluation step."""
    return [[c.variant, c.reference, point_cell(c.point), c.null_control, p.step, p.tokens,
             p.pairs, p.mean_diff, p.sd, p.detectable, c.alpha] for c in curves for p in c.points]


def write_csv(path: Path, rows: list[CellRow]) -> None:
    """results.csv: one row per cell."""
    table = []
    for r in rows:
        cells: dict[str, Any] = dict(r)  # read by column name
        cells["point"] = point_cell(r["point"])
        cells["adjustments"] = "; ".join(f"{k}={x:g}" if isinstance(x, float) else f"{k}={x}"
                                         for k, x in r["adjustments"].items())
        table.append([cells.get(c) for c in CSV_COLUMNS])
    write_table(path, CSV_COLUMNS, table)


def point_cell(point: Iterable[tuple[str, Any]]) -> str:
    """An axis point as one CSV cell: ``model.width=64; model.depth=3`` (empty without axes)."""
    return "; ".join(f"{k}={value_text(v)}" for k, v in point)


def verdict_table(family: Family) -> list[list[Any]]:
    """verdicts.csv rows: every comparison of the family, then the null control's."""
    out = []
    for c in family.comparisons + family.null:
        iv, un, pl, div = c.interval, c.unadjusted, c.planning, c.divergence
        out.append([
            c.variant, point_cell(c.point), len(c.seeds),
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


def write_table(path: Path, header: tuple[str, ...], rows: list[list[Any]]) -> None:
    """A CSV file: the header, then the rows; None as an empty cell, floats as repr (every digit)."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow(["" if v is None else repr(v) if isinstance(v, float) else v for v in row])
    fs.atomic_write_text(path, buf.getvalue(), what="a report table")


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
        table.append([r["id"], r["variant"], point_cell(point), tuned.tuning.key,
                      value, r["seed"], r["status"], r["final_val_loss"], score, g.means[value] if g else None,
                      (g.chosen == value) if g else None, r["planned_tokens"], r["tokens_seen"], r["wall_s"],
                      r["config_hash"], r["message"]])
    write_table(path, TUNING_CSV_COLUMNS, table)


def write_tables(grid_dir: Path, res: GridResults) -> None:
    """results.csv, verdicts.csv (with the tuned values under a ``tune`` block), tuning.csv, and with a ladder
    fits.csv and trend.csv."""
    write_csv(grid_dir / "results.csv", res.rows)
    columns: tuple[str, ...] = VERDICT_COLUMNS
    table = verdict_table(res.family)
    if res.tuning is not None:
        columns, table = (*columns, *TUNED_COLUMNS), [row + _tuned_values(res.tuning, c, res.reference)
                                                      for row, c in zip(table, res.family.comparisons + res.family.null,
                                                                        strict=True)]
        write_tuning_csv(grid_dir / "tuning.csv", res.tuning)
    write_table(grid_dir / "verdicts.csv", columns, table)
    if res.trends is not None:
        write_table(grid_dir / "fits.csv", FIT_COLUMNS, fit_rows(res.trends))
        write_table(grid_dir / "trend.csv", TREND_COLUMNS, trend_rows(res.trends))
