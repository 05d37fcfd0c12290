"""PLACEHOLDER (being replaced): minimal causal attention used to smoke-test the skeleton."""

from __future__ import annotations

import dataclasses

import torch
import torch.nn.functional as F
from torch import nn

from harness.mixers.base import Mixer, register_mixer
from harness.schema import opt


@dataclasses.dataclass(frozen=True)
class GlobalAttentionOptions:
    heads: int = opt(4, "query heads", min=1)


@register_mixer
class GlobalAttention(Mixer):
    kind = "global_attention"
    summary = "causal softmax attention"
    Options = GlobalAttentionOptions

    def __init__(self, width, options, *, layer, depth):
        super().__init__(width, options, layer=layer, depth=depth)
        self.qkv = nn.Linear(width, 3 * width, bias=False)
        self.out = nn.Linear(width, width, bias=False)
        self.out.residual_out = True

    def forward(self, x):
        B, T, D = x.shape
        h = self.options.heads
        q, k, v = self.qkv(x).view(B, T, 3, h, D // h).permute(2, 0, 3, 1, 4)
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        return self.out(y.transpose(1, 2).reshape(B, T, D))
