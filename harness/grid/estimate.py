"""Dry-run time estimates from a measured micro-benchmark (not from FLOPs).

For each distinct model of the grid we time a few real training steps (forward, backward,
AdamW update) on random tokens of the cell's batch shape, in this process, with the cell's
thread count, after one untimed warm-up step. Estimated cell time = planned tokens / measured
tokens/s. It leaves out evaluation, checkpoints and process start-up (a few seconds per cell),
so it is a lower bound; the real speed shows in the status line while the grid runs.
"""

from __future__ import annotations

import time

from harness.config import Config

TIMED_STEPS = 3


def measure_tokens_per_s(cfg: Config, threads: int, steps: int = TIMED_STEPS) -> float:
    """Training tokens/s of ``cfg``'s model on random tokens (one warm-up step, then ``steps`` timed)."""
    import torch

    from harness.grid.fairness import vocab_size
    from harness.model import build_model

    previous = torch.get_num_threads()
    torch.set_num_threads(max(1, threads))
    try:
        torch.manual_seed(0)
        vocab = vocab_size(cfg)
        model = build_model(cfg.model, vocab)
        opt = torch.optim.AdamW(model.parameters(), lr=cfg.train.lr)
        batch = cfg.train.batch_size
        tokens = torch.randint(0, vocab, (batch, cfg.data.seq_len + 1))
        x, y = tokens[:, :-1], tokens[:, 1:]

        def step() -> None:
            for _ in range(cfg.train.grad_accum):
                logits = model(x)
                loss = torch.nn.functional.cross_entropy(logits.reshape(-1, vocab), y.reshape(-1))
                loss.backward()
            opt.step()
            opt.zero_grad(set_to_none=True)

        step()
        start = time.perf_counter()
        for _ in range(steps):
            step()
        elapsed = time.perf_counter() - start
    finally:
        torch.set_num_threads(previous)
    return steps * batch * cfg.train.grad_accum * cfg.data.seq_len / elapsed
