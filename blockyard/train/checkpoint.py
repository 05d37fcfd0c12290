"""Checkpoints: everything a resumed run needs to continue exactly where the saved one stopped.

A checkpoint holds model, optimizer and scheduler state, the torch / numpy / python RNG states,
the data position (the step: batches are a pure function of seed and step) and the loop's own
state (first loss, best val loss, time spent). Files are ``checkpoints/step_<N>.pt``, written
atomically; the last ``train.keep_checkpoints`` are kept. Each file's sha256 goes into
``checkpoints/sha256.json`` (``blockyard.integrity``) before the file takes its name, and a resume
checks it before loading. A checkpoint that is damaged (its bytes differ from the recorded ones) or
cannot be read is moved to ``checkpoints/damaged/`` (kept for inspection, never deleted) and the
previous one used; one from before checksums ("unverifiable") is used with a note.
"""

from __future__ import annotations

import io
import random
import re
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from blockyard import fs, integrity

FORMAT = 1
_NAME = re.compile(r"^step_(\d+)\.pt$")
_REQUIRED = ("format", "step", "config_hash", "model", "optimizer", "scheduler", "rng", "loop")


def checkpoint_path(folder: Path, step: int) -> Path:
    return Path(folder) / f"step_{step:07d}.pt"


def list_checkpoints(folder: Path) -> list[tuple[int, Path]]:
    """(step, path) of the checkpoint files in ``folder``, oldest first."""
    if not Path(folder).is_dir():
        return []
    found = []
    for path in Path(folder).iterdir():
        m = _NAME.match(path.name)
        if m:
            found.append((int(m.group(1)), path))
    return sorted(found)


# ----------------------------------------------------------------------------- RNG states


def rng_state() -> dict[str, Any]:
    """torch, numpy and python RNG states as tensors and plain values (loadable with weights_only)."""
    np_state = np.random.get_state(legacy=False)
    state = {
        "torch": torch.get_rng_state(),
        "numpy": {
            "bit_generator": np_state["bit_generator"],
            "key": torch.from_numpy(np_state["state"]["key"].astype(np.int64)),
            "pos": int(np_state["state"]["pos"]),
            "has_gauss": int(np_state["has_gauss"]),
            "gauss": float(np_state["gauss"]),
        },
        "python": random.getstate(),
    }
    if torch.cuda.is_available() and torch.cuda.is_initialized():
        state["cuda"] = torch.cuda.get_rng_state_all()
    return state


def set_rng_state(state: dict[str, Any]) -> None:
    torch.set_rng_state(state["torch"])
    n = state["numpy"]
    np.random.set_state({
        "bit_generator": n["bit_generator"],
        "state": {"key": n["key"].numpy().astype(np.uint32), "pos": n["pos"]},
        "has_gauss": n["has_gauss"],
        "gauss": n["gauss"],
    })
    random.setstate(_as_python_state(state["python"]))
    if "cuda" in state and torch.cuda.is_available():
        torch.cuda.set_rng_state_all(state["cuda"])


def _as_python_state(value: Any) -> Any:
    # random.setstate wants tuples; a round trip through some loaders turns them into lists.
    if isinstance(value, list):
        return tuple(_as_python_state(v) for v in value)
    if isinstance(value, tuple):
        return tuple(_as_python_state(v) for v in value)
    return value


# ----------------------------------------------------------------------------- save / load


@dataclass
class Checkpoint:
    """A loaded checkpoint: ``step`` and the raw state dict (see :func:`save_checkpoint`)."""

    step: int
    path: Path
    state: dict[str, Any]


def save_checkpoint(
    folder: Path,
    *,
    step: int,
    config_hash: str,
    model: torch.nn.Module,
    optimizer: torch.optim.Optimizer,
    scheduler: Any,
    loop: dict[str, Any],
    keep: int,
    averaged: dict[str, Any] | None = None,
) -> Path:
    """Write ``step_<step>.pt`` atomically, then delete all but the newest ``keep`` checkpoints."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    state = {
        "format": FORMAT,
        "step": step,
        "config_hash": config_hash,
        "model": model.state_dict(),
        "optimizer": optimizer.state_dict(),
        "scheduler": scheduler.state_dict(),
        "rng": rng_state(),
        "loop": dict(loop),
        **({"averaged": averaged} if averaged is not None else {}),
    }
    path = checkpoint_path(folder, step)
    write_recorded(path, state, what=f"the checkpoint of step {step}")
    old = [p for _old_step, p in list_checkpoints(folder)[:-keep]]
    for p in old:
        p.unlink(missing_ok=True)
    if old:  # an entry left by a kill before this write names a file that is gone: harmless
        integrity.record(folder, drop=[p.name for p in old])
    return path


def write_recorded(path: Path, state: dict[str, Any], what: str) -> None:
    """``torch.save(state)`` to ``path`` atomically, its sha256 taken from the bytes as they are written
    and recorded in the folder's manifest before the file takes its name."""
    hashing: list[integrity.HashingWriter] = []

    def write(f: Any) -> None:
        hashing.append(integrity.HashingWriter(f))
        # torch.save calls only write() and flush() on a file object; its stub asks for a whole IO[bytes]
        torch.save(state, hashing[-1])  # type: ignore[arg-type]

    fs.atomic_write(path, write, what=what, needed_bytes=tensor_bytes(state),
                    before_replace=lambda: integrity.record(path.parent, {path.name: hashing[-1].entry()}))


def tensor_bytes(tree: Any) -> int:
    """Bytes of the tensors in a nested dict / list (what dominates a checkpoint file's size)."""
    if isinstance(tree, torch.Tensor):
        return tree.numel() * tree.element_size()
    if isinstance(tree, dict):
        return sum(tensor_bytes(v) for v in tree.values())
    if isinstance(tree, (list, tuple)):
        return sum(tensor_bytes(v) for v in tree)
    return 0


def estimate_checkpoint_bytes(model: torch.nn.Module, optimizer_slots: int = 2) -> int:
    """A checkpoint's size before training: the weights plus ``optimizer_slots`` same-sized optimizer
    states (AdamW keeps two moments per parameter) plus the buffers."""
    params = sum(p.numel() * p.element_size() for p in model.parameters())
    buffers = sum(b.numel() * b.element_size() for b in model.buffers())
    return (1 + optimizer_slots) * params + buffers


def read_checkpoint(path: Path, config_hash: str, note: Any = None) -> Checkpoint:
    """Verify, load and sanity-check one checkpoint; raises ValueError saying what is wrong with it.

    The bytes are read once: hashed against the folder's manifest, then unpickled from memory.
    ``note`` hears that a checkpoint from before checksums could not be verified.
    """
    try:
        data = Path(path).read_bytes()
    except OSError as e:
        raise ValueError(f"unreadable ({e.strerror or e.__class__.__name__})") from None
    verdict = integrity.check_bytes(path, data)
    if verdict.status == integrity.DAMAGED:
        raise ValueError(f"damaged ({verdict.why})")
    if verdict.status == integrity.UNVERIFIABLE and note is not None:
        note(f"checkpoint {path} was written before checksums: it loads unverified")
    try:
        state = torch.load(io.BytesIO(data), map_location="cpu", weights_only=True)
    except Exception as e:  # torch raises several types for truncated or garbled files
        raise ValueError(f"unreadable ({e.__class__.__name__}: {str(e).splitlines()[0] if str(e) else ''})") from e
    if not isinstance(state, dict) or any(k not in state for k in _REQUIRED):
        raise ValueError("not a blockyard checkpoint (keys missing)")
    if state["format"] != FORMAT:
        raise ValueError(f"checkpoint format {state['format']} (this blockyard reads {FORMAT})")
    if state["config_hash"] != config_hash:
        raise ValueError(f"written for config {state['config_hash']}, not {config_hash}")
    m = _NAME.match(Path(path).name)
    if m and int(m.group(1)) != state["step"]:
        raise ValueError(f"holds step {state['step']}, its name says {m.group(1)}")
    return Checkpoint(step=int(state["step"]), path=Path(path), state=state)


def latest_valid_checkpoint(folder: Path, config_hash: str, warn: Any = None, note: Any = None
                            ) -> Checkpoint | None:
    """The newest checkpoint in ``folder`` that verifies and reads; newer ones that do not are moved to
    ``folder/damaged/``, each with a one-line warning naming it."""
    for _step, path in reversed(list_checkpoints(folder)):
        try:
            return read_checkpoint(path, config_hash, note=note)
        except ValueError as e:
            bad = integrity.move_aside(path)
            (warn or _stderr_warning)(f"checkpoint {path} is {e}; moved to {bad.parent.name}/{bad.name}, "
                                      "trying the previous one")
    return None


def damaged_checkpoints(folder: Path) -> list[Path]:
    """Checkpoints an earlier resume moved aside (``folder/damaged/``)."""
    return sorted((Path(folder) / integrity.DAMAGED_DIR).glob("step_*.pt*"))


def _stderr_warning(message: str) -> None:
    print(f"warning: {message}", file=sys.stderr)


def restore(ckpt: Checkpoint, model: torch.nn.Module, optimizer: torch.optim.Optimizer, scheduler: Any) -> dict:
    """Load model, optimizer, scheduler and RNG states; returns the loop state."""
    model.load_state_dict(ckpt.state["model"])
    optimizer.load_state_dict(ckpt.state["optimizer"])
    scheduler.load_state_dict(ckpt.state["scheduler"])
    set_rng_state(ckpt.state["rng"])
    return dict(ckpt.state["loop"])
