"""The LSTM mixer against a hand-written LSTM cell (Hochreiter & Schmidhuber 1997; forget gate of
Gers et al. 2000) using torch's parameters in torch's documented gate order (i, f, g, o)."""

from __future__ import annotations

import pytest
import torch

from blockyard.config import config_from_dict
from blockyard.errors import ConfigError
from blockyard.mixers import MIXERS
from blockyard.mixers.lstm import LSTMMixer, LSTMOptions

WIDTH = 8


def _mixer(width: int = WIDTH, **opts) -> LSTMMixer:
    torch.manual_seed(0)
    return MIXERS["lstm"](width, LSTMOptions(**opts), layer=0, depth=2)


def _cell_loop(m: LSTMMixer, x: torch.Tensor) -> torch.Tensor:
    """i, f, g, o = split(W_ih x_t + b_ih + W_hh h + b_hh) (torch.nn.LSTM docs);
    c_t = sigmoid(f) c_{t-1} + sigmoid(i) tanh(g); h_t = sigmoid(o) tanh(c_t); y = W_o h (float64)."""
    p = {k: v.detach().double() for k, v in m.named_parameters()}
    x = x.double()
    h = torch.zeros(x.shape[0], m.hidden, dtype=torch.float64)
    c = torch.zeros_like(h)
    ys = []
    for t in range(x.shape[1]):
        z = x[:, t] @ p["lstm.weight_ih_l0"].T + p["lstm.bias_ih_l0"]
        z = z + h @ p["lstm.weight_hh_l0"].T + p["lstm.bias_hh_l0"]
        i, f, g, o = z.chunk(4, dim=-1)
        c = torch.sigmoid(f) * c + torch.sigmoid(i) * torch.tanh(g)
        h = torch.sigmoid(o) * torch.tanh(c)
        ys.append(h)
    return torch.stack(ys, dim=1) @ p["proj_out.weight"].T


@pytest.mark.parametrize("hidden_mult", [1.0, 0.5, 1.5])
def test_forward_matches_hand_written_cell(hidden_mult):
    # Hochreiter & Schmidhuber 1997 / Gers et al. 2000 equations, torch's gate order (its nn.LSTM docs).
    m = _mixer(hidden_mult=hidden_mult)
    assert m.hidden == round(hidden_mult * WIDTH)
    x = torch.randn(2, 9, WIDTH)
    torch.testing.assert_close(m(x).double(), _cell_loop(m, x), atol=1e-5, rtol=1e-5)


# step == forward, causality, exact cost hooks: tests/test_mixers_contract.py (hidden_mult 1, 0.5, 2).


@pytest.mark.parametrize("hidden_mult", [0.5, 2.0])
def test_extra_flops_scale_with_the_hidden_size(hidden_mult):
    # The cell's elementwise work is per hidden unit (_CELL_FLOPS, blockyard/mixers/lstm.py).
    width = 12
    assert LSTMMixer.extra_flops_per_token(width, LSTMOptions(hidden_mult=hidden_mult), 64) == pytest.approx(
        hidden_mult * LSTMMixer.extra_flops_per_token(width, LSTMOptions(), 64))


def test_backbone_keeps_torch_lstm_init():
    # torch initialises LSTM weights uniform in +-1/sqrt(hidden) (nn.LSTM docs); the backbone's
    # normal(0, init_std) init touches nn.Linear only, while the output projection is marked residual_out.
    from blockyard.model import build_model

    cfg = config_from_dict({"model": {"width": 16, "depth": 1, "pattern": ["lstm"], "init_std": 1e-3}}).model
    mixer = build_model(cfg, vocab_size=32).blocks[0].mixer
    bound = 16**-0.5
    w = mixer.lstm.weight_hh_l0
    assert w.abs().max() <= bound and w.std() > 0.5 * bound / 3**0.5
    assert mixer.proj_out.residual_out


def test_hidden_mult_validated():
    # Config validation names the dotted key (project contract, blockyard.errors.ConfigError).
    mixers = {"l": {"kind": "lstm", "hidden_mult": 0.01}}
    with pytest.raises(ConfigError) as e:
        config_from_dict({"model": {"width": 8, "pattern": ["l"], "mixers": mixers}})
    assert e.value.path == "model.mixers.l.hidden_mult"
