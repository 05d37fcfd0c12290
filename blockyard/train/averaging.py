"""An exponential moving average of a model's weights, evaluated in place of the trained weights.

Averaging the iterates of stochastic gradient descent cancels much of the noise of its last steps
(Polyak & Juditsky 1992, SIAM J. Control Optim. 30:838; for deep networks Izmailov et al. 2018,
arXiv:1803.05407, who average the tail uniformly). The exponential form keeps one copy of the
weights and forgets the early ones on its own: after step s the average is
``avg_s = decay * avg_{s-1} + (1 - decay) * w_s`` with ``avg_1 = w_1``, and ``decay`` set from a
half-life in steps, so a weight that is ``half_life`` steps old carries half the weight of the newest.
Where it is on (``train.ema_half_life`` > 0), validation measures the *averaged* model: the val lines'
``loss`` is its loss and ``raw_loss`` the trained weights'.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator
from typing import Any

import torch
from torch import nn


def ema_decay(half_life_steps: float) -> float:
    """The per-step decay whose weights halve every ``half_life_steps`` steps (0 < result < 1)."""
    if half_life_steps <= 0:
        raise ValueError("half_life_steps must be > 0")
    return 0.5 ** (1.0 / half_life_steps)


def half_life_steps(fraction: float, total_steps: int) -> float:
    """``train.ema_half_life`` (a fraction of the run) in steps, at least one step."""
    return max(1.0, fraction * total_steps)


class WeightAverage:
    """EMA of ``model``'s parameters (each tied parameter once), updated after every optimizer step."""

    def __init__(self, model: nn.Module, decay: float) -> None:
        self.decay = decay
        self.named = [(n, p) for n, p in model.named_parameters()]
        self.avg: list[torch.Tensor] | None = None

    def update(self) -> None:
        """Fold the current weights into the average (the first call copies them)."""
        with torch.no_grad():
            if self.avg is None:
                self.avg = [p.detach().clone() for _, p in self.named]
                return
            for a, (_, p) in zip(self.avg, self.named, strict=True):
                a.lerp_(p.detach(), 1.0 - self.decay)

    @contextlib.contextmanager
    def swapped_in(self) -> Iterator[None]:
        """Within the block the model holds the averaged weights; the trained ones come back after."""
        if self.avg is None:
            yield
            return
        with torch.no_grad():
            kept = [p.detach().clone() for _, p in self.named]
            for a, (_, p) in zip(self.avg, self.named, strict=True):
                p.copy_(a)
        try:
            yield
        finally:
            with torch.no_grad():
                for k, (_, p) in zip(kept, self.named, strict=True):
                    p.copy_(k)

    def state_dict(self) -> dict[str, Any]:
        return {"decay": self.decay,
                "avg": None if self.avg is None else {n: a for a, (n, _) in zip(self.avg, self.named, strict=True)}}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        avg = state.get("avg")
        if not math.isclose(float(state.get("decay", self.decay)), self.decay, rel_tol=1e-12):
            raise ValueError(f"weight average decay {state.get('decay')} != {self.decay}")
        self.avg = None if avg is None else [avg[n].detach().clone() for n, _ in self.named]
