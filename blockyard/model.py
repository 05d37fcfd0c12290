"""The backbone: the one place that turns a model config into a PyTorch model.

    tokens -> embedding -> depth x [x + mixer(RMSNorm(x)); x + MLP(RMSNorm(x))] -> RMSNorm -> head

Pre-norm residual blocks (Xiong et al. 2020), RMSNorm (Zhang & Sennrich 2019), GeGLU or GeLU
MLPs (Shazeer 2020), head tied to the embedding by default (Press & Wolf 2017), its input scaled by width^-1/2.

Init scheme: embeddings and every linear weight ~ N(0, init_std); the output projection of
each mixer and MLP (modules marked ``residual_out``, blockyard/mixers/base.py) ~ N(0, init_std / sqrt(2 * depth)),
so that the residual stream's variance does not grow with depth (Radford et al. 2019, technical report, sec. 2.3);
linear biases zero; norm gains one. Mixers then re-initialise their own special parameters
(decay rates, convolutions) in ``reset_special_parameters``; torch's LSTM keeps torch's init.

Where the numbers come from (``model.init_draws``): ``by_path`` (the default) draws each weight from
its own generator keyed by (the init seed, the parameter's path, e.g. ``blocks.1.mlp.proj_in``), and an
MLP's weights hidden unit by hidden unit (keyed by the unit's index), and re-seeds each mixer's own
init by its path. Two variants built at the same init seed then start with identical embeddings,
norms, head, MLP units and same-named mixer weights, whatever else differs (MLPs of different widths
share their common units): a paired comparison sees the change, not two unrelated initialisations
(common random numbers, e.g. Law & Kelton, "Simulation Modeling and Analysis", ch. 11). ``stream``
draws everything from torch's global generator in module order, so adding a module reshuffles all
that follows (what every run did before the key existed).

``model.parametrization: mup`` scales these stds, each parameter's Adam lr and the logits with
width relative to ``model.base_width`` (blockyard/parametrization.py has the rule and the table).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from collections.abc import Sequence
from typing import Any, cast

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.checkpoint import checkpoint

from blockyard.config import ModelConfig
from blockyard.kernels import check_backend, uses_fused_op
from blockyard.kernels.ops import geglu_fused, rms_norm_fused
from blockyard.mixers import MIXERS, Mixer
from blockyard.mixers.base import is_residual_out, mark_residual_out
from blockyard.parametrization import ParamScaling, readout_multiplier, scaling


def geglu_reference(h: torch.Tensor) -> torch.Tensor:
    """GeLU(a) * b for h = [a | b] split in halves of the last dim (GeGLU, Shazeer 2020, eq. 5; exact-erf GeLU)."""
    gate, up = h.chunk(2, dim=-1)
    return F.gelu(gate) * up


def geglu(h: torch.Tensor, backend: str = "auto") -> torch.Tensor:
    """``geglu_reference`` through the C++ op (``blockyard.kernels.ops.geglu_fused``: one pass forward
    and one backward instead of two and four) where ``backend`` (``runtime.kernels``) resolves to the
    compiled kernels for CPU float32 / bfloat16 / float64 inputs, else the reference itself."""
    return geglu_fused(h) if uses_fused_op(h, backend) else geglu_reference(h)


class RMSNorm(nn.RMSNorm):
    """torch's ``nn.RMSNorm`` (Zhang & Sennrich 2019; same parameter, same state-dict key), run through
    the fused C++ op (``blockyard.kernels.ops.rms_norm_fused``: one pass forward and one backward
    instead of torch's chain of elementwise ops) where ``kernels`` (``runtime.kernels``) resolves
    to the compiled kernels and autograd records the call; torch's own forward (the reference) elsewhere.

    Without autograd torch's forward is one fused kernel already, and for a decode step's single
    row it costs less per call than the custom op (measured 19 vs 49 us at width 256).
    """

    def __init__(self, width: int, eps: float, *, kernels: str = "auto") -> None:
        super().__init__(width, eps=eps)
        self.kernels = check_backend(kernels)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        recorded = torch.is_grad_enabled() and (x.requires_grad or bool(self.weight is not None
                                                                       and self.weight.requires_grad))
        if recorded and self.weight is not None and self.eps is not None and uses_fused_op(x, self.kernels):
            return rms_norm_fused(x, self.weight, self.eps)
        return super().forward(x)


def keyed_seed(base: int, key: str) -> int:
    """A 63-bit seed from (``base``, ``key``) by a BLAKE2b digest: the same pair, the same seed."""
    digest = hashlib.blake2b(f"{base}/{key}".encode(), digest_size=8).digest()
    return int.from_bytes(digest, "little") & (2**63 - 1)


def keyed_generator(base: int, key: str) -> torch.Generator:
    """A CPU generator seeded with ``keyed_seed(base, key)``."""
    return torch.Generator().manual_seed(keyed_seed(base, key))


def draw_init_base() -> int:
    """The number that keys every ``by_path`` draw, from torch's global generator (seeded by the caller).

    Under a fake-tensor mode (shape-only builds: memory estimates) no number exists; the draws are never read there.
    """
    from torch._subclasses.fake_tensor import FakeTensor

    probe = torch.randint(0, 2**62, (1,), device="cpu")
    return 0 if isinstance(probe, FakeTensor) else int(probe.item())


def keyed_normal(shape: tuple[int, ...], base: int, key: str) -> torch.Tensor:
    """N(0, 1) numbers of ``shape`` from ``keyed_generator(base, key)`` (float32, CPU)."""
    return torch.randn(shape, generator=keyed_generator(base, key))


KEYED_ROW_BLOCK = 32  # rows drawn per generator by keyed_rows (fewer generators, same sharing)


def keyed_rows(rows: int, cols: int, base: int, key: str) -> torch.Tensor:
    """A (rows, cols) N(0, 1) matrix drawn in blocks of ``KEYED_ROW_BLOCK`` rows, block b from key
    ``{key}[b]``: a longer matrix extends a shorter one, so MLPs of different hidden sizes share their
    first units."""
    blocks = -(-rows // KEYED_ROW_BLOCK)
    drawn = [keyed_normal((KEYED_ROW_BLOCK, cols), base, f"{key}[{b}]") for b in range(blocks)]
    return torch.cat(drawn)[:rows] if drawn else torch.empty(0, cols)


class MLP(nn.Module):
    """``gated``: W_o (GeLU(W_g x) * W_u x) (GeGLU, Shazeer 2020); ``plain``: W_o GeLU(W_i x).

    ``kernels`` (``runtime.kernels``) picks the GeGLU unit's implementation (``geglu``).
    """

    def __init__(self, width: int, hidden: int, kind: str, *, kernels: str = "auto") -> None:
        super().__init__()
        self.kind = kind
        self.hidden = hidden
        self.kernels = check_backend(kernels)
        self.proj_in = nn.Linear(width, 2 * hidden if kind == "gated" else hidden, bias=False)
        self.proj_out = nn.Linear(hidden, width, bias=False)
        mark_residual_out(self.proj_out)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.proj_in(x)
        h = geglu(h, self.kernels) if self.kind == "gated" else F.gelu(h)
        return self.proj_out(h)

    @staticmethod
    def param_count(width: int, hidden: int, kind: str) -> int:
        return (3 if kind == "gated" else 2) * width * hidden

    def keyed_init_(self, base: int, path: str, std: float, out_std: float) -> None:
        """``by_path`` init: hidden unit j's input row(s) and output column from keys ending in ``[j]``.

        The gated MLP's two input halves (gate, up) have keys of their own; the output projection is
        drawn column by column (a column is one unit's write into the residual stream)."""
        width, hidden = self.proj_out.weight.shape
        halves = ("gate", "up") if self.kind == "gated" else ("in",)
        rows = torch.cat([keyed_rows(hidden, width, base, f"{path}.{h}") for h in halves])
        with torch.no_grad():
            self.proj_in.weight.copy_(rows.mul_(std))
            self.proj_out.weight.copy_(keyed_rows(hidden, width, base, f"{path}.out").t().mul_(out_std))


class Block(nn.Module):
    """One pre-norm residual block: temporal mixer, then MLP (skipped when the MLP is empty)."""

    def __init__(self, mixer: Mixer, width: int, hidden: int, mlp_kind: str, eps: float, *,
                 kernels: str = "auto") -> None:
        super().__init__()
        self.mixer_norm = RMSNorm(width, eps, kernels=kernels)
        self.mixer = mixer
        self.mlp_norm = RMSNorm(width, eps, kernels=kernels) if hidden > 0 else None
        self.mlp = MLP(width, hidden, mlp_kind, kernels=kernels) if hidden > 0 else None

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = x + self.mixer(self.mixer_norm(x))
        if self.mlp is not None and self.mlp_norm is not None:
            x = x + self.mlp(self.mlp_norm(x))
        return x

    def step(self, x_t: torch.Tensor, state: Any) -> tuple[torch.Tensor, Any]:
        y, state = self.mixer.step(self.mixer_norm(x_t), state)
        x_t = x_t + y
        if self.mlp is not None and self.mlp_norm is not None:
            x_t = x_t + self.mlp(self.mlp_norm(x_t))
        return x_t, state


class LanguageModel(nn.Module):
    """A causal language model over a vocabulary of ``vocab_size`` tokens."""

    def __init__(self, cfg: ModelConfig, vocab_size: int, *, activation_checkpointing: bool = False,
                 kernels: str = "auto") -> None:
        super().__init__()
        # by_path: one number from the global generator (seeded with the init seed by the caller) keys every
        # draw; taken first, so it does not depend on which modules the constructors below build.
        self.init_base = draw_init_base() if cfg.init_draws == "by_path" else None
        self.cfg = cfg
        self.vocab_size = vocab_size
        self.activation_checkpointing = activation_checkpointing
        self.embed = nn.Embedding(vocab_size, cfg.width)
        blocks = []
        for layer, (_name, mcfg) in enumerate(cfg.layer_mixers()):
            cls = MIXERS[mcfg.kind]
            # The kernel choice (runtime.kernels) goes to the mixers that run C++ ops, explicitly.
            extra = {"kernels": kernels} if getattr(cls, "takes_kernels", False) else {}
            mixer = cls(cfg.width, mcfg.options, layer=layer, depth=cfg.depth, **extra)
            blocks.append(Block(mixer, cfg.width, cfg.mlp_hidden, cfg.mlp, cfg.norm_eps, kernels=kernels))
        # a ModuleList (so the blocks register as submodules), typed as what it holds, which ModuleList cannot say
        self.blocks = cast(Sequence[Block], nn.ModuleList(blocks))
        self.final_norm = RMSNorm(cfg.width, cfg.norm_eps, kernels=kernels)
        self.head = None if cfg.tie_embeddings else nn.Linear(cfg.width, vocab_size, bias=False)
        # Tied head: scale its input by width^-1/2 (Raffel et al. 2020, JMLR, arXiv:1910.10683). Without it a
        # token's own embedding dominates the residual stream at init and its logit is init_std * width,
        # which puts the fresh loss far above ln(vocab) at width 256.
        self.readout_scale = cfg.width**-0.5 if cfg.tie_embeddings else 1.0
        self.width_scaling: dict[str, ParamScaling] = {}
        if cfg.parametrization == "mup":
            self._scale_with_width()
        self.reset_parameters()

    def _scale_with_width(self) -> None:
        """muP: classify every parameter against the base-width model, scale the readout and attention."""
        cfg = self.cfg
        base_cfg = dataclasses.replace(cfg, width=cfg.base_width, parametrization="standard", init_draws="stream")
        with torch.device("meta"), torch.random.fork_rng(devices=[]):
            base = LanguageModel(base_cfg, self.vocab_size)
            base_shapes = {name: tuple(p.shape) for name, p in base.named_parameters()}
        head = "embed.weight" if self.head is None else "head.weight"
        tables = {f"{name}.weight" for name, m in self.named_modules() if isinstance(m, nn.Embedding)}
        self.width_scaling = {
            name: scaling(tuple(p.shape), base_shapes[name], fan_in_dim=0 if name in tables else 1,
                          readout=name == head)
            for name, p in self.named_parameters()
        }
        self.readout_scale = base.readout_scale * readout_multiplier(cfg.width, cfg.base_width)
        for block in self.blocks:
            block.mixer.use_base_width(cfg.base_width)

    def lr_multipliers(self) -> dict[str, float]:
        """Parameter name -> factor on the peak lr (muP's per-layer Adam lr; all 1 under standard)."""
        return {name: s.lr_mult for name, s in self.width_scaling.items()}

    def reset_parameters(self) -> None:
        std = self.cfg.init_std
        out_std = std / math.sqrt(2 * self.cfg.depth)
        base = self.init_base
        mlp_parts = {f"{name}.{p}" for name, m in self.named_modules() if isinstance(m, MLP)
                     for p in ("proj_in", "proj_out")} if base is not None else set()
        for name, module in self.named_modules():
            if isinstance(module, nn.Linear) and name not in mlp_parts:
                mult = self.width_scaling[f"{name}.weight"].init_mult if self.width_scaling else 1.0
                self._normal_(module.weight, name, mult * (out_std if is_residual_out(module) else std))
                if module.bias is not None:
                    nn.init.zeros_(module.bias)
            elif isinstance(module, nn.Embedding):
                self._normal_(module.weight, name, std)
            elif isinstance(module, nn.RMSNorm) and module.weight is not None:
                nn.init.ones_(module.weight)
            if base is not None and isinstance(module, MLP):
                mults = [self.width_scaling[f"{name}.{p}.weight"].init_mult if self.width_scaling else 1.0
                         for p in ("proj_in", "proj_out")]
                module.keyed_init_(base, name, mults[0] * std, mults[1] * out_std)
        for i, block in enumerate(self.blocks):
            if base is None:
                block.mixer.reset_special_parameters()
                continue
            with torch.random.fork_rng(devices=[]):
                torch.manual_seed(keyed_seed(base, f"blocks.{i}.mixer"))
                block.mixer.reset_special_parameters()

    def _normal_(self, weight: torch.Tensor, name: str, std: float) -> None:
        """N(0, std) in place: keyed by ``name`` under ``by_path``, from the global stream under ``stream``."""
        if self.init_base is None:
            nn.init.normal_(weight, 0.0, std)
        else:
            with torch.no_grad():
                weight.copy_(keyed_normal(tuple(weight.shape), self.init_base, name).mul_(std))

    def _logits(self, h: torch.Tensor) -> torch.Tensor:
        h = self.final_norm(h)
        if self.readout_scale != 1.0:
            h = h * self.readout_scale
        return F.linear(h, self.embed.weight if self.head is None else self.head.weight)

    def forward(self, tokens: torch.Tensor) -> torch.Tensor:
        """``tokens: (B, T)`` int64 -> logits ``(B, T, vocab)``."""
        h = self.embed(tokens)
        for block in self.blocks:
            if self.activation_checkpointing and self.training and torch.is_grad_enabled():
                h = checkpoint(block, h, use_reentrant=False)
            else:
                h = block(h)
        return self._logits(h)

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> list[Any]:
        """One step state per block, for ``batch`` sequences."""
        return [block.mixer.init_state(batch, device=device) for block in self.blocks]

    def step(self, token: torch.Tensor, states: list[Any]) -> tuple[torch.Tensor, list[Any]]:
        """``token: (B,)`` and the states -> logits ``(B, vocab)`` for the next token, new states."""
        h = self.embed(token)
        new_states = []
        for block, state in zip(self.blocks, states, strict=True):
            h, state = block.step(h, state)
            new_states.append(state)
        return self._logits(h), new_states

    def param_groups(self) -> dict[str, int]:
        """Parameter counts: per mixer kind, MLPs, norms, embedding, head, totals."""
        counts: dict[str, int] = {}

        def add(key: str, n: int) -> None:
            counts[key] = counts.get(key, 0) + n

        for block in self.blocks:
            add(f"mixer:{block.mixer.kind}", sum(p.numel() for p in block.mixer.parameters()))
            if block.mlp is not None:
                add("mlp", sum(p.numel() for p in block.mlp.parameters()))
            norms = [block.mixer_norm] + ([block.mlp_norm] if block.mlp_norm is not None else [])
            add("norms", sum(p.numel() for n in norms for p in n.parameters()))
        add("norms", sum(p.numel() for p in self.final_norm.parameters()))
        add("embedding", self.embed.weight.numel())
        if self.head is not None:
            add("head", self.head.weight.numel())
        counts["total"] = sum(p.numel() for p in self.parameters())
        counts["non_embedding"] = counts["total"] - counts["embedding"] - counts.get("head", 0)
        return counts


def build_model(cfg: ModelConfig, vocab_size: int, *, activation_checkpointing: bool = False,
                kernels: str = "auto") -> LanguageModel:
    """The model for ``cfg`` over ``vocab_size`` tokens (the config was validated on load).

    ``kernels``: the linear-scan / fused-recurrence implementation (``runtime.kernels``, as the
    trainer's ``Runtime.kernels``), passed to the recurrent mixers and to the MLPs' GeGLU unit.
    """
    return LanguageModel(cfg, vocab_size, activation_checkpointing=activation_checkpointing,
                         kernels=kernels)
