"""Batches: windows of ``seq_len + 1`` tokens cut from a flat token array, as (x, y) tensors.

Training windows start at uniformly random offsets drawn from a generator seeded by
(data seed, stream, step) through ``numpy.random.SeedSequence``: batch ``step`` is a pure
function of the seed and the step, so a resumed run sees the batches an uninterrupted one would,
and variants with the same data seed see the same data. Validation windows are fixed by the seed,
``seq_len`` and the number of windows: non-overlapping where the split is long enough.
"""

from __future__ import annotations

import numpy as np
import torch

IGNORE_INDEX = -100  # a label that carries no loss: torch.nn.functional.cross_entropy ignores it by default
TRAIN_STREAM = 1
VAL_STREAM = 2


def stream_rng(seed: int, stream: int, index: int = 0) -> np.random.Generator:
    """An independent PCG64 generator for (seed, stream, index)."""
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence([seed, stream, index])))


def train_window_starts(seed: int, step: int, batch_size: int, n_tokens: int, seq_len: int) -> np.ndarray:
    """Start offsets of the ``batch_size`` training windows of ``step`` (uniform, with replacement)."""
    span = n_tokens - seq_len  # number of valid starts of a (seq_len + 1)-token window
    if span < 1:
        raise ValueError(f"{n_tokens} tokens cannot hold a window of {seq_len + 1}")
    return stream_rng(seed, TRAIN_STREAM, step).integers(0, span, size=batch_size)


def val_window_starts(seed: int, n_windows: int, n_tokens: int, seq_len: int) -> np.ndarray:
    """Sorted start offsets of the fixed validation windows.

    If the split holds ``n_windows`` disjoint windows, pick that many of its disjoint slots at
    random (plus one random shift of the whole grid, so the leftover tail is not always unused);
    otherwise spread overlapping windows evenly over the split.
    """
    length = seq_len + 1
    if n_tokens < length:
        raise ValueError(f"{n_tokens} tokens cannot hold a window of {length}")
    slots = n_tokens // length
    if slots >= n_windows:
        rng = stream_rng(seed, VAL_STREAM)
        chosen = np.sort(rng.choice(slots, size=n_windows, replace=False))
        shift = int(rng.integers(0, n_tokens - slots * length + 1))
        return chosen * length + shift
    return np.linspace(0, n_tokens - length, n_windows).round().astype(np.int64)


def gather_windows(tokens: np.ndarray, starts: np.ndarray, seq_len: int) -> tuple[torch.Tensor, torch.Tensor]:
    """(x, y): ``x[i] = tokens[s_i : s_i + seq_len]``, ``y[i]`` the same shifted by one."""
    idx = np.asarray(starts, dtype=np.int64)[:, None] + np.arange(seq_len + 1, dtype=np.int64)
    windows = torch.from_numpy(np.asarray(tokens[idx], dtype=np.int64))
    return windows[:, :-1].contiguous(), windows[:, 1:].contiguous()


def val_windows(tokens: np.ndarray, seed: int, n_windows: int, seq_len: int,
                batch_size: int) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """The fixed validation windows of a split (``val_window_starts``) as batches of ``batch_size``.

    The trainer's val loss and ``blockyard eval`` at other lengths both read them here, so at the
    training ``seq_len`` the two measure the same windows.
    """
    x, y = gather_windows(tokens, val_window_starts(seed, n_windows, len(tokens), seq_len), seq_len)
    return chunked(x, y, batch_size)


def chunked(x: torch.Tensor, y: torch.Tensor, batch_size: int) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """Consecutive batches of ``batch_size`` rows (the last may be smaller)."""
    return [(x[i : i + batch_size], y[i : i + batch_size]) for i in range(0, x.shape[0], batch_size)]


def count_correct(logits: torch.Tensor, y: torch.Tensor) -> tuple[int, int]:
    """(positions whose argmax is the target, scored positions), over positions ``y != IGNORE_INDEX``."""
    mask = y != IGNORE_INDEX
    return int((logits.argmax(dim=-1)[mask] == y[mask]).sum()), int(mask.sum())
