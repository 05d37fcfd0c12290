"""Causal softmax attention mixers: global (full causal) and local (sliding window).

Both share the projections: one fused bias-free ``qkv`` projection to ``heads`` query heads and
``kv_heads`` key/value heads (MHA when equal, MQA when 1: Shazeer 2019; GQA in between: Ainslie
et al. 2023), optional rotary embeddings on queries and keys (Su et al. 2021), and a bias-free
output projection marked ``residual_out`` so that the backbone scales its init.

The math lives in the pure functions ``causal_attention``, ``sliding_window_attention`` and
``cached_attention``; the modules only wire parameters to them. Local attention never builds a
T x T score or mask: queries are processed in blocks of ``window`` positions, each block
attending to its own and the previous block through a (W, 2W) band mask, so the cost is linear
in T.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, ClassVar

import torch
import torch.nn.functional as F
from torch import nn

from blockyard.errors import ConfigError
from blockyard.mixers.base import Mixer, mark_residual_out, register_mixer
from blockyard.mixers.rope import apply_rope
from blockyard.schema import opt

FLOAT32_BYTES = 4

# ----------------------------------------------------------------------------- options


@dataclasses.dataclass(frozen=True)
class AttentionHeadOptions:
    """Head layout and position encoding shared by both attention kinds."""

    heads: int = opt(4, "query heads (head dim = model.width / heads)", min=1)
    kv_heads: int = opt(0, "key/value heads: 0 = as many as heads (MHA), 1 = MQA, a divisor of heads = GQA", min=0)
    rope: bool = opt(True, "rotary position embeddings on queries and keys (Su et al. 2021); false = no positions")
    rope_base: float = opt(10000.0, "RoPE frequency base: theta_i = rope_base^(-2i/head_dim)", min=1.0)

    @property
    def n_kv_heads(self) -> int:
        return self.kv_heads or self.heads

    def check_width(self, path: str, width: int) -> None:
        """Cross-field checks against the model width; errors quote the dotted key."""
        if width % self.heads:
            raise ConfigError(f"{path}.heads", f"{self.heads} does not divide model.width {width}")
        if self.n_kv_heads > self.heads or self.heads % self.n_kv_heads:
            raise ConfigError(
                f"{path}.kv_heads", f"{self.kv_heads} does not divide heads {self.heads} (0 = as many as heads)"
            )
        head_dim = width // self.heads
        if self.rope and head_dim % 2:
            raise ConfigError(
                f"{path}.rope",
                f"needs an even head dim, but model.width {width} / heads {self.heads} = {head_dim}; "
                "change heads or set rope: false",
            )


@dataclasses.dataclass(frozen=True)
class GlobalAttentionOptions(AttentionHeadOptions):
    pass


@dataclasses.dataclass(frozen=True)
class LocalAttentionOptions(AttentionHeadOptions):
    window: int = opt(64, "tokens each position sees: itself and the window - 1 before it", min=1)


# ----------------------------------------------------------------------------- step states


@dataclasses.dataclass(frozen=True)
class KVCache:
    """Keys and values of every token so far, ``(B, kv_heads, L, head_dim)``; ``position`` = L."""

    keys: torch.Tensor
    values: torch.Tensor
    position: int


@dataclasses.dataclass(frozen=True)
class WindowKVCache:
    """Ring buffer of the last ``min(position, window)`` keys/values, ``(B, kv_heads, <= W, head_dim)``.

    Slot ``p % window`` holds position p. The slot order does not matter: keys carry their
    absolute position through RoPE already and softmax attention is permutation invariant.
    """

    keys: torch.Tensor
    values: torch.Tensor
    position: int
    window: int


# ----------------------------------------------------------------------------- pure math


def expand_kv(x: torch.Tensor, heads: int) -> torch.Tensor:
    """Repeat each of the kv heads of ``x: (..., kv_heads, L, d)`` for its group of query heads.

    Query head h reads kv head h // (heads / kv_heads) (the grouping of Ainslie et al. 2023).
    """
    groups = heads // x.shape[-3]
    return x if groups == 1 else x.repeat_interleave(groups, dim=-3)


def causal_attention(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor) -> torch.Tensor:
    """softmax(q k^T / sqrt(d) + causal mask) v (Vaswani et al. 2017); q: (B, H, T, d), k, v: (B, Hkv, T, d)."""
    heads = q.shape[-3]
    return F.scaled_dot_product_attention(q, expand_kv(k, heads), expand_kv(v, heads), is_causal=True)


def window_band_mask(blocks: int, window: int, device: torch.device | None = None) -> torch.Tensor:
    """Boolean mask ``(blocks, W, 2W)``: query r of block i may see key c of [block i-1, block i].

    Allowed iff 0 <= query position - key position < W and the key position is >= 0.
    """
    r = torch.arange(window, device=device)[:, None]
    c = torch.arange(2 * window, device=device)[None, :]
    offset = window + r - c  # query position - key position
    band = (offset >= 0) & (offset < window)
    key_pos = (torch.arange(blocks, device=device)[:, None, None] - 1) * window + c
    return band & (key_pos >= 0)


def sliding_window_attention(q: torch.Tensor, k: torch.Tensor, v: torch.Tensor, window: int) -> torch.Tensor:
    """Causal attention where position t sees positions t - window + 1 .. t; memory and time linear in T.

    q: (B, H, T, d), k, v: (B, Hkv, T, d). The sequence is padded at the end to a multiple of
    ``window`` (padded positions are only seen by padded queries, which are dropped).
    """
    seq_len = q.shape[-2]
    if window >= seq_len:
        return causal_attention(q, k, v)
    heads = q.shape[-3]
    k, v = expand_kv(k, heads), expand_kv(v, heads)
    blocks = math.ceil(seq_len / window)
    pad = blocks * window - seq_len
    q, k, v = (F.pad(t, (0, 0, 0, pad)).unflatten(-2, (blocks, window)) for t in (q, k, v))  # (B, H, n, W, d)

    def with_previous_block(t: torch.Tensor) -> torch.Tensor:
        previous = F.pad(t[..., :-1, :, :], (0, 0, 0, 0, 1, 0))  # block i-1 (zeros before block 0)
        return torch.cat((previous, t), dim=-2)  # (B, H, n, 2W, d)

    mask = window_band_mask(blocks, window, device=q.device)
    y = F.scaled_dot_product_attention(q, with_previous_block(k), with_previous_block(v), attn_mask=mask)
    return y.flatten(-3, -2)[..., :seq_len, :]


def cached_attention(q: torch.Tensor, keys: torch.Tensor, values: torch.Tensor) -> torch.Tensor:
    """One new query per sequence, ``q: (B, H, 1, d)``, over every cached key (all are in its past)."""
    heads = q.shape[-3]
    return F.scaled_dot_product_attention(q, expand_kv(keys, heads), expand_kv(values, heads))


def ring_write(buffer: torch.Tensor, item: torch.Tensor, position: int, window: int) -> torch.Tensor:
    """A new buffer ``(B, Hkv, <= W, d)`` with ``item: (B, Hkv, 1, d)`` appended (not yet full) or in slot p % W.

    Out of place (step states are never written to): one copy of the buffer with the slot replaced
    (``index_copy``), rather than slicing around the slot and concatenating three pieces.
    """
    if buffer.shape[2] < window:
        return torch.cat((buffer, item), dim=2)
    slot = torch.tensor([position % window], device=buffer.device)
    return buffer.index_copy(2, slot, item)


# ----------------------------------------------------------------------------- modules


class _Attention(Mixer):
    """Projections, RoPE and the step loop shared by both kinds; subclasses pick the attention."""

    Options: ClassVar[type] = AttentionHeadOptions

    def __init__(self, width: int, options: AttentionHeadOptions, *, layer: int, depth: int) -> None:
        super().__init__(width, options, layer=layer, depth=depth)
        self.heads = options.heads
        self.kv_heads = options.n_kv_heads
        self.head_dim = width // options.heads
        self.qkv = nn.Linear(width, (self.heads + 2 * self.kv_heads) * self.head_dim, bias=False)
        self.out = nn.Linear(self.heads * self.head_dim, width, bias=False)
        mark_residual_out(self.out)
        self.query_scale = 1.0

    def use_base_width(self, base_width: int) -> None:
        # muP scores q.k / head_dim instead of / sqrt(head_dim) (Yang et al. 2022, sec. 4, from memory),
        # equal at the base head dim: queries times sqrt(base_head_dim / head_dim), then torch's 1/sqrt(d).
        self.query_scale = math.sqrt((base_width // self.heads) / self.head_dim)

    def _project(self, x: torch.Tensor, positions: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """``x: (B, T, D)`` at absolute ``positions: (T,)`` -> q (B, H, T, d), k and v (B, Hkv, T, d)."""
        d = self.head_dim
        q, k, v = self.qkv(x).split((self.heads * d, self.kv_heads * d, self.kv_heads * d), dim=-1)
        q, k, v = (t.unflatten(-1, (-1, d)).transpose(1, 2) for t in (q, k, v))
        if self.options.rope:
            q = apply_rope(q, positions, self.options.rope_base)
            k = apply_rope(k, positions, self.options.rope_base)
        if self.query_scale != 1.0:
            q = q * self.query_scale
        return q, k, v

    def _merge(self, y: torch.Tensor) -> torch.Tensor:
        """(B, H, T, d) -> output projection of the concatenated heads, (B, T, D)."""
        return self.out(y.transpose(1, 2).flatten(-2))

    def _attend(self, q: torch.Tensor, k: torch.Tensor, v: torch.Tensor) -> torch.Tensor:
        raise NotImplementedError

    def _append(self, state: Any, k: torch.Tensor, v: torch.Tensor) -> Any:
        raise NotImplementedError

    def _empty_kv(self, batch: int, device: torch.device | str | None) -> torch.Tensor:
        weight = self.qkv.weight
        return weight.new_zeros((batch, self.kv_heads, 0, self.head_dim), device=device or weight.device)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        positions = torch.arange(x.shape[1], device=x.device)
        return self._merge(self._attend(*self._project(x, positions)))

    def step(self, x_t: torch.Tensor, state: Any) -> tuple[torch.Tensor, Any]:
        positions = torch.tensor([state.position], device=x_t.device)
        q, k, v = self._project(x_t[:, None, :], positions)
        state = self._append(state, k, v)
        return self._merge(cached_attention(q, state.keys, state.values))[:, 0], state

    # ----- cost hooks
    @classmethod
    def _cached_tokens(cls, options: Any, context: int) -> int:
        """Tokens each query attends to (and the cache holds) at ``context``."""
        raise NotImplementedError

    @classmethod
    def param_count(cls, width: int, options: AttentionHeadOptions) -> int:
        head_dim = width // options.heads
        qkv = width * (options.heads + 2 * options.n_kv_heads) * head_dim
        return qkv + options.heads * head_dim * width

    @classmethod
    def extra_flops_per_token(cls, width: int, options: AttentionHeadOptions, context: int) -> float:
        """6 * n_ctx * d_attn: QK^T and AV, forward + backward (Kaplan et al. 2020, table 1)."""
        d_attn = options.heads * (width // options.heads)
        return float(6 * cls._cached_tokens(options, context) * d_attn)

    @classmethod
    def state_bytes(cls, width: int, options: AttentionHeadOptions, context: int, *, batch: int = 1) -> int:
        """fp32 keys + values of the cached tokens; the position counter is a Python int (0 bytes)."""
        head_dim = width // options.heads
        return 2 * batch * options.n_kv_heads * cls._cached_tokens(options, context) * head_dim * FLOAT32_BYTES


@register_mixer
class GlobalAttention(_Attention):
    kind = "global_attention"
    summary = "causal softmax attention over all past tokens (MHA/GQA/MQA, RoPE); KV cache grows with context"
    Options = GlobalAttentionOptions

    def _attend(self, q: torch.Tensor, k: torch.Tensor, v: torch.Tensor) -> torch.Tensor:
        return causal_attention(q, k, v)

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> KVCache:
        empty = self._empty_kv(batch, device)
        return KVCache(keys=empty, values=empty, position=0)

    def _append(self, state: KVCache, k: torch.Tensor, v: torch.Tensor) -> KVCache:
        return KVCache(
            keys=torch.cat((state.keys, k), dim=2),
            values=torch.cat((state.values, v), dim=2),
            position=state.position + 1,
        )

    @classmethod
    def _cached_tokens(cls, options: GlobalAttentionOptions, context: int) -> int:
        return context


@register_mixer
class LocalAttention(_Attention):
    kind = "local_attention"
    summary = "sliding-window causal softmax attention (sees the last `window` tokens); fixed-size KV ring buffer"
    Options = LocalAttentionOptions

    def _attend(self, q: torch.Tensor, k: torch.Tensor, v: torch.Tensor) -> torch.Tensor:
        return sliding_window_attention(q, k, v, self.options.window)

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> WindowKVCache:
        empty = self._empty_kv(batch, device)
        return WindowKVCache(keys=empty, values=empty, position=0, window=self.options.window)

    def _append(self, state: WindowKVCache, k: torch.Tensor, v: torch.Tensor) -> WindowKVCache:
        return WindowKVCache(
            keys=ring_write(state.keys, k, state.position, state.window),
            values=ring_write(state.values, v, state.position, state.window),
            position=state.position + 1,
            window=state.window,
        )

    @classmethod
    def _cached_tokens(cls, options: LocalAttentionOptions, context: int) -> int:
        return min(options.window, context)
