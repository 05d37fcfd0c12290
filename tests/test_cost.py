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
from blockyard.text import binary_bytes

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
    assert "L=65536" in text and binary_bytes(cost.state_bytes(cfg, 65536)) in text
    assert f"training FLOPs/token at seq_len={cfg.data.seq_len} " in text and "n_ctx" not in text  # our key
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_blocks_bad_input_is_a_user_error(tmp_path, capsys):
    with pytest.raises(UserError, match="--plot"):
        cost.blocks_command([], [], plot=str(tmp_path / "x.png"))
    blocker = tmp_path / "file"
    blocker.write_text("")
    assert main(["blocks", PRESETS[0], "--plot", str(blocker / "x.png")]) == 2
    assert capsys.readouterr().err.startswith("error: --plot")
    assert main(["blocks", str(tmp_path / "missing.yaml")]) == 2


# ----------------------------------------------------------------------------- measured figures (plugins without hooks)


def _counted_by_op(kind: str, width: int, context: int) -> dict[str, float]:
    """torch's FlopCounterMode per op over one forward + backward, per token."""
    from blockyard.cost.measured import flop_counter
    from blockyard.mixers.contract import build_mixer

    mixer = build_mixer(MIXERS[kind], width, small([kind]).model.mixers[kind].options)
    x = torch.randn(1, context, width, requires_grad=True)
    with flop_counter() as counter:
        mixer(x).sum().backward()
    return {str(op): n / context for op, n in counter.get_flop_counts()["Global"].items()}


@pytest.mark.parametrize("width,context", [(32, 64), (64, 128)])
def test_flop_counter_agrees_with_the_analytic_attention_formulas(width, context):
    # torch.utils.flop_counter.FlopCounterMode, an outside count, against Kaplan et al. 2020's terms:
    # - projections: 6 x params exactly (2 FLOPs per multiply-add forward, twice that backward);
    # - scores and values: Kaplan et al. count 6 n_ctx d_attn, the causal average (half of the L x L
    #   products, x3 for training). The counter counts the full L x L square, 4 n_ctx d forward, and
    #   the attention backward as 5 products (the scores recomputed), 10 n_ctx d: 14 / 6 of Kaplan's
    #   term. Stated tolerance: 1% (the counts are exact; the margin is for a changed torch formula).
    by_op = _counted_by_op("global_attention", width, context)
    cls, opts = MIXERS["global_attention"], small(["global_attention"]).model.mixers["global_attention"].options
    dense = sum(n for op, n in by_op.items() if op in ("aten.mm", "aten.addmm", "aten.bmm"))
    attention = sum(n for op, n in by_op.items() if "attention" in op)
    assert dense == pytest.approx(6 * cls.param_count(width, opts), rel=0.01)
    assert attention == pytest.approx(14 / 6 * cls.extra_flops_per_token(width, opts, context), rel=0.01)


def test_measured_figures_of_a_plugin_match_its_own_formulas():
    # The example plugin gives param_count and state_bytes: the measured path must reproduce them.
    from conftest import LINEAR_ATTENTION

    from blockyard.cost import measured
    from blockyard.mixers.plugins import load_plugin

    (cls,) = load_plugin(LINEAR_ATTENTION)
    opts = cls.Options(heads=4)
    assert measured.counted_params(cls, 64, opts) == cls.param_count(64, opts)
    for context, batch in ((1, 1), (4096, 3)):
        assert measured.measured_state_bytes(cls, 64, opts, context, batch=batch) == cls.state_bytes(
            64, opts, context, batch=batch)
    assert measured.measured_hooks(cls) == ("extra_flops_per_token",)


def test_measured_state_bytes_extrapolate_a_growing_cache():
    # Global attention's KV cache grows by 2 x d x 4 bytes per token: measured from steps 1 and 2.
    from blockyard.cost import measured

    cls, opts = MIXERS["global_attention"], small(["global_attention"]).model.mixers["global_attention"].options
    for context in (1, 2, 1000):
        assert measured.measured_state_bytes(cls, 32, opts, context) == cls.state_bytes(32, opts, context)


def test_blocks_says_which_figures_were_measured(capsys):
    from conftest import LEAKY

    cfg = config_from_dict({"plugins": [str(LEAKY)], "model": {"width": 32, "pattern": ["leaky_linear_attention"]}})
    text = cost.describe_config(cfg, VOCAB)
    assert text.splitlines()[-1] == ("measured, not analytic (the plugin gives no formula; blockyard/cost/measured.py):"
                                     " leaky_linear_attention: param_count, extra_flops_per_token, state_bytes")
    assert cost.param_breakdown(cfg, VOCAB)["total"] == build_model(cfg.model, VOCAB).param_groups()["total"]
