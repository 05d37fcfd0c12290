"""The cost model (blockyard/cost/analytic.py) against counted parameters, Kaplan et al.'s FLOPs and measured states."""

from __future__ import annotations

import glob
from pathlib import Path

import pytest
import torch

from blockyard.cli import main
from blockyard.config import config_from_dict, load_config
from blockyard.cost import analytic as cost
from blockyard.errors import UserError
from blockyard.mixers import MIXERS, state_nbytes
from blockyard.model import build_model

ROOT = Path(__file__).resolve().parents[1]
PRESETS = sorted(glob.glob(str(ROOT / "configs" / "*.yaml")))
VOCAB = 300  # any size works for counting; an odd one catches a hard-coded 256


def small(pattern, mixers=None, **model):
    return config_from_dict({
        "name": "t",
        "model": {"width": 32, "depth": len(pattern), "pattern": list(pattern), "mixers": mixers or {}, **model},
        "data": {"seq_len": 64},
    })


MIXED = {
    "rec": {"kind": "recurrence", "conv_width": 4},
    "rec_lti_complex": {"kind": "recurrence", "gate": False, "complex": True, "conv_width": 0, "width_mult": 1.5},
    "local": {"kind": "local_attention", "window": 8, "heads": 4, "kv_heads": 2},
    "mqa": {"kind": "global_attention", "heads": 4, "kv_heads": 1},
    "lstm": {"kind": "lstm", "hidden_mult": 0.75},
}

PATTERNS = [
    small(["rec", "rec", "local"], MIXED),
    small(["rec_lti_complex", "mqa", "lstm"], MIXED, mlp="plain", mlp_expansion=4.0, tie_embeddings=False),
    small(["local", "lstm", "rec", "mqa"], MIXED, mlp_expansion=0.0),
    *(small([kind]) for kind in sorted(MIXERS)),
]


@pytest.mark.parametrize("path", PRESETS, ids=[Path(p).stem for p in PRESETS])
def test_analytic_params_equal_counted_params_for_every_preset(path):
    assert PRESETS, "no presets found in configs/"
    cfg = load_config(path)
    counted = build_model(cfg.model, VOCAB).param_groups()
    assert cost.param_breakdown(cfg, VOCAB) == counted


@pytest.mark.parametrize("cfg", PATTERNS, ids=lambda c: "+".join(c.model.pattern))
def test_analytic_params_equal_counted_params_for_mixed_patterns(cfg):
    model = build_model(cfg.model, VOCAB)
    assert cost.param_breakdown(cfg, VOCAB) == model.param_groups()
    assert cost.param_breakdown(cfg, VOCAB)["total"] == sum(p.numel() for p in model.parameters())


def test_vocab_defaults_to_the_data_layer():
    cfg = small(["global_attention"])  # bytes tokenizer: 256 symbols (UTF-8 bytes)
    assert cost.param_breakdown(cfg)["embedding"] == 256 * 32


def test_flops_of_a_plain_transformer_equal_kaplan():
    # Kaplan et al. 2020, "Scaling Laws for Neural Language Models", table 1 and sec. 2.1:
    # N = 2 d_model n_layer (2 d_attn + d_ff), C_train = 6N + 6 n_layer n_ctx d_attn per token.
    d, n_layer, n_ctx = 128, 4, 512
    cfg = config_from_dict({
        "model": {"width": d, "depth": n_layer, "pattern": ["attn"], "mlp": "plain", "mlp_expansion": 4.0,
                  "mixers": {"attn": {"kind": "global_attention", "heads": 4}}},
        "data": {"seq_len": n_ctx},
    })
    d_attn, d_ff = d, 4 * d
    n = 2 * d * n_layer * (2 * d_attn + d_ff)
    kaplan = 6 * n + 6 * n_layer * n_ctx * d_attn
    assert cost.flops_per_token(cfg) == pytest.approx(kaplan, rel=0.01)
    breakdown = cost.flops_breakdown(cfg, VOCAB)
    assert breakdown["total"] == pytest.approx(cost.flops_per_token(cfg))
    assert breakdown["mixer_extra"] == 6 * n_layer * n_ctx * d_attn
    assert breakdown["head"] == 6 * d * VOCAB  # reported apart, not in the total (Kaplan exclude it)
    assert cost.flops_per_token(cfg, VOCAB, with_head=True) == pytest.approx(kaplan + 6 * d * VOCAB, rel=0.01)


def test_local_attention_flops_stop_growing_at_the_window():
    # Kaplan's n_ctx term counts the keys each query attends to; a window of W caps it at W
    # (Beltagy et al. 2020, arXiv:2004.05150, sec. 3: sliding window cost O(n w)).
    def flops(kind, seq_len):
        mixers = {"a": {"kind": kind, **({"window": 16} if kind == "local_attention" else {})}}
        cfg = config_from_dict({"model": {"width": 32, "depth": 2, "pattern": ["a"], "mixers": mixers},
                                "data": {"seq_len": seq_len}})
        return cost.flops_per_token(cfg)

    assert flops("local_attention", 16) == flops("global_attention", 16)
    assert flops("local_attention", 256) == flops("local_attention", 16)
    assert flops("global_attention", 256) - flops("global_attention", 16) == 6 * 2 * (256 - 16) * 32


def measured_state_bytes(cfg, context, batch):
    torch.manual_seed(0)
    model = build_model(cfg.model, VOCAB).eval()
    states = model.init_state(batch)
    with torch.no_grad():
        for t in range(context):
            _, states = model.step(torch.full((batch,), t % VOCAB), states)
    return state_nbytes(states)


@pytest.mark.parametrize("cfg", PATTERNS, ids=lambda c: "+".join(c.model.pattern))
@pytest.mark.parametrize("context", [0, 1, 7, 8, 13])
def test_predicted_state_bytes_equal_measured_step_states(cfg, context):
    # Contexts straddle the local window (8): below, at and past it.
    batch = 3
    assert cost.state_bytes(cfg, context, batch=batch) == measured_state_bytes(cfg, context, batch)


def test_kv_cache_bytes_follow_the_textbook_formula():
    # KV cache = 2 (K and V) x layers x L x kv_heads x head_dim x bytes per element (Pope et al.
    # 2022, "Efficiently Scaling Transformer Inference", sec. 2.1; MQA: Shazeer 2019 keeps one kv head).
    cfg = small(["mqa", "mqa"], MIXED)
    for L in (1, 100, 4096):
        assert cost.state_bytes(cfg, L, batch=5) == 2 * 2 * L * 1 * (32 // 4) * 4 * 5


def test_state_bytes_grow_linearly_saturate_or_stay_constant():
    glob_ = small(["global_attention"])
    local = small(["local"], MIXED)
    rec = small(["rec"], MIXED)
    assert cost.state_bytes(glob_, 4096) == 16 * cost.state_bytes(glob_, 256)
    assert cost.state_bytes(local, 4096) == cost.state_bytes(local, 8) > cost.state_bytes(local, 4)
    assert cost.state_bytes(rec, 65536) == cost.state_bytes(rec, 1) > 0


def test_blocks_without_config_lists_the_registry():
    text = cost.blocks_command([], [])
    for kind, cls in MIXERS.items():
        assert f"{kind}: {cls.summary}" in text
        for field in cls.Options.__dataclass_fields__:
            assert f"    {field} = " in text


def test_blocks_with_configs_prints_costs_and_plots(tmp_path):
    out = tmp_path / "plots" / "state.png"
    text = cost.blocks_command(PRESETS[:2], ["model.depth=3"], plot=str(out))
    cfg = load_config(PRESETS[0], ["model.depth=3"])
    assert f"{cost.param_breakdown(cfg)['total']:,d}" in text
    assert "L=65536" in text and cost.format_bytes(cost.state_bytes(cfg, 65536)) in text
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_blocks_bad_input_is_a_user_error(tmp_path, capsys):
    with pytest.raises(UserError, match="--plot"):
        cost.blocks_command([], [], plot=str(tmp_path / "x.png"))
    blocker = tmp_path / "file"
    blocker.write_text("")
    assert main(["blocks", PRESETS[0], "--plot", str(blocker / "x.png")]) == 2
    assert capsys.readouterr().err.startswith("error: --plot")
    assert main(["blocks", str(tmp_path / "missing.yaml")]) == 2


def test_format_helpers():
    assert cost.format_count(1234567) == "1.23M"
    assert cost.format_bytes(1536) == "1.5 KiB"
    assert cost.format_bytes(100) == "100 B"
