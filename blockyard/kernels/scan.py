"""The linear scan h_t = a_t * h_{t-1} + b_t along time, three ways with one signature.

This first-order linear recurrence is the core of diagonal linear RNNs (Martin & Cundy 2018,
"Parallelizing linear recurrent neural nets over sequence length", eq. 1); Blelloch 1990
("Prefix sums and their applications", sec. 1.4) shows it is a scan with the associative
operator (a1, b1) . (a2, b2) = (a1 a2, a2 b1 + b2).

Shapes: ``a, b: (B, T, C)``, ``h0: (B, C)`` or None (zeros), result ``h: (B, T, C)``. Real or
complex dtypes (complex: a diagonal complex recurrence); all three are differentiable in a, b, h0.

Backends (the values of ``runtime.kernels``, which also choose the other C++ ops of ``ops``):
- ``reference``: the sequential loop over t, autograd through it. The ground truth.
- ``torch``: the chunked scan in pure PyTorch, any dtype and device. Time is cut into chunks of K ~ sqrt(T) steps;
  inside each chunk a sequential scan from zero runs over all chunks at once and ``cumprod``
  gives the chunk's running product of a; the chunk-end states are themselves a linear
  recurrence over chunks (solved recursively), and h = local + prod * carry. No division by
  products of a ever happens, so decays near 0 cannot blow up.
- ``compiled``: the C++ kernel of ``scan_cpu.cpp`` (CPU, real and complex), parallel over batch x
  channels, sequential in time.
- ``auto``: compiled for CPU tensors when the kernel builds, else torch.

The backend is always passed explicitly (the trainer's ``Runtime.kernels``, config key
``runtime.kernels``, handed to the model): there is no process-wide default.

Backward of every fast path is itself a reverse scan (chain rule through h_t = a_t h_{t-1} + b_t;
complex values follow PyTorch's convention grad_x(w x) = grad * conj(w)):
    g_t = dL/dh_t + conj(a_{t+1}) g_{t+1},  dL/db_t = g_t,  dL/da_t = g_t conj(h_{t-1}),
    dL/dh0 = conj(a_0) g_0  (h_{-1} = h0),
so training memory stays O(B T C).
"""

from __future__ import annotations

import math
from typing import Any

import torch

from blockyard.kernels import build, ops

KERNELS = ("auto", "compiled", "torch", "reference")
COMPILED_DTYPES = (torch.float32, torch.float64, torch.complex64, torch.complex128)
# Up to this many steps a plain loop is cheapest; longer sequences are cut into chunks.
SEQUENTIAL_MAX_STEPS = 8


# ----------------------------------------------------------------------------- backend choice


def check_backend(name: str) -> str:
    """``name`` if it is one of KERNELS, else ValueError naming the allowed ones."""
    if name not in KERNELS:
        raise ValueError(f"unknown kernels choice {name!r}; allowed: {', '.join(KERNELS)}")
    return name


def resolve_backend(a: torch.Tensor, backend: str = "auto") -> str:
    """The concrete backend ``linear_scan`` runs for inputs like ``a`` (may build the kernel).

    ``auto``: compiled for CPU tensors of a compiled dtype when the kernel builds, else torch.
    """
    if check_backend(backend) != "auto":
        return backend
    if a.device.type == "cpu" and a.dtype in COMPILED_DTYPES and build.load_kernels() is not None:
        return "compiled"
    return "torch"


def uses_fused_op(x: torch.Tensor, backend: str) -> bool:
    """Whether the C++ ops (``ops``: fused RG-LRU, conv, GeGLU, RMSNorm) run for inputs like ``x`` under
    ``backend`` (``runtime.kernels``): CPU float32 / bfloat16 / float64 inputs and a backend that resolves
    to ``compiled`` for the float32 (float64) the kernels compute in (``auto``: the kernels built)."""
    if x.device.type != "cpu" or x.dtype not in ops.FUSED_DTYPES:
        return False
    return resolve_backend(x.new_empty(0, dtype=ops.state_dtype(x.dtype)), backend) == "compiled"


def kernels_info(backend: str = "auto") -> dict[str, Any]:
    """For env.json: the requested backend (``runtime.kernels``), what it resolves to for CPU float32,
    and the kernel's build status."""
    probe = torch.empty(0, dtype=torch.float32)
    resolved = resolve_backend(probe, backend)
    return {
        "requested": check_backend(backend),
        "resolved_cpu_float32": resolved,
        # The real RG-LRU runs as the fused C++ op where the backend resolves to compiled.
        "rg_lru_cpu": ("fused C++ op" if resolved == "compiled"
                       else f"PyTorch ops around the {'chunked' if resolved == 'torch' else resolved} scan"),
        # The MLP's GeGLU unit and the RMSNorms run as C++ ops under the same condition.
        "geglu_rms_norm_cpu": "fused C++ ops" if resolved == "compiled" else "PyTorch ops",
        "compiled": build.build_status(),
    }


# ----------------------------------------------------------------------------- entry point


def linear_scan(
    a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor | None = None, *, backend: str = "auto"
) -> torch.Tensor:
    """h_t = a_t * h_{t-1} + b_t along dim 1 of ``a, b: (B, T, C)``, from ``h0: (B, C)`` (None: zeros)."""
    check_scan_inputs(a, b, h0)
    name = resolve_backend(a, backend)
    if name == "reference":
        return scan_reference(a, b, h0)
    if name == "torch":
        return scan_chunked(a, b, h0)
    return scan_compiled(a, b, h0)


def check_scan_inputs(a: Any, b: Any, h0: Any) -> None:
    """Raise TypeError/ValueError naming the argument when shapes, dtypes or devices disagree."""
    for arg, value in (("a", a), ("b", b)):
        if not isinstance(value, torch.Tensor):
            raise TypeError(f"linear_scan: {arg} must be a tensor, got {type(value).__name__}")
    if h0 is not None and not isinstance(h0, torch.Tensor):
        raise TypeError(f"linear_scan: h0 must be a tensor or None, got {type(h0).__name__}")
    if a.dim() != 3:
        raise ValueError(f"linear_scan: a must be (B, T, C), got shape {tuple(a.shape)}")
    if b.shape != a.shape:
        raise ValueError(f"linear_scan: b must have a's shape {tuple(a.shape)}, got {tuple(b.shape)}")
    batch, _, channels = a.shape
    if h0 is not None and h0.shape != (batch, channels):
        raise ValueError(f"linear_scan: h0 must be (B, C) = {(batch, channels)}, got {tuple(h0.shape)}")
    tensors = (a, b) if h0 is None else (a, b, h0)
    if not (a.is_floating_point() or a.is_complex()):
        raise TypeError(f"linear_scan: a must be a floating or complex tensor, got {a.dtype}")
    if any(t.dtype != a.dtype for t in tensors):
        raise TypeError(f"linear_scan: a, b and h0 must share one dtype, got {[t.dtype for t in tensors]}")
    if any(t.device != a.device for t in tensors):
        raise ValueError(f"linear_scan: a, b and h0 must be on one device, got {[str(t.device) for t in tensors]}")


def _needs_graph(*tensors: torch.Tensor | None) -> bool:
    return torch.is_grad_enabled() and any(t is not None and t.requires_grad for t in tensors)


def _zeros_state(a: torch.Tensor) -> torch.Tensor:
    return a.new_zeros(a.shape[0], a.shape[2])


# ----------------------------------------------------------------------------- reference


def scan_reference(a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor | None = None) -> torch.Tensor:
    """The sequential loop h_t = a_t * h_{t-1} + b_t (Martin & Cundy 2018, eq. 1); autograd through it."""
    h = _zeros_state(a) if h0 is None else h0
    states = []
    for t in range(a.shape[1]):
        h = a[:, t] * h + b[:, t]
        states.append(h)
    return torch.stack(states, dim=1) if states else b.clone()


# ----------------------------------------------------------------------------- chunked (pure torch)


def _sequential_forward(a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor) -> torch.Tensor:
    """The loop over dim 1 without autograd, writing into one preallocated output."""
    h = torch.empty_like(b)
    prev = h0
    for t in range(a.shape[1]):
        torch.addcmul(b[:, t], a[:, t], prev, out=h[:, t])
        prev = h[:, t]
    return h


def _chunk_length(steps: int) -> int:
    """K ~ sqrt(T): K sequential steps inside chunks plus T/K carries keeps the op count ~2 sqrt(T)."""
    return max(2, math.isqrt(steps - 1) + 1)


def chunked_forward(a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor) -> torch.Tensor:
    """The scan by chunks (no autograd); see the module docstring. ``h0`` must be a tensor."""
    batch, steps, channels = a.shape
    if steps <= SEQUENTIAL_MAX_STEPS:
        return _sequential_forward(a, b, h0)
    k = _chunk_length(steps)
    n = -(-steps // k)
    pad = n * k - steps
    if pad:  # identity steps (a = 1, b = 0) at the end leave the real states unchanged
        a = torch.cat([a, a.new_ones(batch, pad, channels)], dim=1)
        b = torch.cat([b, b.new_zeros(batch, pad, channels)], dim=1)
    a4 = a.reshape(batch, n, k, channels)
    b4 = b.reshape(batch, n, k, channels)
    # Local scan from a zero state inside every chunk at once: k steps over (B, n, C) slices.
    local = torch.empty_like(b4)
    local[:, :, 0] = b4[:, :, 0]
    for j in range(1, k):
        torch.addcmul(b4[:, :, j], a4[:, :, j], local[:, :, j - 1], out=local[:, :, j])
    decay = torch.cumprod(a4, dim=2)  # prod of a from the chunk start to each step; never divided by
    # The state at each chunk's end obeys the same recurrence over chunks.
    ends = chunked_forward(decay[:, :, -1], local[:, :, -1], h0)
    carry_in = torch.cat([h0[:, None], ends[:, :-1]], dim=1)
    local.addcmul_(decay, carry_in[:, :, None])
    h = local.reshape(batch, n * k, channels)
    return h[:, :steps].contiguous() if pad else h


def _reverse_grad(a: torch.Tensor, grad_h: torch.Tensor, scan) -> torch.Tensor:
    """g_t = dL/dh_t + conj(a_{t+1}) g_{t+1}: the forward scan run on time-reversed inputs."""
    a_next = torch.cat([a[:, 1:], a.new_zeros(a.shape[0], 1, a.shape[2])], dim=1).conj()
    return scan(a_next.flip(1), grad_h.flip(1), _zeros_state(a)).flip(1)


class _ChunkedScan(torch.autograd.Function):
    """Chunked forward; backward is a chunked reverse scan built from differentiable ops (so
    double backward works too)."""

    @staticmethod
    def forward(ctx, a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor | None) -> torch.Tensor:
        start = _zeros_state(a) if h0 is None else h0
        h = chunked_forward(a, b, start)
        ctx.save_for_backward(a, h, start)
        ctx.h0_given = h0 is not None
        return h

    @staticmethod
    def backward(ctx, grad_h: torch.Tensor):
        a, h, start = ctx.saved_tensors
        need_a, need_b, need_h0 = ctx.needs_input_grad
        g = _reverse_grad(a, grad_h, _ChunkedScan.apply)
        grad_a = g * torch.cat([start[:, None], h[:, :-1]], dim=1).conj() if need_a else None
        grad_h0 = a[:, 0].conj() * g[:, 0] if need_h0 and ctx.h0_given else None
        return grad_a, g if need_b else None, grad_h0


def scan_chunked(a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor | None = None) -> torch.Tensor:
    """The chunked pure-PyTorch scan (any dtype, any device)."""
    if a.shape[1] == 0:
        return b.clone()
    if _needs_graph(a, b, h0):
        return _ChunkedScan.apply(a, b, h0)
    return chunked_forward(a, b, _zeros_state(a) if h0 is None else h0)


# ----------------------------------------------------------------------------- compiled (C++)


def scan_compiled(a: torch.Tensor, b: torch.Tensor, h0: torch.Tensor | None = None) -> torch.Tensor:
    """The C++ kernel (CPU; float32/64, complex64/128) as the custom op ``blockyard::linear_scan``
    (fake kernel and autograd included); raises RuntimeError if it could not be built."""
    if a.device.type != "cpu":
        raise ValueError(f"scan backend 'compiled' runs on CPU tensors only, got {a.device}; use 'torch' or 'auto'")
    if a.dtype not in COMPILED_DTYPES:
        raise TypeError(f"scan backend 'compiled' supports {[str(d) for d in COMPILED_DTYPES]}, got {a.dtype}")
    start = _zeros_state(a) if h0 is None else h0.contiguous()
    return ops.linear_scan_op(a.contiguous(), b.contiguous(), start)
