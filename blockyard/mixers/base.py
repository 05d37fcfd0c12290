"""The interface every temporal mixer implements, and the registry decorator.

A mixer maps a sequence ``x: (B, T, D)`` to ``y: (B, T, D)`` causally (position t sees only
positions <= t). Besides the full-sequence ``forward`` it has a generation path
``step(x_t, state) -> (y_t, new_state)`` over an explicit, typed state object (a frozen
dataclass of tensors), created by ``init_state(batch)``. The step path never mutates a state
in place: it returns a new one.

The cost hooks (``param_count``, ``extra_flops_per_token``, ``state_bytes``) are analytic
formulas from the options alone; tests compare them with counted parameters and measured
state tensors.
"""

from __future__ import annotations

import dataclasses
from typing import Any, ClassVar

import torch
from torch import nn

MIXERS: dict[str, type[Mixer]] = {}


def register_mixer(cls: type[Mixer]) -> type[Mixer]:
    """Class decorator: make ``cls`` available under ``cls.kind`` in config patterns."""
    if not getattr(cls, "kind", None):
        raise TypeError(f"{cls.__name__} needs a class attribute 'kind'")
    if not dataclasses.is_dataclass(getattr(cls, "Options", None)):
        raise TypeError(f"{cls.__name__}.Options must be a dataclass of its config keys")
    if cls.kind in MIXERS and MIXERS[cls.kind] is not cls:
        raise ValueError(f"mixer kind {cls.kind!r} registered twice")
    MIXERS[cls.kind] = cls
    return cls


def state_nbytes(state: Any) -> int:
    """Bytes held by the tensors of a step state (a dataclass, tuple or list of tensors)."""
    if isinstance(state, torch.Tensor):
        return state.numel() * state.element_size()
    if dataclasses.is_dataclass(state) and not isinstance(state, type):
        return sum(state_nbytes(getattr(state, f.name)) for f in dataclasses.fields(state))
    if isinstance(state, (tuple, list)):
        return sum(state_nbytes(s) for s in state)
    if isinstance(state, dict):
        return sum(state_nbytes(s) for s in state.values())
    return 0


class Mixer(nn.Module):
    """Base class of temporal mixers; subclasses set ``kind``, ``Options`` and ``summary``."""

    kind: ClassVar[str] = ""
    summary: ClassVar[str] = ""
    Options: ClassVar[type] = type(None)

    def __init__(self, width: int, options: Any, *, layer: int, depth: int) -> None:
        super().__init__()
        self.width = width
        self.options = options
        self.layer = layer
        self.depth = depth

    def forward(self, x: torch.Tensor) -> torch.Tensor:  # (B, T, D) -> (B, T, D)
        raise NotImplementedError

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> Any:
        """The state before the first token, for ``batch`` sequences."""
        raise NotImplementedError

    def step(self, x_t: torch.Tensor, state: Any) -> tuple[torch.Tensor, Any]:
        """One token: ``x_t: (B, D)`` and the state after t-1 tokens -> ``(y_t, state after t)``."""
        raise NotImplementedError

    def reset_special_parameters(self) -> None:
        """Re-initialise parameters whose init is not the backbone's normal(0, std) (e.g. decays).

        Called by the model builder after the generic init; the default does nothing.
        """

    def use_base_width(self, base_width: int) -> None:
        """muP (``model.parametrization: mup``): set forward multipliers relative to ``base_width``.

        Parameter init and lrs are scaled by the backbone (blockyard/parametrization.py); this hook
        is for multipliers inside the mixer's math. Called once, before init; the default has none.
        """

    # ----- cost model hooks (analytic; no module needed) -----
    @classmethod
    def param_count(cls, width: int, options: Any) -> int:
        """Number of parameters of one such mixer at model width ``width``."""
        raise NotImplementedError

    @classmethod
    def extra_flops_per_token(cls, width: int, options: Any, context: int) -> float:
        """Training FLOPs per token (forward + backward) not counted by 6 x params.

        For attention this is the score/value term 6 * n_ctx * d_attn of Kaplan et al. 2020
        (n_ctx capped by the window for local attention); for recurrences the elementwise scan.
        """
        raise NotImplementedError

    @classmethod
    def state_bytes(cls, width: int, options: Any, context: int, *, batch: int = 1) -> int:
        """Bytes of the generation state after ``context`` tokens (what ``step`` carries)."""
        raise NotImplementedError
