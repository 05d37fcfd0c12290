"""Activation memory of one training step, estimated before training, and a warning when it will not fit.

What training holds between a forward pass and its backward pass is the set of tensors autograd
saves for backward. We count them without computing anything: the model is built and run once
(forward + loss, one micro-batch) under ``FakeTensorMode``, which gives every tensor its real CPU
shape, dtype and kernel choice (so SDPA takes the same fused CPU kernel, Dao et al. 2022, arXiv:2205.14135, saving
O(T) per head rather than a T x T matrix) but allocates no storage. ``saved_tensors_hooks``
sees every tensor saved for backward; each storage is counted once and parameters are left out
(they are the model's memory, not activations).

With ``runtime.activation_checkpointing`` each block keeps only its input and recomputes the
rest during backward, one block at a time (Chen et al. 2016, "Training Deep Nets with Sublinear
Memory Cost", sec. 3): saved = embedding and head parts + every block's input + the largest
block's own saved tensors.

Backward needs room beyond the saved tensors for the gradients in flight; we allow twice the
largest saved storage for that (the gradient of the logits and of the softmax below them: common
practice, no source). Under bf16 autocast the estimate stays the fp32 one, an upper bound.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import torch
import torch.nn.functional as F
from torch import nn

from blockyard.config import Config, ModelConfig

if TYPE_CHECKING:
    from blockyard.model import LanguageModel


@dataclasses.dataclass(frozen=True)
class ActivationEstimate:
    """Bytes one training micro-batch needs beyond the model, its gradients and the optimizer state."""

    saved_bytes: int  # held from forward to backward
    transient_bytes: int  # extra room at the start of backward
    parts: dict[str, int]  # saved bytes by part: embedding, block:<i>, head/loss
    block_input_bytes: int  # one block's input (what a checkpointed block keeps)

    @property
    def total_bytes(self) -> int:
        return self.saved_bytes + self.transient_bytes


def _fake_mode() -> Any:
    # FakeTensorMode is torch's own shape-propagation mode (what torch.compile traces with); the
    # private path is its only import location in torch 2.x.
    from torch._subclasses.fake_tensor import FakeTensorMode

    return FakeTensorMode()


def saved_bytes_by_part(model: LanguageModel, tokens: torch.Tensor) -> tuple[dict[str, int], int, int]:
    """Run forward + mean cross-entropy, counting saved-for-backward storages per part.

    Returns (bytes by part, largest saved storage, bytes of one block's input). Works on real and
    on fake tensors alike; the counting is the same.
    """
    params = {p.untyped_storage()._cdata for p in model.parameters()}
    seen: dict[int, int] = {}
    parts: dict[str, int] = {}
    current = ["embedding"]
    block_input = [0]

    def pack(t: torch.Tensor) -> torch.Tensor:
        storage = t.untyped_storage()
        key = storage._cdata
        if key not in seen and key not in params:
            seen[key] = storage.nbytes()
            parts[current[-1]] = parts.get(current[-1], 0) + storage.nbytes()
        return t

    def enter(name: str) -> Callable[..., None]:
        def hook(_m: nn.Module, args: tuple[Any, ...]) -> None:
            current.append(name)
            block_input[0] = max(block_input[0], args[0].numel() * args[0].element_size())
        return hook

    def leave(_m: nn.Module, _args: Any, _out: Any) -> None:
        current.pop()
        if len(current) == 1:
            current[0] = "head/loss"  # after the first block returns, only the head is left

    handles = []
    for i, block in enumerate(model.blocks):
        handles += [block.register_forward_pre_hook(enter(f"block:{i}")), block.register_forward_hook(leave)]
    try:
        with torch.autograd.graph.saved_tensors_hooks(pack, lambda t: t):
            logits = model(tokens)
            F.cross_entropy(logits.float().flatten(0, -2), tokens.flatten())
    finally:
        for h in handles:
            h.remove()
    return parts, max(seen.values(), default=0), block_input[0]


def estimate_activation_memory(model_cfg: ModelConfig, vocab_size: int, batch: int, seq_len: int, *,
                               activation_checkpointing: bool = False, kernels: str = "auto"
                               ) -> ActivationEstimate:
    """Activation bytes of one training micro-batch of ``batch`` x ``seq_len`` tokens (no allocation).

    ``kernels`` (``runtime.kernels``): the compiled kernels are torch custom ops with fake-tensor
    kernels (``blockyard.kernels.ops``), so the estimate traces the path the run will take.
    """
    from blockyard.model import build_model

    with _fake_mode():
        # checkpointing off: we want each block's own saves
        model = build_model(model_cfg, vocab_size, kernels=kernels)
        model.train()
        tokens = torch.zeros(batch, seq_len, dtype=torch.long)
        parts, largest, block_input = saved_bytes_by_part(model, tokens)
    blocks = [v for k, v in parts.items() if k.startswith("block:")]
    if activation_checkpointing:
        outside = sum(v for k, v in parts.items() if not k.startswith("block:"))
        saved = outside + len(model_cfg.layer_mixers()) * block_input + max(blocks, default=0)
    else:
        saved = sum(parts.values())
    return ActivationEstimate(saved_bytes=int(saved), transient_bytes=int(2 * largest), parts=parts,
                              block_input_bytes=int(block_input))


def available_memory_bytes() -> int:
    """Memory the kernel says a new allocation can get without swapping (psutil ``available``)."""
    import psutil

    return int(psutil.virtual_memory().available)


def _gib(n: float) -> str:
    return f"{n / 2**30:.2f} GiB"


# Upper bound of the activation floats one token keeps per layer, per unit of width and of MLP
# expansion, for the cheap pre-check: the shipped mixers measure 25-35 floats per width unit per
# layer at expansion 3 (all parts included), so 64 x expansion leaves a 5x margin.
COARSE_FLOATS_PER_WIDTH = 64


def coarse_bound_bytes(cfg: Config, vocab_size: int) -> int:
    """A cheap, generous upper bound of the activation bytes (no model built, no torch import).

    Per token: ``depth x width x 64 x max(1, mlp_expansion)`` floats, plus the logits, their
    fp32 log-softmax and gradient (3 x vocab floats).
    """
    m = cfg.model
    per_token = m.depth * m.width * COARSE_FLOATS_PER_WIDTH * max(1.0, m.mlp_expansion) + 3 * vocab_size
    return int(4 * per_token * cfg.train.batch_size * cfg.data.seq_len)


def memory_warning(cfg: Config, vocab_size: int, available_bytes: int | None = None) -> str | None:
    """A one-paragraph warning when ``cfg``'s estimated activation memory exceeds available memory, else None.

    The warning gives the estimate and what would fit: the largest ``train.batch_size`` under the
    available memory, and the estimate with ``runtime.activation_checkpointing``. When even the
    coarse bound fits in half the available memory the precise estimate is skipped: it imports
    torch's symbolic-shape machinery, which costs the run ~80 MB of resident memory.
    """
    available = available_memory_bytes() if available_bytes is None else available_bytes
    if coarse_bound_bytes(cfg, vocab_size) < available // 2:
        return None
    batch, seq_len = cfg.train.batch_size, cfg.data.seq_len
    checkpointing = cfg.runtime.activation_checkpointing
    est = estimate_activation_memory(cfg.model, vocab_size, batch, seq_len, activation_checkpointing=checkpointing,
                                     kernels=cfg.runtime.kernels)
    if est.total_bytes <= available:
        return None
    per_sequence = est.total_bytes / batch  # activations are linear in the batch
    fits = int(available // per_sequence)
    hints = []
    if fits >= 1:
        hints.append(f"train.batch_size <= {fits} (with train.grad_accum to keep the tokens per step)")
    if not checkpointing:
        ckpt = estimate_activation_memory(cfg.model, vocab_size, batch, seq_len, activation_checkpointing=True,
                                          kernels=cfg.runtime.kernels)
        hints.append(f"runtime.activation_checkpointing: true (estimate {_gib(ckpt.total_bytes)})")
    if not hints:
        hints.append("a shorter data.seq_len or a smaller model")
    return (f"estimated activation memory {_gib(est.total_bytes)} for train.batch_size {batch} x data.seq_len "
            f"{seq_len} exceeds the {_gib(available)} of memory available; try " + " or ".join(hints))


def warn_if_too_large(cfg: Config, vocab_size: int, warn: Callable[[str], None],
                      available_bytes: int | None = None) -> str | None:
    """Trainer hook: pass :func:`memory_warning`'s message (if any) to ``warn``; return it.

    The estimate is advice: a mixer op without a fake-tensor kernel makes it say so in one line
    instead of stopping the run.
    """
    try:
        message = memory_warning(cfg, vocab_size, available_bytes)
    except (RuntimeError, NotImplementedError) as e:
        warn(f"could not estimate the activation memory ({e.__class__.__name__}: {str(e)[:200]})")
        return None
    if message is not None:
        warn(message)
    return message
