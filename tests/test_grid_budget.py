"""Planning a grid's budget before training: the dry run's plan, ``--noise-from``, ``seeds.most: auto``.

Sources: power of the paired t test (Cohen 1988, "Statistical Power Analysis for the Behavioral
Sciences", ch. 2), computed here by statsmodels' TTestPower, independently of the engine's
solver; equivalence by two one-sided tests (Schuirmann 1987), each at half the interval's level;
the pooled sd sqrt(sum (n_i - 1) s_i^2 / sum (n_i - 1)) (any statistics text). Times: every cell
at a patched 1000 tokens/s, so a cell of 10 steps x 4 x 32 tokens takes 1.28 s.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from _helpers import check_refused_at_parse, curve_grid, earlier_grid_dir, tree_snapshot, write_grid
from statsmodels.stats.power import TTestPower

from blockyard.cli import main
from blockyard.grid import budget, stats
from blockyard.grid.index import open_index
from blockyard.grid.plan import plan_cells, plan_rows
from blockyard.grid.rounds import plan_rounds
from blockyard.grid.run import run_grid
from blockyard.grid.spec import Design, SeedSchedule, load_grid
from blockyard.grid.verdicts import GroupOutcomes, compare_all, restrict

BASE = ("base: {model: {width: 32, depth: 1, pattern: [global_attention]}, data: {corpus: pydoc, seq_len: 32}, "
        "train: {steps: 10, batch_size: 4}}")


@pytest.fixture
def fixed_speed(monkeypatch):
    import blockyard.grid.estimate as estimate

    monkeypatch.setattr(estimate, "measure_tokens_per_s", lambda cfg, threads: 1000.0)


def _spec(tmp_path, seeds: str, smallest_effect: float = 0.01, extra: str = "", name: str = "grid.yaml"):
    return write_grid(tmp_path, f"""
        {BASE}
        variants: {{a: {{}}, b: {{train.lr: 0.001}}}}
        reference: a
        seeds: {seeds}
        smallest_effect: {smallest_effect}
        {extra}
    """, name)


def _dry(path, out, **kw) -> str:
    lines: list[str] = []
    assert run_grid(path, out=out, workers=2, threads=1, dry_run=True, echo=lines.append, **kw) == 0
    return "\n".join(lines)


def _powers(effect: float, n: int, sd: float, alpha: float) -> tuple[float, float]:
    """(power to find a true ±effect two-sided at alpha, power of each one-sided equivalence test at alpha/2 when the
    truth is 0), by statsmodels."""
    p = TTestPower()
    return (p.power(effect / sd, n, alpha, alternative="two-sided"),
            p.power(effect / sd, n, alpha / 2, alternative="larger"))


def _decides(effect, n, sd, alpha) -> bool:
    diff, equiv = _powers(effect, n, sd, alpha)
    return diff >= 0.8 and equiv >= 0.9


def _noise_grid(tmp_path) -> tuple:
    """An earlier grid dir: two comparisons with known final differences (5 and 4 pairs)."""
    rng = np.random.default_rng(3)
    ref = {s: [2.0 + rng.normal(0, 0.1)] for s in range(5)}
    a = {s: [ref[s][0] + rng.normal(0.01, 0.03)] for s in range(5)}
    b = {s: [ref[s][0] + rng.normal(0.0, 0.05)] for s in range(4)}
    grid_dir = tmp_path / "earlier"
    curve_grid(grid_dir, {"ref": ref, "a": a, "b": b}, reference="ref", design_json=Design().to_json())
    sd_a = np.std([a[s][0] - ref[s][0] for s in range(5)], ddof=1)
    sd_b = np.std([b[s][0] - ref[s][0] for s in range(4)], ddof=1)
    return grid_dir, float(np.sqrt((4 * sd_a**2 + 3 * sd_b**2) / 7))


def test_dry_run_with_noise_from_plans_with_the_pooled_measured_sd(tmp_path, fixed_speed):
    noise_dir, pooled = _noise_grid(tmp_path)
    before = tree_snapshot(noise_dir)
    text = _dry(_spec(tmp_path, "[0, 1, 2, 3, 4]", smallest_effect=0.5), tmp_path / "never", noise_from=noise_dir)
    assert tree_snapshot(noise_dir) == before and not (tmp_path / "never").exists()
    assert f"paired sd {pooled:.4f} nats/token, measured in {noise_dir}" in text and "7 degrees of freedom" in text
    assert "ASSUMPTION" not in text and "CANNOT DECIDE" not in text
    # m = 1 comparison, one look: level 0.05. The decidable effect is the smallest d with both powers reached.
    d = float(re.search(r"decides a smallest effect of ([0-9.]+)", text).group(1))
    assert _decides(d * 1.0005, 5, pooled, 0.05) and not _decides(d * 0.995, 5, pooled, 0.05)


def test_dry_run_without_noise_states_the_assumption_and_what_cannot_be_decided(tmp_path, fixed_speed):
    text = _dry(_spec(tmp_path, "[0, 1, 2]"), tmp_path / "never")
    sd = budget.ASSUMED_PAIRED_SD
    assert f"paired sd {sd:.4f} nats/token is an ASSUMPTION: the default grid's models' paired sd" in text
    assert "CANNOT DECIDE" in text
    block = text.split("CANNOT DECIDE")[1]
    # More seeds: the smallest n whose fixed design (level 0.05) decides 0.01 at the assumed sd (statsmodels).
    n = int(re.search(r"more seeds: a list of (\d+) seeds", block).group(1))
    assert _decides(0.01, n, sd, 0.05) and not _decides(0.01, n - 1, sd, 0.05)
    # The seeds and the worst-case time of that design: 2 groups x n cells of 1.28 s on 2 workers.
    assert f"smallest_effect 0.01 needs a list of {n} seeds, " in text
    assert "longer training: only if it lowers the paired sd" in block
    # A larger smallest effect: the value offered is one 3 seeds decide, 3 seeds cannot decide 0.01.
    offered = float(re.search(r"smallest_effect: ([0-9.]+) is what this budget decides", block).group(1))
    assert _decides(offered, 3, sd, 0.05) and not _decides(0.01, 3, sd, 0.05)
    # The same budget with that smallest effect: no block.
    spec = _spec(tmp_path, "[0, 1, 2]", smallest_effect=offered, name="larger.yaml")
    assert "CANNOT DECIDE" not in _dry(spec, tmp_path / "never")


def test_one_seed_cannot_decide_anything(tmp_path, fixed_speed):
    text = _dry(_spec(tmp_path, "[0]", smallest_effect=0.5), tmp_path / "never")
    assert "worst case, 1 seed(s) per group: no interval" in text and "CANNOT DECIDE: 1 seed per group" in text


def test_seed_rounds_plan_at_their_sequential_level(tmp_path, fixed_speed):
    text = _dry(_spec(tmp_path, "{first: 3, most: 9, step: 2}", smallest_effect=0.03), tmp_path / "never")
    sd = budget.ASSUMED_PAIRED_SD
    alpha = stats.sequential_alpha((3, 5, 7, 9), 0.05)
    assert f"level per comparison: {alpha:.4g} two-sided (1 comparison(s), 4 looks at 3, 5, 7, 9 seeds)" in text
    d = float(re.search(r"decides a smallest effect of ([0-9.]+)", text).group(1))
    assert _decides(d * 1.0005, 9, sd, alpha) and not _decides(d * 0.995, 9, sd, alpha)
    # seeds.most that decides 0.03: its own looks' sequential level (the engine's), the powers by statsmodels;
    # one round fewer does not decide it.
    most = int(re.search(r"more seeds: seeds.most: (\d+)", text.split("CANNOT DECIDE")[1]).group(1))
    looks = SeedSchedule(3, most, 2).looks()
    assert _decides(0.03, most, sd, stats.sequential_alpha(looks, 0.05))
    assert not _decides(0.03, most - 2, sd, stats.sequential_alpha(looks[:-1], 0.05))


def _auto_spec(tmp_path, hours: float, name: str = "auto.yaml"):
    return _spec(tmp_path, "{first: 3, most: auto, step: 2}", smallest_effect=0.2,
                 extra=f"budget_hours: {hours!r}", name=name)


# Round 1: 2 groups x 3 seeds = 6 cells of 1.28 s on 2 workers = 3.84 s; each later round 2 x 2 cells = 2.56 s.
# 12 s fits 3.84 + 3 x 2.56 = 11.52 s (most 9), not 14.08 s (most 11).
TWELVE_S = 12 / 3600


def test_most_auto_fits_the_budget_and_plans_its_looks(tmp_path, fixed_speed):
    text = _dry(_auto_spec(tmp_path, TWELVE_S), tmp_path / "never")
    assert "seeds.most: auto -> 9 (the worst case fits in budget_hours" in text
    alpha = stats.sequential_alpha((3, 5, 7, 9), 0.05)
    assert f"{alpha:.4g} two-sided (1 comparison(s), 4 looks at 3, 5, 7, 9 seeds; most: auto from budget_hours" in text
    assert "worst case, 4 rounds, every group to 9 seeds: 18 cells, 12s for the grid" in text
    assert budget.worst_case_wall(3, 9, 2, lambda k: 2 * k * 1.28 / 2) == pytest.approx(11.52)


def test_most_auto_replays_the_recorded_value_on_a_slower_machine(tmp_path, monkeypatch, fixed_speed):
    spec = budget.with_most(load_grid(_auto_spec(tmp_path, TWELVE_S)), 9)
    grid_dir = tmp_path / "grid_dir"
    grid_dir.mkdir()
    with open_index(grid_dir) as index:
        index.plan(plan_rows(plan_cells(spec, threads=1)))
        index.set_meta({"design": spec.design.to_json(), "threads": "1"})
    import blockyard.grid.estimate as estimate

    monkeypatch.setattr(estimate, "measure_tokens_per_s", lambda cfg, threads: 100.0)  # ten times slower
    text = _dry(_auto_spec(tmp_path, TWELVE_S), grid_dir)
    assert "seeds.most: auto -> 9 (recorded in the grid dir when it started)" in text
    # Another budget is another design: refused (exit 2) before anything in the grid dir changes.
    before = tree_snapshot(grid_dir)
    assert main(["grid", str(_auto_spec(tmp_path, 2 * TWELVE_S, "more.yaml")), "--out", str(grid_dir),
                 "--threads", "1", "--workers", "2"]) == 2
    assert tree_snapshot(grid_dir) == before


def _null_outcomes(rng, most: int, variants: tuple[str, ...]) -> dict:
    ref = rng.normal(0, 1, most)
    groups = {("ref", ()): GroupOutcomes("ref", (), dict(enumerate(ref)), (), (), ())}
    for v in variants:
        groups[(v, ())] = GroupOutcomes(v, (), dict(enumerate(ref + rng.normal(0, 1, most))), (), (), ())
    return groups


def test_most_auto_keeps_the_family_wise_error_at_five_percent():
    """Seeded simulation with the engine's own functions (fit_most, plan_rounds, compare_all): a most: auto design
    resolved to most 9 (looks at 3, 5, 7, 9 seeds), m = 2 null comparisons with paired sd 1 and smallest effect
    1.5, so some comparisons stop early as equivalent (rounds run: 8 grids 1, 110 grids 2, 734 grids 3, 5148 grids
    4). Measured: 150 of 6000 grids had a false better or worse, 2.5% (Clopper-Pearson 95%: 2.1-2.9%); the bound
    is 5% (Jennison & Turnbull 2000, ch. 9: repeated confidence intervals hold at every look at once)."""
    schedule = SeedSchedule(3, budget.fit_most(SeedSchedule(3, 3, 2, auto=True, budget_hours=1.0), 11.6,
                                               lambda k: 2 * k * 1.28 / 2), 2, auto=True, budget_hours=1.0)
    assert schedule.looks() == (3, 5, 7, 9)
    design = Design(smallest_effect=1.5, schedule=schedule)
    rng = np.random.default_rng(2026)
    sims, errors = 6000, 0
    keys = [("ref", ()), ("a", ()), ("b", ())]
    for _ in range(sims):
        outcomes = _null_outcomes(rng, 9, ("a", "b"))
        state = plan_rounds(design, keys, "ref", tuple(range(9)), outcomes)
        family = compare_all(restrict(outcomes, state.seeds), "ref", design, with_planning=False)
        errors += any(c.verdict in (stats.BETTER, stats.WORSE) for c in family.comparisons)
    low, high = stats.clopper_pearson(errors, sims)
    assert high <= 0.05, (errors, low, high)


def test_bad_budget_inputs_exit_2_with_one_line_and_change_nothing(tmp_path, capsys):
    grid_dir = earlier_grid_dir(tmp_path, f"{BASE}\nseeds: [0]\n")
    for seeds, extra, message in [
        ("{first: 3, most: auto, step: 2}", "budget_hours: 0", "budget_hours: 0: a number of hours > 0"),
        ("{first: 3, most: auto, step: 2}", "budget_hours: -1.5", "budget_hours: -1.5: a number of hours > 0"),
        ("{first: 3, most: auto, step: 2}", "budget_hours: true", "budget_hours: True: a number of hours > 0"),
        ("{first: 3, most: auto, step: 2}", "", "seeds.most: auto needs the grid key budget_hours"),
        ("{first: 3, most: 9, step: 2}", "budget_hours: 8", "budget_hours: only with seeds: {first: F, most: auto"),
        ("[0, 1]", "budget_hours: 8", "budget_hours: only with seeds"),
        ("{first: 3, most: often}", "", "seeds.most: 'often': an integer >= seeds.first (3), or auto"),
    ]:
        check_refused_at_parse(_spec(tmp_path, seeds, extra=extra), message, grid_dir, capsys)


def test_noise_from_a_dir_that_is_no_grid_exits_2_and_changes_nothing(tmp_path, capsys, fixed_speed):
    grid_dir = earlier_grid_dir(tmp_path, f"{BASE}\nseeds: [0]\n")
    not_grid = tmp_path / "not_a_grid"
    not_grid.mkdir()
    (not_grid / "notes.txt").write_text("hello")
    spec = _spec(tmp_path, "[0, 1]")
    for args, message in [
        (["--dry-run", "--noise-from", str(not_grid)], f"--noise-from {not_grid}: not a grid dir (no index.sqlite)"),
        (["--dry-run", "--noise-from", str(tmp_path / "missing")], "--noise-from"),
        (["--noise-from", str(grid_dir)], f"--noise-from {grid_dir}: only with --dry-run"),
    ]:
        before, before_grid = tree_snapshot(not_grid), tree_snapshot(grid_dir)
        capsys.readouterr()
        assert main(["grid", str(spec), "--out", str(grid_dir), *args]) == 2
        out, err = capsys.readouterr()
        assert err.startswith(f"error: {message}") and err.count("\n") == 1 and out == "", err
        assert tree_snapshot(not_grid) == before and tree_snapshot(grid_dir) == before_grid


def test_a_budget_that_does_not_fit_round_1_exits_2(tmp_path, capsys, fixed_speed):
    capsys.readouterr()
    assert main(["grid", str(_auto_spec(tmp_path, 1 / 3600)), "--out", str(tmp_path / "never"), "--dry-run",
                 "--workers", "2", "--threads", "1"]) == 2
    out, err = capsys.readouterr()
    # Round 1 takes 3.84 s = 0.00107 h here (see TWELVE_S).
    assert err.startswith("error: budget_hours: 0.000278 h (after any tuning stage) does not fit round 1 (3 seeds "
                          "per group take about 0.00107 h here)") and err.count("\n") == 1
    assert not (tmp_path / "never").exists()
