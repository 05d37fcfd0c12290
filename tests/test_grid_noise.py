"""The noise of each comparison along training: noise.csv, the report's Noise section and noise.png.

Sources: the paired sd is the sample sd of the per-seed differences with n - 1 degrees of freedom
(any statistics text; numpy's ``std(ddof=1)``); the detectable difference is the effect size at
which the two-sided one-sample (= paired) t test reaches 80% power (Cohen 1988, "Statistical
Power Analysis for the Behavioral Sciences", ch. 2), here solved by statsmodels' TTestPower,
times the paired sd.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
from _helpers import curve_grid
from statsmodels.stats.power import TTestPower

from blockyard.grid.noise import NoiseCurve, NoisePoint, resolution, resolution_text
from blockyard.grid.report import write_report
from blockyard.grid.spec import NULL_VARIANT, Design

TOKENS_PER_STEP = 128
EVAL_EVERY = 10


def _losses(seed_count: int = 5, evals: int = 4) -> dict[str, dict[int, list[float]]]:
    """Two variants, a reference and a null control; seeded random curves (no structure the code could exploit)."""
    rng = np.random.default_rng(7)
    out = {}
    for v in ("ref", "a", "b", NULL_VARIANT):
        out[v] = {s: list(3.0 - 0.1 * np.arange(evals) + rng.normal(0, 0.05, evals)) for s in range(seed_count)}
    return out


def _read(grid_dir) -> list[dict[str, str]]:
    with open(grid_dir / "noise.csv") as f:
        return list(csv.DictReader(f))


def test_noise_csv_equals_numpy_and_statsmodels(tmp_path):
    losses = _losses()
    curve_grid(tmp_path, losses, reference="ref", design_json=Design(null_control=True).to_json(),
               tokens_per_step=TOKENS_PER_STEP, eval_every=EVAL_EVERY)
    write_report(tmp_path)
    rows = _read(tmp_path)
    # 3 comparisons (a, b and the null control) x 4 evaluation steps.
    assert len(rows) == 3 * 4
    alpha = 0.05 / 2  # Bonferroni over the family's m = 2 comparisons (the null control is not in it)
    for row in rows:
        v, i = row["variant"], int(row["step"]) // EVAL_EVERY - 1
        diffs = np.array([losses[v][s][i] - losses["ref"][s][i] for s in range(5)])
        sd = np.std(diffs, ddof=1)
        effect = TTestPower().solve_power(effect_size=None, nobs=len(diffs), alpha=alpha, power=0.8,
                                          alternative="two-sided")
        assert int(row["pairs"]) == 5
        assert float(row["tokens"]) == int(row["step"]) * TOKENS_PER_STEP
        assert float(row["alpha"]) == pytest.approx(alpha)
        assert float(row["mean_diff"]) == pytest.approx(diffs.mean(), abs=1e-12)
        assert float(row["paired_sd"]) == pytest.approx(sd, rel=1e-12)
        assert float(row["detectable_80"]) == pytest.approx(effect * sd, rel=1e-4)
        assert row["null_control"] == str(v == NULL_VARIANT)
    report = (tmp_path / "report.md").read_text()
    assert "## Noise" in report and "noise.png" in report and (tmp_path / "noise.png").stat().st_size > 0
    # The null control's A/A sd is in the table, marked as such.
    assert f"| {NULL_VARIANT} (A/A) | 5 |" in report


def test_one_evaluation_gives_one_row_and_no_plot(tmp_path):
    losses = {"ref": {0: [3.0], 1: [3.1]}, "a": {0: [3.0], 1: [3.05]}}
    curve_grid(tmp_path, losses, reference="ref", design_json=Design().to_json())
    write_report(tmp_path)
    rows = _read(tmp_path)
    assert len(rows) == 1 and float(rows[0]["paired_sd"]) == pytest.approx(np.std([0.0, -0.05], ddof=1))
    assert not (tmp_path / "noise.png").exists()  # one evaluation: no line to draw


def _curve(sds: list[float], pairs: int = 5, alpha: float = 0.05) -> NoiseCurve:
    tokens = [1e5 * 2**i for i in range(len(sds))]
    return NoiseCurve("a", "ref", (), False, alpha, tuple(
        NoisePoint(i, t, pairs, 0.0, sd, sd * 1.5) for i, (t, sd) in enumerate(zip(tokens, sds, strict=True))))


def test_resolution_compares_the_sd_trend_with_the_gain_of_doubling_the_seeds():
    # sd halves per doubling of tokens (sd ~ tokens^-1, by construction): longer training cuts the detectable
    # difference by 50% per doubling, more than doubling 5 seeds to 10 does (statsmodels: effect at n = 10
    # over effect at n = 5, about 0.61).
    steep = _curve([0.08, 0.04, 0.02, 0.01])
    r = resolution(steep)
    gain = (TTestPower().solve_power(None, nobs=10, alpha=0.05, power=0.8)
            / TTestPower().solve_power(None, nobs=5, alpha=0.05, power=0.8))
    assert r is not None and r.longer == pytest.approx(0.5) and r.more_seeds == pytest.approx(gain, rel=1e-4)
    assert r.better_buy == "longer training"
    assert "longer training buys more resolution" in resolution_text(steep, "a")
    # A flat sd (the last evaluations do not move it): only seeds help.
    flat = _curve([0.08, 0.06, 0.05, 0.05, 0.05, 0.05])
    assert resolution(flat).longer == pytest.approx(1.0) and resolution(flat).better_buy == "more seeds"
    assert "more seeds buy more resolution" in resolution_text(flat, "a")
    # At many seeds the gain of doubling them approaches 1/sqrt(2) (the t quantile barely moves).
    many = resolution(_curve([0.05, 0.05], pairs=400))
    assert many.more_seeds == pytest.approx(1 / math.sqrt(2), rel=0.01)


def test_the_sd_trend_carries_the_ols_interval_and_an_uncertain_trend_decides_nothing():
    """The exponent's 95% interval is the OLS slope's t interval on log sd vs log tokens (statsmodels' OLS
    conf_int, any regression text); a trend whose interval straddles the seeds' factor calls no better buy."""
    import statsmodels.api as sm

    from blockyard.grid.noise import sd_exponent

    # Four noisy evaluations, the shape two 5-seed demo runs gave (the point estimate swings; issue 26's note).
    sds = [0.030, 0.018, 0.026, 0.015]
    swinging = _curve(sds)
    tokens = [p.tokens for p in swinging.points]
    ols = sm.OLS(np.log(sds), sm.add_constant(np.log(tokens))).fit()
    (low, high) = ols.conf_int(alpha=0.05)[1]
    e = sd_exponent(tokens, sds)
    assert e is not None and e.b == pytest.approx(ols.params[1]) and (e.low, e.high) == pytest.approx((low, high))
    r = resolution(swinging)
    assert r.longer_low == pytest.approx(2**low) and r.longer_high == pytest.approx(2**high)
    assert r.longer_low < r.more_seeds < r.longer_high and r.better_buy == "unclear"
    text = resolution_text(swinging, "a")
    assert "too uncertain" in text and "95% CI" in text
    # Two evaluations: a slope but no interval (no degrees of freedom left): the sentence cannot tell either.
    two = resolution(_curve([0.08, 0.04]))
    assert two.longer == pytest.approx(0.5) and two.longer_low is None and two.better_buy == "unclear"
    assert "2 evaluations: no interval" in resolution_text(_curve([0.08, 0.04]), "a")


def test_noise_png_labels_tokens_in_one_unit_like_the_other_figures(tmp_path, monkeypatch):
    """noise.png's token axes go through blockyard.plotting.label_token_axis: 1.4k ... 6k, not 0.0014M."""
    from blockyard.grid.report import figures

    drawn = []

    def keep(fig, path):  # read the labels before the figure is written and closed
        fig.canvas.draw()
        drawn.extend([t.get_text() for t in ax.get_xticklabels() if t.get_text()] for ax in fig.axes)
        figures.pyplot().close(fig)

    monkeypatch.setattr(figures, "finish", keep)
    curve = NoiseCurve("a", "ref", (), False, 0.05, tuple(
        NoisePoint(i, t, 5, 0.0, 0.05, 0.1) for i, t in enumerate((1400.0, 2800.0, 4200.0, 5600.0))))
    assert figures.noise_plot(tmp_path / "noise.png", [curve], 0.01)
    assert len(drawn) == 2 and all(labels for labels in drawn)
    assert all(lab == "0" or lab.endswith("k") for labels in drawn for lab in labels), drawn


def test_noise_csv_writes_an_axis_point_as_results_csv_does():
    """A boolean axis value reads `true` in noise.csv as in results.csv and verdicts.csv (one writer, point_cell)."""
    from blockyard.grid.report.tables import noise_rows, point_cell

    point = (("model.mixers.recurrence.gate", True), ("model.width", 64))
    curve = NoiseCurve("a", "ref", point, False, 0.05, (NoisePoint(10, 1280.0, 3, 0.01, 0.02, 0.05),))
    [row] = noise_rows([curve])
    assert row[2] == point_cell(point) == "model.mixers.recurrence.gate=true; model.width=64"
