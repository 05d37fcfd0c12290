"""An LSTM temporal mixer (Hochreiter & Schmidhuber 1997, with the forget gate of Gers et al. 2000).

    y = W_o LSTM(x),   LSTM = torch.nn.LSTM(D, hidden), one layer, hidden = round(hidden_mult * D)

The output projection W_o is always there, also when hidden == D: it is the mixer's residual
output (``residual_out``), which the backbone initialises small like every other mixer's, so an
LSTM block enters the residual stream on the same footing as the others. The LSTM keeps torch's
own init (the backbone's generic init touches only nn.Linear and nn.Embedding); under
``model.parametrization: mup`` its biases are drawn as at the base width.
"""

from __future__ import annotations

import dataclasses

import torch
from torch import nn

from blockyard.errors import ConfigError
from blockyard.mixers.base import Mixer, mark_residual_out, register_mixer
from blockyard.schema import opt

# Rough forward FLOPs per hidden unit and token beyond 6 x params (common practice, no source:
# ~4 per sigmoid, ~5 per tanh, 1 per mul/add): 3 sigmoids, 2 tanh, c = f c + i g (3), h = o tanh(c) (1).
_CELL_FLOPS = 3 * 4 + 2 * 5 + 3 + 1


@dataclasses.dataclass(frozen=True)
class LSTMOptions:
    hidden_mult: float = opt(1.0, "LSTM hidden size = round(hidden_mult * model.width)", min=0.0)

    def hidden(self, width: int) -> int:
        return round(self.hidden_mult * width)

    def check_width(self, path: str, width: int) -> None:
        if self.hidden(width) < 1:
            p = f"{path}." if path else ""
            raise ConfigError(f"{p}hidden_mult", f"{self.hidden_mult!r} x model width {width} rounds to 0 units")


@dataclasses.dataclass(frozen=True)
class LSTMState:
    """The step state: hidden and cell vectors after the last token."""

    h: torch.Tensor  # (B, hidden) float32
    c: torch.Tensor  # (B, hidden) float32


@register_mixer
class LSTMMixer(Mixer):
    """One torch LSTM layer followed by a linear map back to the model width."""

    kind = "lstm"
    summary = "single-layer LSTM (Hochreiter & Schmidhuber 1997) with an output projection"
    Options = LSTMOptions

    def __init__(self, width: int, options: LSTMOptions, *, layer: int, depth: int) -> None:
        super().__init__(width, options, layer=layer, depth=depth)
        options.check_width("", width)
        self.hidden = options.hidden(width)
        self.lstm = nn.LSTM(width, self.hidden, num_layers=1, batch_first=True)
        self.proj_out = nn.Linear(self.hidden, width, bias=False)
        mark_residual_out(self.proj_out)
        self.base_hidden: int | None = None

    def use_base_width(self, base_width: int) -> None:
        # torch draws the biases from +-hidden^-1/2, which shrinks with width; muP keeps vectors'
        # init width-free, so under mup they are drawn as at the base width (reset_special_parameters).
        self.base_hidden = self.options.hidden(base_width)

    def reset_special_parameters(self) -> None:
        if self.base_hidden is None or self.base_hidden == self.hidden:
            return
        bound = self.base_hidden**-0.5
        for name in ("bias_ih_l0", "bias_hh_l0"):
            nn.init.uniform_(self.lstm.get_parameter(name), -bound, bound)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y, _ = self.lstm(x)
        return self.proj_out(y)

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> LSTMState:
        zeros = torch.zeros(batch, self.hidden, device=device)
        return LSTMState(h=zeros, c=zeros.clone())

    def step(self, x_t: torch.Tensor, state: LSTMState) -> tuple[torch.Tensor, LSTMState]:
        # The same nn.LSTM on a length-1 sequence: the step path cannot drift from forward.
        hx = (state.h[None].to(x_t.dtype), state.c[None].to(x_t.dtype))
        y, (h, c) = self.lstm(x_t[:, None], hx)
        return self.proj_out(y[:, 0]), LSTMState(h=h[0].to(state.h.dtype), c=c[0].to(state.c.dtype))

    # ----- cost model hooks

    @classmethod
    def param_count(cls, width: int, options: LSTMOptions) -> int:
        hidden = options.hidden(width)
        # torch's LSTM: W_ih (4H, D), W_hh (4H, H) and two biases b_ih, b_hh (4H each); then W_o (D, H).
        return 4 * hidden * (width + hidden) + 8 * hidden + hidden * width

    @classmethod
    def extra_flops_per_token(cls, width: int, options: LSTMOptions, context: int) -> float:
        """The cell's elementwise nonlinearities and products, x 3 for forward + backward."""
        return 3.0 * _CELL_FLOPS * options.hidden(width)

    @classmethod
    def state_bytes(cls, width: int, options: LSTMOptions, context: int, *, batch: int = 1) -> int:
        """h and c in float32; constant in ``context``."""
        return batch * 2 * 4 * options.hidden(width)
