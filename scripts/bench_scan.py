"""Time the scan backends side by side against the memory-bandwidth floor.

The floor is one elementwise multiply-add y = a * h + b over tensors of the scan's shape,
forward and backward: the scan cannot move less memory than that (it reads a and b and writes h;
its backward reads dL/dh, a and h and writes dL/da and dL/db). A copy's bandwidth is printed for
scale. Target: the compiled kernel within 1.2x the floor, forward + backward
(``blockyard.bench.targets.SCAN_TARGET_RATIO``).

    .venv/bin/python scripts/bench_scan.py [--threads 2] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import statistics
import time
from collections.abc import Callable
from pathlib import Path

import torch

from blockyard.bench.targets import SCAN_TARGET_RATIO as TARGET_RATIO
from blockyard.kernels import kernels_info, linear_scan


def interleaved_times(fns: dict[str, Callable[[], None]], warmup: int, repeats: int) -> dict[str, list[float]]:
    """Wall times of each ``fn``, run round-robin so that load from other processes hits all alike."""
    for fn in fns.values():
        for _ in range(warmup):
            fn()
    times: dict[str, list[float]] = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            start = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - start)
    return times


def make_inputs(shape: tuple[int, int, int], seed: int = 0) -> dict[str, torch.Tensor]:
    """Decays in (0.5, 1) (a stable recurrence), inputs, a start state and an upstream gradient."""
    gen = torch.Generator().manual_seed(seed)
    batch, _, channels = shape
    return {
        "a": (0.5 + 0.5 * torch.rand(shape, generator=gen)).requires_grad_(),
        "b": torch.randn(shape, generator=gen).requires_grad_(),
        "h0": torch.randn(batch, channels, generator=gen).requires_grad_(),
        "h": torch.randn(shape, generator=gen).requires_grad_(),
        "grad": torch.randn(shape, generator=gen),
    }


def clear_grads(x: dict[str, torch.Tensor]) -> None:
    for t in x.values():
        t.grad = None


def scan_step(x: dict[str, torch.Tensor], backend: str) -> Callable[[], None]:
    def run() -> None:
        clear_grads(x)
        out = linear_scan(x["a"], x["b"], x["h0"], backend=backend)
        out.backward(x["grad"])

    return run


def scan_forward(x: dict[str, torch.Tensor], backend: str) -> Callable[[], None]:
    def run() -> None:
        with torch.no_grad():
            linear_scan(x["a"], x["b"], x["h0"], backend=backend)

    return run


def floor_step(x: dict[str, torch.Tensor]) -> Callable[[], None]:
    def run() -> None:
        clear_grads(x)
        out = x["a"] * x["h"] + x["b"]
        out.backward(x["grad"])

    return run


def floor_forward(x: dict[str, torch.Tensor]) -> Callable[[], None]:
    def run() -> None:
        with torch.no_grad():
            _ = x["a"] * x["h"] + x["b"]

    return run


def copy_bandwidth_gbps(shape: tuple[int, int, int], warmup: int, repeats: int) -> float:
    """Bytes read + written per second by ``dst.copy_(src)`` at the scan's tensor size (median)."""
    src = torch.randn(shape)
    dst = torch.empty_like(src)
    seconds = statistics.median(interleaved_times({"copy": lambda: dst.copy_(src)}, warmup, repeats)["copy"])
    return 2 * src.numel() * src.element_size() / seconds / 1e9


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--shape", type=int, nargs=3, default=(16, 256, 256), metavar=("B", "T", "C"))
    parser.add_argument("--threads", type=int, default=2, help="torch intra-op threads")
    parser.add_argument("--warmup", type=int, default=3)
    parser.add_argument("--repeats", type=int, default=15)
    parser.add_argument("--json", type=Path, default=None, help="also write the results here")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    shape = tuple(args.shape)
    x = make_inputs(shape)
    info = kernels_info()  # builds the kernel first, outside the timings
    backends = ["reference", "torch"] + (["compiled"] if info["compiled"]["state"] == "built" else [])

    fns = {"multiply-add floor": (floor_forward(x), floor_step(x))}
    fns.update({name: (scan_forward(x, name), scan_step(x, name)) for name in backends})
    forward = interleaved_times({name: pair[0] for name, pair in fns.items()}, args.warmup, args.repeats)
    fwd_bwd = interleaved_times({name: pair[1] for name, pair in fns.items()}, args.warmup, args.repeats)
    gbps = copy_bandwidth_gbps(shape, args.warmup, args.repeats)

    floor_median = statistics.median(fwd_bwd["multiply-add floor"])
    floor_best = min(fwd_bwd["multiply-add floor"])
    print(f"shape {shape} float32, threads {args.threads}, median of {args.repeats}; copy bandwidth {gbps:.1f} GB/s")
    print(f"{'backend':<20} {'fwd ms':>9} {'fwd+bwd ms':>11} {'x floor':>8} {'best x floor':>13}")
    results = {}
    for name in fns:
        fwd, both, best = statistics.median(forward[name]), statistics.median(fwd_bwd[name]), min(fwd_bwd[name])
        results[name] = {
            "fwd_ms": fwd * 1e3,
            "fwd_bwd_ms": both * 1e3,
            "best_fwd_bwd_ms": best * 1e3,
            "ratio_to_floor": both / floor_median,
            "best_ratio_to_floor": best / floor_best,
        }
        row = results[name]
        print(
            f"{name:<20} {row['fwd_ms']:>9.3f} {row['fwd_bwd_ms']:>11.3f} {row['ratio_to_floor']:>8.2f}"
            f" {row['best_ratio_to_floor']:>13.2f}"
        )
    if "compiled" in results:
        ratio = results["compiled"]["ratio_to_floor"]
        verdict = "meets" if ratio <= TARGET_RATIO else "misses"
        print(f"compiled fwd+bwd is {ratio:.2f}x the multiply-add floor: {verdict} the target <= {TARGET_RATIO}x")
    else:
        print(f"compiled backend unavailable: {info['compiled']['error']}")
    if args.json:
        payload = {
            "shape": list(shape),
            "threads": args.threads,
            "repeats": args.repeats,
            "copy_gbps": gbps,
            "target_ratio": TARGET_RATIO,
            "results": results,
            "kernels_info": info,
        }
        args.json.write_text(json.dumps(payload, indent=2) + "\n")


if __name__ == "__main__":
    main()
