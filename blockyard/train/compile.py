"""``runtime.compile``: the model's forward (and so its backward) through ``torch.compile`` for training.

The compiled function replaces the ``forward`` of the model *instance*, so the module itself is
unchanged: its state dict keys are the eager model's (no ``_orig_mod.`` prefix), checkpoints load
into an uncompiled model, and ``model.step`` (decoding) stays eager. Compilation is lazy in torch,
so a failure (no C++ compiler, an op the compiler cannot trace) would surface at the first train
step; instead one trial forward + backward on a real batch runs here, before the run dir is
touched, and on failure the eager forward is restored and the reason returned for a warning and
for env.json. The trial is also the compiler's warm-up (tens of seconds), kept out of the loop's clock.
"""

from __future__ import annotations

import time
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from blockyard.data.batches import IGNORE_INDEX
from blockyard.train.runtime import Runtime


def compile_for_training(model: nn.Module, runtime: Runtime,
                         batch: tuple[torch.Tensor, torch.Tensor]) -> dict[str, Any]:
    """Compile ``model``'s forward in place when ``runtime.compile``; what happened, for env.json.

    Returns ``{"requested", "active", "warmup_s"}``, and ``"reason"`` where compilation failed
    (then the model runs eagerly). Leaves parameters, gradients (None) and RNG states as found.
    """
    if not runtime.compile:
        return {"requested": False, "active": False}
    model.forward = torch.compile(model.forward)
    start = time.perf_counter()
    try:
        with torch.random.fork_rng(devices=[]):
            _trial_step(model, runtime, batch)
    except Exception as e:  # noqa: BLE001 - any compiler failure means: train eagerly, and say why
        del model.forward  # the class's eager forward again
        reason = " ".join(f"{e.__class__.__name__}: {e}".split())[:300]
        return {"requested": True, "active": False, "reason": reason}
    finally:
        model.zero_grad(set_to_none=True)
    return {"requested": True, "active": True, "warmup_s": round(time.perf_counter() - start, 2)}


def _trial_step(model: nn.Module, runtime: Runtime, batch: tuple[torch.Tensor, torch.Tensor]) -> None:
    """Forward and backward as the train step runs them (autocast, fp32 loss), so both graphs compile now."""
    x, y = (t.to(runtime.device) for t in batch)
    with runtime.autocast():
        logits = model(x)
    loss = F.cross_entropy(logits.float().flatten(0, -2), y.flatten(), ignore_index=IGNORE_INDEX, reduction="sum")
    with runtime.numerics():
        loss.backward()


def compile_warning(facts: dict[str, Any]) -> str | None:
    """The warning to show when ``runtime.compile`` was requested but the model runs eagerly."""
    if facts.get("requested") and not facts.get("active"):
        return f"runtime.compile: torch.compile failed, training eagerly ({facts.get('reason')})"
    return None
