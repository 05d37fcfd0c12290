"""The grid report and status line on synthetic grid dirs (index rows + cell metrics written here)."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import pytest
from scipy import stats as sps

from blockyard.cli import main
from blockyard.errors import UserError
from blockyard.grid.index import open_index
from blockyard.grid.report import CAUTION, write_report
from blockyard.grid.status import grid_progress, status_text

TOKENS_PER_STEP = 128


def make_grid(grid_dir: Path, results: dict[str, dict[int, float | str]], reference: str | None = "ref",
              steps: int = 20, point: list | None = None) -> None:
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
                        "match": "none"})
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


def verdict_rows(report: str) -> dict[str, list[str]]:
    section = report.split("## Verdicts")[1].split("## Variants")[0]
    rows = [ln.strip("|").split(" | ") for ln in section.splitlines() if ln.startswith("| ") and "---" not in ln]
    return {r[0].strip(): [c.strip() for c in r] for r in rows[1:]}


def test_identical_variants_give_no_detectable_difference(tmp_path):
    finals = {0: 2.31, 1: 2.45, 2: 2.38}
    make_grid(tmp_path, {"ref": dict(finals), "same": dict(finals)})
    report = write_report(tmp_path).read_text()
    row = verdict_rows(report)["same"]
    assert row[3] == "+0.0000"
    assert row[4] == "[+0.0000, +0.0000]"  # the interval [0, 0] contains 0
    assert row[5] == "**no detectable difference at this budget**"
    assert row[6] == "-"  # nothing to detect


def test_clear_difference_is_a_verdict_with_scipy_interval(tmp_path):
    ref = {0: 2.30, 1: 2.50, 2: 2.40, 3: 2.35}
    better = {0: 2.21, 1: 2.42, 2: 2.29, 3: 2.27}
    worse = {0: 2.36, 1: 2.56, 2: 2.49, 3: 2.40}
    make_grid(tmp_path, {"ref": ref, "better": better, "worse": worse})
    report = write_report(tmp_path).read_text()
    rows = verdict_rows(report)
    assert rows["better"][5] == "**better**" and rows["worse"][5] == "**worse**"
    # The printed interval is scipy's paired t interval (scipy.stats.ttest_rel, independent code).
    ci = sps.ttest_rel(list(better.values()), list(ref.values())).confidence_interval(0.95)
    low, high = (float(x) for x in re.findall(r"[+-]\d\.\d+", rows["better"][4]))
    assert low == pytest.approx(ci.low, abs=5e-5) and high == pytest.approx(ci.high, abs=5e-5)
    assert high < 0
    assert int(rows["better"][6]) >= 2
    # The group mean and its interval (scipy.stats.ttest_1samp) in the variants table.
    ref_ci = sps.ttest_1samp(list(ref.values()), 0).confidence_interval(0.95)
    assert f"[{ref_ci.low:.4f}, {ref_ci.high:.4f}]" in report


def test_one_seed_reports_no_interval(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0}, "other": {0: 1.9}})
    report = write_report(tmp_path).read_text()
    row = verdict_rows(report)["other"]
    assert row[4] == "n=1: no interval" and row[5] == "**n=1: no interval**"
    assert "n=1: no interval" in report.split("## Variants")[1]


def test_diverged_cells_are_listed_and_left_out(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.2}, "hot": {0: 1.8, 1: "diverged"}})
    report = write_report(tmp_path).read_text()
    excluded = report.split("## Cells left out of the statistics")[1].split("##")[0]
    assert "| hot-seed1 | diverged | 3 | loss blew up |" in excluded
    assert "ref-seed" not in excluded
    variants = report.split("## Variants")[1].split("##")[0]
    hot = next(ln for ln in variants.splitlines() if ln.startswith("| hot"))
    assert "| 1/2 | 1.8000 | n=1: no interval |" in hot  # the diverged seed is not averaged in
    assert verdict_rows(report)["hot"][2] == "1"  # one finished pair


def test_report_files_csv_html_and_caution(tmp_path, capsys):
    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.1}, "b": {0: 1.9, 1: "failed"}})
    assert main(["report", str(tmp_path)]) == 0
    assert capsys.readouterr().out.strip() == f"wrote {tmp_path / 'report.md'}"
    md = (tmp_path / "report.md").read_text()
    assert md.rstrip().endswith(CAUTION)
    for png in ("val_loss_vs_tokens.png", "val_loss_vs_wall.png", "final_loss_vs_params.png"):
        assert (tmp_path / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert f"]({png})" in md
    html = (tmp_path / "report.html").read_text()
    assert html.count("src='data:image/png;base64,") == 3
    assert CAUTION in html and "<table>" in html
    with open(tmp_path / "results.csv") as f:
        rows = list(csv.DictReader(f))
    assert [r["id"] for r in rows] == ["ref-seed0", "ref-seed1", "b-seed0", "b-seed1"]
    assert [r["status"] for r in rows] == ["done", "done", "done", "failed"]
    assert float(rows[2]["final_val_loss"]) == 1.9 and rows[3]["final_val_loss"] == ""


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
    for cid, tokens, speed in (("run-a", 4000, 500.0), ("run-b", 1000, 1500.0)):
        (tmp_path / "cells" / cid).mkdir(parents=True)
        line = {"step": 1, "split": "train", "loss": 3.0, "tokens": tokens, "tokens_per_s": speed}
        (tmp_path / "cells" / cid / "metrics.jsonl").write_text(json.dumps(line) + "\n" + '{"step": 2, "spl')
    progress = grid_progress(tmp_path)
    assert (progress.done, progress.diverged, progress.running, progress.failed, progress.left) == (2, 1, 2, 0, 1)
    # Left: (10000 - 4000) + (10000 - 1000) + 10000 tokens at 500 + 1500 tokens/s.
    assert progress.eta_s == pytest.approx(25_000 / 2000)
    text = status_text(tmp_path)
    assert text.splitlines()[0] == "grid synthetic: 3/6 done (1 diverged), 2 running, 0 failed, 1 left | ETA 12s"
    assert "running run-a: step 1, 40% of 10,000 tokens, 500 tok/s" in text
    assert "no grid process holds this dir" in text


def test_eta_counts_a_cell_without_speed_at_the_finished_cells_speed(tmp_path):
    make_grid(tmp_path, {"ref": {0: 2.0}})  # one finished cell at 1000 tokens/s
    with open_index(tmp_path) as index:
        index.plan([{"id": "new", "variant": "c", "seed": 0, "point": [], "config_hash": "x", "adjustments": {},
                     "planned_tokens": 5000, "flops_per_token": None, "params_total": 1, "params_non_embedding": 1}])
        index.mark_running("new")
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
    assert "| model.width=32 | 3 | +0.0033 |" in lines[0] and "no detectable difference" in lines[0]
    assert "| model.width=64 | 3 | -0.0967 |" in lines[1] and "**better**" in lines[1]
