"""Length extrapolation: a trained run's validation loss at multiples of its training context.

A model trained on windows of ``seq_len`` tokens is evaluated on validation windows of
``k * seq_len`` tokens. The loss is split into position buckets (equal slices of the window), so
the table shows *where* a model breaks: a model that extrapolates keeps the late buckets at or
below the early ones (more context can only help an ideal predictor); one that does not sees its
loss rise past position ``seq_len``. RoPE attention without a window is the classic failure
(Press et al. 2022, "Train Short, Test Long", fig. 1); recurrences and local attention are
expected to hold.
"""

from __future__ import annotations

import dataclasses

import torch
import torch.nn.functional as F

IGNORE_INDEX = -100  # y == -100 marks positions without loss (DEVELOPERS.md, data interface)


@dataclasses.dataclass(frozen=True)
class BucketLoss:
    """Summed token losses and counts per position bucket; means are derived, so they always agree."""

    loss_sum: torch.Tensor  # (n_buckets,) float64, nats
    count: torch.Tensor  # (n_buckets,) int64, scored tokens

    def __add__(self, other: BucketLoss) -> BucketLoss:
        return BucketLoss(self.loss_sum + other.loss_sum, self.count + other.count)

    @property
    def bucket_means(self) -> list[float]:
        return [float(s / c) if c > 0 else float("nan") for s, c in zip(self.loss_sum, self.count, strict=True)]

    @property
    def mean(self) -> float:
        """Token-weighted mean loss over the whole window (the count-weighted average of the buckets)."""
        total = int(self.count.sum())
        return float(self.loss_sum.sum() / total) if total else float("nan")


def bucket_edges(length: int, n_buckets: int) -> list[int]:
    """Boundaries of ``n_buckets`` contiguous position slices of a window of ``length`` (as equal as integers allow)."""
    n = max(1, min(n_buckets, length))
    return [round(i * length / n) for i in range(n + 1)]


def position_bucket_loss(logits: torch.Tensor, y: torch.Tensor, n_buckets: int) -> BucketLoss:
    """Cross-entropy of ``logits: (B, T, V)`` against ``y: (B, T)``, summed per position bucket."""
    token_loss = F.cross_entropy(
        logits.flatten(0, 1).float(), y.flatten(), ignore_index=IGNORE_INDEX, reduction="none"
    ).view(y.shape)
    scored = y != IGNORE_INDEX
    edges = bucket_edges(y.shape[1], n_buckets)
    sums, counts = [], []
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        sums.append(token_loss[:, lo:hi].double().sum())
        counts.append(scored[:, lo:hi].sum())
    return BucketLoss(torch.stack(sums), torch.stack(counts).long())
