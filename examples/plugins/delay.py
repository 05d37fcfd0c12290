"""A one-step delay, y_t = W x_(t-1), written the plain way: no package helpers beyond the base class.

The smallest block that mixes in time: output t sees only the input one position back (y_0 = 0).
It is causal and its step path carries the previous input as its whole state, so it passes the
contract. It does not mark its output projection with ``mark_residual_out``: ``blockyard check``
shows a warning row for that and ``blockyard train`` says in one line what the mark would change
(only the projection's initial scale); neither refuses it. Nothing here is tuned: it is a test
case for the contract and a template for a block of your own.

    blockyard check examples/plugins/delay.py
"""

from __future__ import annotations

import dataclasses

import torch
from torch import nn

from blockyard.mixers import Mixer, register_mixer


@dataclasses.dataclass(frozen=True)
class DelayOptions:
    """No options."""


@dataclasses.dataclass(frozen=True)
class DelayState:
    previous: torch.Tensor  # (B, D): the input of the token before


@register_mixer
class Delay(Mixer):
    kind = "delay"
    summary = "y_t = W x_(t-1): a one-step delay (example plugin, written without helpers)"
    Options = DelayOptions

    def __init__(self, width: int, options: DelayOptions, *, layer: int, depth: int) -> None:
        super().__init__(width, options, layer=layer, depth=depth)
        self.proj = nn.Linear(width, width, bias=False)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        shifted = torch.cat([torch.zeros_like(x[:, :1]), x[:, :-1]], dim=1)
        return self.proj(shifted)

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> DelayState:
        return DelayState(previous=torch.zeros(batch, self.width, device=device))

    def step(self, x_t: torch.Tensor, state: DelayState) -> tuple[torch.Tensor, DelayState]:
        return self.proj(state.previous), DelayState(previous=x_t)
