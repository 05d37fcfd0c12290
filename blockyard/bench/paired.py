"""Paired step timing: two configs' training steps alternated in one process, ratio per pair.

Whole-run timings (``blockyard.bench.speed``) of two configs lie minutes apart, and this kind of
machine drifts by 15-20% over minutes (measured on the 2-core hosts this project is built on), so
a ratio of two runs carries that drift. Here the trainer's own step (``train_step``: forward,
backward, clipping, AdamW) of config A and of config B alternate (A B, B A, A B, ...: the order
flips every pair, so a steady drift cancels to first order), each pair gives one tokens/s ratio,
and the figure is their median with a distribution-free 95% confidence interval (the binomial
order-statistic interval of the median, scipy's ``quantile_test``).
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from typing import Any

from scipy.stats import quantile_test

DEFAULT_PAIRS = 16
PAIRED_WARMUP = 3  # untimed steps of each config first (allocator, thread pool, kernel build)


def _timed(step: Callable[[int], None], i: int) -> float:
    start = time.perf_counter()
    step(i)
    return time.perf_counter() - start


def paired_ratios(num_step: Callable[[int], None], den_step: Callable[[int], None], *, pairs: int,
                  num_tokens: int = 1, den_tokens: int = 1, warmup: int = PAIRED_WARMUP) -> list[float]:
    """Per-pair tokens/s of ``num_step`` over ``den_step`` (``*_tokens``: tokens per step), ``pairs`` pairs."""
    for i in range(warmup):
        num_step(i)
        den_step(i)
    out = []
    for k in range(pairs):
        i = warmup + k
        if k % 2 == 0:
            t_num, t_den = _timed(num_step, i), _timed(den_step, i)
        else:
            t_den, t_num = _timed(den_step, i), _timed(num_step, i)
        out.append((num_tokens / t_num) / (den_tokens / t_den))
    return out


def median_with_interval(values: list[float], confidence: float = 0.95) -> dict[str, Any]:
    """Median of ``values`` and its distribution-free confidence interval (None bounds where n is too small).

    The interval is the binomial order-statistic interval of the median (scipy.stats.quantile_test
    at p = 0.5): it needs no assumption on the shape of the pairs' distribution, only independence.
    """
    ci = quantile_test(values, q=statistics.median(values), p=0.5).confidence_interval(confidence)
    low, high = float(ci.low), float(ci.high)
    return {"median": statistics.median(values), "low": low if low > float("-inf") else None,
            "high": high if high < float("inf") else None, "pairs": len(values), "confidence": confidence}
