"""Paired step timing (blockyard.bench.paired) and the targets that read its interval."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy.stats import binom

from blockyard.bench import paired
from blockyard.bench.paired import median_with_interval, paired_ratios
from blockyard.bench.targets import Target


class FakeClock:
    """perf_counter that only the fake steps move: step durations are exact."""

    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def test_pairs_alternate_their_order_and_give_the_tokens_per_s_ratio(monkeypatch):
    clock = FakeClock()
    monkeypatch.setattr(paired.time, "perf_counter", clock)
    calls = []

    def stepper(name: str, seconds: float):
        def step(i: int) -> None:
            calls.append((name, i))
            clock.now += seconds
        return step

    # num: 2 s per step of 3 tokens (1.5 tokens/s); den: 1 s per step of 1 token (1 token/s).
    values = paired_ratios(stepper("num", 2.0), stepper("den", 1.0), pairs=4, num_tokens=3, den_tokens=1, warmup=2)
    assert values == pytest.approx([1.5] * 4)
    timed = calls[4:]  # two warm-up steps of each first, untimed
    assert calls[:4] == [("num", 0), ("den", 0), ("num", 1), ("den", 1)]
    assert [n for n, _ in timed] == ["num", "den", "den", "num", "num", "den", "den", "num"]
    assert [i for _, i in timed] == [2, 2, 3, 3, 4, 4, 5, 5]  # both configs see the same batches


def test_flipping_the_order_cancels_a_steady_drift(monkeypatch):
    # The machine slows down by 1% per second of run time (the kind of drift seen between rounds).
    # Always timing num first would bias every pair the same way; flipping the order every pair
    # makes the mean log-ratio of two neighbouring pairs cancel the drift to first order.
    clock = FakeClock()
    monkeypatch.setattr(paired.time, "perf_counter", clock)

    def stepper(seconds: float):
        def step(i: int) -> None:
            clock.now += seconds * (1 + 0.01 * clock.now)
        return step

    values = paired_ratios(stepper(1.0), stepper(1.25), pairs=16, warmup=0)
    true = 1.25
    assert abs(np.exp(np.mean(np.log(values))) / true - 1) < 2e-3
    assert values[0] > true > values[1]  # num first gains from the drift, num second loses


def test_median_interval_is_the_binomial_order_statistic_interval():
    # Distribution-free CI of the median: [x_(k), x_(n-k+1)] with k the largest integer such that
    # P(Binomial(n, 1/2) <= k - 1) <= alpha / 2 (Conover 1999, Practical Nonparametric Statistics,
    # sec. 3.2, the quantile test's interval; quoted from memory), computed here with scipy's binom.
    rng = np.random.default_rng(0)
    for n in (6, 9, 16, 31):
        x = rng.lognormal(0.0, 0.2, n)
        k = max(j for j in range(1, n + 1) if binom.cdf(j - 1, n, 0.5) <= 0.025)
        s = np.sort(x)
        got = median_with_interval(list(x))
        assert got["median"] == pytest.approx(np.median(x))
        assert (got["low"], got["high"]) == pytest.approx((s[k - 1], s[n - k]))


def test_median_interval_covers_the_true_median_at_least_95_percent_by_simulation():
    # Simulated: 3000 samples of 16 right-skewed per-pair ratios (lognormal, true median 1.2).
    # The order-statistic interval's exact coverage at n = 16 is 1 - 2 P(Bin(16, .5) <= 3) = 0.979;
    # the simulation gives 0.985 (seed 1).
    rng = np.random.default_rng(1)
    hits = 0
    for _ in range(3000):
        ci = median_with_interval(list(1.2 * rng.lognormal(0.0, 0.15, 16)))
        hits += ci["low"] <= 1.2 <= ci["high"]
    assert 0.97 <= hits / 3000 <= 0.99


def test_too_few_pairs_have_no_interval():
    got = median_with_interval([1.0, 1.1, 1.2, 1.3, 1.4])
    assert got["median"] == 1.2 and got["low"] is None and got["high"] is None


@pytest.mark.parametrize(("interval", "met"), [((1.26, 1.30), True), ((1.20, 1.24), False), ((1.22, 1.28), None)])
def test_a_target_with_an_interval_is_met_only_when_all_of_it_is(interval, met):
    assert Target("ratio", 1.25, ">=", 1.25, interval=interval).met is met
    assert Target("ratio", 1.25, ">=", 1.25).met is True  # without an interval: the value alone


def test_a_compiled_case_whose_compilation_fails_is_refused_not_timed_eagerly(tmp_path, monkeypatch):
    import blockyard.train.compile as compile_mod
    from blockyard.bench.cases import BenchCase, trainer_parts

    def broken(fn):
        def run(*args, **kwargs):
            raise RuntimeError("simulated compiler failure")
        return run

    monkeypatch.setenv("BLOCKYARD_CACHE", str(tmp_path / "cache"))
    monkeypatch.setattr(compile_mod.torch, "compile", broken)
    case = BenchCase("tiny-compiled", "global_attention", 16, 2, width=16, depth=1, compile=True)
    with pytest.raises(RuntimeError, match="tiny-compiled: torch.compile failed .*simulated compiler failure"):
        trainer_parts(case, tmp_path / "cache", threads=1)
    eager = trainer_parts(dataclasses.replace(case, compile=False), tmp_path / "cache", threads=1)
    eager.step(0)  # the eager twin builds and steps
