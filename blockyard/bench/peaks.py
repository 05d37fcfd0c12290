"""This machine's ceilings, measured now: GEMM GFLOP/s, memory-copy GB/s, and what the CPU is.

Model FLOPs utilisation divides by the GEMM peak; the scan's bytes/s is compared with the copy
bandwidth. Both are best-of-n timings: other processes only ever slow a measurement down.
"""

from __future__ import annotations

import math
import os
import platform
import time
from collections.abc import Callable
from typing import Any

import torch


def _best_seconds(fn: Callable[[], Any], repeats: int, warmup: int = 2) -> float:
    """Shortest wall time of ``fn()`` over ``repeats`` calls (the least disturbed by other load)."""
    for _ in range(warmup):
        fn()
    best = math.inf
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def gemm_gflops(dtype: torch.dtype, n: int = 1024, repeats: int = 10) -> float:
    """Square matmul throughput, 2 n^3 FLOPs per product, in GFLOP/s: the ceiling for dense layers."""
    a = torch.randn(n, n).to(dtype)
    b = torch.randn(n, n).to(dtype)
    out = torch.empty(n, n, dtype=dtype)
    seconds = _best_seconds(lambda: torch.mm(a, b, out=out), repeats)
    return 2 * n**3 / seconds / 1e9


def copy_gbytes_per_s(nbytes: int = 256 * 2**20, repeats: int = 5) -> float:
    """Memory bandwidth of a large fp32 copy (bytes read + bytes written), in GB/s.

    The buffer is far larger than the last-level cache so this is DRAM bandwidth, the ceiling
    for memory-bound elementwise work such as the scan.
    """
    src = torch.randn(nbytes // 4)
    dst = torch.empty_like(src)
    seconds = _best_seconds(lambda: dst.copy_(src), repeats)
    return 2 * nbytes / seconds / 1e9


def machine_facts() -> dict[str, Any]:
    """CPU model, threads, torch version and capability, bf16 support, load average."""
    from blockyard.train.records import cpu_model
    from blockyard.train.runtime import cpu_bf16_support

    bf16, why = cpu_bf16_support()
    return {"cpu": cpu_model(), "threads": torch.get_num_threads(), "torch": torch.__version__,
            "capability": torch.backends.cpu.get_cpu_capability(), "bf16": bf16, "bf16_reason": why,
            "python": platform.python_version(), "load_average": list(os.getloadavg())}
