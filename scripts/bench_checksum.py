"""The cost of checksummed checkpoints: hashing one checkpoint against writing it, side by side.

Builds the model of ``configs/attention-global.yaml`` (width 256, depth 6), takes one AdamW step so
the optimizer holds its two moments, and times, round-robin so that load from other processes hits
all alike: writing the checkpoint as before checksums (``torch.save`` into an atomic, fsynced file),
writing it as the trainer now does (sha256 taken from the bytes as they are written, manifest
updated), hashing the written file (read + sha256, as ``blockyard verify`` does), and a resume's
read (verify + load) against a plain load. Prints medians and the ratios.

    .venv/bin/python scripts/bench_checksum.py [--rounds 7] [--threads 1]
"""

from __future__ import annotations

import argparse
import io
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import torch

from blockyard import fs, integrity
from blockyard.config import load_config
from blockyard.model import build_model
from blockyard.train import checkpoint as ckpt
from blockyard.train.optim import build_optimizer

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "attention-global.yaml"


def checkpoint_state() -> dict:
    cfg = load_config(CONFIG)
    torch.manual_seed(0)
    model = build_model(cfg.model, 256)
    optimizer = build_optimizer(model, cfg.train)
    tokens = torch.randint(0, 256, (2, 64))
    model(tokens).float().logsumexp(-1).mean().backward()
    optimizer.step()
    return {"format": ckpt.FORMAT, "step": 1, "config_hash": "bench", "model": model.state_dict(),
            "optimizer": optimizer.state_dict(), "scheduler": {}, "rng": ckpt.rng_state(), "loop": {}}


def round_robin(fns: dict[str, Callable[[], object]], rounds: int) -> dict[str, float]:
    for fn in fns.values():
        fn()
    times: dict[str, list[float]] = {name: [] for name in fns}
    for _ in range(rounds):
        for name, fn in fns.items():
            start = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - start)
    return {name: statistics.median(t) for name, t in times.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=7)
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    state = checkpoint_state()
    with tempfile.TemporaryDirectory() as tmp:
        plain, hashed = Path(tmp) / "plain" / "step_0000001.pt", Path(tmp) / "hashed" / "step_0000001.pt"
        plain.parent.mkdir()
        hashed.parent.mkdir()
        fns = {
            "write (no checksum)": lambda: fs.atomic_write(plain, lambda f: torch.save(state, f)),
            "write + sha256 while writing": lambda: ckpt.write_recorded(hashed, state, what="bench"),
            "sha256 of the written file": lambda: integrity.entry_of_file(hashed),
            "load (no checksum)": lambda: torch.load(io.BytesIO(hashed.read_bytes()), weights_only=True),
            "verify + load (resume)": lambda: ckpt.read_checkpoint(hashed, "bench"),
        }
        medians = round_robin(fns, args.rounds)
        size = hashed.stat().st_size
    params = sum(t.numel() for t in state["model"].values())
    print(f"checkpoint of {CONFIG.name}: {params:,d} model values, {size / 2**20:.1f} MiB; "
          f"median of {args.rounds} rounds, {args.threads} thread(s)")
    for name, s in medians.items():
        print(f"  {name:<30} {s * 1e3:8.1f} ms")
    write, hashed_write = medians["write (no checksum)"], medians["write + sha256 while writing"]
    print(f"hash / write: {medians['sha256 of the written file'] / write:.2f}; write with checksum / without: "
          f"{hashed_write / write:.2f}; verify + load / load: "
          f"{medians['verify + load (resume)'] / medians['load (no checksum)']:.2f}")


if __name__ == "__main__":
    main()
