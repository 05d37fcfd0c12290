"""The plain reference loop: the transformer and training step a researcher would write by hand.

Embedding, pre-norm blocks with MHA via SDPA and a GeGLU MLP, tied head, AdamW, nothing else.
It computes the same function as blockyard's global-attention model (``tests/test_bench.py``
loads one's weights into the other and compares losses and gradients), so the tokens/s ratio
between the two loops measures blockyard's overhead only. It is written on torch primitives on
purpose and shares no code with ``blockyard.model`` (its RoPE included): a reference that reused
blockyard's pieces could not catch their mistakes.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, cast

import torch
import torch.nn.functional as F
from torch import nn

if TYPE_CHECKING:  # names for the converters' signatures only: the loop itself uses none of blockyard's code
    from blockyard.mixers.attention import GlobalAttention
    from blockyard.model import Block, LanguageModel


@dataclasses.dataclass(frozen=True)
class PlainShape:
    """The shapes of the hand-written reference transformer."""

    vocab: int = 256
    width: int = 256
    depth: int = 4
    heads: int = 4
    mlp_hidden: int = 768
    rope_base: float = 10000.0
    eps: float = 1e-6


class PlainBlock(nn.Module):
    """Pre-norm block: x + Attn(RMSNorm(x)), then x + GeGLU(RMSNorm(x)), all inline."""

    def __init__(self, s: PlainShape) -> None:
        super().__init__()
        self.heads = s.heads
        self.norm1 = nn.RMSNorm(s.width, eps=s.eps)
        self.qkv = nn.Linear(s.width, 3 * s.width, bias=False)
        self.attn_out = nn.Linear(s.width, s.width, bias=False)
        self.norm2 = nn.RMSNorm(s.width, eps=s.eps)
        self.up = nn.Linear(s.width, 2 * s.mlp_hidden, bias=False)
        self.down = nn.Linear(s.mlp_hidden, s.width, bias=False)

    def forward(self, x: torch.Tensor, cos: torch.Tensor, sin: torch.Tensor) -> torch.Tensor:
        b, t, d = x.shape
        q, k, v = self.qkv(self.norm1(x)).view(b, t, 3, self.heads, d // self.heads).permute(2, 0, 3, 1, 4)
        q, k = rotate(q, cos, sin), rotate(k, cos, sin)
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        x = x + self.attn_out(y.transpose(1, 2).reshape(b, t, d))
        gate, up = self.up(self.norm2(x)).chunk(2, dim=-1)
        return x + self.down(F.gelu(gate) * up)


def rotate(x: torch.Tensor, cos: torch.Tensor, sin: torch.Tensor) -> torch.Tensor:
    """RoPE on interleaved pairs (2i, 2i+1) (Su et al. 2021, eq. 34); cos, sin: (T, d/2) precomputed."""
    x1, x2 = x[..., 0::2], x[..., 1::2]
    return torch.stack((x1 * cos - x2 * sin, x1 * sin + x2 * cos), dim=-1).flatten(-2)


class PlainTransformer(nn.Module):
    """Embedding -> blocks -> RMSNorm -> tied head scaled by width^-1/2; logits (B, T, V)."""

    cos: torch.Tensor  # (max_len, head_dim / 2) buffers of the rotation angles
    sin: torch.Tensor

    def __init__(self, s: PlainShape, max_len: int) -> None:
        super().__init__()
        self.shape = s
        self.embed = nn.Embedding(s.vocab, s.width)
        self.blocks = cast(Sequence[PlainBlock], nn.ModuleList(PlainBlock(s) for _ in range(s.depth)))
        self.norm = nn.RMSNorm(s.width, eps=s.eps)
        head_dim = s.width // s.heads
        inv_freq = s.rope_base ** (-torch.arange(0, head_dim, 2, dtype=torch.float64) / head_dim)
        angles = torch.arange(max_len, dtype=torch.float64)[:, None] * inv_freq[None, :]
        self.register_buffer("cos", angles.cos().float(), persistent=False)
        self.register_buffer("sin", angles.sin().float(), persistent=False)
        for p in self.parameters():
            if p.ndim == 2:
                nn.init.normal_(p, 0.0, 0.02)

    def forward(self, tokens: torch.Tensor) -> torch.Tensor:
        t = tokens.shape[1]
        cos, sin = self.cos[:t], self.sin[:t]
        x = self.embed(tokens)
        for block in self.blocks:
            x = block(x, cos, sin)
        return F.linear(self.norm(x) * self.shape.width**-0.5, self.embed.weight)


def _attention_of(block: Block) -> GlobalAttention:
    """``block``'s mixer, which must be global attention: the one block the plain loop mirrors."""
    from blockyard.mixers.attention import GlobalAttention

    if not isinstance(block.mixer, GlobalAttention):
        raise TypeError(f"the plain loop mirrors global attention only, not {block.mixer.kind!r}")
    return block.mixer


def plain_shape_of(model: LanguageModel) -> PlainShape:
    """The ``PlainShape`` of one of blockyard's global-attention ``LanguageModel`` (MHA, gated MLP, tied head)."""
    cfg = model.cfg
    mixer = _attention_of(model.blocks[0])
    return PlainShape(vocab=model.vocab_size, width=cfg.width, depth=cfg.depth, heads=mixer.heads,
                      mlp_hidden=cfg.mlp_hidden, rope_base=mixer.options.rope_base, eps=cfg.norm_eps)


def load_blockyard_weights(plain: PlainTransformer, model: LanguageModel) -> None:
    """Copy the weights of one of blockyard's ``LanguageModel``s into ``plain`` (same shapes, different names)."""
    with torch.no_grad():
        plain.embed.weight.copy_(model.embed.weight)
        plain.norm.weight.copy_(model.final_norm.weight)
        for mine, theirs in zip(plain.blocks, model.blocks, strict=True):
            mine.norm1.weight.copy_(theirs.mixer_norm.weight)
            attention = _attention_of(theirs)
            mine.qkv.weight.copy_(attention.qkv.weight)
            mine.attn_out.weight.copy_(attention.out.weight)
            if theirs.mlp_norm is None or theirs.mlp is None:
                raise TypeError("the plain loop mirrors blocks with an MLP only (model.mlp_hidden > 0)")
            mine.norm2.weight.copy_(theirs.mlp_norm.weight)
            mine.up.weight.copy_(theirs.mlp.proj_in.weight)
            mine.down.weight.copy_(theirs.mlp.proj_out.weight)


def plain_optimizer(model: nn.Module, lr: float = 3e-3) -> torch.optim.AdamW:
    """AdamW with decay on matrices (the embedding included: a plain loop rarely separates it)."""
    return torch.optim.AdamW(model.parameters(), lr=lr, betas=(0.9, 0.95), weight_decay=0.1)


def plain_train_step(model: nn.Module, optimizer: torch.optim.Optimizer, x: torch.Tensor, y: torch.Tensor,
                     bf16: bool = False) -> torch.Tensor:
    """One step of the reference loop: forward, cross-entropy, backward, AdamW step, zero_grad; the loss.

    Nothing else runs: ``tests/test_bench.py`` records every aten op this step dispatches and
    checks that the list equals that of the same five lines written out by hand.
    """
    with torch.autocast("cpu", dtype=torch.bfloat16, enabled=bf16):
        logits = model(x)
    loss = F.cross_entropy(logits.float().flatten(0, 1), y.flatten())
    loss.backward()
    optimizer.step()
    optimizer.zero_grad(set_to_none=True)
    return loss


def random_batches(vocab: int, batch: int, seq_len: int, count: int,
                   seed: int = 0) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """``count`` (x, y) next-token batches of uniform random tokens (speed does not depend on the text)."""
    g = torch.Generator().manual_seed(seed)
    out = []
    for _ in range(count):
        seq = torch.randint(vocab, (batch, seq_len + 1), generator=g)
        out.append((seq[:, :-1], seq[:, 1:]))
    return out


def plain_stepper(shape: PlainShape, batch: int, seq_len: int, bf16: bool = False,
                  seed: int = 0) -> Callable[[int], None]:
    """The reference loop as ``step(i)``: a fresh model and AdamW (torch seed 0), each step on a new
    batch of uniform random tokens (``seed``; speed does not depend on the text, nor on ``i``)."""
    torch.manual_seed(0)
    model = PlainTransformer(shape, seq_len)
    optimizer = plain_optimizer(model)
    gen = torch.Generator().manual_seed(seed)

    def step(_i: int) -> None:
        seq = torch.randint(shape.vocab, (batch, seq_len + 1), generator=gen)
        plain_train_step(model, optimizer, seq[:, :-1], seq[:, 1:], bf16=bf16)

    return step


def plain_step_seconds(shape: PlainShape, batch: int, seq_len: int, steps: int, warmup: int,
                       bf16: bool = False) -> list[float]:
    """Wall seconds of each timed step of the reference loop (after ``warmup`` untimed steps)."""
    step = plain_stepper(shape, batch, seq_len, bf16=bf16)
    times = []
    for i in range(warmup + steps):
        start = time.perf_counter()
        step(i)
        if i >= warmup:
            times.append(time.perf_counter() - start)
    return times


def plain_tokens_per_s(shape: PlainShape, batch: int, seq_len: int, steps: int, warmup: int,
                       bf16: bool = False, window: int = 10) -> float:
    """Tokens per second of the reference loop: the best window of ``window`` timed steps.

    Windows of 10 steps match the blockyard side, whose loop clock is read at every 10th step.
    """
    times = plain_step_seconds(shape, batch, seq_len, steps, warmup, bf16=bf16)
    sums = [sum(times[i:i + window]) for i in range(0, len(times) - window + 1, window)] or [sum(times)]
    used = min(window, len(times))
    return batch * seq_len * used / min(sums)
