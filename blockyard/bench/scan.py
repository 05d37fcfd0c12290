"""The linear scan's speed against the memory-bandwidth floor, through the kernels' own timing script."""

from __future__ import annotations

import math
import statistics
from pathlib import Path
from typing import Any


def _bench_scan_module() -> Any:
    """The kernels' own measuring code, ``scripts/bench_scan.py`` (not a package module: loaded by path)."""
    import importlib.util

    path = Path(__file__).resolve().parents[2] / "scripts" / "bench_scan.py"
    if not path.exists():
        return None
    spec = importlib.util.spec_from_file_location("blockyard_bench_scan", path)
    if spec is None or spec.loader is None:
        raise ImportError(f"{path}: cannot be loaded as a module")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def scan_figures(shape: tuple[int, int, int] = (16, 256, 256), repeats: int = 15) -> dict[str, Any]:
    """The scan fwd+bwd against one multiply-add fwd+bwd, per backend, and its bytes/s (medians).

    Bytes of a forward scan: a and b read, h written (3 fp32 tensors of ``shape``); of fwd+bwd
    8 (the backward reads dL/dh, a, h and writes dL/da, dL/db). Timing and inputs come from the
    kernels' own ``scripts/bench_scan.py`` (round-robin, so load from other processes hits all alike).
    """
    from blockyard.kernels import kernels_info, resolve_backend

    bs = _bench_scan_module()
    if bs is None:
        return {"error": "scripts/bench_scan.py not found"}
    info = kernels_info()  # builds the kernel first, outside the timings
    x = bs.make_inputs(shape)
    backends = ["torch"] + (["compiled"] if info["compiled"]["state"] == "built" else [])
    try:
        forward = bs.interleaved_times({"floor": bs.floor_forward(x)} |
                                       {n: bs.scan_forward(x, n) for n in backends}, 3, repeats)
        both = bs.interleaved_times({"floor": bs.floor_step(x)} | {n: bs.scan_step(x, n) for n in backends},
                                    3, repeats)
    except AttributeError as e:  # the script's helpers were renamed: say so instead of failing the whole run
        return {"error": f"scripts/bench_scan.py: {e}"}
    floor_fb = statistics.median(both["floor"])
    numel = math.prod(shape)
    out: dict[str, Any] = {"shape": list(shape), "floor_fwd_bwd_ms": floor_fb * 1e3, "backends": {},
                           "auto": resolve_backend(x["a"], "auto")}
    for name in backends:
        fwd, fwd_bwd = statistics.median(forward[name]), statistics.median(both[name])
        out["backends"][name] = {
            "fwd_ms": fwd * 1e3, "fwd_bwd_ms": fwd_bwd * 1e3, "ratio_to_floor": fwd_bwd / floor_fb,
            "fwd_gbytes_per_s": 3 * numel * 4 / fwd / 1e9, "fwd_bwd_gbytes_per_s": 8 * numel * 4 / fwd_bwd / 1e9,
        }
    return out
