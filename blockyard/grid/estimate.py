"""Dry-run time estimates from a measured micro-benchmark (not from FLOPs).

For each distinct model of the grid we time a few of the trainer's own steps
(``blockyard.train.loop.train_step``: forward, backward, clipping, AdamW update) on random tokens of
the cell's batch shape, in this process, with the cell's runtime (precision, kernels,
activation checkpointing) and thread count, after one untimed warm-up step. Estimated cell time =
planned tokens / measured tokens/s. It leaves out evaluation, checkpoints and process start-up (a
few seconds per cell), so it is a lower bound; the real speed shows in the status line while the
grid runs.
"""

from __future__ import annotations

import time

from blockyard.config import Config

TIMED_STEPS = 3


def measure_tokens_per_s(cfg: Config, threads: int, steps: int = TIMED_STEPS) -> float:
    """Training tokens/s of ``cfg`` on random tokens (one warm-up step, then ``steps`` timed)."""
    import torch

    from blockyard.grid.fairness import vocab_size
    from blockyard.model import build_model
    from blockyard.train.allocator import keep_freed_memory
    from blockyard.train.loop import train_step
    from blockyard.train.optim import build_optimizer, build_scheduler
    from blockyard.train.runtime import resolve_runtime

    previous = torch.get_num_threads()
    torch.set_num_threads(max(1, threads))
    try:
        runtime, _ = resolve_runtime(cfg.runtime)  # its warnings reach the user when the cell trains
        keep_freed_memory()  # the cell's trainer does the same
        torch.manual_seed(0)
        vocab = vocab_size(cfg)
        model = build_model(cfg.model, vocab, activation_checkpointing=cfg.runtime.activation_checkpointing,
                            kernels=runtime.kernels)
        model.to(runtime.device)
        opt = build_optimizer(model, cfg.train)
        sched = build_scheduler(opt, cfg.train, steps + 1)
        tokens = torch.randint(0, vocab, (cfg.train.batch_size, cfg.data.seq_len + 1))
        micro = [(tokens[:, :-1], tokens[:, 1:])] * cfg.train.grad_accum

        def step() -> None:
            train_step(model, opt, sched, micro, runtime, cfg.train.grad_clip)

        step()
        start = time.perf_counter()
        for _ in range(steps):
            step()
        elapsed = time.perf_counter() - start
    finally:
        torch.set_num_threads(previous)
    return steps * cfg.train.batch_size * cfg.train.grad_accum * cfg.data.seq_len / elapsed
