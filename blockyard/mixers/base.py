"""The interface every temporal mixer implements, and the registry decorator.

A mixer maps a sequence ``x: (B, T, D)`` to ``y: (B, T, D)`` causally (position t sees only
positions <= t). Besides the full-sequence ``forward`` it has a generation path
``step(x_t, state) -> (y_t, new_state)`` over an explicit, typed state object (a frozen
dataclass of tensors), created by ``init_state(batch)``. The step path never mutates a state
in place: it returns a new one.

The cost hooks (``param_count``, ``extra_flops_per_token``, ``state_bytes``) are analytic
formulas from the options alone; the contract (``blockyard/mixers/contract.py``) compares them
with counted parameters and measured state tensors. A mixer loaded from a user's plugin file may
leave them out: the cost model then measures them (``blockyard/cost/measured.py``).

Init convention (``residual_out``): the backbone initialises every ``nn.Linear`` weight of a
mixer ~ N(0, init_std), except the projections that write into the residual stream, which get
N(0, init_std / sqrt(2 * depth)) so that the stream's variance does not grow with depth
(Radford et al. 2019). A mixer declares those with :func:`mark_residual_out` (usually its one
output projection); the contract checks that at least one is declared.
"""

from __future__ import annotations

import dataclasses
from typing import Any, ClassVar

import torch
from torch import nn

MIXERS: dict[str, type[Mixer]] = {}
#: The attribute that marks a module as writing into the residual stream (see the module docstring).
RESIDUAL_OUT = "residual_out"
#: Module names of plugin files start with this (``blockyard/mixers/plugins.py``).
PLUGIN_MODULE_PREFIX = "blockyard_plugin_"
#: The cost hooks a mixer class may give (a plugin may leave any of them out).
COST_HOOKS = ("param_count", "extra_flops_per_token", "state_bytes")


def register_mixer(cls: type[Mixer]) -> type[Mixer]:
    """Class decorator: make ``cls`` available under ``cls.kind`` in config patterns."""
    if not getattr(cls, "kind", None):
        raise TypeError(f"{cls.__name__} needs a class attribute 'kind'")
    if not dataclasses.is_dataclass(getattr(cls, "Options", None)):
        raise TypeError(f"{cls.__name__}.Options must be a dataclass of its config keys")
    if hasattr(cls, "takes_scan_backend"):  # the name before runtime.kernels; silently ignored otherwise
        raise TypeError(f"{cls.__name__}.takes_scan_backend was renamed: write takes_kernels = True (the mixer then "
                        "gets kernels=, one of auto | compiled | torch | reference)")
    earlier = MIXERS.get(cls.kind)
    # A plugin's kind may be taken over by a later plugin (an edited file loaded again in the same
    # process); the plugin loader refuses two files of one config that define the same kind.
    if earlier is not None and earlier is not cls and not earlier.__module__.startswith(PLUGIN_MODULE_PREFIX):
        raise ValueError(f"mixer kind {cls.kind!r} is a built-in mixer; give the class another kind")
    MIXERS[cls.kind] = cls
    return cls


def mark_residual_out(module: nn.Module) -> nn.Module:
    """Declare ``module`` (a linear layer) as writing into the residual stream: its init is scaled down."""
    setattr(module, RESIDUAL_OUT, True)
    return module


def is_residual_out(module: nn.Module) -> bool:
    return bool(getattr(module, RESIDUAL_OUT, False))


def gives_hook(cls: type[Mixer], name: str) -> bool:
    """True when ``cls`` defines the cost hook ``name`` itself rather than inheriting the base's stub."""
    return getattr(cls, name).__func__ is not getattr(Mixer, name).__func__


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
