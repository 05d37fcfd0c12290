"""The linear scan h_t = a_t * h_{t-1} + b_t: sequential reference, chunked PyTorch, compiled C++.

``linear_scan(a, b, h0, backend=...)`` is the one entry point; ``set_scan_backend`` sets the
default (config key ``runtime.scan``) and ``scan_backend_info`` reports what it resolves to.
"""

from blockyard.kernels.scan import (
    SCAN_BACKENDS,
    get_scan_backend,
    linear_scan,
    resolve_backend,
    scan_backend_info,
    scan_chunked,
    scan_compiled,
    scan_reference,
    set_scan_backend,
)

__all__ = [
    "SCAN_BACKENDS",
    "get_scan_backend",
    "linear_scan",
    "resolve_backend",
    "scan_backend_info",
    "scan_chunked",
    "scan_compiled",
    "scan_reference",
    "set_scan_backend",
]
