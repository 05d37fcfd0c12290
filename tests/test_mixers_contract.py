"""The contract every registered mixer keeps (blockyard/mixers/base.py), checked over ``MIXERS``.

A mixer added to the registry is tested here without further work: causality, the step path
reproducing the full-sequence forward, finite gradients reaching every parameter, the analytic
parameter count and the analytic state size. The definitions are those of an autoregressive
model (output t is a function of inputs <= t; generation token by token computes the same
function): common practice, no source. A hook that raises NotImplementedError fails its test.
"""

from __future__ import annotations

import dataclasses

import pytest
import torch

from blockyard.config import MixerConfig, config_from_dict
from blockyard.mixers import MIXERS, state_nbytes
from blockyard.model import build_model

WIDTH = 32
SEQ_LEN = 40
BATCH = 2
SMALL_WINDOW = 16  # < SEQ_LEN, so local attention runs its blocked path (40 is not a multiple: padding)

CASES = [pytest.param(kind, {}, id=kind) for kind in sorted(MIXERS)]
if "local_attention" in MIXERS:
    CASES.append(pytest.param("local_attention", {"window": SMALL_WINDOW}, id=f"local_attention-window{SMALL_WINDOW}"))


def mixer_config(kind: str, options: dict, width: int = WIDTH) -> MixerConfig:
    """The validated config of ``kind``: a bare kind in the pattern gets that kind's option defaults."""
    if options:
        model = {"width": width, "depth": 1, "pattern": ["m"], "mixers": {"m": {"kind": kind, **options}}}
        return config_from_dict({"model": model}).model.mixers["m"]
    return config_from_dict({"model": {"width": width, "depth": 1, "pattern": [kind]}}).model.mixers[kind]


def build_mixer(kind: str, options: dict, width: int = WIDTH):
    torch.manual_seed(0)
    mixer = MIXERS[kind](width, mixer_config(kind, options, width).options, layer=0, depth=1)
    mixer.reset_special_parameters()
    return mixer


def inputs(seed: int = 1) -> torch.Tensor:
    return torch.randn(BATCH, SEQ_LEN, WIDTH, generator=torch.Generator().manual_seed(seed))


def run_steps(step_fn, init_state, xs: torch.Tensor):
    """Drive ``step_fn`` over ``xs`` along dim 1; returns the stacked outputs and every state."""
    state, outs, states = init_state, [], []
    for t in range(xs.shape[1]):
        y, state = step_fn(xs[:, t], state)
        outs.append(y)
        states.append(state)
    return torch.stack(outs, dim=1), states


# ----------------------------------------------------------------------------- each mixer alone


@pytest.mark.parametrize("kind,options", CASES)
def test_causal(kind, options):
    mixer = build_mixer(kind, options)
    x = inputs()
    with torch.no_grad():
        base = mixer(x)
        for t in (0, 7, SEQ_LEN // 2, SEQ_LEN - 1):
            x2 = x.clone()
            x2[:, t] += 3.0 * torch.randn(BATCH, WIDTH, generator=torch.Generator().manual_seed(t))
            y = mixer(x2)
            past = (y[:, :t] - base[:, :t]).abs().max().item() if t else 0.0
            assert past <= 1e-6, f"changing position {t} changed earlier outputs by {past:.2e}"
            assert (y[:, t:] - base[:, t:]).abs().max().item() > 1e-4, f"position {t} has no effect at all"


@pytest.mark.parametrize("kind,options", CASES)
def test_step_reproduces_forward(kind, options):
    mixer = build_mixer(kind, options)
    x = inputs()
    with torch.no_grad():
        full = mixer(x)
        stepped, states = run_steps(mixer.step, mixer.init_state(BATCH), x)
    assert full.abs().max().item() > 1e-4, "output is ~0: the comparison below would prove nothing"
    torch.testing.assert_close(stepped, full, atol=1e-5, rtol=0)
    state = states[-1]
    assert dataclasses.is_dataclass(state) and state.__dataclass_params__.frozen, "a step state is a frozen dataclass"


@pytest.mark.parametrize("kind,options", CASES)
def test_gradients_finite_and_reach_every_parameter(kind, options):
    mixer = build_mixer(kind, options)
    x = inputs().requires_grad_(True)
    weights = torch.randn(BATCH, SEQ_LEN, WIDTH, generator=torch.Generator().manual_seed(2))
    (mixer(x) * weights).sum().backward()
    assert torch.isfinite(x.grad).all() and x.grad.abs().sum() > 0
    for name, p in mixer.named_parameters():
        assert p.grad is not None, f"{name} gets no gradient (unused parameter?)"
        assert torch.isfinite(p.grad).all(), f"{name} has a non-finite gradient"
        assert p.grad.abs().sum() > 0, f"{name} has an all-zero gradient"


@pytest.mark.parametrize("width", [32, 64])
@pytest.mark.parametrize("kind,options", CASES)
def test_param_count_is_exact(kind, options, width):
    mixer = build_mixer(kind, options, width)
    counted = sum(p.numel() for p in mixer.parameters())
    assert MIXERS[kind].param_count(width, mixer.options) == counted


@pytest.mark.parametrize("kind,options", CASES)
def test_state_bytes_match_measured_state(kind, options):
    mixer = build_mixer(kind, options)  # fp32, the precision state_bytes is defined in
    x = inputs()
    with torch.no_grad():
        _, states = run_steps(mixer.step, mixer.init_state(BATCH), x)
    for length in (1, 5, SEQ_LEN):
        measured = state_nbytes(states[length - 1])
        analytic = MIXERS[kind].state_bytes(WIDTH, mixer.options, length, batch=BATCH)
        assert analytic == measured, f"after {length} tokens: formula {analytic} B, state holds {measured} B"


@pytest.mark.parametrize("kind,options", CASES)
def test_extra_flops_finite_and_never_fall_with_context(kind, options):
    # More context can never make a token cheaper to train on (common practice, no source).
    opts = mixer_config(kind, options).options
    flops = [MIXERS[kind].extra_flops_per_token(WIDTH, opts, n) for n in (1, 16, 256, 4096)]
    assert all(f >= 0 and f == f and f != float("inf") for f in flops)
    assert flops == sorted(flops)


# ----------------------------------------------------------------------------- a mixed model


def mixed_model():
    """Every registered kind in one model, plus local attention with a window below the sequence length."""
    pattern = [*sorted(MIXERS), "local_small"]
    model = {
        "width": WIDTH,
        "depth": len(pattern),
        "pattern": pattern,
        "mixers": {"local_small": {"kind": "local_attention", "window": 4}},
        "init_std": 0.2,  # larger than the default so that every block visibly moves the logits
    }
    cfg = config_from_dict({"model": model})
    torch.manual_seed(0)
    return build_model(cfg.model, vocab_size=61).eval()


def tokens(seed: int = 3) -> torch.Tensor:
    return torch.randint(0, 61, (BATCH, 30), generator=torch.Generator().manual_seed(seed))


def test_mixed_model_is_causal():
    model, tok = mixed_model(), tokens()
    with torch.no_grad():
        base = model(tok)
        for t in (0, 9, 29):
            tok2 = tok.clone()
            tok2[:, t] = (tok2[:, t] + 1) % 61
            logits = model(tok2)
            if t:
                assert (logits[:, :t] - base[:, :t]).abs().max().item() <= 1e-6
            assert (logits[:, t:] - base[:, t:]).abs().max().item() > 1e-4


def test_mixed_model_step_reproduces_forward():
    model, tok = mixed_model(), tokens()
    with torch.no_grad():
        full = model(tok)
        stepped, _ = run_steps(model.step, model.init_state(BATCH), tok)
    torch.testing.assert_close(stepped, full, atol=1e-5, rtol=0)
