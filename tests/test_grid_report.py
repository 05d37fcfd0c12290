"""The grid report and status line on synthetic grid dirs (index rows + cell metrics written here)."""

from __future__ import annotations

import contextlib
import csv
import json
import re
from pathlib import Path

import pytest
from scipy import stats as sps

from blockyard.cli import main
from blockyard.errors import UserError
from blockyard.grid import stats
from blockyard.grid.griddir import grid_lock
from blockyard.grid.index import open_index
from blockyard.grid.report import write_report
from blockyard.grid.report.sections import CAUTION
from blockyard.grid.report.tables import VERDICT_COLUMNS
from blockyard.grid.spec import Design, SeedSchedule
from blockyard.grid.status import grid_progress, status_text
from blockyard.rundir import writing

TOKENS_PER_STEP = 128


def make_grid(grid_dir: Path, results: dict[str, dict[int, float | str]], reference: str | None = "ref",
              steps: int = 20, point: list | None = None, design: Design | None = None) -> None:
    """A grid dir whose cells ended as given: variant -> seed -> final val loss, or a status string."""
    rows = []
    for variant, seeds in results.items():
        for seed in seeds:
            rows.append({"id": f"{variant}-seed{seed}", "variant": variant, "seed": seed, "point": point or [],
                         "config_hash": f"{variant}{seed}", "adjustments": {},
                         "planned_tokens": steps * TOKENS_PER_STEP, "flops_per_token": 1000.0, "params_total": 2000,
                         "params_non_embedding": 1000})
    with open_index(grid_dir) as index:
        index.plan(rows)
        index.set_meta({"name": "synthetic", "description": "a made-up grid", "reference": reference or "",
                        "match": "none", "design": (design or Design()).to_json()})
        for variant, seeds in results.items():
            for seed, outcome in seeds.items():
                cid = f"{variant}-seed{seed}"
                cell = grid_dir / "cells" / cid
                cell.mkdir(parents=True)
                index.mark_running(cid)
                if isinstance(outcome, str):
                    index.mark_finished(cid, outcome, exit_code=3, message="loss blew up")
                    continue
                lines = []
                for step in range(5, steps + 1, 5):
                    loss = outcome + 0.1 * (steps - step)
                    lines.append({"step": step, "split": "train", "loss": loss, "tokens": step * TOKENS_PER_STEP,
                                  "tokens_per_s": 1000.0, "wall_s": step * 0.1})
                    lines.append({"step": step, "split": "val", "loss": loss, "wall_s": step * 0.1 + 0.01})
                (cell / "metrics.jsonl").write_text("".join(json.dumps(ln) + "\n" for ln in lines))
                summary = {"status": "done", "final_val_loss": outcome, "best_val_loss": outcome,
                           "params": {"total": 2000, "non_embedding": 1000}, "tokens_seen": steps * TOKENS_PER_STEP,
                           "steps": steps, "wall_s": 2.0, "tokens_per_s": 1000.0}
                index.mark_finished(cid, "done", summary=summary, exit_code=0)


def verdict_rows(report: str, section: str = "## Verdicts") -> dict[str, list[str]]:
    body = report.split(section)[1].split("\n## ")[0]
    rows = [ln.strip("|").split(" | ") for ln in body.splitlines() if ln.startswith("| ") and "---" not in ln]
    return {r[0].strip(): [c.strip() for c in r] for r in rows[1:]}


def read_verdicts_csv(grid_dir: Path) -> dict[str, dict[str, str]]:
    with open(grid_dir / "verdicts.csv") as f:
        return {r["variant"]: r for r in csv.DictReader(f)}


def test_identical_variants_are_equivalent(tmp_path):
    finals = {0: 2.31, 1: 2.45, 2: 2.38}
    make_grid(tmp_path, {"ref": dict(finals), "same": dict(finals)})
    report = write_report(tmp_path).read_text()
    row = verdict_rows(report)["same"]
    assert row[3] == "+0.0000"
    assert row[4] == "[+0.0000, +0.0000]"  # the interval [0, 0] lies inside +-0.01
    assert row[5] == "**equivalent**"
    assert row[7] == "2"  # sd 0: two pairs decide anything
    assert "**1 of 1 comparison(s) decided**: 1 equivalent." in report


def test_clear_differences_get_simultaneous_scipy_intervals(tmp_path):
    ref = {0: 2.30, 1: 2.50, 2: 2.40, 3: 2.35}
    better = {0: 2.21, 1: 2.42, 2: 2.29, 3: 2.27}
    worse = {0: 2.36, 1: 2.56, 2: 2.49, 3: 2.40}
    make_grid(tmp_path, {"ref": ref, "better": better, "worse": worse})
    report = write_report(tmp_path).read_text()
    rows = verdict_rows(report)
    # worse: 4 pairs (+0.06, +0.06, +0.09, +0.05); left without seed 2 the 3 pairs' 97.5% interval reaches
    # below 0 (t_{0.9875, 2} = 6.2), so the verdict rests on one seed: fragile. better's is steadier.
    assert rows["better"][5] == "**better**" and rows["worse"][5] == "**worse** (fragile)"
    # Two comparisons: each simultaneous interval is scipy's paired t interval (scipy.stats.ttest_rel,
    # independent code) at 1 - 0.05 / 2 (Bonferroni); the unadjusted column is its 95% interval.
    test = sps.ttest_rel(list(better.values()), list(ref.values()))
    for column, level in ((4, 0.975), (6, 0.95)):
        ci = test.confidence_interval(level)
        low, high = (float(x) for x in re.findall(r"[+-]\d\.\d+", rows["better"][column]))
        assert low == pytest.approx(ci.low, abs=5e-5) and high == pytest.approx(ci.high, abs=5e-5)
    assert "97.5% paired t interval" in report
    assert int(rows["better"][7]) >= 2
    # The group mean and its interval (scipy.stats.ttest_1samp) in the variants table.
    ref_ci = sps.ttest_1samp(list(ref.values()), 0).confidence_interval(0.95)
    assert f"[{ref_ci.low:.4f}, {ref_ci.high:.4f}]" in report
    csv_rows = read_verdicts_csv(tmp_path)
    assert set(VERDICT_COLUMNS) >= {"variant", "point", "pairs", "mean_diff", "low", "high", "low_unadjusted",
                                    "high_unadjusted", "paired_sd", "smallest_effect", "verdict", "seeds_needed",
                                    "diverged_variant", "diverged_reference"}
    b = csv_rows["better"]
    ci = test.confidence_interval(0.975)
    assert float(b["low"]) == pytest.approx(ci.low, rel=1e-9) and float(b["high"]) == pytest.approx(ci.high, rel=1e-9)
    assert (b["verdict"], b["pairs"], b["smallest_effect"], b["family_size"]) == ("better", "4", "0.01", "2")


def test_a_difference_below_the_smallest_effect_is_equivalent_with_a_note(tmp_path):
    ref = {0: 2.30, 1: 2.50, 2: 2.40, 3: 2.35, 4: 2.45}
    slightly = {s: v - 0.003 + 0.0005 * (s % 2) for s, v in ref.items()}  # lower by ~0.003, very steady
    make_grid(tmp_path, {"ref": ref, "slightly": slightly})
    row = verdict_rows(write_report(tmp_path).read_text())["slightly"]
    assert row[5] == "**equivalent** (lower by less than the smallest effect)"


def test_undecided_says_what_would_decide_it(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.1, 2: 2.2}, "noisy": {0: 2.05, 1: 2.06, 2: 2.21}})
    report = write_report(tmp_path).read_text()
    assert verdict_rows(report)["noisy"][5] == "**undecided**"
    note = next(ln for ln in report.splitlines() if ln.startswith("- noisy is undecided at 3 pairs"))
    needed = read_verdicts_csv(tmp_path)["noisy"]
    assert f"about {needed['seeds_needed']} seeds per group would decide it" in note


def test_one_seed_reports_no_interval(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0}, "other": {0: 1.9}})
    report = write_report(tmp_path).read_text()
    row = verdict_rows(report)["other"]
    assert row[4] == "n<2: no interval" and row[5] == "**undecided** (n<2: no interval)"
    assert "n<2: no interval" in report.split("## Variants")[1]


def test_diverged_cells_are_outcomes_decided_on_the_worst_rank_composite(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.2, 2: 2.1}, "hot": {0: 1.8, 1: "diverged", 2: 1.9}})
    report = write_report(tmp_path).read_text()
    excluded = report.split("## Cells without a final loss")[1].split("##")[0]
    assert "| hot-seed1 | diverged | 3 | loss blew up |" in excluded
    assert "ref-seed" not in excluded
    variants = report.split("## Variants")[1].split("##")[0]
    hot = next(ln for ln in variants.splitlines() if ln.startswith("| hot"))
    ref = next(ln for ln in variants.splitlines() if ln.startswith("| ref"))
    # Both rows average the seeds both finished (0 and 2), so the gap is the paired one.
    assert "| 2 / 1 / 0 | 2 | 1.8500 |" in hot and "| 3 / 0 / 0 | 2 | 2.0500 |" in ref
    row = verdict_rows(report)["hot"]
    assert row[2] == "2" and row[9] == "1 / 0"
    # Lower by 0.2 on both common seeds, but it lost seed 1: 3 composite pairs (-0.2, +inf, -0.2) cannot
    # reach 2.5% one-sided (smallest p 1/8, Wilcoxon 1945), so undecided, with McNemar's test of 1 vs 0.
    assert row[5].startswith("**undecided** (divergence differs: diverged on 1 / 0 of 3 pair(s)")
    note = next(ln for ln in report.splitlines() if ln.startswith("- hot: diverged on 1 seed(s)"))
    assert "worst-rank composite's: on 3 pair(s), 1 where only the variant diverged" in note
    assert "No rank test on 3 pair(s) can reach the look's level: the smallest one-sided p is 0.125" in note
    # 2^-n <= 0.025 first at n = 6; the t test's seeds needed do not apply to the composite.
    assert "at least 6 pairs not lost by both are needed" in note and row[7] == "-"
    csv_hot = read_verdicts_csv(tmp_path)["hot"]
    assert csv_hot["diverged_variant"] == "1" and csv_hot["composite_verdict"] == "undecided"
    assert float(csv_hot["divergence_mcnemar_p"]) == 1.0 and csv_hot["fragile"] == "False"


def test_report_files_csv_html_and_caution(tmp_path, capsys):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.1}, "b": {0: 1.9, 1: "failed"}})
    assert main(["report", str(tmp_path)]) == 0
    assert capsys.readouterr().out.strip() == f"wrote {tmp_path / 'report.md'}"
    md = (tmp_path / "report.md").read_text()
    assert md.rstrip().endswith(CAUTION)
    for png in ("val_loss_vs_tokens.png", "val_loss_vs_wall.png"):
        assert (tmp_path / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert f"]({png})" in md
    # Every group has the same size: no params plot (x would span nothing).
    assert not (tmp_path / "final_loss_vs_params.png").exists() and "](verdicts.png)" in md
    html = (tmp_path / "report.html").read_text()
    assert html.count("src='data:image/png;base64,") == 3
    assert CAUTION in html and "<table>" in html
    with open(tmp_path / "results.csv") as f:
        rows = list(csv.DictReader(f))
    assert [r["id"] for r in rows] == ["ref-seed0", "ref-seed1", "b-seed0", "b-seed1"]
    assert [r["status"] for r in rows] == ["done", "done", "done", "failed"]
    assert float(rows[2]["final_val_loss"]) == 1.9 and rows[3]["final_val_loss"] == ""
    assert read_verdicts_csv(tmp_path)["b"]["failed_variant"] == "1"


def test_forest_plot_leads_the_plots_and_the_null_control_stands_apart(tmp_path):
    ref = {0: 2.30, 1: 2.50, 2: 2.40}
    make_grid(tmp_path, {"ref": ref, "b": {s: v - 0.1 for s, v in ref.items()},
                         "null-control": {0: 2.25, 1: 2.46, 2: 2.33}})
    report = write_report(tmp_path).read_text()
    plots = report.split("## Plots")[1]
    assert plots.lstrip().startswith("![Paired differences to the reference")
    assert "](verdicts.png)" in plots.split("\n\n")[1]
    assert (tmp_path / "verdicts.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # One comparison in the family: the null control is outside it and gets its own section.
    assert "**1 of 1 comparison(s) decided**: 1 better." in report
    assert list(verdict_rows(report)) == ["b"]
    null = verdict_rows(report, "## Noise floor (null control)")
    # 2.25 < 2.30 etc.: a false positive here, on 3 pairs (any 2 of them cannot decide: fragile).
    assert null["null-control"][5] == "**better** (fragile)"
    assert "**Flagged:** the null control came out **better**" in report
    # m = 1: the null comparison is at 5%, so a flag comes up in 5% of grids under a true null.
    assert "Under a true null this happens in at most 5% of grids (about 1 in 20): 1 null comparison(s), each at the " \
           "per-comparison level 5% = 5% / 1." in report
    assert read_verdicts_csv(tmp_path)["null-control"]["in_family"] == "False"


def test_sequential_report_says_how_many_rounds_ran_and_why_it_stopped(tmp_path):
    ref = {s: 2.0 + 0.05 * s for s in range(5)}
    design = Design(0.01, SeedSchedule(first=3, most=5, step=2))
    clear = {s: v + 0.3 for s, v in ref.items() if s < 3}
    noisy = {s: v + (0.05 if s % 2 else -0.04) for s, v in ref.items()}
    make_grid(tmp_path, {"ref": ref, "clear": clear, "noisy": noisy}, design=design)
    report = write_report(tmp_path).read_text()
    assert "Rounds: 2 round(s) ran; reached seeds.most = 5 seeds with 1 comparison(s) undecided." in report
    assert "seeds until decided (first 3, most 5, 2 per round" in report
    assert "Seeds until decided: round 1 trains 3 seeds per group" in report
    rows = verdict_rows(report)
    assert rows["clear"][2] == "3" and rows["clear"][5] == "**worse**"
    assert rows["noisy"][2] == "5"


def test_params_plot_only_when_an_axis_varies_size(tmp_path):
    with open_index(tmp_path) as index:
        rows = [{"id": f"{v}-w{w}-s{s}", "variant": v, "seed": s, "point": [["model.width", w]],
                 "config_hash": "h", "adjustments": {}, "planned_tokens": 100, "flops_per_token": 1.0,
                 "params_total": w * w * 20, "params_non_embedding": w * w * 10}
                for v in ("ref", "b") for w in (32, 64) for s in (0, 1)]
        index.plan(rows)
        index.set_meta({"name": "sizes", "reference": "ref", "match": "none"})
        for r in rows:
            index.mark_finished(r["id"], "done", summary={"final_val_loss": 2.0 - r["seed"] * 0.01 - r["point"][0][1]
                                                          / 1000, "tokens_per_s": 1.0, "wall_s": 1.0})
    report = write_report(tmp_path).read_text()
    assert "](final_loss_vs_params.png)" in report


def test_report_of_a_dir_without_grid_is_a_user_error(tmp_path, capsys):
    with pytest.raises(UserError, match="no grid here"):
        write_report(tmp_path)
    assert main(["report", str(tmp_path / "nope")]) == 2
    assert capsys.readouterr().err.startswith("error: ")


def test_status_line_counts_and_eta(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: "diverged"}, "b": {0: 1.9}})
    with open_index(tmp_path) as index:
        index.plan(index_rows := [{"id": cid, "variant": "c", "seed": s, "point": [], "config_hash": cid,
                                    "adjustments": {}, "planned_tokens": 10_000, "flops_per_token": None,
                                    "params_total": 1, "params_non_embedding": 1}
                                   for s, cid in enumerate(["run-a", "run-b", "wait"])])
        assert len(index_rows) == 3
        index.mark_running("run-a")
        index.mark_running("run-b")
    writers = contextlib.ExitStack()  # each running cell's trainer holds its run dir's lock
    for cid, tokens, speed in (("run-a", 4000, 500.0), ("run-b", 1000, 1500.0)):
        (tmp_path / "cells" / cid).mkdir(parents=True)
        line = {"step": 1, "split": "train", "loss": 3.0, "tokens": tokens, "tokens_per_s": speed}
        (tmp_path / "cells" / cid / "metrics.jsonl").write_text(json.dumps(line) + "\n" + '{"step": 2, "spl')
        writers.enter_context(writing(tmp_path / "cells" / cid))
    with writers:
        progress = grid_progress(tmp_path)
        text = status_text(tmp_path)
    assert (progress.done, progress.diverged, progress.running, progress.failed, progress.left) == (2, 1, 2, 0, 1)
    # Left: (10000 - 4000) + (10000 - 1000) + 10000 tokens at 500 + 1500 tokens/s.
    assert progress.eta_s == pytest.approx(25_000 / 2000)
    assert text.splitlines()[0] == "grid synthetic: 3/6 done (1 diverged), 2 running, 0 failed, 1 left | ETA 12s"
    assert "running run-a: step 1, 40% of 10,000 tokens, 500 tok/s" in text
    assert "no grid process holds this dir" in text


def test_eta_counts_a_cell_without_speed_at_the_finished_cells_speed(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0}})  # one finished cell at 1000 tokens/s
    with open_index(tmp_path) as index:
        index.plan([{"id": "new", "variant": "c", "seed": 0, "point": [], "config_hash": "x", "adjustments": {},
                     "planned_tokens": 5000, "flops_per_token": None, "params_total": 1, "params_non_embedding": 1}])
        index.mark_running("new")
    with grid_lock(tmp_path):  # the grid process lives; its new cell has not written a line yet
        assert grid_progress(tmp_path).eta_s == pytest.approx(5000 / 1000.0)


def test_status_line_between_cells_says_no_cell_is_running(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0}})
    with open_index(tmp_path) as index:
        index.plan([{"id": "next", "variant": "c", "seed": 0, "point": [], "config_hash": "x", "adjustments": {},
                     "planned_tokens": 5000, "flops_per_token": None, "params_total": 1, "params_non_embedding": 1}])
    progress = grid_progress(tmp_path)
    assert (progress.running, progress.left, progress.eta_s) == (0, 1, None)
    assert progress.line().endswith("1 left | no cell running")


def test_status_command_prints_the_grid_line(tmp_path, capsys):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.1}})
    assert main(["grid", "--status", str(tmp_path)]) == 0
    assert capsys.readouterr().out == "grid synthetic: 2/2 done, 0 running, 0 failed, 0 left | finished\n"
    assert main(["grid", "--status", str(tmp_path / "nothing")]) == 2
    assert "no grid here" in capsys.readouterr().err


def test_comparisons_pair_cells_at_the_same_axis_point(tmp_path):
    # Two axis points; the variant is better at width 64 only. Pairing across points would mix them up.
    with open_index(tmp_path) as index:
        rows, finals = [], {}
        for variant, by_width in {"ref": {32: (2.0, 2.1, 2.2), 64: (1.8, 1.9, 2.0)},
                                  "var": {32: (2.01, 2.09, 2.21), 64: (1.7, 1.81, 1.9)}}.items():
            for width, values in by_width.items():
                for seed, value in enumerate(values):
                    cid = f"{variant}-width{width}-seed{seed}"
                    finals[cid] = value
                    rows.append({"id": cid, "variant": variant, "seed": seed, "point": [["model.width", width]],
                                 "config_hash": cid, "adjustments": {}, "planned_tokens": 100,
                                 "flops_per_token": 1.0, "params_total": 10, "params_non_embedding": 5})
        index.plan(rows)
        index.set_meta({"name": "axes", "reference": "ref", "match": "none"})
        for cid, value in finals.items():
            index.mark_finished(cid, "done", summary={"final_val_loss": value, "tokens_per_s": 1.0, "wall_s": 1.0})
    report = write_report(tmp_path).read_text()
    section = report.split("## Verdicts")[1].split("## Variants")[0]
    lines = [ln for ln in section.splitlines() if ln.startswith("| var |")]
    assert len(lines) == 2
    # Two comparisons (one variant at two points): 97.5% intervals, t(0.9875, 2) = 6.205.
    assert "| model.width=32 | 3 | +0.0033 | [-0.0380, +0.0447] | **undecided** |" in lines[0]
    # Fragile: left without one of its 3 seeds, 2 pairs (t(0.9875, 1) = 25.45) cannot decide it.
    assert "| model.width=64 | 3 | -0.0967 | [-0.1174, -0.0760] | **better** (fragile) |" in lines[1]


def test_the_power_sentence_and_the_method_say_when_they_hold(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.1, 2: 2.2, 3: 2.3}, "noisy": {0: 2.01, 1: 2.09, 2: 2.22, 3: 2.29}})
    report = write_report(tmp_path).read_text()
    csv_noisy = read_verdicts_csv(tmp_path)["noisy"]
    need, sd = int(csv_noisy["seeds_needed"]), float(csv_noisy["sd_upper"])
    note = next(ln for ln in report.splitlines() if ln.startswith("- noisy is undecided at 4 pairs"))
    # 80% power holds at a true difference of 0 and of at least delta; in between it is lower, and the note
    # gives the chance at delta / 2 (stats.decision_probability, checked against a simulation elsewhere).
    chance = stats.decision_probability(0.005, sd, need, 0.05, 0.01)
    assert chance < 0.8
    assert (f"would decide it with 80% power if the true difference is 0 (equivalent; "
            f"{csv_noisy['seeds_for_equivalence']} seeds) or at least ±0.01 (better or worse; "
            f"{csv_noisy['seeds_for_difference']} seeds); at a true difference in between, ±0.005, the chance with "
            f"{need} seeds is {100 * chance:.4g}%") in note
    method = report.split("## Method")[1]
    assert "Assumptions of the error bound: the paired differences are independent across seeds" in method
    assert "about 10% at 5 pairs and 8% at 10 pairs" in method  # measured in tests/test_divergence_verdicts.py
    assert "worst-rank composite (Lachin 1999" in method and "Fragile:" in method


# ----------------------------------------------------------------------------- the HTML page and the figures


def test_html_renders_emphasis_strong_and_code_and_leaves_products_alone():
    """Inline marks as CommonMark reads them (spec 0.31, sec. 6.2: a `*` opens emphasis when no space
    follows it and closes it when no space precedes it; code spans take their content literally)."""
    from blockyard.grid.report.document import Doc

    doc = Doc()
    doc.p("*every* group, **bold**, `a*b*c`, 2*3*4 and a * b * c")
    doc.table(["*x*"], [["**y**"]])
    html = doc.html(Path("."), "t")
    assert "<em>every</em> group, <strong>bold</strong>, <code>a*b*c</code>, 2*3*4 and a * b * c" in html
    assert "<td><strong>y</strong></td>" in html and "*every*" not in html


def test_wide_tables_scroll_inside_the_page():
    from blockyard.grid.report.document import Doc

    doc = Doc()
    doc.table([f"column {i}" for i in range(40)], [[str(i) for i in range(40)]])
    html = doc.html(Path("."), "t")
    assert ".wide{overflow-x:auto" in html
    assert re.search(r"<div class='wide'><table>.*</table></div>", html, re.S)


def test_figures_draw_in_our_palette(tmp_path):
    import matplotlib

    from blockyard import palette

    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.1}, "b": {0: 1.9, 1: 2.0}})
    write_report(tmp_path)
    assert matplotlib.rcParams["axes.prop_cycle"].by_key()["color"] == list(palette.SERIES)
    assert len(set(palette.SERIES)) == len(palette.SERIES)
    verdicts = {palette.BETTER, palette.WORSE, palette.EQUIVALENT, palette.UNDECIDED, palette.OUTSIDE}
    assert len(verdicts) == 5
