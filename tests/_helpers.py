"""Helpers shared by the tests that train tiny runs and grids on disk and drive the CLI on them.

A tiny run (a random-word corpus and a one-block config that trains in seconds), grid spec files,
the checks on a run dir or grid dir a test compares before and after, polling for a state another
process reaches, and a file whose writes fail as write(2) does on a full disk. (conftest.py holds
the mixer and plugin helpers.)
"""

from __future__ import annotations

import hashlib
import os
import random
import subprocess
import sys
import textwrap
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
import torch
import yaml

from blockyard.cli import main
from blockyard.errors import UserError
from blockyard.grid.index import open_index
from blockyard.grid.plan import plan_cells, plan_rows
from blockyard.grid.spec import load_grid
from blockyard.model import build_model
from blockyard.rundir import read_metrics, without_timing

REPO = Path(__file__).resolve().parents[1]


def child_env(**extra: str) -> dict[str, str]:
    """The environment for ``python -m blockyard`` in a child process: this checkout's package, one thread."""
    return {**os.environ, "PYTHONPATH": str(REPO), "OMP_NUM_THREADS": "1", **extra}


# ----------------------------------------------------------------------------- tiny runs


def write_word_corpus(path: Path, words: list[str], *, seed: int, lines: int, words_per_line: int = 12) -> Path:
    """``lines`` lines of ``words_per_line`` words drawn from ``words`` (seeded): a corpus tiny runs learn fast."""
    rng = random.Random(seed)
    path.write_text("\n".join(" ".join(rng.choice(words) for _ in range(words_per_line)) for _ in range(lines)))
    return path


def tiny_run_config(root: Path, train: dict[str, Any], **sections: dict[str, Any]) -> dict[str, Any]:
    """A run config: one width-32 attention block on ``root/corpus.txt`` (byte tokens, seq_len 32, cache
    under ``root``), trained as ``train`` says, one thread; ``sections`` replace whole sections."""
    return {
        "model": {"width": 32, "depth": 1, "pattern": ["global_attention"]},
        "data": {"corpus": str(root / "corpus.txt"), "tokenizer": "bytes", "seq_len": 32,
                 "cache_dir": str(root / "cache")},
        "train": train,
        "runtime": {"threads": 1},
        **sections,
    }


def write_tiny_run(root: Path, words: list[str], *, seed: int, train: dict[str, Any], lines: int = 2000) -> Path:
    """``root`` with ``corpus.txt`` (:func:`write_word_corpus`) and ``run.yaml`` (:func:`tiny_run_config`, the
    chunked scan so that no process builds the compiled kernel), for tests that run ``blockyard train``."""
    write_word_corpus(root / "corpus.txt", words, seed=seed, lines=lines)
    config = tiny_run_config(root, train, runtime={"threads": 1, "kernels": "torch"})
    (root / "run.yaml").write_text(yaml.safe_dump(config))
    return root


def comparable(run_dir: Path) -> list[dict]:
    """A run's metric lines without their timing fields: equal for two runs that trained the same."""
    return [without_timing(line) for line in read_metrics(run_dir / "metrics.jsonl")]


def wait_until(predicate: Callable[[], Any], timeout: float, what: str) -> Any:
    """Poll ``predicate`` until it returns something truthy (returned) or fail after ``timeout`` s naming ``what``."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.02)
    raise AssertionError(f"timed out waiting for {what}")


# ----------------------------------------------------------------------------- grids


def write_grid(tmp_path: Path, text: str, name: str = "grid.yaml") -> Path:
    """The grid spec ``text`` (dedented) written to ``tmp_path / name``."""
    path = tmp_path / name
    path.write_text(textwrap.dedent(text))
    return path


def grid_command(spec: Path, grid_dir: Path) -> list[str]:
    """``blockyard grid`` on ``spec`` into ``grid_dir`` as a child process's argv: one worker, one thread."""
    return [sys.executable, "-m", "blockyard", "grid", str(spec), "--out", str(grid_dir), "--workers", "1",
            "--threads", "1"]


def start_grid(spec: Path, grid_dir: Path, env: dict[str, str] | None = None) -> subprocess.Popen:
    """:func:`grid_command` started with its output discarded, in a session of its own so that a test can kill
    the grid process alone (its pid) or with its cells (its process group)."""
    return subprocess.Popen(grid_command(spec, grid_dir), env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)


def tree_snapshot(folder: Path) -> dict[str, tuple[float, str]]:
    """mtime and sha256 of every file under ``folder``: equal snapshots mean nothing was written there."""
    return {str(p.relative_to(folder)): (p.stat().st_mtime_ns, hashlib.sha256(p.read_bytes()).hexdigest())
            for p in sorted(folder.rglob("*")) if p.is_file()}


def check_refused_at_parse(path: Path, message: str, grid_dir: Path, capsys: pytest.CaptureFixture) -> UserError:
    """The spec at ``path`` fails to load with a one-line error starting ``message``, and ``blockyard grid`` on it
    exits 2 printing just that line, leaving ``grid_dir`` (an existing grid dir) untouched. Returns the error."""
    with pytest.raises(UserError) as err:
        load_grid(path)
    assert str(err.value).startswith(message), str(err.value)
    assert "\n" not in str(err.value)
    before = tree_snapshot(grid_dir)
    capsys.readouterr()
    assert main(["grid", str(path), "--out", str(grid_dir)]) == 2
    out, errors = capsys.readouterr()
    assert errors == f"error: {err.value}\n" and out == ""
    assert tree_snapshot(grid_dir) == before
    return err.value


def earlier_grid_dir(tmp_path: Path, spec_text: str) -> Path:
    """``tmp_path/grid_dir``: the index of the grid ``spec_text`` (one cell, ``base-seed0``), that cell marked
    finished and a finished-looking dir for it; what a refused command must leave untouched."""
    grid_dir = tmp_path / "grid_dir"
    grid_dir.mkdir()
    with open_index(grid_dir) as index:
        index.plan(plan_rows(plan_cells(load_grid(write_grid(tmp_path, spec_text, "earlier.yaml")), threads=1)))
        index.mark_finished("base-seed0", "done", summary={"final_val_loss": 1.5})
    (grid_dir / "cells" / "base-seed0").mkdir(parents=True)
    (grid_dir / "cells" / "base-seed0" / "summary.json").write_text('{"status": "done"}')
    return grid_dir


def real_non_embedding(cfg) -> int:
    """Non-embedding parameters counted on a built (CPU) model with torch's numel, independently of the
    analytic count that matching and ladder budgets use."""
    torch.manual_seed(0)
    model = build_model(cfg.model, 256)
    embed = model.embed.weight.numel() + (model.head.weight.numel() if model.head is not None else 0)
    return sum(p.numel() for p in model.parameters()) - embed


# ----------------------------------------------------------------------------- failing writes


class FailingFile:
    """A real file whose writes fail with ``number``, as write(2) does on a full or broken disk."""

    def __init__(self, raw, number: int) -> None:
        self.raw, self.number = raw, number

    def write(self, data):
        raise OSError(self.number, os.strerror(self.number))

    def __getattr__(self, name):
        return getattr(self.raw, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.raw.close()


def curve_grid(grid_dir: Path, losses: dict[str, dict[int, list[float]]], *, reference: str, design_json: str,
               tokens_per_step: int = 128, eval_every: int = 10) -> None:
    """A grid dir without training: ``losses`` = variant -> seed -> validation loss at steps eval_every, 2 x
    eval_every, ...; each cell done with its last loss as the final one, its metrics.jsonl holding a train line
    (with tokens) and a val line per evaluation."""
    import json

    rows = [{"id": f"{v}-seed{s}", "variant": v, "seed": s, "point": [], "config_hash": f"{v}{s}", "adjustments": {},
             "planned_tokens": len(curve) * eval_every * tokens_per_step, "flops_per_token": 1000.0,
             "params_total": 2000, "params_non_embedding": 1000}
            for v, seeds in losses.items() for s, curve in seeds.items()]
    grid_dir.mkdir(parents=True, exist_ok=True)
    with open_index(grid_dir) as index:
        index.plan(rows)
        index.set_meta({"name": "curves", "reference": reference, "match": "none", "design": design_json})
        for v, seeds in losses.items():
            for s, curve in seeds.items():
                cid = f"{v}-seed{s}"
                lines = []
                for i, loss in enumerate(curve, start=1):
                    step = i * eval_every
                    lines.append({"step": step, "split": "train", "loss": loss + 0.1, "tokens": step * tokens_per_step,
                                  "tokens_per_s": 1000.0, "wall_s": step * 0.1})
                    lines.append({"step": step, "split": "val", "loss": loss, "wall_s": step * 0.1})
                cell = grid_dir / "cells" / cid
                cell.mkdir(parents=True)
                (cell / "metrics.jsonl").write_text("".join(json.dumps(ln) + "\n" for ln in lines))
                steps = len(curve) * eval_every
                summary = {"status": "done", "final_val_loss": curve[-1], "best_val_loss": min(curve),
                           "tokens_seen": steps * tokens_per_step, "steps": steps, "wall_s": 1.0}
                index.mark_running(cid)
                index.mark_finished(cid, "done", summary=summary, exit_code=0)
