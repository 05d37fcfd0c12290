"""Cost figures measured on a built mixer, for mixers that give no formula (plugins may leave hooks out).

``param_count``, ``extra_flops_per_token`` and ``state_bytes`` here answer with the mixer's own
analytic hook when it has one, else with a measurement:

- parameters: counted on a module built at that width;
- FLOPs: torch's own counter (``torch.utils.flop_counter.FlopCounterMode``) over one forward and
  backward of one sequence at the given context, divided by its tokens; the extra term is that
  minus 6 x params (the convention of ``blockyard/cost/analytic.py``), at least 0. The counter
  counts matrix products, convolutions and attention kernels, not elementwise work nor fused
  recurrent kernels (``nn.LSTM``); it counts the full L x L score matrix of causal attention
  (twice the causal-average term of Kaplan et al. 2020). Torch's CPU attention kernel is not in
  its registry, so it is mapped here to torch's own attention formulas;
- state bytes: the tensors of ``init_state`` after one ``step`` and after two; a state that grew
  between them is taken to grow by that much per token (a cache), else to stay constant.

Measurements are cached per (class, width, options, context) for the life of the process.
"""

from __future__ import annotations

from typing import Any

import torch
from torch.utils.flop_counter import FlopCounterMode, sdpa_backward_flop_count, sdpa_flop_count

from blockyard.mixers.base import COST_HOOKS, Mixer, gives_hook, state_nbytes

_CACHE: dict[tuple, Any] = {}
# Torch's CPU attention kernel, missing from the counter's registry: counted with the same
# formulas the registry uses for its GPU attention kernels.
def _cpu_attention_flops(query_shape: Any, key_shape: Any, value_shape: Any, *args: Any, **kwargs: Any) -> int:
    return sdpa_flop_count(query_shape, key_shape, value_shape)


def _cpu_attention_backward_flops(grad_out_shape: Any, query_shape: Any, key_shape: Any, value_shape: Any,
                                  *args: Any, **kwargs: Any) -> int:
    return sdpa_backward_flop_count(grad_out_shape, query_shape, key_shape, value_shape)


CPU_ATTENTION_FLOPS = {
    torch.ops.aten._scaled_dot_product_flash_attention_for_cpu: _cpu_attention_flops,
    torch.ops.aten._scaled_dot_product_flash_attention_for_cpu_backward: _cpu_attention_backward_flops,
}


def flop_counter() -> FlopCounterMode:
    """Torch's FLOP counter, with its CPU attention kernel counted."""
    return FlopCounterMode(display=False, custom_mapping=CPU_ATTENTION_FLOPS)


def _cached(key: tuple, compute: Any) -> Any:
    if key not in _CACHE:
        _CACHE[key] = compute()
    return _CACHE[key]


def _build(cls: type[Mixer], width: int, options: Any) -> Mixer:
    with torch.random.fork_rng():  # measuring must not move the caller's random stream
        torch.manual_seed(0)
        mixer = cls(width, options, layer=0, depth=1)
        mixer.reset_special_parameters()
    return mixer


def measured_hooks(cls: type[Mixer]) -> tuple[str, ...]:
    """The cost hooks ``cls`` does not give, whose figures are therefore measured."""
    return tuple(name for name in COST_HOOKS if not gives_hook(cls, name))


def counted_params(cls: type[Mixer], width: int, options: Any) -> int:
    return _cached(("params", cls, width, repr(options)),
                   lambda: sum(p.numel() for p in _build(cls, width, options).parameters()))


def counted_flops_per_token(cls: type[Mixer], width: int, options: Any, context: int) -> float:
    """FLOPs of one forward + backward over one sequence of ``context`` tokens, per token (torch's counter)."""

    def compute() -> float:
        mixer = _build(cls, width, options)
        x = torch.randn(1, context, width, generator=torch.Generator().manual_seed(0), requires_grad=True)
        with flop_counter() as counter:
            mixer(x).sum().backward()
        return counter.get_total_flops() / context

    return _cached(("flops", cls, width, repr(options), context), compute)


def measured_extra_flops_per_token(cls: type[Mixer], width: int, options: Any, context: int) -> float:
    """Counted training FLOPs per token beyond 6 x params (never below 0)."""
    return max(0.0, counted_flops_per_token(cls, width, options, context) - 6.0 * param_count(cls, width, options))


def measured_state_bytes(cls: type[Mixer], width: int, options: Any, context: int, *, batch: int = 1) -> int:
    """State bytes after ``context`` tokens, from the states after one and two steps (linear growth)."""

    def per_token() -> tuple[int, int]:
        mixer = _build(cls, width, options)
        x = torch.randn(batch, 2, width, generator=torch.Generator().manual_seed(0))
        with torch.no_grad():
            _, one = mixer.step(x[:, 0], mixer.init_state(batch))
            _, two = mixer.step(x[:, 1], one)
        return state_nbytes(one), state_nbytes(two) - state_nbytes(one)

    first, growth = _cached(("state", cls, width, repr(options), batch), per_token)
    return first + max(0, context - 1) * growth


# ----------------------------------------------------------------------------- the hooks, formula or measured


def param_count(cls: type[Mixer], width: int, options: Any) -> int:
    if gives_hook(cls, "param_count"):
        return int(cls.param_count(width, options))
    return counted_params(cls, width, options)


def extra_flops_per_token(cls: type[Mixer], width: int, options: Any, context: int) -> float:
    if gives_hook(cls, "extra_flops_per_token"):
        return float(cls.extra_flops_per_token(width, options, context))
    return measured_extra_flops_per_token(cls, width, options, context)


def state_bytes(cls: type[Mixer], width: int, options: Any, context: int, *, batch: int = 1) -> int:
    if gives_hook(cls, "state_bytes"):
        return int(cls.state_bytes(width, options, context, batch=batch))
    return measured_state_bytes(cls, width, options, context, batch=batch)
