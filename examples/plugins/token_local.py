"""A token-local block, y_t = W x_t, declared as such: a "no mixing in time" baseline for an ablation.

Output t depends on input t alone, so the contract's "mixes in time" check (some output after t
moves when input t does) would fail it: a block meant to mix that silently does not would read as
a "no mixing" result. This one declares ``token_local = True`` on purpose; the check then passes
it and the grid report's variants table marks its variants as token-local. Its state is empty.

    blockyard check examples/plugins/token_local.py
"""

from __future__ import annotations

import dataclasses

import torch
from torch import nn

from blockyard.mixers import Mixer, mark_residual_out, register_mixer


@dataclasses.dataclass(frozen=True)
class TokenLocalOptions:
    """No options."""


@dataclasses.dataclass(frozen=True)
class TokenLocalState:
    """Nothing is carried from one token to the next."""


@register_mixer
class TokenLocal(Mixer):
    kind = "token_local_linear"
    summary = "y_t = W x_t: no mixing in time, on purpose (example plugin, a baseline)"
    Options = TokenLocalOptions
    token_local = True  # deliberate: the contract's "mixes in time" check passes it, reports mark it

    def __init__(self, width: int, options: TokenLocalOptions, *, layer: int, depth: int) -> None:
        super().__init__(width, options, layer=layer, depth=depth)
        self.proj = mark_residual_out(nn.Linear(width, width, bias=False))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.proj(x)

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> TokenLocalState:
        return TokenLocalState()

    def step(self, x_t: torch.Tensor, state: TokenLocalState) -> tuple[torch.Tensor, TokenLocalState]:
        return self.proj(x_t), state
