"""The C++ kernels as torch custom operators (``torch.library``), each with a fake-tensor kernel and autograd.

Registered under the stable names ``blockyard::linear_scan``, ``rg_lru``, ``causal_conv``, ``geglu``,
``gelu_mul`` and ``rms_norm`` (and their backward ops), their implementations call the compiled
library of ``build.py``, whose namespace is a hash of the source. The fake kernels only describe
output shapes and dtypes, so FakeTensorMode (the memory estimator) and ``torch.compile`` trace
through the ops without the library, or a compiler, being present.

The ops are first-derivative only (their backward ops have no autograd of their own); the
pure-PyTorch paths (``runtime.kernels: torch``: ``blockyard.kernels.scan``, ``rg_lru_reference``,
torch's own conv, GeLU and norm) remain the references, the fallback when the library cannot be
built, and support double backward.
"""

from __future__ import annotations

from typing import Any

import torch
from torch import Tensor

from blockyard.kernels import build

# Input dtypes of the fused ops (RG-LRU, conv, GeGLU; the RG-LRU state is float32, float64 for float64 inputs).
FUSED_DTYPES = (torch.float32, torch.bfloat16, torch.float64)


def compiled_ops() -> Any:
    """``torch.ops.<hashed namespace>`` of the built library; RuntimeError naming the build error if it failed."""
    ops = build.load_kernels()
    if ops is None:
        raise RuntimeError(f"runtime.kernels: compiled is unavailable: {build.build_status()['error']}")
    return ops


def state_dtype(dtype: torch.dtype) -> torch.dtype:
    """The dtype the recurrence state is kept in for inputs of ``dtype``: float32 at least."""
    return torch.promote_types(dtype, torch.float32)


# ----------------------------------------------------------------------------- linear scan


@torch.library.custom_op("blockyard::linear_scan", mutates_args=())
def linear_scan_op(a: Tensor, b: Tensor, h0: Tensor) -> Tensor:
    """h_t = a_t h_{t-1} + b_t over dim 1 (contiguous CPU a, b: (B, T, C); h0: (B, C))."""
    return compiled_ops().forward(a, b, h0)


@linear_scan_op.register_fake
def _(a: Tensor, b: Tensor, h0: Tensor) -> Tensor:
    return torch.empty_like(a)


@torch.library.custom_op("blockyard::linear_scan_backward", mutates_args=())
def linear_scan_backward_op(grad_h: Tensor, a: Tensor, h: Tensor, h0: Tensor, need_grad_a: bool
                            ) -> tuple[Tensor, Tensor, Tensor]:
    """(dL/da or an empty tensor, dL/db, dL/dh0) of the scan (reverse scan in C++)."""
    grad_a, grad_b, grad_h0 = compiled_ops().backward(grad_h, a, h, h0, need_grad_a)
    return grad_a, grad_b, grad_h0


@linear_scan_backward_op.register_fake
def _(grad_h: Tensor, a: Tensor, h: Tensor, h0: Tensor, need_grad_a: bool) -> tuple[Tensor, Tensor, Tensor]:
    grad_a = torch.empty_like(a) if need_grad_a else a.new_empty(0)
    return grad_a, torch.empty_like(a), torch.empty_like(h0)


def _scan_setup(ctx: Any, inputs: tuple[Any, ...], output: Tensor) -> None:
    a, _b, h0 = inputs
    ctx.save_for_backward(a, output, h0)


def _scan_backward(ctx: Any, grad_h: Tensor) -> tuple[Tensor | None, ...]:
    a, h, h0 = ctx.saved_tensors
    need_a, need_b, need_h0 = ctx.needs_input_grad
    grad_a, grad_b, grad_h0 = linear_scan_backward_op(grad_h.contiguous(), a, h, h0, need_a)
    return grad_a if need_a else None, grad_b if need_b else None, grad_h0 if need_h0 else None


linear_scan_op.register_autograd(_scan_backward, setup_context=_scan_setup)


# ----------------------------------------------------------------------------- fused RG-LRU


@torch.library.custom_op("blockyard::rg_lru", mutates_args=())
def rg_lru_op(x: Tensor, gate_a: Tensor | None, gate_x: Tensor | None, decay: Tensor, h0: Tensor, c: float,
              input_norm: bool) -> Tensor:
    """The RG-LRU's states h (B, T, C) in one pass (``rglru_cpu.cpp``); gates both given or both None."""
    return compiled_ops().rglru_forward(x, gate_a, gate_x, decay, h0, c, input_norm)


@rg_lru_op.register_fake
def _(x: Tensor, gate_a: Tensor | None, gate_x: Tensor | None, decay: Tensor, h0: Tensor, c: float,
      input_norm: bool) -> Tensor:
    return x.new_empty(x.shape, dtype=state_dtype(x.dtype))


@torch.library.custom_op("blockyard::rg_lru_backward", mutates_args=())
def rg_lru_backward_op(grad_h: Tensor, x: Tensor, gate_a: Tensor | None, gate_x: Tensor | None, decay: Tensor,
                       h0: Tensor, h: Tensor, c: float, input_norm: bool
                       ) -> tuple[Tensor, Tensor, Tensor, Tensor, Tensor]:
    """(dx, dgate_a, dgate_x, ddecay, dh0); the gate gradients are empty tensors without gates."""
    grads = compiled_ops().rglru_backward(grad_h, x, gate_a, gate_x, decay, h0, h, c, input_norm)
    return tuple(grads)


@rg_lru_backward_op.register_fake
def _(grad_h: Tensor, x: Tensor, gate_a: Tensor | None, gate_x: Tensor | None, decay: Tensor, h0: Tensor,
      h: Tensor, c: float, input_norm: bool) -> tuple[Tensor, Tensor, Tensor, Tensor, Tensor]:
    gate = torch.empty_like(x) if gate_a is not None else x.new_empty(0)
    return torch.empty_like(x), gate, gate.clone(), torch.empty_like(decay), torch.empty_like(h0)


def _rg_lru_setup(ctx: Any, inputs: tuple[Any, ...], output: Tensor) -> None:
    x, gate_a, gate_x, decay, h0, c, input_norm = inputs
    ctx.save_for_backward(x, gate_a, gate_x, decay, h0, output)
    ctx.c, ctx.input_norm = c, input_norm


def _rg_lru_backward(ctx: Any, grad_h: Tensor) -> tuple[Tensor | None, ...]:
    x, gate_a, gate_x, decay, h0, h = ctx.saved_tensors
    dx, dga, dgx, ddecay, dh0 = rg_lru_backward_op(grad_h.contiguous(), x, gate_a, gate_x, decay, h0, h,
                                                   ctx.c, ctx.input_norm)
    need = ctx.needs_input_grad
    gated = gate_a is not None
    return (dx if need[0] else None, dga if gated and need[1] else None, dgx if gated and need[2] else None,
            ddecay if need[3] else None, dh0 if need[4] else None, None, None)


rg_lru_op.register_autograd(_rg_lru_backward, setup_context=_rg_lru_setup)


def rg_lru_fused(x: Tensor, decay: Tensor, gate_a_logits: Tensor | None = None, gate_x_logits: Tensor | None = None,
                 *, c: float = 8.0, input_norm: bool = True, h0: Tensor | None = None) -> Tensor:
    """The RG-LRU through the fused op, same signature and math as ``rg_lru_reference``: states (B, T, C).

    x and the gate logits: float32, bfloat16 or float64 CPU tensors (cast to x's dtype); Lambda
    and h0 are cast to the state dtype. Raises RuntimeError when the library could not be built.
    """
    if x.device.type != "cpu" or x.dtype not in FUSED_DTYPES:
        raise TypeError(f"the fused RG-LRU op takes CPU {[str(d) for d in FUSED_DTYPES]} inputs, "
                        f"got {x.dtype} on {x.device}")
    if (gate_a_logits is None) != (gate_x_logits is None):
        raise ValueError("the fused RG-LRU op takes both gate logits or neither")
    sdt = state_dtype(x.dtype)
    gates = [None if g is None else g.to(x.dtype).contiguous() for g in (gate_a_logits, gate_x_logits)]
    start = x.new_zeros(x.shape[0], x.shape[2], dtype=sdt) if h0 is None else h0.to(sdt).contiguous()
    return rg_lru_op(x.contiguous(), gates[0], gates[1], decay.to(sdt).contiguous(), start, float(c), input_norm)


# ----------------------------------------------------------------------------- causal depthwise conv


@torch.library.custom_op("blockyard::causal_conv", mutates_args=())
def causal_conv_op(x: Tensor, tail: Tensor | None, weight: Tensor, bias: Tensor) -> Tensor:
    """y_t = bias + sum_k weight[:, k] x_{t-K+1+k} per channel, (B, T, C) in and out (``conv_cpu.cpp``)."""
    return compiled_ops().causal_conv_forward(x, tail, weight, bias)


@causal_conv_op.register_fake
def _(x: Tensor, tail: Tensor | None, weight: Tensor, bias: Tensor) -> Tensor:
    return x.new_empty(x.shape, dtype=state_dtype(x.dtype))


@torch.library.custom_op("blockyard::causal_conv_backward", mutates_args=())
def causal_conv_backward_op(grad_y: Tensor, x: Tensor, tail: Tensor | None, weight: Tensor
                            ) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    """(dx, dtail or an empty tensor, dweight, dbias) of the causal depthwise conv."""
    return tuple(compiled_ops().causal_conv_backward(grad_y, x, tail, weight))


@causal_conv_backward_op.register_fake
def _(grad_y: Tensor, x: Tensor, tail: Tensor | None, weight: Tensor) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    dtail = x.new_empty(0) if tail is None else torch.empty_like(tail)
    return (x.new_empty(x.shape), dtail, torch.empty_like(weight, memory_format=torch.contiguous_format),
            weight.new_empty(weight.shape[0]))


def _conv_setup(ctx: Any, inputs: tuple[Any, ...], output: Tensor) -> None:
    x, tail, weight, _bias = inputs
    ctx.save_for_backward(x, tail, weight)


def _conv_backward(ctx: Any, grad_y: Tensor) -> tuple[Tensor | None, ...]:
    x, tail, weight = ctx.saved_tensors
    dx, dtail, dweight, dbias = causal_conv_backward_op(grad_y.contiguous(), x, tail, weight)
    need = ctx.needs_input_grad
    return (dx if need[0] else None, dtail if tail is not None and need[1] else None,
            dweight if need[2] else None, dbias if need[3] else None)


causal_conv_op.register_autograd(_conv_backward, setup_context=_conv_setup)


def causal_conv_fused(x: Tensor, weight: Tensor, bias: Tensor, tail: Tensor | None = None) -> Tensor:
    """The causal depthwise conv through the C++ op: same math as ``causal_depthwise_conv``'s y.

    x: a (B, T, C) float32, bfloat16 or float64 CPU tensor, channels contiguous (any other strides:
    no copy); weight (C, K), bias (C,) and the output are in the state dtype (float32 for bfloat16
    inputs: the sum of the K taps is rounded once, into the float32 the RG-LRU reads); the tail
    (B, K-1, C), the inputs before x, is cast to x's dtype as the reference does.
    """
    if x.device.type != "cpu" or x.dtype not in FUSED_DTYPES:
        raise TypeError(f"the fused causal conv takes CPU {[str(d) for d in FUSED_DTYPES]} inputs, "
                        f"got {x.dtype} on {x.device}")
    if x.shape[-1] > 1 and x.stride(-1) != 1:
        x = x.contiguous()
    sdt = state_dtype(x.dtype)
    tail = None if tail is None else tail.to(x.dtype).contiguous()
    return causal_conv_op(x, tail, weight.to(sdt), bias.to(sdt).contiguous())


# ----------------------------------------------------------------------------- GeGLU unit of the MLP


@torch.library.custom_op("blockyard::geglu", mutates_args=())
def geglu_op(h: Tensor) -> Tensor:
    """GeLU(a) * b for h = [a | b] split in halves of its last dim (``geglu_cpu.cpp``); h contiguous."""
    return compiled_ops().geglu_forward(h)


@geglu_op.register_fake
def _(h: Tensor) -> Tensor:
    return h.new_empty((*h.shape[:-1], h.shape[-1] // 2))


@torch.library.custom_op("blockyard::geglu_backward", mutates_args=())
def geglu_backward_op(grad: Tensor, h: Tensor) -> Tensor:
    """dL/dh of the GeGLU unit, both halves in one tensor of h's shape."""
    return compiled_ops().geglu_backward(grad, h)


@geglu_backward_op.register_fake
def _(grad: Tensor, h: Tensor) -> Tensor:
    return torch.empty_like(h)


def _geglu_setup(ctx: Any, inputs: tuple[Any, ...], output: Tensor) -> None:
    ctx.save_for_backward(inputs[0])


def _geglu_backward(ctx: Any, grad: Tensor) -> Tensor:
    (h,) = ctx.saved_tensors
    return geglu_backward_op(grad.to(h.dtype).contiguous(), h)


geglu_op.register_autograd(_geglu_backward, setup_context=_geglu_setup)


def geglu_fused(h: Tensor) -> Tensor:
    """GeLU(a) * b (exact erf GeLU) for h = [a | b], through the C++ op: same math as
    ``blockyard.model.geglu_reference``, one pass forward and one backward.

    h: a float32, bfloat16 or float64 CPU tensor with an even last dim (copied if not contiguous);
    the output has h's dtype. Raises RuntimeError when the library could not be built.
    """
    if h.device.type != "cpu" or h.dtype not in FUSED_DTYPES:
        raise TypeError(f"the fused GeGLU op takes CPU {[str(d) for d in FUSED_DTYPES]} inputs, "
                        f"got {h.dtype} on {h.device}")
    if h.shape[-1] % 2:
        raise ValueError(f"the fused GeGLU op splits the last dim in halves, got {h.shape[-1]}")
    return geglu_op(h.contiguous())


@torch.library.custom_op("blockyard::gelu_mul", mutates_args=())
def gelu_mul_op(a: Tensor, b: Tensor) -> Tensor:
    """GeLU(a) * b for (N, H) a and b of one dtype, rows at any stride (``geglu_cpu.cpp``)."""
    return compiled_ops().gelu_mul_forward(a, b)


@gelu_mul_op.register_fake
def _(a: Tensor, b: Tensor) -> Tensor:
    return a.new_empty(a.shape)


@torch.library.custom_op("blockyard::gelu_mul_backward", mutates_args=())
def gelu_mul_backward_op(grad: Tensor, a: Tensor, b: Tensor) -> tuple[Tensor, Tensor]:
    """(dL/da, dL/db) of ``gelu_mul``, contiguous."""
    da, db = compiled_ops().gelu_mul_backward(grad, a, b)
    return da, db


@gelu_mul_backward_op.register_fake
def _(grad: Tensor, a: Tensor, b: Tensor) -> tuple[Tensor, Tensor]:
    return a.new_empty(a.shape), a.new_empty(a.shape)


def _gelu_mul_setup(ctx: Any, inputs: tuple[Any, ...], output: Tensor) -> None:
    ctx.save_for_backward(*inputs)


def _gelu_mul_backward(ctx: Any, grad: Tensor) -> tuple[Tensor, Tensor]:
    a, b = ctx.saved_tensors
    return gelu_mul_backward_op(grad.to(a.dtype).contiguous(), a, b)


gelu_mul_op.register_autograd(_gelu_mul_backward, setup_context=_gelu_mul_setup)


def gelu_mul_fused(a: Tensor, b: Tensor) -> Tensor:
    """GeLU(a) * b (exact erf GeLU) of same-shaped CPU tensors through the C++ op, in a's dtype (b is
    cast to it): the same math as ``F.gelu(a) * b``, one pass forward and one backward. ``a`` may be a
    strided view (a half of a projection's output): it is read in place where its rows are evenly spaced."""
    if a.device.type != "cpu" or a.dtype not in FUSED_DTYPES or a.shape != b.shape:
        raise TypeError(f"the fused GeLU product takes same-shaped CPU {[str(d) for d in FUSED_DTYPES]} inputs, "
                        f"got {a.dtype} {tuple(a.shape)} and {b.dtype} {tuple(b.shape)} on {a.device}")
    width = a.shape[-1]
    rows = [t.reshape(-1, width) for t in (a, b.to(a.dtype))]  # views where the strides allow
    rows = [t if width <= 1 or t.stride(-1) == 1 else t.contiguous() for t in rows]
    return gelu_mul_op(*rows).reshape(a.shape)


# ----------------------------------------------------------------------------- RMSNorm


@torch.library.custom_op("blockyard::rms_norm", mutates_args=())
def rms_norm_op(x: Tensor, weight: Tensor, eps: float) -> tuple[Tensor, Tensor]:
    """(y, 1 / rms per row) of RMSNorm over the last dim of a contiguous (N, D) x (``rmsnorm_cpu.cpp``)."""
    y, rstd = compiled_ops().rms_norm_forward(x, weight, eps)
    return y, rstd


@rms_norm_op.register_fake
def _(x: Tensor, weight: Tensor, eps: float) -> tuple[Tensor, Tensor]:
    return torch.empty_like(x), x.new_empty(x.shape[0], dtype=weight.dtype)


@torch.library.custom_op("blockyard::rms_norm_backward", mutates_args=())
def rms_norm_backward_op(grad_y: Tensor, x: Tensor, weight: Tensor, rstd: Tensor) -> tuple[Tensor, Tensor]:
    """(dL/dx, dL/dweight) of ``rms_norm``."""
    dx, dw = compiled_ops().rms_norm_backward(grad_y, x, weight, rstd)
    return dx, dw


@rms_norm_backward_op.register_fake
def _(grad_y: Tensor, x: Tensor, weight: Tensor, rstd: Tensor) -> tuple[Tensor, Tensor]:
    return torch.empty_like(x), torch.empty_like(weight)


def _rms_norm_setup(ctx: Any, inputs: tuple[Any, ...], output: tuple[Tensor, Tensor]) -> None:
    x, weight, _eps = inputs
    ctx.save_for_backward(x, weight, output[1])


def _rms_norm_backward(ctx: Any, grad_y: Tensor, _grad_rstd: Tensor | None) -> tuple[Tensor | None, ...]:
    x, weight, rstd = ctx.saved_tensors
    dx, dw = rms_norm_backward_op(grad_y.to(x.dtype).contiguous(), x, weight, rstd)
    return dx, dw if ctx.needs_input_grad[1] else None, None


rms_norm_op.register_autograd(_rms_norm_backward, setup_context=_rms_norm_setup)


def rms_norm_fused(x: Tensor, weight: Tensor, eps: float) -> Tensor:
    """RMSNorm over x's last dim through the C++ op: x / sqrt(mean(x^2) + eps) * weight, in x's dtype.

    The same math as ``torch.nn.functional.rms_norm(x, (D,), weight, eps)``, one pass forward and
    one backward. x: a float32, bfloat16 or float64 CPU tensor; weight: (D,), cast to the compute
    dtype (float32; float64 for float64 x).
    """
    if x.device.type != "cpu" or x.dtype not in FUSED_DTYPES:
        raise TypeError(f"the fused RMSNorm takes CPU {[str(d) for d in FUSED_DTYPES]} inputs, "
                        f"got {x.dtype} on {x.device}")
    rows = x.reshape(-1, x.shape[-1]).contiguous()
    y, _ = rms_norm_op(rows, weight.to(state_dtype(x.dtype)).contiguous(), float(eps))
    return y.reshape(x.shape)
