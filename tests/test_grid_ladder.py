"""A ladder of model sizes in a grid: rungs as cells, budgets, bad input, dry run, trend.csv / fits.csv, report."""

from __future__ import annotations

import csv
import math
import textwrap
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from _helpers import check_refused_at_parse, earlier_grid_dir, real_non_embedding, tree_snapshot, write_grid

from blockyard.cli import main
from blockyard.grid.fairness import MATCH_TOLERANCE
from blockyard.grid.index import open_index
from blockyard.grid.ladder import TREND_COLUMNS, Ladder
from blockyard.grid.plan import plan_cells
from blockyard.grid.report import write_report
from blockyard.grid.report.figures import GAP_VS_N, LOSS_VS_N
from blockyard.grid.run import run_grid
from blockyard.grid.spec import Design, load_grid
from blockyard.rundir import format_duration

# Tiny cells on the pydoc corpus (ships with Python), byte tokens.
BASE = """
base:
  model: {width: 16, depth: 1, pattern: [global_attention], mlp_expansion: 2.0}
  data: {corpus: pydoc, seq_len: 16}
  train: {steps: 10, batch_size: 2, eval_every: 5, eval_windows: 2, log_every: 5, warmup_steps: 2,
          checkpoint_every: 100}
"""
LADDER = """
variants:
  attention: {}
  recurrence: {model.pattern: [recurrence]}
reference: attention
match: params
ladder:
  - {model.width: 16}
  - {model.width: 32}
  - {model.width: 48, model.depth: 2}
"""


def test_every_variant_rung_and_seed_is_a_cell_with_the_rung_budget_and_matching_per_rung(tmp_path):
    spec = load_grid(write_grid(tmp_path, BASE + LADDER + "tokens_per_param: 20\nseeds: [0, 1]\n"))
    plan = plan_cells(spec, threads=1)
    assert [p.id for p in plan] == [f"{v}-rung{k}-seed{s}" for v in ("attention", "recurrence") for k in (1, 2, 3)
                                    for s in (0, 1)]
    widths = {1: 16, 2: 32, 3: 48}
    for p in plan:
        k = dict(p.cell.point)["rung"]
        cfg = p.cell.cfg
        assert (cfg.model.width, cfg.model.depth) == (widths[k], 2 if k == 3 else 1)
        ref = next(q for q in plan if q.cell.variant == "attention" and q.cell.point == p.cell.point)
        # tokens_per_param x the reference's non-embedding parameters at this rung (issue 17).
        assert cfg.train.tokens == round(20 * real_non_embedding(ref.cell.cfg))
        if p.cell.variant == "recurrence":  # matched to the reference at its own rung, not rung 1's
            n, n_ref = real_non_embedding(cfg), real_non_embedding(ref.cell.cfg)
            assert abs(n - n_ref) <= MATCH_TOLERANCE * n_ref and "model.mlp_expansion" in p.cell.adjustments
    budgets = sorted({p.cell.cfg.train.tokens for p in plan})
    assert len(budgets) == 3 and budgets[0] < budgets[1] < budgets[2]


def test_without_tokens_per_param_every_rung_keeps_the_base_budget(tmp_path):
    spec = load_grid(write_grid(tmp_path, BASE + LADDER + "seeds: [0]\n"))
    plan = plan_cells(spec, threads=1)
    assert len(plan) == 6
    assert {(p.cell.cfg.train.tokens, p.cell.cfg.train.steps) for p in plan} == {(0, 10)}


@pytest.fixture
def existing_grid_dir(tmp_path) -> Path:
    """A grid dir holding an index of an earlier grid with one finished-looking cell."""
    return earlier_grid_dir(tmp_path, BASE + "name: earlier\nseeds: [0]\n")


TWO_RUNGS = "ladder: [{model.width: 16}, {model.width: 32}]\n"


@pytest.mark.parametrize("body, message", [
    ("ladder: [{model.width: 16}, {model.widht: 32}]", "ladder.rung2: model.widht: unknown key"),
    ("ladder: [{model.width: 16}]", "ladder: a list of at least 2 rungs"),
    ("ladder: {model.width: 16}", "ladder: a list of at least 2 rungs"),
    ("ladder: [{model.width: 16}, {}]", "ladder.rung2: expected a non-empty mapping"),
    ("ladder: [{model.width: 16}, {model.width: 16}]", "ladder.rung2: repeats rung 1"),
    ("ladder: [{model.width: 16}, {train.seed: 3}]", "ladder.rung2.train.seed: cannot be overridden"),
    (TWO_RUNGS + "tokens_per_param: 0", "tokens_per_param: 0: a number > 0"),
    (TWO_RUNGS + "tokens_per_param: -20", "tokens_per_param: -20: a number > 0"),
    (TWO_RUNGS + "tokens_per_param: lots", "tokens_per_param: 'lots': a number > 0"),
    ("tokens_per_param: 20", "tokens_per_param: needs a ladder"),
    ("ladder_target: 1.0e+7", "ladder_target: needs a ladder"),
    (TWO_RUNGS + "axes: {model.width: [64]}", "axes.model.width: also set by ladder rung 1"),
    (TWO_RUNGS + "variants: {a: {}, b: {model.width: 8}}\nreference: a", "variants.b.model.width: also set by ladder"),
    ("ladder: [{model.width: 16}, {model.width: 32, train.tokens: 5}]\ntokens_per_param: 20",
     "ladder.rung2.train.tokens: set by tokens_per_param"),
    (TWO_RUNGS + "ladder_target: 0", "ladder_target: 0: a non-embedding parameter count (> 0)"),
])
def test_bad_ladders_fail_at_parse_with_one_line_naming_the_key(tmp_path, existing_grid_dir, capsys, body,
                                                               message):
    path = write_grid(tmp_path, BASE + "seeds: [0]\n" + body + "\n", "bad.yaml")
    check_refused_at_parse(path, message, existing_grid_dir, capsys)


def _width_n(width: int) -> int:
    """Non-embedding parameters of the base's one-block attention model at ``width`` (built and counted)."""
    from blockyard.config import config_from_dict

    return real_non_embedding(config_from_dict({"model": {"width": width, "depth": 1, "pattern": ["global_attention"],
                                                          "mlp_expansion": 2.0}}))


@pytest.mark.parametrize("body, message", [
    (TWO_RUNGS + "ladder_target: 5000", "ladder_target: 5000 is below the largest rung's {n32:,d} non-embedding"),
    ("ladder: [{model.width: 32}, {model.width: 16}]", "ladder.rung2: the reference has {n16:,d} non-embedding "
     "parameters here, not more than rung 1's {n32:,d}"),
])
def test_ladders_whose_sizes_do_not_fit_fail_before_anything_is_written(tmp_path, existing_grid_dir, capsys, body,
                                                                        message):
    message = message.format(n16=_width_n(16), n32=_width_n(32))
    assert 5000 < _width_n(32)
    path = write_grid(tmp_path, BASE + "seeds: [0]\n" + body + "\n", "bad.yaml")
    before = tree_snapshot(existing_grid_dir)
    assert main(["grid", str(path), "--out", str(existing_grid_dir)]) == 2
    out, errors = capsys.readouterr()
    assert errors.startswith(f"error: {message}") and errors.count("\n") == 1 and out == "", errors
    assert tree_snapshot(existing_grid_dir) == before
    assert main(["grid", str(path), "--dry-run", "--out", str(existing_grid_dir)]) == 2


def test_dry_run_shows_each_rungs_params_tokens_time_and_the_total(tmp_path, monkeypatch):
    import blockyard.grid.estimate as estimate

    monkeypatch.setattr(estimate, "measure_tokens_per_s", lambda cfg, threads: 1000.0)
    path = write_grid(tmp_path, BASE + LADDER + "tokens_per_param: 4\nladder_target: 1.0e+6\nseeds: [0, 1]\n")
    lines: list[str] = []
    assert run_grid(path, out=tmp_path / "never", workers=2, threads=1, dry_run=True, echo=lines.append) == 0
    assert not (tmp_path / "never").exists()
    text = "\n".join(lines)
    plan = plan_cells(load_grid(path), threads=1)
    assert ("Ladder: 3 rungs; token budget: 4 tokens per non-embedding parameter of the reference; "
            "target N=1e+06") in text
    rung_lines = {ln.split()[0]: ln for ln in text.split("Ladder: ")[1].splitlines()[2:] if ln.strip()}
    for k in (1, 2, 3):
        at = [p for p in plan if dict(p.cell.point)["rung"] == k]
        ref = next(p for p in at if p.cell.variant == "attention")
        seconds = sum(p.cost.tokens for p in at) / 1000.0  # 1000 tokens/s, 4 cells
        line = rung_lines[str(k)]
        assert f" {real_non_embedding(ref.cell.cfg):,d} " in line and f" {ref.cost.tokens:,d} " in line
        assert line.split()[-2:] == ["4", format_duration(seconds)], (line, seconds)
    total = sum(p.cost.tokens for p in plan) / 1000.0
    assert rung_lines["total"].split()[1:] == ["12", format_duration(total)]
    assert "12 cells. Estimated time:" in text


# name -> (smallest, largest) non-embedding parameters of the reference, and whether depth is fixed:
# the evening ladder spans >= 10x at one depth (issue 27); the overnight one ~20k to ~1M, depth 2 to 4.
SHIPPED_LADDERS = {"ladder.yaml": ((25_000, 40_000), (0.25e6, 0.4e6), True),
                   "ladder-overnight.yaml": ((15_000, 30_000), (0.8e6, 1.3e6), False)}


@pytest.mark.parametrize("name", list(SHIPPED_LADDERS))
def test_the_shipped_ladders_span_ten_times_the_parameters_at_20_tokens_per_parameter(name):
    spec = load_grid(Path(__file__).resolve().parent.parent / "configs" / "grids" / name)
    (low0, high0), (low1, high1), fixed_depth = SHIPPED_LADDERS[name]
    assert list(spec.variants) == ["global-attention", "recurrence-only", "hybrid-2r1l"]
    assert spec.ladder is not None and len(spec.ladder.rungs) >= 4 and spec.ladder.tokens_per_param == 20
    plan = plan_cells(spec, threads=1)
    assert len(plan) == 3 * len(spec.ladder.rungs) * len(spec.seeds)
    ref = {dict(p.cell.point)["rung"]: p for p in plan if p.cell.variant == "global-attention"}
    sizes = [ref[k].cost.params_non_embedding for k in sorted(ref)]
    assert low0 <= sizes[0] <= high0 and low1 <= sizes[-1] <= high1 and sizes[-1] >= 10 * sizes[0], sizes
    assert (len({p.cell.cfg.model.depth for p in plan}) == 1) == fixed_depth
    for p in plan:
        n = ref[dict(p.cell.point)["rung"]].cost.params_non_embedding
        assert abs(p.cost.params_non_embedding - n) <= MATCH_TOLERANCE * n
        assert p.cell.cfg.train.tokens == round(20 * n) and p.cell.cfg.model.parametrization == "mup"
        assert p.cell.cfg.data.corpus == "plays"


# ----------------------------------------------------------------------------- the report


def make_ladder_grid(grid_dir: Path, losses: dict[str, dict[int, dict[int, float]]], params: dict[str, list[int]],
                     ladder: Ladder, reference: str = "ref") -> None:
    """A grid dir whose cells ended as given: variant -> rung -> seed -> final loss; params per variant and rung."""
    grid_dir.mkdir()
    rows = []
    for variant, rungs in losses.items():
        for k, seeds in rungs.items():
            for seed in seeds:
                rows.append({"id": f"{variant}-rung{k}-seed{seed}", "variant": variant, "seed": seed,
                             "point": [["rung", k]], "config_hash": f"{variant}{k}{seed}", "adjustments": {},
                             "planned_tokens": 20 * params[reference][k - 1], "flops_per_token": 1000.0,
                             "params_total": params[variant][k - 1] + 500,
                             "params_non_embedding": params[variant][k - 1]})
    with open_index(grid_dir) as index:
        index.plan(rows)
        index.set_meta({"name": "synthetic-ladder", "reference": reference, "match": "params",
                        "design": Design().to_json(), "ladder": ladder.to_json()})
        for r in rows:
            loss = losses[r["variant"]][r["point"][0][1]][r["seed"]]
            index.mark_running(r["id"])
            index.mark_finished(r["id"], "done", exit_code=0, summary={
                "status": "done", "final_val_loss": loss, "best_val_loss": loss, "tokens_seen": r["planned_tokens"],
                "steps": 10, "wall_s": 1.0, "tokens_per_s": 1000.0})


def test_report_fits_each_variant_and_the_trend_of_each_gap(tmp_path):
    # Reference: L(N) = E + A N^-alpha with E = 1.7, A = 400, alpha = 0.34 (the form of Hoffmann et al.
    # 2022, eq. 2, in N alone; these numbers are ours) plus seed noise; the variant's gap closes by
    # 0.03 nats/token per doubling. The null control is the reference again (left out of the trends).
    rng = np.random.default_rng(7)
    n_ref = [20_000, 80_000, 300_000, 1_000_000]
    params = {"ref": n_ref, "rec": [int(n * 1.01) for n in n_ref], "null-control": n_ref}
    seeds = (0, 1, 2, 3)
    truth = {k: 1.7 + 400 * n ** -0.34 for k, n in enumerate(n_ref, start=1)}
    gap = {k: 0.6 - 0.03 * math.log2(n) for k, n in enumerate(n_ref, start=1)}
    losses: dict[str, dict[int, dict[int, float]]] = {"ref": {}, "rec": {}, "null-control": {}}
    for k in truth:
        for s in seeds:
            base = truth[k] + rng.normal(0, 0.005)  # what a seed's init and data do to every variant
            losses["ref"].setdefault(k, {})[s] = base
            losses["null-control"].setdefault(k, {})[s] = base + rng.normal(0, 0.003)
            losses["rec"].setdefault(k, {})[s] = base + gap[k] + rng.normal(0, 0.003)
    grid_dir = tmp_path / "grid"
    make_ladder_grid(grid_dir, losses, params, Ladder(({"model.width": 32}, {"model.width": 64},
                                                       {"model.width": 128}, {"model.width": 256}),
                                                      20.0, 1.0e7))
    report = write_report(grid_dir).read_text()

    with open(grid_dir / "trend.csv") as f:
        rows = list(csv.DictReader(f))
    assert tuple(rows[0])[:11] == ("variant", "point", "slope_per_doubling", "slope_low", "slope_high", "trend",
                                   "target", "gap_at_target", "gap_low", "gap_high", "crossover")
    assert tuple(rows[0]) == TREND_COLUMNS and [r["variant"] for r in rows] == ["rec"]
    # The slope is the random-rung WLS line through the rung means of the per-seed paired differences against
    # log2 of the reference's N (issue 27): with 4 seeds at every rung its weights are equal, so it is the
    # OLS line through the rung means (statsmodels OLS: slope and 95% interval on R - 2 = 2 df).
    x = np.array([math.log2(n_ref[k - 1]) for k in truth])
    d = np.array([np.mean([losses["rec"][k][s] - losses["ref"][k][s] for s in seeds]) for k in truth])
    ols = sm.OLS(d, sm.add_constant(x)).fit()
    assert float(rows[0]["slope_per_doubling"]) == pytest.approx(ols.params[1], rel=1e-9)
    low, high = ols.conf_int(0.05)[1]
    assert (float(rows[0]["slope_low"]), float(rows[0]["slope_high"])) == pytest.approx((low, high), rel=1e-9)
    assert rows[0]["slope_df"] == "2" and float(rows[0]["rung_sd"]) >= 0
    assert rows[0]["trend"] == "shrinking" and float(rows[0]["target"]) == 1.0e7
    assert float(rows[0]["gap_low"]) < float(rows[0]["gap_at_target"]) < float(rows[0]["gap_high"])
    assert float(rows[0]["gap_at_target"]) == pytest.approx(0.6 - 0.03 * math.log2(1e7), abs=0.02)
    # The true gap crosses 0 at 2^20 = 1.05M, within 10x of the largest rung.
    assert float(rows[0]["crossover"]) == pytest.approx(2 ** 20, rel=0.15)

    with open(grid_dir / "fits.csv") as f:
        fits = {r["variant"]: r for r in csv.DictReader(f)}
    assert set(fits) == {"ref", "rec"}  # the null control repeats the reference: no fit of its own
    ref_fit = fits["ref"]
    assert ref_fit["form"] == "E + A * N^-alpha" and ref_fit["rungs"] == "4"
    assert float(ref_fit["alpha_low"]) <= float(ref_fit["alpha"]) <= float(ref_fit["alpha_high"])
    assert float(ref_fit["alpha"]) == pytest.approx(0.34, abs=0.1)
    assert float(ref_fit["E"]) == pytest.approx(1.7, abs=0.15)

    section = report.split("## Ladder: does the gap close with size?")[1].split("\n## ")[0]
    slope = float(rows[0]["slope_per_doubling"])
    assert f"**rec** vs ref: gap {slope:+.4f} nats/token per doubling of N (95% CI" in section
    assert ": shrinking; the fitted gap crosses 0 at N=" in section and "% Fieller interval" in section
    assert "DerSimonian & Laird 1986" in section  # the report names its trend method
    assert "only 1 degree of freedom is left for misfit" in section
    assert "| 4 | model.width=256 | ref 1M, rec 1.01M, null-control 1M |" not in section  # null control not listed
    assert "| 4 | model.width=256 | ref 1M, rec 1.01M | 20M |" in section
    assert (grid_dir / LOSS_VS_N).stat().st_size > 10_000 and (grid_dir / GAP_VS_N).stat().st_size > 10_000
    assert f"]({LOSS_VS_N})" in report and f"]({GAP_VS_N})" in report
    # Every rung is an axis point of the verdicts: one comparison per rung for rec (and its null control apart).
    with open(grid_dir / "verdicts.csv") as f:
        verdicts = list(csv.DictReader(f))
    assert sorted(r["point"] for r in verdicts if r["variant"] == "rec") == [f"rung={k}" for k in (1, 2, 3, 4)]
    assert {r["family_size"] for r in verdicts} == {"4"}


def test_rungs_without_finished_seeds_are_left_out_and_said_so(tmp_path):
    n_ref = [1_000, 4_000, 16_000]
    losses = {"ref": {1: {0: 3.0, 1: 3.1}, 2: {0: 2.8, 1: 2.85}, 3: {0: 2.6, 1: 2.62}},
              "rec": {1: {0: 3.2, 1: 3.3}, 2: {0: 2.9, 1: 2.97}}}
    grid_dir = tmp_path / "grid"
    make_ladder_grid(grid_dir, losses, {"ref": n_ref, "rec": n_ref},
                     Ladder(({"model.width": 8}, {"model.width": 16}, {"model.width": 32})))
    with open_index(grid_dir) as index:  # rung 3 of rec never ran
        index.plan([{"id": f"rec-rung3-seed{s}", "variant": "rec", "seed": s, "point": [["rung", 3]],
                     "config_hash": "x", "adjustments": {}, "planned_tokens": 1, "flops_per_token": 1.0,
                     "params_total": 1, "params_non_embedding": 16_000} for s in (0, 1)])
    report = write_report(grid_dir).read_text()
    assert "rec: rung(s) 3 left out of the loss fit (no finished seed)" in report
    assert "rec: rung(s) 3 left out of the gap trend (no finished seed)" in report
    with open(grid_dir / "fits.csv") as f:
        fits = {r["variant"]: r for r in csv.DictReader(f)}
    # 2-3 rungs: log L on log N without E, and the fit says so (issue 17).
    assert fits["rec"]["rungs"] == "2" and fits["rec"]["E"] == "" and "without E" in fits["rec"]["note"]
    assert fits["ref"]["form"] == "A * N^-alpha (log L on log N, no E)"


# ----------------------------------------------------------------------------- end to end


@pytest.mark.slow
def test_a_tiny_ladder_trains_and_writes_trend_fits_and_plots(tmp_path):
    path = write_grid(tmp_path, BASE + textwrap.dedent("""
        name: tiny-ladder
        variants:
          attention: {}
          recurrence: {model.pattern: [recurrence]}
        reference: attention
        match: params
        ladder:
          - {model.width: 16}
          - {model.width: 24}
          - {model.width: 32}
        tokens_per_param: 1
        ladder_target: 1.0e+5
        seeds: [0]
    """))
    lines: list[str] = []
    assert run_grid(path, out=tmp_path / "out", workers=2, threads=1, echo=lines.append) == 0, lines
    grid_dir = tmp_path / "out"
    with open_index(grid_dir, readonly=True) as index:
        cells = {c["id"]: c for c in index.cells()}
    # 3 rungs of 1 seed (6 cells): the gap trend's interval has R - 2 degrees of freedom (issue 27), so 2 rungs
    # would give none.
    assert len(cells) == 6 and all(c["status"] == "done" for c in cells.values())
    # Each rung trained on 1 token per reference parameter (whole steps of 2 x 16 tokens).
    plan = {p.id: p for p in plan_cells(load_grid(path), threads=1)}
    for cid, c in cells.items():
        ref = plan[cid.replace("recurrence", "attention")]
        assert c["tokens_seen"] == math.ceil(ref.cost.params_non_embedding / 32) * 32
    with open(grid_dir / "trend.csv") as f:
        trend = list(csv.DictReader(f))
    with open(grid_dir / "fits.csv") as f:
        fits = list(csv.DictReader(f))
    assert [r["variant"] for r in trend] == ["recurrence"] and trend[0]["target"] == "100000.0"
    assert [r["variant"] for r in fits] == ["attention", "recurrence"]
    assert all(r["form"].startswith("A * N^-alpha") for r in fits)
    assert (grid_dir / LOSS_VS_N).exists() and (grid_dir / GAP_VS_N).exists()
    report = (grid_dir / "report.md").read_text()
    assert "## Ladder: does the gap close with size?" in report and "**recurrence** vs attention: gap" in report
