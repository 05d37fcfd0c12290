"""Causal linear attention with a feature map: a block the package does not ship, as a plugin file.

Katharopoulos et al. 2020, "Transformers are RNNs: Fast Autoregressive Transformers with Linear
Attention" (arXiv:2006.16236). Softmax similarity is replaced by a kernel phi(q)^T phi(k) with the
positive feature map phi(x) = elu(x) + 1 (their eq. 7), so causal attention (their eq. 9)

    y_i = phi(q_i)^T sum_{j<=i} phi(k_j) v_j^T  /  phi(q_i)^T sum_{j<=i} phi(k_j)

can be computed two ways: in parallel over the sequence with a causal mask on phi(Q) phi(K)^T
(``forward``, what training uses), or as a recurrence over a fixed-size state (their eqs. 10-12:
S_i = S_{i-1} + phi(k_i) v_i^T, z_i = z_{i-1} + phi(k_i); ``step``, what generation uses). The
state does not grow with the context, unlike a softmax attention's KV cache.

Use it from a config::

    plugins: [linear_attention.py]          # relative to the config file
    model:
      pattern: [linear]
      mixers:
        linear: {kind: linear_attention, heads: 4}

It gives ``param_count`` and ``state_bytes`` (``blockyard check`` compares them with the module)
and leaves ``extra_flops_per_token`` out, so the cost model measures its FLOPs with torch's
counter (``blockyard blocks CONFIG`` says which figures were measured).
"""

from __future__ import annotations

import dataclasses
from typing import ClassVar

import torch
import torch.nn.functional as F
from torch import nn

from blockyard.errors import ConfigError
from blockyard.mixers import Mixer, mark_residual_out, register_mixer
from blockyard.schema import opt

# Added to the normaliser phi(q)^T z (positive, since phi > 0) against division by ~0.
EPS = 1e-6


def feature_map(x: torch.Tensor) -> torch.Tensor:
    """phi(x) = elu(x) + 1 > 0 (Katharopoulos et al. 2020, eq. 7)."""
    return F.elu(x) + 1.0


def causal_linear_attention(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor) -> torch.Tensor:
    """Parallel form: ``q, k, v: (B, H, T, d)`` -> (B, H, T, d), each position over positions <= it."""
    fq, fk = feature_map(q), feature_map(k)
    scores = (fq @ fk.transpose(-1, -2)).tril()  # (B, H, T, T): phi(q_i)^T phi(k_j) for j <= i
    return (scores @ v) / (scores.sum(-1, keepdim=True) + EPS)


def linear_attention_step(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, s: torch.Tensor, z: torch.Tensor
                          ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Recurrent form, one token: ``q, k, v: (B, H, d)``, ``s: (B, H, d, d)``, ``z: (B, H, d)`` -> y, s', z'."""
    fq, fk = feature_map(q), feature_map(k)
    s = s + fk[..., :, None] * v[..., None, :]  # S_i = S_{i-1} + phi(k_i) v_i^T
    z = z + fk  # z_i = z_{i-1} + phi(k_i)
    y = (fq[..., None, :] @ s)[..., 0, :] / ((fq * z).sum(-1, keepdim=True) + EPS)
    return y, s, z


@dataclasses.dataclass(frozen=True)
class LinearAttentionOptions:
    heads: int = opt(4, "attention heads (must divide the width)", min=1)

    def check_width(self, path: str, width: int) -> None:
        if width % self.heads:
            raise ConfigError(f"{path}.heads", f"{self.heads} does not divide model.width {width}")


@dataclasses.dataclass(frozen=True)
class LinearAttentionState:
    s: torch.Tensor  # (B, H, d, d): sum of phi(k_j) v_j^T so far
    z: torch.Tensor  # (B, H, d): sum of phi(k_j) so far


@register_mixer
class LinearAttention(Mixer):
    kind: ClassVar[str] = "linear_attention"
    summary: ClassVar[str] = ("causal linear attention, phi(x) = elu(x) + 1, constant-size state "
                              "(Katharopoulos et al. 2020; example plugin)")
    Options: ClassVar[type] = LinearAttentionOptions

    def __init__(self, width: int, options: LinearAttentionOptions, *, layer: int, depth: int) -> None:
        super().__init__(width, options, layer=layer, depth=depth)
        self.heads = options.heads
        self.head_dim = width // options.heads
        self.qkv = nn.Linear(width, 3 * width, bias=False)
        self.out = mark_residual_out(nn.Linear(width, width, bias=False))

    def _split(self, x: torch.Tensor) -> tuple[torch.Tensor, ...]:
        """(..., D) -> q, k, v of shape (..., H, d)."""
        return tuple(t.unflatten(-1, (self.heads, self.head_dim)) for t in self.qkv(x).chunk(3, dim=-1))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        q, k, v = (t.transpose(1, 2) for t in self._split(x))  # (B, H, T, d)
        return self.out(causal_linear_attention(q, k, v).transpose(1, 2).flatten(-2))

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> LinearAttentionState:
        w = self.qkv.weight
        device = device or w.device
        return LinearAttentionState(
            s=w.new_zeros((batch, self.heads, self.head_dim, self.head_dim), device=device, dtype=torch.float32),
            z=w.new_zeros((batch, self.heads, self.head_dim), device=device, dtype=torch.float32))

    def step(self, x_t: torch.Tensor, state: LinearAttentionState) -> tuple[torch.Tensor, LinearAttentionState]:
        q, k, v = self._split(x_t)  # (B, H, d)
        y, s, z = linear_attention_step(q.float(), k.float(), v.float(), state.s, state.z)
        return self.out(y.to(x_t.dtype).flatten(-2)), LinearAttentionState(s=s, z=z)

    # ----- cost hooks (extra_flops_per_token left out on purpose: measured by torch's counter)
    @classmethod
    def param_count(cls, width: int, options: LinearAttentionOptions) -> int:
        return 4 * width * width  # q, k, v and output projections, no biases

    @classmethod
    def state_bytes(cls, width: int, options: LinearAttentionOptions, context: int, *, batch: int = 1) -> int:
        head_dim = width // options.heads
        return 4 * batch * options.heads * (head_dim * head_dim + head_dim)  # fp32, whatever the context
