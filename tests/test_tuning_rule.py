"""The tuning rule keeps a one-step stability margin, and a tuning has 3 seeds unless told otherwise.

Sources: backing off from the largest stable learning rate is common practice, no single source; the
stability-cliff model below is issue 26's (the optimum 0.3-0.7 of a doubling below the rate that
diverges half the time); its figures are measured by the seeded simulation here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from blockyard.grid.tuning import (
    DEFAULT_TUNING_SEEDS,
    choose,
    default_tuning_seeds,
    eligible,
    mean_score,
    parse_tuning,
)

INF = math.inf


def test_eligible_values_have_a_larger_neighbour_that_never_diverged():
    scores = {1: [3.0, 3.1], 2: [2.9, 2.8], 4: [2.5, INF], 8: [2.4, 2.4], 16: [2.6, 2.6]}
    # 1: next (2) finite: yes. 2: next (4) lost a seed: no. 4: diverged itself: no. 8: next (16) fine: yes.
    # 16: the largest has no larger neighbour: never.
    assert eligible(scores) == [1, 8]
    assert choose(scores) == 8
    assert choose({1: [3.0], 2: [2.0]}) == 1  # two values: only the smaller can be chosen
    assert choose({1: [3.0], 2: [INF], 4: [2.0], 8: [INF]}) == 1  # nothing eligible: the smallest


def _old_rule(scores: dict[float, list[float]]) -> float:
    """The rule before issue 26: the lowest mean, a diverged seed counting +inf (ties: the smallest)."""
    means = {v: mean_score(s) for v, s in scores.items()}
    return min(sorted(means), key=lambda v: means[v])


def cliff_divergence(rule, trials: int, seed: int, tuning_seeds: int, sharpness: float) -> float:
    """Mean divergence probability at the chosen value in a stability-cliff model.

    log2 of the value: x; divergence probability 1 / (1 + exp(-(x - c) / sharpness)) with c = 0 (the rate
    that diverges half the time); loss 3 + 0.05 (x - x*)^2 + N(0, 0.01) with the optimum x* = -u, u uniform
    on 0.3..0.7 doublings; 6 values a doubling apart, at a random phase, the cliff inside the range.
    """
    rng = np.random.default_rng(seed)
    total = 0.0
    for _ in range(trials):
        phase, u = rng.random(), rng.uniform(0.3, 0.7)
        xs = [phase + i - 4 for i in range(6)]
        scores = {x: [INF if rng.random() < 1 / (1 + math.exp(-x / sharpness))
                      else 3.0 + 0.05 * (x + u) ** 2 + rng.normal(0, 0.01) for _ in range(tuning_seeds)] for x in xs}
        total += 1 / (1 + math.exp(-rule(scores) / sharpness))
    return total / trials


# Issue 26: the chosen value should diverge <= 10% of the time. Simulated, 4000 tunings each (seed 1),
# 3 tuning seeds: with the margin 2e-6 (cliff sharpness 0.1 doubling) and 0.0046 (0.3); the old rule
# 0.025 and 0.082. With 1 tuning seed the old rule gives 0.053 and 0.151 (issue 26 measured 9-22% in its
# model); the margin 4e-5 and 0.024.
@pytest.mark.parametrize("sharpness, old_one_seed", [(0.1, 0.04), (0.3, 0.12)])
def test_the_chosen_value_rarely_diverges_on_a_stability_cliff(sharpness, old_one_seed):
    trials = 4000
    new = cliff_divergence(choose, trials, 1, DEFAULT_TUNING_SEEDS, sharpness)
    assert new <= 0.10, new
    assert cliff_divergence(choose, trials, 1, 1, sharpness) <= 0.10
    # The old rule on the same tunings picks the cliff's edge far more often (the simulation has teeth).
    assert cliff_divergence(_old_rule, trials, 1, 1, sharpness) >= old_one_seed
    assert cliff_divergence(_old_rule, trials, 1, DEFAULT_TUNING_SEEDS, sharpness) > 5 * new


def test_tune_seeds_default_to_three_disjoint_from_the_verdict_seeds():
    block = {"key": "train.lr", "values": [1e-3, 2e-3]}
    tuning = parse_tuning(block, seeds=(0, 1, 2), reserved=(), matched_key=None, set_by={})
    assert tuning.seeds == (100, 101, 102) and DEFAULT_TUNING_SEEDS == 3
    # A seed schedule up to 101 (seeds 0..100 possible): the default steps past them.
    assert default_tuning_seeds(tuple(range(101))) == (101, 102, 103)
    assert default_tuning_seeds((101,)) == (100, 102, 103)
    given = parse_tuning({**block, "seeds": [7]}, seeds=(0,), reserved=(), matched_key=None, set_by={})
    assert given.seeds == (7,)
