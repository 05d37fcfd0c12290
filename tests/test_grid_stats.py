"""Grid statistics against independent references: t tables, scipy's t-tests, power tables, simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps

from blockyard.grid import stats


def test_t_critical_matches_the_t_table_and_scipy():
    # Standard two-sided 95% t-table values (e.g. Fisher & Yates' tables; any statistics text):
    # df=1: 12.706, df=2: 4.303, df=4: 2.776, df=9: 2.262, df=29: 2.045.
    table = {2: 12.706, 3: 4.303, 5: 2.776, 10: 2.262, 30: 2.045}
    for n, value in table.items():
        assert stats.t_critical(n) == pytest.approx(value, abs=5e-4)
        assert stats.t_critical(n) == pytest.approx(sps.t.ppf(0.975, n - 1), rel=1e-12)
    with pytest.raises(ValueError):
        stats.t_critical(1)


def test_mean_interval_equals_scipy_one_sample_t_interval():
    # Independent computation: scipy.stats.ttest_1samp(...).confidence_interval() (scipy >= 1.10).
    rng = np.random.default_rng(1)
    for n in (2, 3, 5, 12):
        values = list(rng.normal(2.0, 0.3, n))
        iv = stats.mean_interval(values)
        ref = sps.ttest_1samp(values, 0.0).confidence_interval(0.95)
        assert iv.n == n
        assert iv.mean == pytest.approx(np.mean(values), rel=1e-12)
        assert iv.sd == pytest.approx(np.std(values, ddof=1), rel=1e-12)
        assert iv.low == pytest.approx(ref.low, rel=1e-10)
        assert iv.high == pytest.approx(ref.high, rel=1e-10)


def test_paired_difference_interval_equals_scipy_paired_t_interval():
    # Independent computation: scipy.stats.ttest_rel(a, b).confidence_interval() is the interval of mean(a - b).
    rng = np.random.default_rng(2)
    ref = {s: float(v) for s, v in enumerate(rng.normal(3.0, 0.2, 6))}
    var = {s: v - 0.05 + float(rng.normal(0, 0.01)) for s, v in ref.items()}
    var[99] = 1.0  # a seed the reference lacks is not paired
    seeds, diffs = stats.paired_differences(var, ref)
    assert seeds == list(range(6))
    iv = stats.mean_interval(diffs)
    expect = sps.ttest_rel([var[s] for s in seeds], [ref[s] for s in seeds]).confidence_interval(0.95)
    assert iv.low == pytest.approx(expect.low, rel=1e-9)
    assert iv.high == pytest.approx(expect.high, rel=1e-9)
    assert stats.verdict(iv) == stats.BETTER


def test_one_value_has_no_interval_and_no_verdict():
    iv = stats.mean_interval([2.5])
    assert (iv.n, iv.mean, iv.sd, iv.low, iv.high) == (1, 2.5, None, None, None)
    assert stats.verdict(iv) == stats.NO_INTERVAL == "n=1: no interval"


def test_zero_spread_differences():
    # Identical variants with identical seeds give differences that are exactly 0: sd = 0, the
    # interval is [0, 0], which contains 0, so no difference is claimed.
    same = stats.mean_interval([0.0, 0.0, 0.0])
    assert (same.sd, same.low, same.high) == (0.0, 0.0, 0.0)
    assert same.contains(0.0)
    assert stats.verdict(same) == stats.NO_DIFFERENCE
    assert stats.seeds_to_detect(same.mean, same.sd) is None
    # A constant nonzero difference is certain: the interval is the point itself.
    shifted = stats.mean_interval([0.1, 0.1])
    assert stats.verdict(shifted) == stats.WORSE
    assert stats.seeds_to_detect(0.1, 0.0) == 2


@pytest.mark.parametrize("effect, expected_n", [(0.2, 199), (0.5, 34), (0.8, 15), (1.0, 10)])
def test_seeds_to_detect_matches_power_tables(effect, expected_n):
    # Sample sizes of the two-sided one-sample (= paired) t-test at alpha 0.05 and power 0.80 for
    # effect size d = delta / sd, as G*Power 3 (Faul et al. 2007) reports them (values from memory;
    # Cohen 1988 table 2.4.1 gives the same to within a unit).
    assert stats.seeds_to_detect(effect, 1.0) == expected_n
    assert stats.seeds_to_detect(-effect * 0.03, 0.03) == expected_n  # scale and sign free


def test_power_matches_a_simulation():
    # Independent check of the noncentral-t power: simulate paired differences N(delta, sd) with
    # n = 8 seeds and count how often the paired t-test rejects at 5% (Monte Carlo, 40k trials).
    delta, sd, n, trials = 0.3, 0.25, 8, 40_000
    rng = np.random.default_rng(3)
    d = rng.normal(delta, sd, (trials, n))
    t = d.mean(1) / (d.std(1, ddof=1) / math.sqrt(n))
    simulated = float(np.mean(np.abs(t) > sps.t.ppf(0.975, n - 1)))
    assert stats.paired_t_power(n, delta, sd) == pytest.approx(simulated, abs=0.01)


def test_seeds_to_detect_gives_up_past_the_cap():
    assert stats.seeds_to_detect(1e-4, 1.0) is None
    assert stats.paired_t_power(500, 0.5, 0.1) == pytest.approx(1.0)  # far tail: no nan
