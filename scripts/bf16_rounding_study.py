"""How far does bf16-sized rounding move the 300-step validation loss? A study that runs on any CPU.

The bf16 quality check (``harness bench --quality``) needs bf16 units. This script asks the
question behind its setting on a CPU without them: train the benchmark's global-attention case
in fp32, and again from the same seed on the same batches with the inputs and outputs of the ops
CPU autocast runs in bf16 (matmuls, linear, SDPA, conv1d) rounded to bf16 and the math kept in
fp32. That is not the real bf16 path (elementwise ops between matmuls stay fp32 here), but it
perturbs the trajectory by the same order of rounding, so it shows whether a setting is too
chaotic for a +-1% comparison. Each line printed is one pair: final val loss fp32, rounded, and
the relative difference.

    .venv/bin/python scripts/bf16_rounding_study.py --lr 1e-3 --seeds 0,1,2 [--threads 1]
"""

from __future__ import annotations

import argparse
import contextlib
import json
import sys
import tempfile
from pathlib import Path
from typing import Any, NoReturn

import torch
import torch.nn.functional as F
from torch.overrides import TorchFunctionMode

# The CPU autocast ops that run in bf16 and that the harness's models call (torch's autocast docs).
ROUNDED_OPS = {F.linear, torch.matmul, torch.Tensor.matmul, torch.Tensor.__matmul__, torch.bmm, torch.mm,
               torch.addmm, torch.baddbmm, F.scaled_dot_product_attention, F.conv1d}


def round_to_bf16(x: Any) -> Any:
    """An fp32 tensor rounded to the nearest bf16 value (still fp32); anything else unchanged."""
    if isinstance(x, torch.Tensor) and x.dtype == torch.float32:
        return x.to(torch.bfloat16).to(torch.float32)
    return x


class RoundedMatmuls(TorchFunctionMode):
    """Round the inputs and outputs of ``ROUNDED_OPS`` to bf16; backward rounds their gradients too."""

    def __torch_function__(self, func, types, args=(), kwargs=None):  # noqa: ANN001, ANN204
        kwargs = kwargs or {}
        if func not in ROUNDED_OPS:
            return func(*args, **kwargs)
        out = func(*(round_to_bf16(a) for a in args), **{k: round_to_bf16(v) for k, v in kwargs.items()})
        return round_to_bf16(out)


def final_val_loss(seed: int, lr: float, steps: int, threads: int, rounded: bool, cache: Path) -> float:
    """Train the benchmark's quality case once; its final validation loss."""
    from harness.bench import BenchCase, harness_run

    case = BenchCase("study-rounded" if rounded else "study-fp32", "global_attention", 256, 16)
    with RoundedMatmuls() if rounded else contextlib.nullcontext():
        run = harness_run(case, steps, 10, cache, threads, eval_windows=32, eval_every=steps, seed=seed, lr=lr)
    return run["summary"]["final_val_loss"]


def fail(message: str) -> NoReturn:
    """A one-line error on stderr, exit code 2 (bad input)."""
    print(f"error: {message}", file=sys.stderr)
    raise SystemExit(2)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lr", type=float, default=1e-3, help="peak learning rate (default 1e-3)")
    parser.add_argument("--seeds", default="0,1,2", help="comma-separated seeds (default 0,1,2)")
    parser.add_argument("--steps", type=int, default=300, help="training steps (default 300)")
    parser.add_argument("--threads", type=int, default=0, help="torch threads (default 0 = every core)")
    args = parser.parse_args()
    try:
        seeds = [int(s) for s in args.seeds.split(",")]
    except ValueError:
        fail(f"--seeds {args.seeds!r}: give integers separated by commas, e.g. 0,1,2")
    if not 0 < args.lr <= 1 or args.steps < 20:
        fail(f"--lr {args.lr} / --steps {args.steps}: need 0 < lr <= 1 and steps >= 20")
    with tempfile.TemporaryDirectory(prefix="harness-study-") as cache:
        for seed in seeds:
            fp32 = final_val_loss(seed, args.lr, args.steps, args.threads, False, Path(cache))
            rounded = final_val_loss(seed, args.lr, args.steps, args.threads, True, Path(cache))
            print(json.dumps({"lr": args.lr, "seed": seed, "fp32": fp32, "rounded": rounded,
                              "relative_difference": (rounded - fp32) / fp32}), flush=True)


if __name__ == "__main__":
    main()
