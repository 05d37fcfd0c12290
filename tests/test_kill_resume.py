"""SIGKILL at random (seeded) moments, rerun each time: the result equals an uninterrupted one's.

(a) One training run with a checkpoint every step, killed 20 times (during start-up, training,
evaluation and checkpoint writes alike) and rerun after each kill: its ``metrics.jsonl`` equals an
uninterrupted run's line for line (``rundir.TIMING_FIELDS`` aside), and no rerun fails.
(b) A two-cell grid whose grid process alone is killed 5 times and rerun at once (its cells, told
by the kernel, write a checkpoint and stop while the rerun's cells wait for their run dirs): the
final ``results.csv`` losses equal an uninterrupted grid's.
"""

from __future__ import annotations

import csv
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
from _helpers import child_env, comparable, grid_command, write_tiny_run, write_word_corpus

from blockyard.config import load_config
from blockyard.grid.run import run_grid
from blockyard.rundir import read_metrics, read_summary
from blockyard.train import run_training

pytestmark = pytest.mark.slow  # full tier: kills and resumes real processes

WORDS = "kill the run at any moment and it must come back the same as if nothing had happened".split()


def last_step(run_dir: Path) -> int:
    lines = read_metrics(run_dir / "metrics.jsonl")
    return lines[-1]["step"] if lines else 0


# Each rerun is a fresh process forked from one that imported blockyard and torch once (as
# ``python -m blockyard train`` would be after its imports), so 21 runs cost seconds, not minutes.
_FORK_SERVER = r"""
import os, sys
from blockyard.cli import main
# The imports every run would repeat (torch's compiler stack and TensorBoard are the slow ones).
import torch._dynamo, torch.utils.tensorboard  # noqa: E401, F401
import blockyard.cost.memory, blockyard.data, blockyard.eval.probes, blockyard.model, blockyard.train  # noqa
args = sys.argv[1:]
for request in sys.stdin:
    err = request.strip()
    pid = os.fork()
    if pid == 0:
        fd = os.open(err, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
        os.dup2(fd, 2)
        try:
            code = main(args)
        except BaseException:
            import traceback
            traceback.print_exc()
            code = 1
        sys.stderr.flush()
        os._exit(code)
    print(pid, flush=True)
    _, status = os.waitpid(pid, 0)
    print(os.waitstatus_to_exitcode(status), flush=True)
"""


class ForkingRunner:
    """Runs ``blockyard ARGS`` again and again, each time as a new forked process (see above)."""

    def __init__(self, args: list[str], err: Path) -> None:
        self.server = subprocess.Popen([sys.executable, "-c", _FORK_SERVER, *args], env=child_env(), text=True,
                                       stdin=subprocess.PIPE, stdout=subprocess.PIPE)
        self.err = err  # the stderr of the latest run
        self.pid: int | None = None

    def start(self) -> int:
        self.server.stdin.write(f"{self.err}\n")
        self.server.stdin.flush()
        self.pid = int(self.server.stdout.readline())
        return self.pid

    def running(self) -> bool:
        try:
            with open(f"/proc/{self.pid}/stat") as f:
                return f.read().split(") ")[1][0] != "Z"  # not yet a zombie (its parent waits for it)
        except OSError:
            return False

    def wait(self) -> int:
        return int(self.server.stdout.readline())

    def stderr(self) -> str:
        return self.err.read_text() if self.err.exists() else ""

    def close(self) -> None:
        self.server.stdin.close()
        self.server.wait(60)


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="watches the forked runs through /proc (Linux)")
def test_training_killed_20_times_resumes_to_the_uninterrupted_metrics(tmp_path):
    train = {"steps": 150, "batch_size": 4, "warmup_steps": 5, "log_every": 1, "eval_every": 10,
             "checkpoint_every": 1, "keep_checkpoints": 2, "eval_windows": 2}
    write_tiny_run(tmp_path, WORDS, seed=3, train=train, lines=3000)
    run_training(load_config(tmp_path / "run.yaml"), tmp_path / "reference", progress="silent")
    out = tmp_path / "killed"
    runner = ForkingRunner(["train", str(tmp_path / "run.yaml"), "--out", str(out)], tmp_path / "run.err")
    rng = random.Random(20)
    kills, exits = 0, []
    try:
        while True:
            pid = runner.start()
            if kills < 20:
                if rng.random() < 0.2:  # now and then during start-up or resume, before a step is taken
                    time.sleep(rng.uniform(0.0, 0.5))
                else:  # else a few steps on, then a random moment into the next step(s) and their checkpoints
                    target = last_step(out) + rng.randint(1, 5)
                    while runner.running() and last_step(out) < target:
                        time.sleep(0.002)
                    time.sleep(rng.uniform(0.0, 0.03))
                if runner.running():
                    os.kill(pid, signal.SIGKILL)
                    kills += 1
            code = runner.wait()
            exits.append(code)
            assert code in (0, -signal.SIGKILL), runner.stderr()  # no rerun fails
            if code == 0:
                break
    finally:
        runner.close()
    assert kills == 20, f"the run finished after {kills} kills; give it more steps"
    assert exits.count(0) == 1
    assert read_summary(out)["status"] == "done"
    assert comparable(out) == comparable(tmp_path / "reference")


SPEC = """
name: killed
description: an overnight grid whose process is killed again and again
base:
  model: {width: 32, depth: 1, pattern: [global_attention]}
  runtime: {kernels: torch}
  data: {corpus: CORPUS, tokenizer: bytes, seq_len: 32}
  train: {steps: 1500, batch_size: 4, eval_every: 500, eval_windows: 2, log_every: 25, warmup_steps: 10,
          checkpoint_every: 100}
variants:
  attention: {}
  recurrence: {model.pattern: [recurrence]}
reference: attention
seeds: [0]
"""


def results(grid_dir: Path) -> dict[str, str]:
    with open(grid_dir / "results.csv") as f:
        return {row["id"]: row["final_val_loss"] for row in csv.DictReader(f)}


def grid_steps(grid_dir: Path) -> int:
    cells = grid_dir / "cells"
    return sum(last_step(c) for c in cells.iterdir()) if cells.is_dir() else 0


@pytest.mark.slow
def test_grid_killed_5_times_ends_with_the_uninterrupted_results(tmp_path):
    spec = tmp_path / "killed.yaml"
    corpus = write_word_corpus(tmp_path / "corpus.txt", WORDS, seed=3, lines=3000)
    spec.write_text(textwrap.dedent(SPEC).replace("CORPUS", str(corpus)))
    env = child_env(BLOCKYARD_CACHE=str(tmp_path / "cache"))
    os.environ["BLOCKYARD_CACHE"] = env["BLOCKYARD_CACHE"]  # for the in-process reference grid
    try:
        assert run_grid(spec, out=tmp_path / "reference", workers=1, threads=1, echo=lambda _: None) == 0
    finally:
        del os.environ["BLOCKYARD_CACHE"]
    grid_dir = tmp_path / "grid"
    command = grid_command(spec, grid_dir)
    rng = random.Random(5)
    kills = 0
    while True:
        proc = subprocess.Popen(command, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
        if kills < 5:
            target = grid_steps(grid_dir) + rng.randint(100, 500)  # a random point of the training ahead
            while proc.poll() is None and grid_steps(grid_dir) < target:
                time.sleep(0.01)
            time.sleep(rng.uniform(0.0, 0.2))
            if proc.poll() is None:
                proc.send_signal(signal.SIGKILL)  # the grid process alone: its cell stops by itself
                kills += 1
        out, _ = proc.communicate(timeout=600)
        assert proc.returncode in (0, -signal.SIGKILL), out
        if proc.returncode == 0:
            break
    assert kills == 5, f"the grid finished after {kills} kills; give its cells more steps"
    assert results(grid_dir) == results(tmp_path / "reference")
    assert all(loss for loss in results(grid_dir).values())
