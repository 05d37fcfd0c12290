"""Divergence as an outcome, the fragile flag, the planning level and the error bound's assumptions.

Checks against independent code (scipy's exact and permutation Wilcoxon tests, scipy's binomial
test for McNemar, scipy's paired t intervals) and seeded simulations that run the project's own
decision path (``verdicts.compare_all``, ``rounds.plan_rounds``) on synthetic losses with known
truth; each simulated figure is written beside its check (measured with the seeds given here).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps

from blockyard.grid import stats
from blockyard.grid.report.sections import SKEW_FAMILY_ERROR
from blockyard.grid.rounds import plan_rounds
from blockyard.grid.spec import Design, SeedSchedule
from blockyard.grid.verdicts import GroupOutcomes, compare_all, restrict

DELTA = 0.01  # the default smallest effect (nats/token)


def monte_carlo_margin(p: float, trials: int) -> float:
    """Three binomial standard errors: how far a simulated rate may sit from its target by chance."""
    return 3 * math.sqrt(p * (1 - p) / trials)


# ----------------------------------------------------------------------------- the tests against scipy


@pytest.mark.parametrize("n, shift", [(4, 0.0), (6, 0.8), (9, -0.5), (13, 0.3)])
def test_signed_rank_equals_scipys_exact_wilcoxon(n, shift):
    # scipy.stats.wilcoxon(method="exact"): the same test by independent code (no ties, no zeros).
    d = np.random.default_rng(n).normal(shift, 1.0, n)
    ours = stats.signed_rank_test(d)
    for alternative, p in (("less", ours.p_less), ("greater", ours.p_greater)):
        assert p == pytest.approx(sps.wilcoxon(d, alternative=alternative, method="exact").pvalue, rel=1e-12)
    assert ours.r_plus == pytest.approx(sps.wilcoxon(d, alternative="greater", method="exact").statistic)


@pytest.mark.parametrize("diffs", [
    [0.1, -0.2, 0.3, math.inf, math.inf, -0.05, 0.1],  # two diverged variant cells tie at the top rank
    [-math.inf, 0.02, -0.01, 0.02, math.inf, -0.03, 0.0, -0.04],  # a zero (dropped) and one of each side
    [math.inf, math.inf, math.inf, -0.1],
])
def test_signed_rank_with_ties_and_infinities_equals_scipys_exact_permutation_test(diffs):
    # scipy's permutation version enumerates all 2^n sign patterns of the mid-ranks (exact with ties);
    # +-inf become a finite value above every |difference|, which leaves every rank unchanged.
    finite = [x if math.isfinite(x) else math.copysign(1e6, x) for x in diffs if x != 0]
    ours = stats.signed_rank_test(diffs)
    exact = sps.PermutationMethod(n_resamples=math.inf)
    for alternative, p in (("less", ours.p_less), ("greater", ours.p_greater)):
        assert p == pytest.approx(sps.wilcoxon(finite, alternative=alternative, method=exact).pvalue, rel=1e-9)
    assert ours.n == len(finite) and ours.smallest_p == 0.5 ** len(finite)


@pytest.mark.parametrize("variant_only, reference_only", [(3, 0), (5, 1), (2, 2), (0, 7), (0, 0)])
def test_mcnemar_exact_equals_the_binomial_test_of_the_discordant_pairs(variant_only, reference_only):
    # McNemar (1947)'s exact form is the two-sided binomial test of b out of b + c at 1/2 (scipy).
    n = variant_only + reference_only
    expected = 1.0 if n == 0 else sps.binomtest(variant_only, n, 0.5).pvalue
    assert stats.mcnemar_exact(variant_only, reference_only) == pytest.approx(expected, rel=1e-12)


def test_composite_decides_only_where_some_sign_pattern_can_reach_the_level():
    # 5 pairs: smallest one-sided p 1/32 = 0.03125 > 0.025, so even 5 lost seeds of 5 cannot decide at 5%.
    assert stats.decide_composite([math.inf] * 5, 0.05)[0] == stats.UNDECIDED
    # 6 pairs: 1/64 < 0.025: every seed lost by the variant is "worse".
    assert stats.decide_composite([math.inf] * 6, 0.05)[0] == stats.WORSE
    assert stats.decide_composite([-math.inf] * 3 + [-0.1, -0.2, -0.3], 0.05)[0] == stats.BETTER
    # Never equivalent, however small the finished differences.
    assert stats.decide_composite([1e-6, -1e-6] * 10 + [math.inf], 0.05)[0] == stats.UNDECIDED


# ----------------------------------------------------------------------------- divergence by simulation


def diverging_pair(rng: np.random.Generator, n: int, true_diff: float, sd: float, fraction: float,
                   mode: str) -> dict:
    """A reference and a variant paired by seed (seed effect sd 0.05 shared, paired sd ``sd``); the variant
    diverges on its own worst seeds (largest paired noise): ``fraction`` of n of them ("count"), or each seed
    whose noise lies in the worst ``fraction`` of its law ("tail": a random number, possibly none)."""
    base = 2.0 + rng.normal(0, 0.05, n)
    noise = rng.normal(0, sd, n)
    if mode == "count":
        k = round(fraction * n)
        lost = set(np.argsort(noise)[n - k:].tolist()) if k else set()
    else:
        lost = set(np.flatnonzero(noise > sd * sps.norm.ppf(1 - fraction)).tolist())
    variant = {s: base[s] + true_diff + noise[s] for s in range(n) if s not in lost}
    return {("ref", ()): GroupOutcomes("ref", (), dict(enumerate(base)), (), (), ()),
            ("v", ()): GroupOutcomes("v", (), variant, tuple(sorted(lost)), (), ())}


def divergence_rates(n: int, true_diff: float, sd: float, fraction: float, mode: str, trials: int, seed: int,
                     verdict: str) -> tuple[float, float]:
    """(rate of ``verdict`` by the engine, rate by the old rule: the t interval on the seeds both finished)."""
    rng = np.random.default_rng(seed)
    new = old = 0
    for _ in range(trials):
        (c,) = compare_all(diverging_pair(rng, n, true_diff, sd, fraction, mode), "ref", Design(),
                           with_planning=False).comparisons
        new += c.verdict == verdict
        old += c.interval is not None and stats.decide(c.interval, DELTA)[0] == verdict
    return new / trials, old / trials


# Issue 26: a null variant that diverges on its worst 20% of seeds; false "better" allowed: 2.5% (one
# side of the 5% two-sided level, m = 1). Simulated, 10 pairs, paired sd = delta, 3000 grids (seed 1):
#   count (2 of 10 lost): engine 0.000, old rule (t on common seeds) 0.143;
#   tail (each seed lost if its noise is above the 80% point): engine 0.014, old rule 0.107.
# (Measured before with 4000 grids: 5 pairs 0.000 / 0.067 and 0.016 / 0.045; 20 pairs 0.000 / 0.140
# and 0.010 / 0.128.) The engine's remaining rate comes from grids where no seed was lost, so the
# composite does not apply and the finished seeds are a truncated sample.
@pytest.mark.parametrize("mode, old_at_least", [("count", 0.10), ("tail", 0.07)])
def test_a_null_variant_that_loses_its_worst_seeds_is_not_called_better(mode, old_at_least):
    trials = 3000
    new, old = divergence_rates(10, 0.0, DELTA, 0.2, mode, trials, seed=1, verdict=stats.BETTER)
    assert new <= 0.025 + monte_carlo_margin(0.025, trials), new
    assert old >= old_at_least, old  # the simulation has teeth: dropping lost seeds fails it


# Issue 26: a variant worse by delta that diverges on its worst 30% of seeds; false "equivalent" allowed:
# 2.5%. Simulated, 10 pairs, paired sd = delta / 2, 3000 grids (seed 2): count: engine 0.000, old rule
# 0.310; tail: engine 0.0133, old rule 0.285 (4000 grids before: 5 pairs at sd = delta 0.000 / 0.097 and
# 0.022 / 0.075; 20 pairs at sd = delta / 2 0.000 / 0.62 and 0.0003 / 0.70).
@pytest.mark.parametrize("mode", ["count", "tail"])
def test_a_worse_variant_that_loses_its_worst_seeds_is_not_called_equivalent(mode):
    trials = 3000
    new, old = divergence_rates(10, DELTA, DELTA / 2, 0.3, mode, trials, seed=2, verdict=stats.EQUIVALENT)
    assert new <= 0.025 + monte_carlo_margin(0.025, trials), new
    assert old >= 0.2, old


def null_grid(rng: np.random.Generator, variants: int, points: int, n: int, p_diverge: float,
              shape: str = "normal") -> dict:
    """Every group truly equal to the reference; every cell diverges with probability ``p_diverge`` independently
    of its loss; paired differences normal, or right-skewed (lognormal, sigma 0.5, centred), with sd delta."""
    groups = {}
    for p in range(points):
        point = (("model.width", 32 * (p + 1)),)
        base = 2.0 + rng.normal(0, 0.05, n)
        for name in ["ref"] + [f"v{v}" for v in range(variants)]:
            if name == "ref":
                noise = np.zeros(n)
            elif shape == "normal":
                noise = rng.normal(0, DELTA, n)
            else:  # lognormal(0, 0.5): mean e^0.125, variance (e^0.25 - 1) e^0.25
                z = rng.lognormal(0.0, 0.5, n)
                noise = (z - math.exp(0.125)) * DELTA / math.sqrt((math.exp(0.25) - 1) * math.exp(0.25))
            lost = rng.random(n) < p_diverge
            groups[(name, point)] = GroupOutcomes(name, point, {s: base[s] + noise[s] for s in range(n) if not lost[s]},
                                                  tuple(np.flatnonzero(lost).tolist()), (), ())
    return groups


def fixed_family_error(n: int, p_diverge: float, trials: int, seed: int, shape: str = "normal") -> tuple[float, float]:
    """(any better or worse, any better) over grids of 3 variants x 2 points, all truly equal."""
    rng = np.random.default_rng(seed)
    wrong = better = 0
    for _ in range(trials):
        family = compare_all(null_grid(rng, 3, 2, n, p_diverge, shape), "ref", Design(), with_planning=False)
        wrong += any(c.verdict in (stats.BETTER, stats.WORSE) for c in family.comparisons)
        better += any(c.verdict == stats.BETTER for c in family.comparisons)
    return wrong / trials, better / trials


# Family-wise error with divergence that differs by chance (20% of cells, independent of the loss, so
# the composite is a true null): 3 variants x 2 points, 10 pairs, 1500 grids (seed 3): 0.035 (2000 grids,
# seed 1: 0.026; 20 pairs, 1000 grids: 0.036; without divergence, 5 pairs, seed 3: 0.043). Bonferroni
# over m = 6 at 5% (Hochberg & Tamhane 1987, ch. 2); the exact signed-rank test keeps each comparison's
# level (Wilcoxon 1945).
def test_family_wise_error_with_divergence_stays_at_5_percent_fixed_design():
    trials = 1500
    wrong, _ = fixed_family_error(10, 0.2, trials, seed=3)
    assert wrong <= 0.05 + monte_carlo_margin(0.05, trials), wrong


# Sequential: seeds {first: 3, most: 10}, 2 variants x 1 point, cells diverging 20% of the time as above;
# 800 grids (seed 4): 0.0125 (1000 grids, seed 3: 0.015). The rank tests use the looks' nominal level
# (computed for t statistics, Pocock 1977); the simulation shows the family still holds.
@pytest.mark.slow
def test_family_wise_error_with_divergence_stays_at_5_percent_sequential_design():
    trials = 800
    rng = np.random.default_rng(4)
    design = Design(DELTA, SeedSchedule(first=3, most=10))
    wrong = 0
    for _ in range(trials):
        outcomes = null_grid(rng, 2, 1, 10, 0.2)
        state = plan_rounds(design, list(outcomes), "ref", tuple(range(10)), outcomes)
        family = compare_all(restrict(outcomes, state.seeds), "ref", design, with_planning=False)
        wrong += any(c.verdict in (stats.BETTER, stats.WORSE) for c in family.comparisons)
    assert wrong / trials <= 0.05 + monte_carlo_margin(0.05, trials), wrong / trials


# The error bound assumes roughly normal paired differences. Right-skewed ones (lognormal, sigma 0.5,
# centred, sd delta), no true difference, 3 variants x 2 points, 4000 grids: family error 0.104 at 5 pairs
# (seed 9) and 0.084 at 10 pairs (seed 14), nearly all false "better" (0.101 and 0.082): the t interval
# fails here (issue 26 measured 11-16%). The Method says so with these figures (SKEW_FAMILY_ERROR). The
# test asserts the measured figure within Monte Carlo error, so a change that moves it is noticed.
@pytest.mark.parametrize("n, seed, measured, measured_better", [(5, 9, 0.104, 0.101), (10, 14, 0.084, 0.082)])
def test_right_skewed_null_family_error(n, seed, measured, measured_better):
    trials = 4000
    wrong, better = fixed_family_error(n, 0.0, trials, seed, shape="lognormal")
    assert wrong == pytest.approx(measured, abs=monte_carlo_margin(measured, trials))
    assert better == pytest.approx(measured_better, abs=monte_carlo_margin(measured_better, trials))
    assert wrong > 0.05  # the assumption matters: the report must say so
    assert "10%" in SKEW_FAMILY_ERROR and "8%" in SKEW_FAMILY_ERROR


# ----------------------------------------------------------------------------- fragile, planning, wording


def _pair(diffs: list[float]) -> dict:
    ref = {s: 2.0 + 0.1 * s for s in range(len(diffs))}
    return {("ref", ()): GroupOutcomes("ref", (), ref, (), (), ()),
            ("v", ()): GroupOutcomes("v", (), {s: ref[s] + d for s, d in enumerate(diffs)}, (), (), ())}


def _t_verdict(diffs: list[float], alpha: float) -> str:
    """The verdict read off scipy's paired t interval (independent of the engine's interval code)."""
    iv = sps.ttest_1samp(diffs, 0.0).confidence_interval(1 - alpha)
    if -DELTA < iv.low and iv.high < DELTA:
        return stats.EQUIVALENT
    return stats.BETTER if iv.high < 0 else stats.WORSE if iv.low > 0 else stats.UNDECIDED


@pytest.mark.parametrize("diffs, fragile", [
    ([-0.03, -0.031, -0.029, -0.03, 0.0], True),  # without seed 0 the 4 pairs' interval reaches above 0
    ([-0.05, -0.051, -0.049, -0.05, -0.052], False),
])
def test_fragile_marks_a_verdict_that_one_left_out_seed_flips(diffs, fragile):
    (c,) = compare_all(_pair(diffs), "ref", Design()).comparisons
    assert c.verdict == stats.BETTER == _t_verdict(diffs, 0.05)
    flips = [_t_verdict(diffs[:k] + diffs[k + 1:], 0.05) != c.verdict for k in range(len(diffs))]
    assert c.fragile == any(flips) == fragile


def test_seeds_needed_are_planned_at_the_level_the_verdicts_use():
    # Sequential design, 2 comparisons: the look's nominal level is below the Bonferroni 2.5%.
    design = Design(DELTA, SeedSchedule(first=3, most=10))
    rng = np.random.default_rng(5)
    groups = {("ref", ()): GroupOutcomes("ref", (), {s: 2.0 for s in range(5)}, (), (), ())}
    for name in ("a", "b"):
        groups[(name, ())] = GroupOutcomes(name, (), {s: 2.0 + rng.normal(0, DELTA) for s in range(5)}, (), (), ())
    family = compare_all(groups, "ref", design)
    assert family.look_alpha < family.comparison_alpha == pytest.approx(0.025)
    for c in family.comparisons:
        pl = c.planning
        assert pl.seeds_for_difference == stats.seeds_for_difference(DELTA, pl.sd_upper, family.look_alpha)
        assert pl.seeds_for_equivalence == stats.seeds_for_equivalence(DELTA, pl.sd_upper, family.look_alpha)
        assert pl.detectable == pytest.approx(stats.detectable_difference(5, pl.sd_upper, family.look_alpha))
        # The Bonferroni level understated both (issue 26: by 12-25% in seeds).
        assert pl.seeds_for_difference >= stats.seeds_for_difference(DELTA, pl.sd_upper, family.comparison_alpha)
        assert pl.detectable > stats.detectable_difference(5, pl.sd_upper, family.comparison_alpha)


# The power sentence's blind spot: with the seeds that give 80% power at 0 and at +-delta, the chance to
# decide at delta / 2 is lower. decision_probability integrates it; a simulation of the engine's own
# interval and rule (20000 draws each, seed 6) agrees. n = 8, sd = delta, alpha = 0.05: truth 0: formula
# 0.454, simulated 0.457; delta / 2: 0.424 / 0.424; delta: 0.701 / 0.701; n = 30 at delta / 2: 0.9996 / 0.9997.
@pytest.mark.parametrize("true_diff, n", [(0.0, 8), (DELTA / 2, 8), (DELTA, 8), (DELTA / 2, 30)])
def test_decision_probability_matches_a_simulation(true_diff, n):
    sims, alpha = 20_000, 0.05
    rng = np.random.default_rng(6)
    draws = rng.normal(true_diff, DELTA, (sims, n))
    decided = sum(stats.decide(stats.mean_interval(list(d), 1 - alpha), DELTA)[0] != stats.UNDECIDED for d in draws)
    expected = stats.decision_probability(true_diff, DELTA, n, alpha, DELTA)
    assert decided / sims == pytest.approx(expected, abs=monte_carlo_margin(expected, sims) + 1e-3)


# The null control's flag: one null comparison at the per-comparison level 5% / m. m = 6 (issue 26: about
# 1 grid in 120, not 1 in 20). Simulated with the engine's interval and rule at the family's level, 40000
# null grids of 5 pairs (seed 7): the interval excludes 0 in 0.0083 of them (formula 1 - (1 - 0.05/6) =
# 0.00833, the t interval's exact level); flagged (better or worse) 0.0070, a little less, because
# "equivalent" wins when a very narrow interval lies inside the band: the report says "at most".
def test_null_control_flag_rate_for_m_comparisons():
    groups = {(name, ()): GroupOutcomes(name, (), {s: 2.0 for s in range(5)}, (), (), ())
              for name in ["ref", "null-control"] + [f"v{i}" for i in range(6)]}
    family = compare_all(groups, "ref", Design(), with_planning=False)
    assert family.size == 6 and len(family.null) == 1
    rate = stats.null_flag_rate(family.comparison_alpha, len(family.null))
    assert 1 / rate == pytest.approx(120, rel=1e-9)
    sims = 40_000
    draws = np.random.default_rng(7).normal(0.0, DELTA, (sims, 5))
    intervals = [stats.mean_interval(list(d), 1 - family.look_alpha) for d in draws]
    excludes = sum(not iv.contains(0.0) for iv in intervals)
    flagged = sum(stats.decide(iv, DELTA)[0] in (stats.BETTER, stats.WORSE) for iv in intervals)
    assert excludes / sims == pytest.approx(rate, abs=monte_carlo_margin(rate, sims))
    assert flagged <= excludes


def test_a_variant_that_loses_seeds_the_reference_finishes_is_worse_on_the_composite():
    ref = {s: 2.0 + 0.01 * s for s in range(8)}
    groups = {("ref", ()): GroupOutcomes("ref", (), ref, (), (), ()),
              ("hot", ()): GroupOutcomes("hot", (), {0: 1.9, 1: 1.9}, (2, 3, 4, 5, 6, 7), (), ()),
              ("calm", ()): GroupOutcomes("calm", (), {s: v + 0.001 for s, v in ref.items()}, (), (), ())}
    hot, calm = compare_all(groups, "ref", Design()).comparisons
    # m = 2: 2.5% two-sided per comparison, 1.25% one-sided. hot's composite: -0.1, -0.11 and six +inf
    # tied at mid-rank 5.5; R+ = 33 of 36, P(R+ >= 33) = 4 / 256 = 0.0156 (scipy's exact permutation
    # test over the 2^8 sign patterns): not <= 0.0125.
    d = hot.divergence
    assert d.rank.p_greater == pytest.approx(sps.wilcoxon([-0.1, -0.11] + [1e6] * 6, alternative="greater",
                                                          method=sps.PermutationMethod(n_resamples=math.inf)).pvalue)
    assert d.rank.p_greater == pytest.approx(4 / 256)
    assert hot.verdict == stats.UNDECIDED and d.reachable  # 2^-8 could have reached it: the data did not
    assert hot.note.startswith("divergence differs: diverged on 6 / 0 of 8 pair(s)")
    assert calm.verdict == stats.EQUIVALENT and calm.divergence is None
    # One more lost seed instead of a finished one: seven tied at mid-rank 5, R+ = 35, P(R+ >= 35) =
    # 2 / 256 = 0.0078 <= 0.0125: worse. The
    # finished seeds' better losses cannot rescue a variant that loses most of its runs.
    groups[("hot", ())] = GroupOutcomes("hot", (), {0: 1.9}, (1, 2, 3, 4, 5, 6, 7), (), ())
    hot = compare_all(groups, "ref", Design()).comparisons[0]
    assert hot.verdict == stats.WORSE and hot.note.startswith("by the worst-rank composite: diverged on 7 / 0")
