"""bf16 training numerics on a CPU without bf16 units, at about 0.6x fp32 speed.

``runtime.precision: bf16_emulated`` runs torch's real bf16 autocast (the same ops cast to bf16,
bf16 activations, bf16 elementwise kernels, fp32 softmax and loss), but computes each bf16
matrix product and convolution as fp32 math on the same bf16 values and rounds the result once
to bf16. A bf16 GEMM unit with fp32 accumulators (AVX512-BF16, AMX) computes exactly that: the
products of two bf16 numbers are exact in fp32, the sums accumulate in fp32, and the output is
rounded to nearest-even once (Kalamkar et al. 2019, "A Study of BFLOAT16 for Deep Learning
Training", arXiv:1905.12322; the AVX512-BF16 instruction set reference). Only the order of the
fp32 sums can differ, which moves an output by at most one bf16 rounding, and rarely.

Why: without those units torch computes bf16 GEMMs at a few % of fp32 speed, so the question
"does bf16 change my result?" could only be asked of a machine that has them. Attention keeps
torch's own bf16 kernel (the same code on every CPU, so the same numerics). Its backward runs
about 5x slower than fp32 without bf16 units, which holds a global-attention model to about 0.6x
fp32 speed; computing it in fp32 instead was faster but less faithful (the gradient's bf16 error
agreed less with torch's: cosine 0.92 against 0.96). The LSTM's fused oneDNN bf16
kernel cannot run without bf16 units, so under emulation torch's native LSTM runs instead
(per-step bf16 gate GEMMs, emulated as above, with the cell math in torch's own kernels).
"""

from __future__ import annotations

import contextlib
from collections import Counter
from collections.abc import Iterator
from typing import Any

import torch
from torch.utils._python_dispatch import TorchDispatchMode
from torch.utils._pytree import tree_flatten, tree_map

aten = torch.ops.aten

#: The aten ops whose bf16 form is a GEMM or convolution (forward and backward) on CPU: the ops
#: that run slowly without bf16 units and that a bf16 unit computes with fp32 accumulation.
EMULATED_OPS = frozenset({
    aten.mm.default, aten.addmm.default, aten.bmm.default, aten.baddbmm.default,
    aten.mv.default, aten.addmv.default, aten.dot.default,
    aten.convolution.default, aten.convolution_backward.default,
})


def _is_bf16(x: Any) -> bool:
    return isinstance(x, torch.Tensor) and x.dtype == torch.bfloat16


def _widen(x: Any) -> Any:
    return x.float() if _is_bf16(x) else x


def _narrow(x: Any) -> Any:
    return x.to(torch.bfloat16) if isinstance(x, torch.Tensor) and x.dtype == torch.float32 else x


def emulated_bf16_op(func: Any, args: tuple[Any, ...], kwargs: dict[str, Any]) -> Any:
    """``func`` on bf16 tensors computed in fp32 on the same values, every output rounded once to bf16."""
    return tree_map(_narrow, func(*tree_map(_widen, args), **tree_map(_widen, kwargs)))


class EmulatedBf16Gemms(TorchDispatchMode):
    """Reroute every bf16 op of :data:`EMULATED_OPS` through :func:`emulated_bf16_op`.

    A dispatch mode sits below autograd, so it sees the GEMMs of the backward pass too (as long
    as it is active when ``backward()`` runs). ``counts`` tallies the ops it rerouted.
    """

    def __init__(self) -> None:
        super().__init__()
        self.counts: Counter[str] = Counter()

    def __torch_dispatch__(self, func, types, args=(), kwargs=None):  # noqa: ANN001, ANN204
        kwargs = kwargs or {}
        if func in EMULATED_OPS and any(_is_bf16(a) for a in tree_flatten((args, kwargs))[0]):
            self.counts[str(func.overloadpacket)] += 1
            return emulated_bf16_op(func, args, kwargs)
        return func(*args, **kwargs)


@contextlib.contextmanager
def emulated_bf16_gemms() -> Iterator[EmulatedBf16Gemms]:
    """Activate the emulation, with oneDNN off so that torch's native LSTM replaces oneDNN's bf16 one."""
    # torch.backends.mkldnn.flags() would also set oneDNN's TF32 switch, which warns on CPU builds.
    was_enabled = torch._C._get_mkldnn_enabled()
    torch._C._set_mkldnn_enabled(False)
    try:
        with EmulatedBf16Gemms() as mode:
            yield mode
    finally:
        torch._C._set_mkldnn_enabled(was_enabled)
