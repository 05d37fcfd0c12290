"""A deliberately broken block, for tests and for seeing what `blockyard check` reports: it leaks.

The same causal linear attention as ``linear_attention.py`` (Katharopoulos et al. 2020,
arXiv:2006.16236), except that in the full-sequence pass each position's key and value come from
the *next* token: an off-by-one shift of the kind that slips into real code. Output t then sees
input t + 1, so a language model built from it reads the token it is asked to predict and
trains to an impossibly low loss. Its step path cannot see the future, so it also disagrees with
the forward pass. ``blockyard check`` reports "output 0 changes when input 1 does"; ``blockyard
train`` refuses it. Self-contained on purpose: a plugin file may not import the files beside it.
"""

from __future__ import annotations

import dataclasses
from typing import ClassVar

import torch
import torch.nn.functional as F
from torch import nn

from blockyard.mixers import Mixer, mark_residual_out, register_mixer


def _phi(x: torch.Tensor) -> torch.Tensor:
    return F.elu(x) + 1.0


@dataclasses.dataclass(frozen=True)
class LeakyOptions:
    pass


@dataclasses.dataclass(frozen=True)
class LeakyState:
    s: torch.Tensor  # (B, D, D)
    z: torch.Tensor  # (B, D)


@register_mixer
class LeakyLinearAttention(Mixer):
    kind: ClassVar[str] = "leaky_linear_attention"
    summary: ClassVar[str] = "single-head linear attention whose keys come from the next token (leaks; for tests)"
    Options: ClassVar[type] = LeakyOptions

    def __init__(self, width: int, options: LeakyOptions, *, layer: int, depth: int) -> None:
        super().__init__(width, options, layer=layer, depth=depth)
        self.qkv = nn.Linear(width, 3 * width, bias=False)
        self.out = mark_residual_out(nn.Linear(width, width, bias=False))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        q, k, v = self.qkv(x).chunk(3, dim=-1)
        k, v = (torch.cat([t[:, 1:], t[:, -1:]], dim=1) for t in (k, v))  # the bug: position t gets t + 1's
        scores = (_phi(q) @ _phi(k).transpose(-1, -2)).tril()
        return self.out((scores @ v) / scores.sum(-1, keepdim=True))

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> LeakyState:
        w = self.qkv.weight
        return LeakyState(s=w.new_zeros((batch, self.width, self.width), device=device),
                          z=w.new_zeros((batch, self.width), device=device))

    def step(self, x_t: torch.Tensor, state: LeakyState) -> tuple[torch.Tensor, LeakyState]:
        q, k, v = self.qkv(x_t).chunk(3, dim=-1)
        s = state.s + _phi(k)[:, :, None] * v[:, None, :]
        z = state.z + _phi(k)
        y = (_phi(q)[:, None, :] @ s)[:, 0] / (_phi(q) * z).sum(-1, keepdim=True)
        return self.out(y), LeakyState(s=s, z=z)
