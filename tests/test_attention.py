"""Attention mixers against references written here and against torch's SDPA with explicit masks."""

from __future__ import annotations

import math

import pytest
import torch
import torch.nn.functional as F
from conftest import make_mixer
from torch.profiler import ProfilerActivity, profile

from blockyard.mixers import MIXERS
from blockyard.mixers.attention import sliding_window_attention
from blockyard.mixers.rope import apply_rope

WIDTH = 32


def build(kind: str, width: int = WIDTH, **options):
    """A mixer with its option defaults filled in by the config system (as a model would get it)."""
    return make_mixer(kind, width, **options)


# ----------------------------------------------------------------------------- references


def rope_complex(x: torch.Tensor, positions: torch.Tensor, base: float = 10000.0) -> torch.Tensor:
    """RoPE as complex multiplication (x_2i + i x_2i+1) * exp(i m theta_i), Su et al. 2021, section 3.2.2."""
    d = x.shape[-1]
    theta = base ** (-torch.arange(0, d, 2, dtype=torch.float64) / d)
    z = torch.view_as_complex(x.double().unflatten(-1, (d // 2, 2)).contiguous())
    rot = torch.polar(torch.ones_like(theta), positions.double()[:, None] * theta[None, :])
    return torch.view_as_real(z * rot).flatten(-2).to(x.dtype)


def allowed_mask(seq_len: int, window: int | None) -> torch.Tensor:
    """allowed[t, s]: causal (s <= t), and within the window (t - s < W) when one is given."""
    t = torch.arange(seq_len)[:, None]
    s = torch.arange(seq_len)[None, :]
    ok = s <= t
    return ok & (t - s < window) if window is not None else ok


def naive_attention(q, k, v, allowed):
    """softmax(q k^T / sqrt(d), masked) v head by head (Vaswani et al. 2017, eq. 1).

    Query head h reads kv head h // (H / Hkv): consecutive query heads share a kv head
    (Ainslie et al. 2023, GQA; Hkv = 1 is MQA, Shazeer 2019).
    """
    heads, kv_heads, d = q.shape[1], k.shape[1], q.shape[-1]
    outs = []
    for h in range(heads):
        g = h // (heads // kv_heads)
        scores = q[:, h] @ k[:, g].transpose(-1, -2) / math.sqrt(d)
        scores = scores.masked_fill(~allowed, float("-inf"))
        outs.append(scores.softmax(-1) @ v[:, g])
    return torch.stack(outs, dim=1)


def reference_forward(mixer, x, window, attention):
    """The mixer's output recomputed from its weights with the reference RoPE and ``attention``."""
    B, T, _ = x.shape
    H, Hkv, d = mixer.heads, mixer.kv_heads, mixer.head_dim
    q, k, v = (x @ mixer.qkv.weight.T).split((H * d, Hkv * d, Hkv * d), dim=-1)
    q, k, v = (t.reshape(B, T, -1, d).transpose(1, 2) for t in (q, k, v))
    if mixer.options.rope:
        pos = torch.arange(T)
        base = mixer.options.rope_base
        q, k = rope_complex(q, pos, base), rope_complex(k, pos, base)
    y = attention(q, k, v, allowed_mask(T, window))
    return y.transpose(1, 2).reshape(B, T, H * d) @ mixer.out.weight.T


def sdpa_explicit_mask(q, k, v, allowed):
    """torch's SDPA with the boolean mask spelled out, kv heads expanded by the same grouping."""
    g = q.shape[1] // k.shape[1]
    return F.scaled_dot_product_attention(q, k.repeat_interleave(g, 1), v.repeat_interleave(g, 1), attn_mask=allowed)


HEAD_LAYOUTS = [pytest.param(4, 0, id="mha"), pytest.param(4, 2, id="gqa"), pytest.param(4, 1, id="mqa")]
KINDS = [
    pytest.param("global_attention", {}, None, 23, id="global"),
    pytest.param("local_attention", {"window": 5}, 5, 23, id="local-w5-padded"),
    pytest.param("local_attention", {"window": 8}, 8, 24, id="local-w8-exact-blocks"),
    pytest.param("local_attention", {"window": 1}, 1, 7, id="local-w1"),
]


# ----------------------------------------------------------------------------- forward vs references


@pytest.mark.parametrize("rope", [True, False], ids=["rope", "norope"])
@pytest.mark.parametrize("heads,kv_heads", HEAD_LAYOUTS)
@pytest.mark.parametrize("kind,extra,window,seq_len", KINDS)
def test_forward_matches_naive_and_sdpa_references(kind, extra, window, seq_len, heads, kv_heads, rope):
    mixer = build(kind, heads=heads, kv_heads=kv_heads, rope=rope, **extra)
    x = torch.randn(2, seq_len, WIDTH, generator=torch.Generator().manual_seed(1))
    with torch.no_grad():
        got = mixer(x)
        # Reference 1: masked softmax written out (Vaswani et al. 2017, eq. 1) + RoPE as complex rotation.
        naive = reference_forward(mixer, x, window, naive_attention)
        # Reference 2: torch SDPA with an explicit boolean mask (torch docs, scaled_dot_product_attention).
        sdpa = reference_forward(mixer, x, window, sdpa_explicit_mask)
    torch.testing.assert_close(got, naive, atol=1e-5, rtol=0)
    torch.testing.assert_close(got, sdpa, atol=1e-5, rtol=0)


@pytest.mark.parametrize("kind,extra", [("global_attention", {}), ("local_attention", {"window": 4})])
def test_rope_base_option_is_used(kind, extra):
    mixer = build(kind, rope_base=50.0, **extra)
    x = torch.randn(1, 11, WIDTH, generator=torch.Generator().manual_seed(8))
    with torch.no_grad():
        got = mixer(x)
        torch.testing.assert_close(
            got, reference_forward(mixer, x, extra.get("window"), naive_attention), atol=1e-5, rtol=0
        )
        default = build(kind, **extra)
        default.load_state_dict(mixer.state_dict())
        assert (default(x) - got).abs().max() > 1e-3  # the base changes the result


@pytest.mark.parametrize("heads,kv_heads", HEAD_LAYOUTS)
def test_local_with_window_at_least_seq_len_equals_global(heads, kv_heads):
    # Definition: a window covering the whole sequence is plain causal attention.
    glob = build("global_attention", heads=heads, kv_heads=kv_heads)
    x = torch.randn(2, 16, WIDTH, generator=torch.Generator().manual_seed(2))
    for window in (16, 40):
        local = build("local_attention", heads=heads, kv_heads=kv_heads, window=window)
        local.load_state_dict(glob.state_dict())
        with torch.no_grad():
            torch.testing.assert_close(local(x), glob(x), atol=1e-6, rtol=0)


def test_sliding_window_function_matches_mask_reference_for_every_window():
    # Blocked band vs the explicit (T, T) mask reference, across windows that do / do not divide T.
    g = torch.Generator().manual_seed(3)
    q, k, v = (torch.randn(1, 2, 19, 8, generator=g) for _ in range(3))
    for window in range(1, 22):
        want = naive_attention(q, k, v, allowed_mask(19, window))
        torch.testing.assert_close(sliding_window_attention(q, k, v, window), want, atol=1e-5, rtol=0)


# ----------------------------------------------------------------------------- linear memory


def largest_allocation_bytes(fn, *args) -> int:
    """Largest single allocation made by any op while ``fn`` runs (torch profiler memory events).

    The profiler attributes every allocator call, also those inside fused kernels, to the op
    that made it, so a T x T intermediate shows up even if no Python-visible tensor holds it.
    """
    with profile(activities=[ProfilerActivity.CPU], profile_memory=True) as prof:
        fn(*args)
    return max(e.self_cpu_memory_usage for e in prof.events())


def test_local_attention_at_long_context_allocates_no_seq_len_squared_tensor():
    T, W = 4096, 64
    square_bytes = T * T * 4  # one fp32 T x T matrix
    g = torch.Generator().manual_seed(4)
    q, k, v = (torch.randn(1, 2, T, 16, generator=g) for _ in range(3))
    mixer = build("local_attention", width=32, heads=2, window=W)
    x = torch.randn(1, T, 32, generator=g)
    with torch.no_grad():
        # Negative control: the same probe flags the masked (T, T) reference, so it can catch the bug.
        assert largest_allocation_bytes(naive_attention, q, k, v, allowed_mask(T, W)) >= square_bytes
        assert largest_allocation_bytes(sliding_window_attention, q, k, v, W) < square_bytes / 8
        assert largest_allocation_bytes(mixer, x) < square_bytes / 8
        # ... and the blocked result is still right at this length.
        want = sdpa_explicit_mask(q, k, v, allowed_mask(T, W))
        torch.testing.assert_close(sliding_window_attention(q, k, v, W), want, atol=1e-5, rtol=0)


# ----------------------------------------------------------------------------- RoPE


def test_rope_matches_complex_rotation():
    # Su et al. 2021, section 3.2.2: RoPE = multiplication by exp(i m theta_i) in the complex plane.
    x = torch.randn(2, 3, 10, 16, dtype=torch.float64)
    pos = torch.arange(10) * 7 + 3
    torch.testing.assert_close(apply_rope(x, pos, 10000.0), rope_complex(x, pos), atol=1e-12, rtol=0)
    torch.testing.assert_close(apply_rope(x, pos, 500.0), rope_complex(x, pos, 500.0), atol=1e-12, rtol=0)


def test_rope_in_bf16_keeps_the_angle_of_far_positions():
    # bf16 spacing near 1000 is 4 (8-bit mantissa, IEEE-style): angles must not be formed in bf16.
    x = torch.randn(1, 2, 64, 16, generator=torch.Generator().manual_seed(0))
    pos = torch.arange(1000, 1064)
    want = apply_rope(x, pos, 10000.0)
    got = apply_rope(x.bfloat16(), pos, 10000.0)
    assert got.dtype == torch.bfloat16  # rotated in fp32, handed back in the input's dtype
    torch.testing.assert_close(got.float(), want, atol=0.05, rtol=0.02)
    # Rotating in fp32 leaves only the final rounding: within half a bf16 ulp of the exact result
    # (2^-9 relative, 8-bit mantissa), not the several roundings of a bf16 multiply-add chain.
    exact = apply_rope(x.bfloat16().double(), pos, 10000.0)
    assert ((got.double() - exact).abs() <= exact.abs() * 2**-8 + 1e-6).all()  # + fp32 rounding near 0


def test_rope_scores_depend_only_on_relative_position():
    # Su et al. 2021, eq. 16: <f(q, m), f(k, n)> = g(q, k, m - n).
    g = torch.Generator().manual_seed(5)
    q, k = torch.randn(32, generator=g, dtype=torch.float64), torch.randn(32, generator=g, dtype=torch.float64)

    def score(m: int, n: int) -> float:
        qm = apply_rope(q[None], torch.tensor([m]), 10000.0)[0]
        kn = apply_rope(k[None], torch.tensor([n]), 10000.0)[0]
        return float(qm @ kn)

    for m, n in [(0, 0), (5, 2), (3, 11), (100, 37)]:
        for shift in (1, 17, 1000):
            assert score(m, n) == pytest.approx(score(m + shift, n + shift), abs=1e-9)
    # ... and the positions do enter: a different offset gives a different score.
    assert abs(score(5, 2) - score(5, 4)) > 1e-3
    # A rotation keeps norms (Su et al. 2021, eq. 14: R is orthogonal).
    rotated = apply_rope(q[None], torch.tensor([123]), 10000.0)[0]
    assert float(rotated.norm()) == pytest.approx(float(q.norm()), rel=1e-12)


# ----------------------------------------------------------------------------- step path


# step == forward, causality and functional state: tests/test_mixers_contract.py, for every head layout.


@pytest.mark.parametrize("heads,kv_heads", HEAD_LAYOUTS)
@pytest.mark.parametrize("kind,extra", [("global_attention", {}), ("local_attention", {"window": 6})])
def test_kv_cache_holds_the_attended_tokens(kind, extra, heads, kv_heads):
    # The cache holds the tokens a query attends to: all of them, or the last `window` (common practice, no source).
    mixer = build(kind, heads=heads, kv_heads=kv_heads, **extra)
    x = torch.randn(2, 20, WIDTH, generator=torch.Generator().manual_seed(6))
    with torch.no_grad():
        state = mixer.init_state(2)
        for t in range(x.shape[1]):
            _, state = mixer.step(x[:, t], state)
    expected_len = min(20, extra.get("window", 20))
    assert state.keys.shape == (2, mixer.kv_heads, expected_len, mixer.head_dim)
    assert state.position == 20


# ----------------------------------------------------------------------------- cost hooks


@pytest.mark.parametrize("heads,kv_heads", HEAD_LAYOUTS)
def test_param_count_formula(heads, kv_heads):
    # Kaplan et al. 2020, table 1: MHA attention has 4 d_model d_attn parameters (QKV + output);
    # with Hkv kv heads, K and V shrink by Hkv / H (Ainslie et al. 2023).
    width = 64
    mixer = build("global_attention", width=width, heads=heads, kv_heads=kv_heads)
    kv = kv_heads or heads
    assert sum(p.numel() for p in mixer.parameters()) == width * width * (2 + 2 * kv / heads)
    assert MIXERS["global_attention"].param_count(width, mixer.options) == width * width * (2 + 2 * kv / heads)


def test_extra_flops_follow_kaplan_attention_term():
    # Kaplan et al. 2020, table 1: forward 2 n_ctx d_attn per layer and token; training = 3x forward.
    glob, local = build("global_attention", width=64), build("local_attention", width=64, window=16)
    assert MIXERS["global_attention"].extra_flops_per_token(64, glob.options, 256) == 6 * 256 * 64
    assert MIXERS["local_attention"].extra_flops_per_token(64, local.options, 256) == 6 * 16 * 64
    assert MIXERS["local_attention"].extra_flops_per_token(64, local.options, 10) == 6 * 10 * 64


def test_state_bytes_of_kv_cache():
    # A KV cache holds 2 (K and V) x kv_heads x head_dim numbers per token (common practice, no source).
    opts = build("global_attention", width=64, heads=8, kv_heads=2).options
    assert MIXERS["global_attention"].state_bytes(64, opts, 100, batch=3) == 2 * 2 * 8 * 100 * 3 * 4
    local_opts = build("local_attention", width=64, heads=8, kv_heads=2, window=16).options
    assert MIXERS["local_attention"].state_bytes(64, local_opts, 100) == 2 * 2 * 8 * 16 * 4
