"""The gated linear recurrence block around the RG-LRU (De et al. 2024, arXiv:2402.19427, sec. 2.4, fig. 2).

    x (B, T, D) -> gate branch:      GeLU(W_g x)                                   (B, T, C)
                -> recurrent branch: W_r x -> causal depthwise Conv1D -> RG-LRU      (B, T, C)
    y = W_o (gate * recurrent)                                                      (B, T, D)

with recurrence width C = round(width_mult * D). The RG-LRU (their eqs. 1-4), per channel:

    r_t = sigmoid(W_a x_t + b_a)              recurrence gate
    i_t = sigmoid(W_x x_t + b_x)              input gate
    log a_t = -c r_t softplus(-Lambda)        i.e. a_t = sigmoid(Lambda)^(c r_t)
    h_t = a_t h_{t-1} + sqrt(1 - a_t^2) (i_t x_t)

W_a, W_x are block-diagonal. The decay lives in log space and sqrt(1 - a^2) is computed as
sqrt(-expm1(2 log a)), which keeps precision for a close to 1; the state is float32 even under
bf16 autocast. Two implementations of the same math: ``rg_lru_reference`` composes PyTorch ops
around ``blockyard.kernels.linear_scan`` (the reference, and the fallback without a compiler);
the fused C++ op ``blockyard.kernels.ops.rg_lru_fused`` does decay, input normalisation, input
gate and scan in one pass. ``rg_lru(..., backend=)`` picks one: the kernels choice (config key
``runtime.kernels``) is handed to the block by the model builder, never read from a global. The same
backend picks the causal depthwise conv: ``causal_depthwise_conv`` (torch's grouped conv1d, the
reference) or the C++ op ``blockyard.kernels.ops.causal_conv_fused`` (``causal_conv`` chooses).

Ablation knobs (``RecurrenceOptions``): ``gate: false`` is a fixed-decay diagonal recurrence in the
style of the diagonal state space models of Gu et al. 2022 (arXiv:2206.11893, id from memory):
a = sigmoid(Lambda), constant over time, and no input gate either, so the recurrence is linear
time-invariant; ``complex: true`` is a diagonal complex recurrence in the style of the linear
recurrent unit of Orvieto et al. 2023 (arXiv:2303.06349); ``input_norm: false`` drops the
sqrt(1 - a^2) factor; ``c``, ``conv_width``, ``gate_blocks`` and ``width_mult`` as their help says.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable

import torch
import torch.nn.functional as F
from torch import nn

from blockyard.errors import ConfigError
from blockyard.kernels import check_backend, linear_scan, uses_fused_op
from blockyard.kernels.ops import causal_conv_fused, compiled_ops, gelu_mul_fused, rg_lru_fused
from blockyard.mixers.base import Mixer, mark_residual_out, register_mixer
from blockyard.schema import opt

Scan = Callable[[torch.Tensor, torch.Tensor, torch.Tensor | None], torch.Tensor]

# The decay at a fully open recurrence gate (r_t = 1) starts uniform in this range
# (De et al. 2024, sec. 2.4, quoted from memory: "a^c is uniformly distributed between 0.9 and 0.999").
DECAY_MIN, DECAY_MAX = 0.9, 0.999
# Complex variant: ring init of Orvieto et al. 2023 (their appendix code, from memory): |lambda|^2
# uniform in [r_min^2, r_max^2] (uniform over the annulus' area), phase uniform in [0, max_phase].
# Their general default is r_min = 0, r_max = 1; for long-range tasks they use r_min = 0.9, r_max = 0.999
# and a small max_phase (pi/10). We use the long-range values, which also match the real variant's range.
RING_MIN, RING_MAX, MAX_PHASE = DECAY_MIN, DECAY_MAX, math.pi / 10

# Rough forward FLOPs per recurrence channel and token of the elementwise work that 6 x params
# misses (common practice, no source: ~4 FLOPs per sigmoid/softplus/exp-type function, 1 per mul/add).
_GELU_AND_PRODUCT_FLOPS = 9  # GeLU of the gate branch (~8) and the branch product (1)
_GATED_LRU_FLOPS = 8 + 4 + 4 + 2  # two sigmoids; log a = -c r softplus(-L) and exp; expm1, sqrt, mul; i*x
_FIXED_LRU_FLOPS = 1  # a and sqrt(1 - a^2) do not depend on t: only the input scaling remains
_REAL_SCAN_FLOPS = 2  # a * h + b
_COMPLEX_SCAN_FLOPS = 8  # complex multiply (6) and add (2)
_COMPLEX_DECAY_FLOPS = 8  # exp of a complex number: exp, cos, sin, two muls (only when the magnitude is gated)


# ----------------------------------------------------------------------------- options and state


@dataclasses.dataclass(frozen=True)
class RecurrenceOptions:
    width_mult: float = opt(
        1.0, "recurrence width C = round(width_mult * model.width); De et al. 2024 use 4/3, our default is 1.0",
        min=0.0)
    conv_width: int = opt(4, "width of the causal depthwise Conv1D before the RG-LRU (0 = no conv)", min=0)
    gate: bool = opt(
        True, "RG-LRU gates r_t and i_t; false = fixed decay a = sigmoid(Lambda) and no input gate "
        "(linear time-invariant)")
    c: float = opt(8.0, "decay exponent scale: log a_t = -c r_t softplus(-Lambda) (unused when gate is false)", min=0.0)
    input_norm: bool = opt(True, "scale the input by sqrt(1 - a_t^2) so the state keeps unit variance")
    complex: bool = opt(False, "diagonal complex state in the style of Orvieto et al. 2023 (arXiv:2303.06349); "
                        "output Re(h)")
    gate_blocks: int = opt(
        4, "blocks of the block-diagonal gate weights W_a, W_x; must divide C (unused when gate is false)", min=1)

    def validate(self, path: str) -> None:
        p = f"{path}." if path else ""
        if self.width_mult <= 0:
            raise ConfigError(f"{p}width_mult", f"{self.width_mult!r} must be > 0")
        if self.gate and self.c <= 0:
            raise ConfigError(f"{p}c", f"{self.c!r} must be > 0 (c = 0 would freeze the state)")

    def recurrence_width(self, width: int) -> int:
        return round(self.width_mult * width)

    def check_width(self, path: str, width: int) -> None:
        p = f"{path}." if path else ""
        rec = self.recurrence_width(width)
        if rec < 1:
            raise ConfigError(f"{p}width_mult", f"{self.width_mult!r} x model width {width} rounds to 0 channels")
        if self.gate and rec % self.gate_blocks:
            raise ConfigError(
                f"{p}gate_blocks",
                f"{self.gate_blocks} does not divide the recurrence width {rec} (= round(width_mult * {width}))")


@dataclasses.dataclass(frozen=True)
class RecurrenceState:
    """The step state: the recurrence h and the conv inputs of the last conv_width - 1 tokens."""

    h: torch.Tensor  # (B, C) float32, complex64 for the complex variant
    conv_tail: torch.Tensor  # (B, max(conv_width - 1, 0), C) float32, oldest first


# ----------------------------------------------------------------------------- pure functions


def block_diagonal_linear(x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor) -> torch.Tensor:
    """x @ blockdiag(weight[0], ..., weight[H-1]) + bias; x: (..., H * w), weight: (H, w, w), bias: (H * w,).

    One batched matmul over the blocks, with x viewed (not copied) as (H, N, w): measured faster on
    CPU than the equivalent einsum, which copies x into that layout first.
    """
    blocks, w, _ = weight.shape
    y = torch.bmm(x.reshape(-1, blocks, w).transpose(0, 1), weight)
    return y.transpose(0, 1).reshape(x.shape) + bias


def causal_depthwise_conv(
    x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor, tail: torch.Tensor | None = None
) -> tuple[torch.Tensor, torch.Tensor]:
    """y_t = bias + sum_k weight[:, k] x_{t-K+1+k}, per channel; returns (y, the last K-1 inputs).

    ``tail`` (B, K-1, C) holds the inputs before ``x`` (zeros before the first token), so the
    full-sequence and the token-by-token paths are the same computation.
    """
    batch, _, channels = x.shape
    keep = weight.shape[1] - 1
    if tail is None:
        tail = x.new_zeros(batch, keep, channels)
    full = torch.cat([tail.to(x.dtype), x], dim=1)
    y = F.conv1d(full.transpose(1, 2), weight[:, None, :], bias, groups=channels).transpose(1, 2)
    return y, full[:, full.shape[1] - keep :]


def causal_conv(
    x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor, tail: torch.Tensor | None = None, *,
    backend: str = "auto",
) -> tuple[torch.Tensor, torch.Tensor]:
    """``causal_depthwise_conv`` through the C++ op where ``backend`` resolves to the compiled kernels, else itself.

    The C++ op reads x in place (a strided view is fine) and writes y contiguous, in float32 for
    bfloat16 inputs (the dtype the RG-LRU computes in); the reference returns x's dtype.
    """
    if not uses_fused_op(x, backend):
        return causal_depthwise_conv(x, weight, bias, tail)
    keep = weight.shape[1] - 1
    y = causal_conv_fused(x, weight, bias, tail)
    if x.shape[1] >= keep:
        return y, x[:, x.shape[1] - keep :]
    before = x.new_zeros(x.shape[0], keep, x.shape[2]) if tail is None else tail.to(x.dtype)
    return y, torch.cat([before, x], dim=1)[:, -keep:]


def gelu_product(gate: torch.Tensor, y: torch.Tensor, backend: str = "auto") -> torch.Tensor:
    """GeLU(gate) * y, the block's output gating: the fused C++ op (``gelu_mul_fused``) where
    ``backend`` resolves to the compiled kernels, else torch's ``F.gelu(gate) * y`` (the reference)."""
    return gelu_mul_fused(gate, y) if uses_fused_op(gate, backend) else F.gelu(gate) * y


def rg_lru_log_decay(decay: torch.Tensor, gate_a_logits: torch.Tensor | None, c: float) -> torch.Tensor:
    """log a_t = -c sigmoid(gate_a_logits) softplus(-Lambda) (De et al. 2024, eq. 3, a = sigmoid(Lambda));

    without a recurrence gate the decay is fixed: log a = log sigmoid(Lambda), c unused.
    """
    log_a = -F.softplus(-decay)
    if gate_a_logits is None:
        return log_a
    return c * torch.sigmoid(gate_a_logits) * log_a


def gated_input(
    x: torch.Tensor, log_a: torch.Tensor, gate_x_logits: torch.Tensor | None, input_norm: bool
) -> torch.Tensor:
    """sqrt(1 - a_t^2) (i_t x_t) (De et al. 2024, eq. 4), with sqrt(1 - a^2) = sqrt(-expm1(2 log a))."""
    if gate_x_logits is not None:
        x = torch.sigmoid(gate_x_logits) * x
    if input_norm:
        x = torch.sqrt(-torch.expm1(2 * log_a)) * x
    return x


def _compute_dtype(x: torch.Tensor) -> torch.dtype:
    """float32 at least: the state is never kept in half precision (float64 stays float64)."""
    return torch.promote_types(x.dtype, torch.float32)


def rg_lru(
    x: torch.Tensor,
    decay: torch.Tensor,
    gate_a_logits: torch.Tensor | None = None,
    gate_x_logits: torch.Tensor | None = None,
    *,
    c: float = 8.0,
    input_norm: bool = True,
    h0: torch.Tensor | None = None,
    backend: str = "auto",
) -> torch.Tensor:
    """The RG-LRU (De et al. 2024, eqs. 1-4): all states h (B, T, C) in float32 (or float64).

    Runs the fused op where ``backend`` (``runtime.kernels``) resolves to the compiled kernels, else
    ``rg_lru_reference`` with that choice of scan; both compute the same math.
    """
    both_or_none = (gate_a_logits is None) == (gate_x_logits is None)
    if both_or_none and uses_fused_op(x, backend):
        return rg_lru_fused(x, decay, gate_a_logits, gate_x_logits, c=c, input_norm=input_norm, h0=h0)
    scan = functools.partial(linear_scan, backend=backend)
    return rg_lru_reference(x, decay, gate_a_logits, gate_x_logits, c=c, input_norm=input_norm, h0=h0, scan=scan)


def rg_lru_reference(
    x: torch.Tensor,
    decay: torch.Tensor,
    gate_a_logits: torch.Tensor | None = None,
    gate_x_logits: torch.Tensor | None = None,
    *,
    c: float = 8.0,
    input_norm: bool = True,
    h0: torch.Tensor | None = None,
    scan: Scan = linear_scan,
) -> torch.Tensor:
    """The RG-LRU (De et al. 2024, eqs. 1-4) as PyTorch ops around ``scan``: states h (B, T, C) in float32 (or float64).

    x, gate logits: (B, T, C); decay = Lambda: (C,). Gate logits None drop that gate: no
    ``gate_a_logits`` gives the fixed decay a = sigmoid(Lambda), no ``gate_x_logits`` gives i_t = 1.
    """
    dtype = _compute_dtype(x)
    x = x.to(dtype)
    gate_a_logits = None if gate_a_logits is None else gate_a_logits.to(dtype)
    gate_x_logits = None if gate_x_logits is None else gate_x_logits.to(dtype)
    log_a = rg_lru_log_decay(decay.to(dtype), gate_a_logits, c).expand_as(x)
    b = gated_input(x, log_a, gate_x_logits, input_norm)
    return scan(torch.exp(log_a), b, None if h0 is None else h0.to(dtype))


def complex_lru(
    x: torch.Tensor,
    nu_log: torch.Tensor,
    theta_log: torch.Tensor,
    gate_a_logits: torch.Tensor | None = None,
    gate_x_logits: torch.Tensor | None = None,
    *,
    c: float = 8.0,
    input_norm: bool = True,
    h0: torch.Tensor | None = None,
    scan: Scan = linear_scan,
) -> torch.Tensor:
    """Diagonal complex recurrence (LRU, Orvieto et al. 2023) with optional RG-LRU gates: complex h (B, T, C).

        lambda = exp(-exp(nu_log) + i exp(theta_log))          (Orvieto et al. 2023, sec. 3.3)
        |lambda_t| = |lambda|^(c r_t)                           (gate on: the RG-LRU gate on the magnitude)
        h_t = lambda_t h_{t-1} + sqrt(1 - |lambda_t|^2) (i_t x_t)

    The input x is real; the normalisation gamma_t = sqrt(1 - |lambda_t|^2) is computed from the
    current magnitude (not learned as in Orvieto et al. 2023) so that it stays exact under the gate.
    """
    dtype = _compute_dtype(x)
    cdtype = torch.complex64 if dtype == torch.float32 else torch.complex128
    x = x.to(dtype)
    log_mag = -torch.exp(nu_log.to(dtype))
    if gate_a_logits is not None:
        log_mag = c * torch.sigmoid(gate_a_logits.to(dtype)) * log_mag
    log_mag = log_mag.expand_as(x)
    phase = torch.exp(theta_log.to(dtype)).expand_as(x)
    a = torch.exp(torch.complex(log_mag, phase))
    b = gated_input(x, log_mag, None if gate_x_logits is None else gate_x_logits.to(dtype), input_norm)
    return scan(a, b.to(cdtype), None if h0 is None else h0.to(cdtype))


def decay_init(shape: tuple[int, ...], c_eff: float) -> torch.Tensor:
    """Lambda such that sigmoid(Lambda)^c_eff is uniform in [DECAY_MIN, DECAY_MAX] (De et al. 2024, sec. 2.4).

    softplus(-Lambda) = -log(u) / c_eff, so Lambda = -log(expm1(-log(u) / c_eff)).
    """
    u = torch.empty(shape, dtype=torch.float64).uniform_(DECAY_MIN, DECAY_MAX)
    return (-torch.log(torch.expm1(-torch.log(u) / c_eff))).float()


def ring_init(shape: tuple[int, ...], c_eff: float) -> tuple[torch.Tensor, torch.Tensor]:
    """(nu_log, theta_log) of the ring init of Orvieto et al. 2023: |lambda|^(2 c_eff) uniform in
    [RING_MIN^2, RING_MAX^2], phase uniform in (0, MAX_PHASE]."""
    u = torch.rand(shape, dtype=torch.float64)
    radius_sq = u * (RING_MAX**2 - RING_MIN**2) + RING_MIN**2
    nu_log = torch.log(-0.5 * torch.log(radius_sq) / c_eff)
    theta_log = torch.log(MAX_PHASE * (1.0 - torch.rand(shape, dtype=torch.float64)))  # 1 - U: never log(0)
    return nu_log.float(), theta_log.float()


# ----------------------------------------------------------------------------- modules


class BlockDiagonalLinear(nn.Module):
    """A linear map of width ``width`` whose matrix is block-diagonal with ``blocks`` blocks (plus a bias)."""

    def __init__(self, width: int, blocks: int) -> None:
        super().__init__()
        self.weight = nn.Parameter(torch.empty(blocks, width // blocks, width // blocks))
        self.bias = nn.Parameter(torch.empty(width))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        # LeCun normal per block (fan-in = block width), zero bias: common practice, no source.
        nn.init.normal_(self.weight, 0.0, self.weight.shape[1] ** -0.5)
        nn.init.zeros_(self.bias)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return block_diagonal_linear(x, self.weight, self.bias)


class CausalDepthwiseConv(nn.Module):
    """Per-channel causal temporal convolution of width ``kernel`` (the C++ op under runtime.kernels: compiled)."""

    def __init__(self, width: int, kernel: int, *, kernels: str = "auto") -> None:
        super().__init__()
        self.kernels = check_backend(kernels)
        self.weight = nn.Parameter(torch.empty(width, kernel))
        self.bias = nn.Parameter(torch.empty(width))
        self.reset_parameters()

    def reset_parameters(self) -> None:
        # torch's Conv1d default (uniform in +-1/sqrt(fan_in), fan_in = kernel): common practice, no source.
        bound = self.weight.shape[1] ** -0.5
        nn.init.uniform_(self.weight, -bound, bound)
        nn.init.uniform_(self.bias, -bound, bound)

    def forward(self, x: torch.Tensor, tail: torch.Tensor | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        return causal_conv(x, self.weight, self.bias, tail, backend=self.kernels)


class RGLRU(nn.Module):
    """The RG-LRU's parameters (gates and decay), real or complex; the math is ``rg_lru`` / ``complex_lru``."""

    def __init__(self, width: int, options: RecurrenceOptions, *, kernels: str = "auto") -> None:
        super().__init__()
        self.options = options
        self.kernels = check_backend(kernels)
        self.gate_a = BlockDiagonalLinear(width, options.gate_blocks) if options.gate else None
        self.gate_x = BlockDiagonalLinear(width, options.gate_blocks) if options.gate else None
        if options.complex:
            self.nu_log = nn.Parameter(torch.empty(width))
            self.theta_log = nn.Parameter(torch.empty(width))
        else:
            self.decay = nn.Parameter(torch.empty(width))  # Lambda of De et al. 2024
        self.reset_parameters()

    def reset_parameters(self) -> None:
        # The init targets the decay at an open gate: a^c when gated, a itself when the decay is fixed.
        c_eff = self.options.c if self.options.gate else 1.0
        with torch.no_grad():
            if self.options.complex:
                nu_log, theta_log = ring_init(self.nu_log.shape, c_eff)
                self.nu_log.copy_(nu_log)
                self.theta_log.copy_(theta_log)
            else:
                self.decay.copy_(decay_init(self.decay.shape, c_eff))
        for gate in (self.gate_a, self.gate_x):
            if gate is not None:
                gate.reset_parameters()

    def forward(self, x: torch.Tensor, h0: torch.Tensor | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """x (B, T, C) -> (output (B, T, C) in x's dtype, last state (B, C) in float32 or complex64)."""
        opts = self.options
        # Gates and state stay float32 under autocast (De et al. 2024 keep the recurrence in fp32; from memory).
        with torch.autocast(device_type=x.device.type, enabled=False):
            xf = x.to(_compute_dtype(x))
            ra = None if self.gate_a is None else self.gate_a(xf)
            rx = None if self.gate_x is None else self.gate_x(xf)
            if opts.complex:
                scan = functools.partial(linear_scan, backend=self.kernels)
                h = complex_lru(xf, self.nu_log, self.theta_log, ra, rx, c=opts.c, input_norm=opts.input_norm, h0=h0,
                                scan=scan)
                y = h.real
            else:
                h = rg_lru(xf, self.decay, ra, rx, c=opts.c, input_norm=opts.input_norm, h0=h0,
                           backend=self.kernels)
                y = h
        return y.to(x.dtype), h[:, -1]


@register_mixer
class RecurrenceBlock(Mixer):
    """De et al. 2024's recurrent block: W_o (GeLU(W_g x) * RG-LRU(Conv1D(W_r x)))."""

    kind = "recurrence"
    summary = "gated linear recurrence block around the RG-LRU (De et al. 2024), with ablation knobs"
    Options = RecurrenceOptions

    # The model builder passes ``kernels`` (config key ``runtime.kernels``) to mixers that set this.
    takes_kernels = True

    def __init__(self, width: int, options: RecurrenceOptions, *, layer: int, depth: int,
                 kernels: str = "auto") -> None:
        super().__init__(width, options, layer=layer, depth=depth)
        options.check_width("", width)
        rec = options.recurrence_width(width)
        self.rec_width = rec
        self.proj_in = nn.Linear(width, 2 * rec, bias=False)  # gate branch | recurrent branch
        self.conv = (CausalDepthwiseConv(rec, options.conv_width, kernels=kernels)
                     if options.conv_width > 0 else None)
        self.lru = RGLRU(rec, options, kernels=kernels)
        self.proj_out = nn.Linear(rec, width, bias=False)
        mark_residual_out(self.proj_out)

    def reset_special_parameters(self) -> None:
        if self.conv is not None:
            self.conv.reset_parameters()
        self.lru.reset_parameters()

    def _mix(
        self, x: torch.Tensor, state: RecurrenceState | None
    ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor | None]:
        gate, rec = self.proj_in(x).chunk(2, dim=-1)
        tail = None
        if self.conv is not None:
            rec, tail = self.conv(rec, None if state is None else state.conv_tail)
        y, h = self.lru(rec, None if state is None else state.h)
        # The C++ conv hands the RG-LRU float32 under bf16 autocast: the product stays in the gate's dtype.
        return self.proj_out(gelu_product(gate, y.to(gate.dtype), self.lru.kernels)), h, tail

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self._mix(x, None)[0]

    def init_state(self, batch: int, *, device: torch.device | str | None = None) -> RecurrenceState:
        rec = self.rec_width
        hdtype = torch.complex64 if self.options.complex else torch.float32
        return RecurrenceState(
            h=torch.zeros(batch, rec, dtype=hdtype, device=device),
            conv_tail=torch.zeros(batch, max(self.options.conv_width - 1, 0), rec, device=device),
        )

    def step(self, x_t: torch.Tensor, state: RecurrenceState) -> tuple[torch.Tensor, RecurrenceState]:
        if self._fused_step_applies(x_t):
            return self._fused_step(x_t, state)
        y, h, tail = self._mix(x_t[:, None], state)
        tail = state.conv_tail if tail is None else tail.to(state.conv_tail.dtype)
        return y[:, 0], RecurrenceState(h=h.to(state.h.dtype), conv_tail=tail)

    def _fused_step(self, x_t: torch.Tensor, state: RecurrenceState) -> tuple[torch.Tensor, RecurrenceState]:
        """The decode step with conv, gates and RG-LRU update in one C++ call (``rglru_step``): the same
        math as ``_mix`` on one token, with a handful of ops instead of a few dozen. Returns a new state."""
        gate, rec = self.proj_in(x_t).chunk(2, dim=-1)
        lru, conv = self.lru, self.conv
        weights: list[torch.Tensor | None] = [None, None] if conv is None else [conv.weight, conv.bias]
        for g in (lru.gate_a, lru.gate_x):
            weights += [None, None] if g is None else [g.weight, g.bias]
        h, tail = compiled_ops().rglru_step(rec.float().contiguous(), state.conv_tail, *weights, lru.decay,
                                            state.h, float(self.options.c), self.options.input_norm)
        y = self.proj_out(F.gelu(gate) * h.to(gate.dtype))
        return y, RecurrenceState(h=h, conv_tail=tail)

    def _fused_step_applies(self, x_t: torch.Tensor) -> bool:
        """The fused step is for inference (no autograd through it), real float32 states, the compiled backend."""
        if self.options.complex or x_t.dtype != torch.float32:
            return False
        if torch.is_grad_enabled() and (x_t.requires_grad or any(p.requires_grad for p in self.parameters())):
            return False
        return uses_fused_op(x_t, self.lru.kernels)

    # ----- cost model hooks

    @classmethod
    def param_count(cls, width: int, options: RecurrenceOptions) -> int:
        rec = options.recurrence_width(width)
        n = 3 * width * rec  # proj_in (gate and recurrent branches) and proj_out
        if options.conv_width > 0:
            n += options.conv_width * rec + rec
        if options.gate:
            n += 2 * (rec * rec // options.gate_blocks + rec)  # W_a, W_x block-diagonal, with biases
        n += 2 * rec if options.complex else rec  # (nu, theta) or Lambda
        return n

    @classmethod
    def extra_flops_per_token(cls, width: int, options: RecurrenceOptions, context: int) -> float:
        """Elementwise gates, decay and scan (rough per-channel counts above), x 3 for forward + backward.

        Matmul-like work with parameters (projections, block-diagonal gates, conv taps) is in 6 x params.
        """
        per_channel = _GELU_AND_PRODUCT_FLOPS + (_GATED_LRU_FLOPS if options.gate else _FIXED_LRU_FLOPS)
        if options.complex:
            per_channel += _COMPLEX_SCAN_FLOPS + (_COMPLEX_DECAY_FLOPS if options.gate else 0)
        else:
            per_channel += _REAL_SCAN_FLOPS
        return 3.0 * per_channel * options.recurrence_width(width)

    @classmethod
    def state_bytes(cls, width: int, options: RecurrenceOptions, context: int, *, batch: int = 1) -> int:
        """h (4 bytes a channel, 8 if complex) and the float32 conv tail; constant in ``context``."""
        rec = options.recurrence_width(width)
        h_bytes = (8 if options.complex else 4) * rec
        tail_bytes = 4 * max(options.conv_width - 1, 0) * rec
        return batch * (h_bytes + tail_bytes)
