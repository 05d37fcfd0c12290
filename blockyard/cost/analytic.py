"""The cost model of an assembled config: parameters, training FLOPs per token, inference state bytes.

Everything here is analytic, computed from the config alone (no model is built): each mixer kind
answers for itself through its cost hooks (``param_count``, ``extra_flops_per_token``,
``state_bytes`` in ``blockyard/mixers/base.py``; a plugin mixer without them is measured by
``blockyard/cost/measured.py``, and ``describe_config`` says so); this module adds the backbone around them
(embedding, RMSNorms, MLPs, head) and sums over depth. Tests compare the numbers with counted
parameters (``LanguageModel.param_groups``) and measured step states (``state_nbytes``).

FLOPs convention (Kaplan et al. 2020, "Scaling Laws for Neural Language Models", sec. 2.1):
training compute per token is C ~= 6 N + 6 n_layer n_ctx d_attn, with N the non-embedding
parameters. Embedding and unembedding (head) FLOPs are *excluded*, as in Kaplan et al.; the
head's 6 d vocab is reported separately by :func:`flops_breakdown` because at our tiny widths
it is not negligible.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

from blockyard.config import Config, ModelConfig, load_config
from blockyard.cost import measured
from blockyard.errors import UserError
from blockyard.mixers import MIXERS
from blockyard.model import MLP
from blockyard.plotting import pyplot
from blockyard.schema import describe
from blockyard.text import aligned_table, binary_bytes, count_text

# Context lengths at which ``blockyard blocks`` reports state bytes: a short prompt, a long
# document, a book.
REPORT_CONTEXTS = (256, 4096, 65536)


@dataclasses.dataclass(frozen=True)
class LayerCost:
    """Cost of one residual block: its mixer, MLP and norms."""

    layer: int
    name: str  # the pattern entry (key of model.mixers)
    kind: str  # the registered mixer kind
    mixer_params: int
    mlp_params: int
    norm_params: int
    extra_flops_per_token: float  # training FLOPs per token beyond 6 x params (attention scores...)


def _rmsnorm_params(width: int) -> int:
    """RMSNorm with a learned gain per feature (Zhang & Sennrich 2019), no bias."""
    return width


def layer_costs(model: ModelConfig, context: int) -> list[LayerCost]:
    """Per-block costs over depth, the pattern cycled as the model builder does."""
    rows = []
    hidden = model.mlp_hidden
    for layer, (name, mcfg) in enumerate(model.layer_mixers()):
        cls = MIXERS[mcfg.kind]
        has_mlp = hidden > 0
        rows.append(
            LayerCost(
                layer=layer,
                name=name,
                kind=mcfg.kind,
                mixer_params=measured.param_count(cls, model.width, mcfg.options),
                mlp_params=MLP.param_count(model.width, hidden, model.mlp) if has_mlp else 0,
                norm_params=_rmsnorm_params(model.width) * (2 if has_mlp else 1),
                extra_flops_per_token=measured.extra_flops_per_token(cls, model.width, mcfg.options, context),
            )
        )
    return rows


def _vocab_size(cfg: Config, vocab_size: int | None) -> int:
    if vocab_size is not None:
        return vocab_size
    from blockyard.data import vocab_size_for

    return int(vocab_size_for(cfg))


def param_breakdown(cfg: Config, vocab_size: int | None = None) -> dict[str, int]:
    """Parameter counts with the keys of ``LanguageModel.param_groups()``.

    ``mixer:<kind>`` per mixer kind, ``mlp``, ``norms``, ``embedding``, ``head`` (only when untied),
    ``total`` and ``non_embedding`` (total minus embedding and head: Kaplan et al. 2020's N).
    ``vocab_size`` defaults to what the data layer derives from ``cfg.data``.
    """
    model = cfg.model
    vocab = _vocab_size(cfg, vocab_size)
    rows = layer_costs(model, cfg.data.seq_len)
    counts: dict[str, int] = {}
    for row in rows:  # mixer kinds first, in order of appearance over depth
        key = f"mixer:{row.kind}"
        counts[key] = counts.get(key, 0) + row.mixer_params
    mlp = sum(r.mlp_params for r in rows)
    if mlp:
        counts["mlp"] = mlp
    counts["norms"] = sum(r.norm_params for r in rows) + _rmsnorm_params(model.width)  # + the final norm
    counts["embedding"] = vocab * model.width
    if not model.tie_embeddings:
        counts["head"] = vocab * model.width
    counts["total"] = sum(counts.values())
    counts["non_embedding"] = counts["total"] - counts["embedding"] - counts.get("head", 0)
    return counts


def non_embedding_params(model: ModelConfig, context: int = 1) -> int:
    """N of Kaplan et al. 2020: every parameter except the embedding and the head (vocab-free)."""
    rows = layer_costs(model, context)
    return sum(r.mixer_params + r.mlp_params + r.norm_params for r in rows) + _rmsnorm_params(model.width)


def flops_breakdown(cfg: Config, vocab_size: int | None = None) -> dict[str, float]:
    """Training FLOPs per token (forward + backward) by term, at context ``cfg.data.seq_len``.

    ``dense`` = 6 N (Kaplan et al. 2020, eq. 2.1 times 3 for the backward pass), ``mixer_extra``
    = sum over layers of the mixers' extra term (attention: 6 n_ctx d_attn), ``total`` = their sum
    (the Kaplan convention: embeddings excluded), and ``head`` = 6 d vocab for the unembedding,
    reported apart and not included in ``total``.
    """
    rows = layer_costs(cfg.model, cfg.data.seq_len)
    dense = 6.0 * non_embedding_params(cfg.model)
    extra = sum(r.extra_flops_per_token for r in rows)
    head = 6.0 * cfg.model.width * _vocab_size(cfg, vocab_size)
    return {"dense": dense, "mixer_extra": extra, "total": dense + extra, "head": head}


def flops_per_token(cfg: Config, vocab_size: int | None = None, *, with_head: bool = False) -> float:
    """Training FLOPs per token: 6 N + the mixers' extra terms, embeddings excluded (Kaplan et al. 2020).

    ``with_head`` adds the unembedding's 6 d V: left out of compute budgets by the Kaplan convention,
    but computed all the same, so a utilisation measured from tokens/s counts it (the benchmark's MFU).
    """
    rows = layer_costs(cfg.model, cfg.data.seq_len)
    body = 6.0 * non_embedding_params(cfg.model) + sum(r.extra_flops_per_token for r in rows)
    return body + (6.0 * cfg.model.width * _vocab_size(cfg, vocab_size) if with_head else 0.0)


def layer_state_bytes(model: ModelConfig, context: int, batch: int = 1) -> list[int]:
    """Bytes of each block's generation state after ``context`` tokens."""
    return [
        measured.state_bytes(MIXERS[mcfg.kind], model.width, mcfg.options, context, batch=batch)
        for _name, mcfg in model.layer_mixers()
    ]


def state_bytes(cfg: Config | ModelConfig, context: int, batch: int = 1) -> int:
    """Inference state bytes for ``batch`` sequences after ``context`` tokens, summed over depth.

    Global attention's KV cache grows linearly with ``context``; local attention's stops growing
    at the window; a recurrence holds a constant state (plus its short convolution's tail).
    """
    model = cfg.model if isinstance(cfg, Config) else cfg
    return sum(layer_state_bytes(model, context, batch))


def describe_registry() -> str:
    """The registered mixer kinds, their summary and option keys with defaults (read from code)."""
    parts = []
    for kind in sorted(MIXERS):
        cls = MIXERS[kind]
        parts.append(f"{kind}: {cls.summary or '(no summary)'}")
        for key, default, help_text in describe(cls.Options):
            parts.append(f"    {key} = {default!r}  {help_text}")
    return "\n".join(parts)


def describe_config(cfg: Config, vocab_size: int | None = None) -> str:
    """Params per block kind, the pattern over depth, FLOPs per token and state bytes at a few L."""
    vocab = _vocab_size(cfg, vocab_size)
    params = param_breakdown(cfg, vocab)
    flops = flops_breakdown(cfg, vocab)
    model = cfg.model
    lines = [
        f"{cfg.name or '(unnamed)'}: width {model.width}, depth {model.depth}, vocab {vocab}, "
        f"mlp {model.mlp} x{model.mlp_expansion:g}, seq_len {cfg.data.seq_len}",
        "",
        "parameters",
    ]
    for key, n in params.items():
        lines.append(f"  {key:<24} {n:>12,d}  ({count_text(n)})")
    lines += ["", "layers"]
    states = {L: layer_state_bytes(model, L) for L in REPORT_CONTEXTS}
    header = ["layer", "name", "kind", "mixer params", "extra FLOPs/tok"] + [f"state@{L}" for L in REPORT_CONTEXTS]
    rows = [
        [str(r.layer), r.name, r.kind, f"{r.mixer_params:,d}", count_text(r.extra_flops_per_token)]
        + [binary_bytes(states[L][r.layer]) for L in REPORT_CONTEXTS]
        for r in layer_costs(model, cfg.data.seq_len)
    ]
    lines.append(aligned_table(header, rows, indent="  "))
    lines += [
        "",
        f"training FLOPs/token at seq_len={cfg.data.seq_len} (6N + mixer terms, embeddings excluded; "
        "Kaplan et al. 2020): "
        f"{count_text(flops['total'])}  (6N {count_text(flops['dense'])}, "
        f"mixers {count_text(flops['mixer_extra'])}; head 6*d*vocab {count_text(flops['head'])} not included)",
        "inference state per sequence: "
        + ", ".join(f"L={L}: {binary_bytes(sum(states[L]))}" for L in REPORT_CONTEXTS),
    ]
    note = measured_note(model)
    return "\n".join(lines + ([note] if note else []))


def measured_note(model: ModelConfig) -> str:
    """Which figures were measured on a built module rather than computed (plugins without cost hooks)."""
    kinds = {mcfg.kind: measured.measured_hooks(MIXERS[mcfg.kind]) for _n, mcfg in model.layer_mixers()}
    parts = [f"{kind}: {', '.join(hooks)}" for kind, hooks in kinds.items() if hooks]
    if not parts:
        return ""
    return ("measured, not analytic (the plugin gives no formula; blockyard/cost/measured.py): " + "; ".join(parts))


def plot_state_bytes(cfgs: list[Config], path: str | Path, contexts: list[int] | None = None) -> Path:
    """Log-log PNG of inference state bytes (batch 1) vs context length, one line per config."""
    plt = pyplot()
    contexts = contexts or [2**k for k in range(4, 18)]
    fig, ax = plt.subplots(figsize=(6, 4))
    for cfg in cfgs:
        ax.plot(contexts, [state_bytes(cfg, L) for L in contexts], marker="o", ms=3, label=cfg.name)
    ax.set_xscale("log", base=2)
    ax.set_yscale("log", base=2)
    ax.set_xlabel("context length L (tokens)")
    ax.set_ylabel("state bytes per sequence")
    ax.set_title("generation state vs context")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    out = Path(path)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        fig.savefig(out, dpi=120)
    except OSError as e:
        raise UserError(f"--plot {path}: cannot write ({e.strerror or e})") from None
    finally:
        plt.close(fig)
    return out


def blocks_command(configs: list[str], overrides: list[str], *, plot: str | None = None) -> str:
    """``blockyard blocks``: the mixer registry, or the cost summary of each config (and a plot)."""
    if not configs:
        if plot:
            raise UserError("--plot needs at least one config file")
        return describe_registry()
    cfgs = [load_config(path, overrides) for path in configs]
    text = "\n\n".join(describe_config(cfg) for cfg in cfgs)
    if plot:
        out = plot_state_bytes(cfgs, plot)
        text += f"\n\nwrote {out}"
    return text
