"""The C++ kernels and the linear scan h_t = a_t * h_{t-1} + b_t (sequential reference, chunked PyTorch, C++).

``runtime.kernels`` (auto, compiled, torch, reference) chooses between the C++ ops of ``ops`` (the
scan, the fused RG-LRU, the causal conv, GeGLU, RMSNorm) and torch's; it is passed explicitly.
``linear_scan(a, b, h0, backend=...)`` is the scan's one entry point; ``kernels_info`` reports
what a choice resolves to; ``build.load_kernels`` builds and loads every kernel.
"""

from blockyard.kernels.scan import (
    KERNELS,
    check_backend,
    kernels_info,
    linear_scan,
    resolve_backend,
    scan_chunked,
    scan_compiled,
    scan_reference,
    uses_fused_op,
)

__all__ = [
    "KERNELS",
    "check_backend",
    "linear_scan",
    "resolve_backend",
    "kernels_info",
    "scan_chunked",
    "scan_compiled",
    "scan_reference",
    "uses_fused_op",
]
