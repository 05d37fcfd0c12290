"""The backbone (blockyard/model.py) and the preset configs (configs/*.yaml)."""

from __future__ import annotations

import math
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from blockyard.config import config_from_dict, load_config
from blockyard.mixers import MIXERS
from blockyard.model import build_model

CONFIGS = Path(__file__).resolve().parent.parent / "configs"
PRESETS = sorted(CONFIGS.glob("*.yaml"))
BYTE_VOCAB = 256  # blockyard.config: data.tokenizer "bytes" = UTF-8 bytes, vocab 256


def model_config(**model):
    return config_from_dict({"model": model}).model


def make(vocab: int = BYTE_VOCAB, seed: int = 0, **model):
    torch.manual_seed(seed)
    return build_model(model_config(**model), vocab)


def n_params(module: nn.Module) -> int:
    return sum(p.numel() for p in module.parameters())


# ----------------------------------------------------------------------------- parameter count


@pytest.mark.parametrize("width,depth", [(64, 2), (128, 3)])
def test_param_count_of_plain_transformer_is_12_L_d_squared_plus_embeddings_and_norms(width, depth):
    # Kaplan et al. 2020, section 2.1 / table 1: N = 2 d_model n_layer (2 d_attn + d_ff) = 12 n_layer d^2
    # for d_attn = d_model and d_ff = 4 d_model, without biases; embeddings and norms come on top.
    vocab = 97
    model = make(vocab, width=width, depth=depth, pattern=["global_attention"], mlp="plain", mlp_expansion=4)
    norms = (2 * depth + 1) * width  # one RMSNorm gain vector per mixer, per MLP, and the final norm
    assert n_params(model) == 12 * depth * width**2 + vocab * width + norms
    assert model.param_groups()["non_embedding"] == 12 * depth * width**2 + norms


# ----------------------------------------------------------------------------- initial loss


def fresh_loss(model: nn.Module, vocab: int) -> float:
    g = torch.Generator().manual_seed(7)
    tok = torch.randint(0, vocab, (8, 64), generator=g)
    targets = torch.randint(0, vocab, (8, 64), generator=g)
    with torch.no_grad():
        return F.cross_entropy(model(tok).flatten(0, 1), targets.flatten()).item()


@pytest.mark.parametrize("tie", [True, False], ids=["tied", "untied"])
@pytest.mark.parametrize("width", [64, 256])
def test_fresh_model_loss_is_near_log_vocab(width, tie):
    # A fresh model should predict close to uniformly: loss ~ ln(vocab) on random targets
    # (common practice, no source); an init that makes logits large shows up as a higher loss.
    model = make(width=width, depth=4, tie_embeddings=tie)
    assert abs(fresh_loss(model, BYTE_VOCAB) - math.log(BYTE_VOCAB)) < 0.1


# ----------------------------------------------------------------------------- untied head


def test_untied_head_is_a_separate_trained_matrix():
    vocab, width = 50, 32
    tied = make(vocab, width=width, depth=2)
    untied = make(vocab, width=width, depth=2, tie_embeddings=False)
    assert tied.head is None
    assert isinstance(untied.head, nn.Linear) and untied.head.weight.shape == (vocab, width)
    assert untied.head.weight.data_ptr() != untied.embed.weight.data_ptr()
    assert n_params(untied) == n_params(tied) + vocab * width
    assert untied.param_groups()["head"] == vocab * width

    tok = torch.randint(0, vocab, (2, 12))
    untied(tok).logsumexp(-1).sum().backward()
    assert untied.head.weight.grad is not None and untied.head.weight.grad.abs().sum() > 0
    # Changing the head changes the logits; in the tied model the embedding is the head.
    with torch.no_grad():
        before = untied(tok)
        untied.head.weight.mul_(2.0)
        assert not torch.allclose(untied(tok), before)


# ----------------------------------------------------------------------------- init scheme


def test_init_scales_residual_output_projections_by_inverse_sqrt_of_2_depth():
    # Radford et al. 2019 (technical report, section 2.3): residual-layer weights scaled by 1/sqrt(N), N = 2 * depth
    # residual branches here; everything else ~ N(0, init_std).
    depth, width, std = 6, 256, 0.02
    model = make(width=width, depth=depth, init_std=std)
    residual = [m for m in model.modules() if isinstance(m, nn.Linear) and getattr(m, "residual_out", False)]
    others = [m for m in model.modules() if isinstance(m, nn.Linear) and not getattr(m, "residual_out", False)]
    assert len(residual) == 2 * depth  # attention output + MLP output per block
    assert len(others) == 2 * depth  # attention qkv + MLP input per block
    for m in residual:
        assert m.weight.std().item() == pytest.approx(std / math.sqrt(2 * depth), rel=0.03)
        assert abs(m.weight.mean().item()) < 0.1 * std
    for m in others:
        assert m.weight.std().item() == pytest.approx(std, rel=0.03)
    assert model.embed.weight.std().item() == pytest.approx(std, rel=0.03)
    for m in model.modules():
        if isinstance(m, nn.RMSNorm):
            assert torch.equal(m.weight, torch.ones_like(m.weight))


# ----------------------------------------------------------------------------- activation checkpointing


def test_activation_checkpointing_gives_identical_outputs_and_gradients():
    pattern = [*sorted(MIXERS), "local_small"]
    cfg = model_config(
        width=32, depth=len(pattern), pattern=pattern, mixers={"local_small": {"kind": "local_attention", "window": 4}}
    )
    torch.manual_seed(0)
    plain = build_model(cfg, 61)
    torch.manual_seed(0)
    ckpt = build_model(cfg, 61, activation_checkpointing=True)
    ckpt.load_state_dict(plain.state_dict())

    calls = {"n": 0}

    def count(*_):
        calls["n"] += 1

    for block in ckpt.blocks:
        block.register_forward_pre_hook(count)  # pre: recomputation may stop early
    tok = torch.randint(0, 61, (2, 20), generator=torch.Generator().manual_seed(1))
    targets = torch.randint(0, 61, (2, 20), generator=torch.Generator().manual_seed(2))
    outs = []
    for model in (plain, ckpt):
        model.train()
        logits = model(tok)
        F.cross_entropy(logits.flatten(0, 1), targets.flatten()).backward()
        outs.append(logits.detach())
    # Recomputation really happened: each block ran once forward and once again in backward.
    assert calls["n"] == 2 * len(ckpt.blocks)
    torch.testing.assert_close(outs[1], outs[0], atol=0, rtol=0)
    for (name, p), q in zip(plain.named_parameters(), ckpt.parameters(), strict=True):
        torch.testing.assert_close(q.grad, p.grad, atol=1e-7, rtol=0, msg=f"gradient of {name} differs")


# ----------------------------------------------------------------------------- presets


def test_the_documented_presets_exist():
    names = {p.name for p in PRESETS}
    wanted = {"attention-global.yaml", "recurrence-only.yaml", "hybrid-2r1l.yaml", "hybrid-2r1l-nogate.yaml"}
    assert wanted <= names


@pytest.mark.parametrize("path", PRESETS, ids=[p.stem for p in PRESETS])
def test_preset_loads_and_builds_a_laptop_sized_model(path):
    cfg = load_config(path)
    assert cfg.name == path.stem
    assert cfg.data.tokenizer == "bytes" and cfg.data.corpus == "plays" and cfg.data.seq_len == 256
    model = build_model(cfg.model, BYTE_VOCAB)
    assert 1_000_000 <= n_params(model) <= 5_000_000, f"{n_params(model):,} parameters"
    # And it runs: one forward on a short window gives finite logits of the right shape.
    with torch.no_grad():
        logits = model(torch.randint(0, BYTE_VOCAB, (1, 16)))
    assert logits.shape == (1, 16, BYTE_VOCAB) and torch.isfinite(logits).all()


def test_nogate_preset_differs_from_its_parent_only_in_the_gate():
    parent = load_config(CONFIGS / "hybrid-2r1l.yaml")
    child = load_config(CONFIGS / "hybrid-2r1l-nogate.yaml")
    assert parent.model.mixers["recurrence"].options.gate is True
    assert child.model.mixers["recurrence"].options.gate is False
    assert child.model.pattern == parent.model.pattern == ("recurrence", "recurrence", "local_attention")
    assert child.model.mixers["local_attention"].options.window == 128
    assert child.data == parent.data and child.train == parent.train
