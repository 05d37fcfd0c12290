"""The linear scan h_t = a_t * h_{t-1} + b_t: sequential reference, chunked PyTorch, compiled C++.

``linear_scan(a, b, h0, backend=...)`` is the one entry point (the backend, config key
``runtime.scan``, is passed explicitly); ``scan_backend_info`` reports what it resolves to.
``ops`` holds the C++ kernels as torch custom ops, among them the fused RG-LRU.
"""

from blockyard.kernels.scan import (
    SCAN_BACKENDS,
    check_backend,
    linear_scan,
    resolve_backend,
    scan_backend_info,
    scan_chunked,
    scan_compiled,
    scan_reference,
    uses_fused_op,
)

__all__ = [
    "SCAN_BACKENDS",
    "check_backend",
    "linear_scan",
    "resolve_backend",
    "scan_backend_info",
    "scan_chunked",
    "scan_compiled",
    "scan_reference",
    "uses_fused_op",
]
