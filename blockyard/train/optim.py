"""AdamW with decay on matrices only, and the warmup + cosine learning-rate schedule.

AdamW: decoupled weight decay (Loshchilov & Hutter 2019, "Decoupled Weight Decay
Regularization"). Decay applies to weight matrices only; norm gains, biases and embeddings
are left undecayed unless ``train.decay_all`` (common practice, no source).

Per-layer learning rates: under ``model.parametrization: mup`` the model gives each parameter a
factor on the peak lr (``LanguageModel.lr_multipliers``, muP's Adam column of Yang et al. 2022);
parameters with the same factor share a group whose ``lr`` is ``train.lr x lr_scale``. Table 3
does not cover weight decay; torch's AdamW decays by lr x weight_decay x p, so here the decay
follows each group's lr (a choice, no source).

Schedule: linear warmup to the peak, then cosine decay to ``lr_floor * peak`` (cosine
annealing without restarts, Loshchilov & Hutter 2017, "SGDR").
"""

from __future__ import annotations

import math
from typing import Any

import torch
from torch import nn

from blockyard.config import TrainConfig


def lr_factor(step: int, warmup: int, total: int, floor: float) -> float:
    """Multiplier of the peak lr for optimizer update ``step`` (1-based, 1..total).

    Warmup: ``step / warmup`` for ``step <= warmup``. Then, with
    ``progress = (step - warmup) / (total - warmup)`` clamped to [0, 1]:
    ``floor + (1 - floor) * 0.5 * (1 + cos(pi * progress))`` (Loshchilov & Hutter 2017, eq. 5,
    with eta_min = floor and eta_max = 1), so the last update runs at exactly the floor.
    """
    if warmup > 0 and step <= warmup:
        return step / warmup
    span = total - warmup
    progress = 1.0 if span <= 0 else min(max((step - warmup) / span, 0.0), 1.0)
    return floor + (1.0 - floor) * 0.5 * (1.0 + math.cos(math.pi * progress))


def _embedding_param_ids(model: nn.Module) -> set[int]:
    return {id(p) for m in model.modules() if isinstance(m, nn.Embedding) for p in m.parameters(recurse=False)}


def param_groups(model: nn.Module, weight_decay: float, decay_all: bool = False) -> list[dict[str, Any]]:
    """AdamW parameter groups: ``decay`` (matrices, ndim >= 2, not embeddings) and ``no_decay``.

    With ``decay_all`` every parameter is in the ``decay`` group. Empty groups are dropped.
    Each group carries a ``group`` name key (kept by torch in the optimizer state). Parameters
    whose lr factor (``model.lr_multipliers()``, where the model has it) is not 1 go to groups
    ``decay x0.25`` etc. with an ``lr_scale`` key, after the unscaled ones, so that group 0 runs
    at the peak lr.
    """
    embeddings = _embedding_param_ids(model)
    lr_multipliers = getattr(model, "lr_multipliers", None)  # blockyard's models have it; a plain module not
    multipliers: dict[str, float] = lr_multipliers() if lr_multipliers is not None else {}
    buckets: dict[tuple[bool, float], list[nn.Parameter]] = {(True, 1.0): [], (False, 1.0): []}
    for name, p in model.named_parameters():
        if not p.requires_grad:
            continue
        is_matrix = p.ndim >= 2 and id(p) not in embeddings
        buckets.setdefault((decay_all or is_matrix, multipliers.get(name, 1.0)), []).append(p)
    groups = []
    for (decay, scale), params in sorted(buckets.items(), key=lambda kv: (kv[0][1] != 1.0, not kv[0][0], kv[0][1])):
        group: dict[str, Any] = {"group": "decay" if decay else "no_decay", "params": params,
                 "weight_decay": weight_decay if decay else 0.0}
        if scale != 1.0:
            group["group"] += f" x{scale:.4g}"
            group["lr_scale"] = scale
        groups.append(group)
    return [g for g in groups if g["params"]]


def build_optimizer(model: nn.Module, cfg: TrainConfig) -> torch.optim.AdamW:
    """``torch.optim.AdamW`` over :func:`param_groups` with the config's lr (times each ``lr_scale``) and betas."""
    groups = param_groups(model, cfg.weight_decay, cfg.decay_all)
    for group in groups:
        if "lr_scale" in group:
            group["lr"] = cfg.lr * group["lr_scale"]
    return torch.optim.AdamW(groups, lr=cfg.lr, betas=(cfg.beta1, cfg.beta2))


def build_scheduler(
    optimizer: torch.optim.Optimizer, cfg: TrainConfig, total: int
) -> torch.optim.lr_scheduler.LambdaLR:
    """LambdaLR whose i-th value (i = updates done so far) is ``lr_factor(i + 1, ...)``.

    The offset makes update ``s`` (1-based) run at ``lr_factor(s)``: the first update already
    moves (1 / warmup of the peak) and update ``warmup`` runs at the peak.
    """

    def factor(done: int) -> float:
        return lr_factor(done + 1, cfg.warmup_steps, total, cfg.lr_floor)

    return torch.optim.lr_scheduler.LambdaLR(optimizer, factor)


def total_steps(cfg: TrainConfig, seq_len: int) -> int:
    """``train.steps``, or ``ceil(train.tokens / tokens per step)`` when a token budget is set."""
    if cfg.tokens > 0:
        return max(1, math.ceil(cfg.tokens / tokens_per_step(cfg, seq_len)))
    return cfg.steps


def tokens_per_step(cfg: TrainConfig, seq_len: int) -> int:
    """Input tokens one optimizer step consumes: batch_size * grad_accum * seq_len."""
    return cfg.batch_size * cfg.grad_accum * seq_len
