"""Grid statistics against independent references: t tables, scipy's t-tests, statsmodels' TOST and power
solver, Pocock's table of sequential levels, and seeded simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps
from statsmodels.stats.power import TTestPower
from statsmodels.stats.weightstats import ttost_paired

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
        for level in (0.95, 1 - 0.05 / 6):
            values = list(rng.normal(2.0, 0.3, n))
            iv = stats.mean_interval(values, level)
            ref = sps.ttest_1samp(values, 0.0).confidence_interval(level)
            assert iv.n == n and iv.confidence == level
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
    assert stats.decide(iv, 0.01) == (stats.BETTER, "")


def interval(low: float, high: float) -> stats.Interval:
    return stats.Interval(n=3, mean=(low + high) / 2, sd=1.0, low=low, high=high)


@pytest.mark.parametrize("low, high, verdict, note", [
    (-0.05, -0.02, stats.BETTER, ""),
    (0.02, 0.05, stats.WORSE, ""),
    (-0.004, 0.006, stats.EQUIVALENT, ""),
    (-0.008, -0.001, stats.EQUIVALENT, stats.LOWER_BY_LESS),  # below 0 and inside the band: equivalent wins
    (0.001, 0.009, stats.EQUIVALENT, stats.HIGHER_BY_LESS),
    (-0.02, 0.005, stats.UNDECIDED, ""),  # covers 0 and leaves the band
    (-0.01, 0.005, stats.UNDECIDED, ""),  # the band is open: touching -delta is not inside
])
def test_four_verdicts_at_the_smallest_effect(low, high, verdict, note):
    # Rules of issue 15, item 1 (equivalence: Schuirmann 1987).
    assert stats.decide(interval(low, high), 0.01) == (verdict, note)


def test_no_interval_is_undecided():
    assert stats.decide(stats.mean_interval([2.5]), 0.01) == (stats.UNDECIDED, stats.NO_INTERVAL)


def test_equivalence_equals_statsmodels_paired_tost():
    # statsmodels.stats.weightstats.ttost_paired (Schuirmann's two one-sided tests): equivalence at
    # level a/2 per side <=> the two-sided (1 - a) t interval lies inside the band. Fixtures straddle
    # the boundary: shifts from 0 to past the band, spreads from tight to loose.
    rng = np.random.default_rng(5)
    delta, agree, equivalent = 0.01, 0, 0
    for n in (3, 5, 10):
        for m in (1, 2, 6):
            a = stats.comparison_alpha(m)
            for _ in range(40):
                ref = rng.normal(2.0, 0.1, n)
                var = ref + rng.uniform(-0.012, 0.012) + rng.normal(0, rng.choice([0.001, 0.003, 0.01]), n)
                ours = stats.decide(stats.mean_interval(list(var - ref), 1 - a), delta)[0] == stats.EQUIVALENT
                pvalue = ttost_paired(var, ref, -delta, delta)[0]
                assert ours == (pvalue < a / 2)
                agree += 1
                equivalent += ours
    assert agree == 360 and 40 < equivalent < 320  # both outcomes were exercised


@pytest.mark.parametrize("effect, expected_n", [(0.2, 199), (0.5, 34), (0.8, 15), (1.0, 10)])
def test_seeds_for_difference_matches_power_tables(effect, expected_n):
    # Sample sizes of the two-sided one-sample (= paired) t-test at alpha 0.05 and power 0.80 for
    # effect size d = delta / sd, as Faul et al. 2007 (Behavior Research Methods 39) tabulate them (values from memory;
    # Cohen 1988 table 2.4.1 gives the same to within a unit).
    assert stats.seeds_for_difference(0.01, 0.01 / effect, 0.05) == expected_n


@pytest.mark.parametrize("effect", [0.3, 0.7, 1.0, 1.5, 2.5])
@pytest.mark.parametrize("alpha", [0.05, 0.025, 0.05 / 6])
def test_seeds_needed_agree_with_statsmodels_power_solver(effect, alpha):
    # statsmodels.stats.power.TTestPower.solve_power returns the continuous n; ours is its ceiling.
    solver = TTestPower()
    n = solver.solve_power(effect_size=effect, alpha=alpha, power=0.8, alternative="two-sided")
    assert stats.seeds_for_difference(0.01, 0.01 / effect, alpha) == max(2, math.ceil(n))
    # Equivalence at true 0: each one-sided test at alpha/2 with power 0.9 (union bound gives >= 0.8).
    n_eq = solver.solve_power(effect_size=effect, alpha=alpha / 2, power=0.9, alternative="larger")
    assert stats.seeds_for_equivalence(0.01, 0.01 / effect, alpha) == max(2, math.ceil(n_eq))


def test_seeds_for_equivalence_reach_80_percent_by_simulation():
    # At the planned n, simulate the interval at true difference 0 (sd known to the planner): it lands
    # inside +-delta in >= 80% of trials. Simulated (20k trials, seed 11): 0.816 at the planned n = 9,
    # 0.721 at n = 8, so the union-bound plan is not wasteful here.
    delta, sd, alpha = 0.01, 0.008, 0.05

    def inside(n: int) -> float:
        d = np.random.default_rng(11).normal(0, sd, (20_000, n))
        half = sps.t.ppf(1 - alpha / 2, n - 1) * d.std(1, ddof=1) / math.sqrt(n)
        return float(np.mean((d.mean(1) - half > -delta) & (d.mean(1) + half < delta)))

    n = stats.seeds_for_equivalence(delta, sd, alpha)
    assert n == 9
    assert inside(n) >= 0.8 > inside(n - 1)


def test_sd_upper_bound_covers_the_true_sd_at_its_confidence():
    # (n - 1) s^2 / sigma^2 ~ chi2(n - 1) for normal data (Cochran's theorem; any statistics text):
    # the bound s * sqrt((n-1) / chi2_{0.2, n-1}) exceeds sigma in 80% of samples.
    rng = np.random.default_rng(4)
    for n in (2, 3, 6):
        samples = rng.normal(0, 1.0, (40_000, n))
        bounds = np.array([stats.sd_upper_bound(float(s), n) for s in samples.std(1, ddof=1)])
        assert np.mean(bounds >= 1.0) == pytest.approx(0.8, abs=0.01)
    assert stats.sd_upper_bound(1.0, 3) == pytest.approx(math.sqrt(2 / sps.chi2.ppf(0.2, 2)), rel=1e-12)


def test_detectable_difference_is_where_power_reaches_80_percent():
    for n, alpha in ((3, 0.05), (5, 0.0125), (10, 0.05 / 6)):
        diff = stats.detectable_difference(n, 0.02, alpha)
        power = TTestPower().power(effect_size=diff / 0.02, nobs=n, alpha=alpha, alternative="two-sided")
        assert power == pytest.approx(0.8, abs=1e-6)
    assert stats.detectable_difference(1, 0.02, 0.05) is None


def test_power_matches_a_simulation():
    # Independent check of the noncentral-t power: simulate paired differences N(delta, sd) with
    # n = 8 seeds and count how often the paired t-test rejects at 5% (Monte Carlo, 40k trials).
    delta, sd, n, trials = 0.3, 0.25, 8, 40_000
    rng = np.random.default_rng(3)
    d = rng.normal(delta, sd, (trials, n))
    t = d.mean(1) / (d.std(1, ddof=1) / math.sqrt(n))
    simulated = float(np.mean(np.abs(t) > sps.t.ppf(0.975, n - 1)))
    assert stats.t_test_power(delta / sd, n, 0.05) == pytest.approx(simulated, abs=0.01)


def test_power_far_in_the_tail_is_finite():
    # statsmodels returns nan there; the fallback (scipy's noncentral t, then the normal) says ~1.
    assert stats.t_test_power(12.7, 4, 0.0125) == pytest.approx(1.0, abs=1e-6)
    assert stats.t_test_power(1e6, 3, 0.01) == pytest.approx(1.0)
    assert stats.seeds_for_difference(0.01, 1e-16, 0.05) == 2
    assert stats.seeds_for_difference(0.01, 0.0, 0.05) == 2
    assert stats.seeds_for_difference(1e-5, 1.0, 0.05) is None  # past MAX_SEEDS


@pytest.mark.parametrize("k, nominal", [(2, 0.0294), (3, 0.0221), (4, 0.0182), (5, 0.0158), (10, 0.0106)])
def test_sequential_level_matches_pococks_table(k, nominal):
    # Pocock 1977 (Biometrika 64:191, table 1; values from memory): the constant nominal two-sided
    # level of K equally spaced looks with overall level 0.05, normal theory. With large looks the t
    # statistics are normal, so the simulated level must agree (within Monte Carlo error).
    looks = tuple(2000 * i for i in range(1, k + 1))
    assert stats.sequential_alpha(looks, 0.05) == pytest.approx(nominal, abs=4e-4)


def test_sequential_level_holds_for_t_statistics_by_brute_force():
    # Independent simulation on raw normal values (not the sufficient statistics the function draws):
    # rejecting at the nominal level at any of the looks 3..10 happens in 5% of null sequences.
    looks = tuple(range(3, 11))
    nominal = stats.sequential_alpha(looks, 0.05)
    assert 0.0105 < nominal < 0.0135  # simulated 0.0122, below the fixed test's 0.05 per look
    rng = np.random.default_rng(12)
    x = rng.standard_normal((100_000, 10))
    reject = np.zeros(len(x), dtype=bool)
    for n in looks:
        d = x[:, :n]
        t = d.mean(1) / (d.std(1, ddof=1) / math.sqrt(n))
        reject |= 2 * sps.t.sf(np.abs(t), n - 1) < nominal
    assert reject.mean() == pytest.approx(0.05, abs=0.003)
    assert stats.sequential_alpha((5,), 0.05) == 0.05  # one look: the fixed level
    with pytest.raises(ValueError):
        stats.sequential_alpha((3, 3), 0.05)


def test_clopper_pearson_equals_scipy_exact_interval():
    # scipy.stats.binomtest(...).proportion_ci(method="exact") is the Clopper-Pearson interval.
    for k, n in ((0, 20), (1, 20), (7, 40)):
        ci = sps.binomtest(k, n).proportion_ci(0.95, method="exact")
        assert stats.clopper_pearson(k, n) == pytest.approx((ci.low, ci.high), abs=1e-9)
