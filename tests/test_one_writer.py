"""One writer per run dir, and a grid status that tells live cells from stopped ones.

A second ``train`` (or ``eval``) on a run dir that a live process writes is refused with one line
naming the dir, the writer's pid and how to watch it (exit 2), and changes nothing; the first run
finishes exactly as a lone run would. The lock is an OS lock (flock(2)), so a killed writer leaves
nothing behind that blocks the next one.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import pytest
from _helpers import child_env, comparable, start_grid, wait_until, write_tiny_run

from blockyard.cli import main
from blockyard.config import load_config
from blockyard.errors import UserError
from blockyard.grid.griddir import grid_lock
from blockyard.grid.index import open_index
from blockyard.grid.status import grid_progress, status_text
from blockyard.rundir import read_metrics, read_summary, writer_pid, writing
from blockyard.train import run_training


@pytest.fixture(scope="module")
def root(tmp_path_factory) -> Path:
    words = "a grid of small runs checked twice over one long night".split()
    train = {"steps": 600, "batch_size": 4, "warmup_steps": 2, "log_every": 5, "eval_every": 200,
             "checkpoint_every": 200, "eval_windows": 2}
    return write_tiny_run(tmp_path_factory.mktemp("writers"), words, seed=2, train=train)


@pytest.mark.slow
def test_a_second_train_on_a_live_run_dir_is_refused_and_the_first_is_unharmed(root):
    lone = root / "lone"
    run_training(load_config(root / "run.yaml"), lone, progress="silent")
    out = root / "shared"
    first = subprocess.Popen([sys.executable, "-m", "blockyard", "train", str(root / "run.yaml"), "--out", str(out)],
                             env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        wait_until(lambda: read_metrics(out / "metrics.jsonl"), 120, "the first run's first metric line")
        first.send_signal(signal.SIGSTOP)  # paused, still alive and holding the dir, until the second is done
        second = subprocess.run([sys.executable, "-m", "blockyard", "train", str(root / "run.yaml"), "--out", str(out)],
                                env=child_env(), capture_output=True, text=True, timeout=120)
        first.send_signal(signal.SIGCONT)
        assert second.returncode == 2
        assert second.stderr.splitlines() == [
            f"error: {out}: process {first.pid} is writing this run dir; watch it with: tail -f {out}/metrics.jsonl "
            "(or wait for it to end)"]
        _, err = first.communicate(timeout=300)
    finally:
        if first.poll() is None:
            first.send_signal(signal.SIGCONT)
            first.kill()
    assert first.returncode == 0, err
    assert "resuming" not in err
    assert comparable(out) == comparable(lone)
    assert writer_pid(out) is None


@pytest.mark.slow
def test_eval_and_force_on_a_live_run_dir_are_refused(root, capsys):
    out = root / "held"
    run_training(load_config(root / "run.yaml", ["train.steps=10"]), out, progress="silent")
    capsys.readouterr()
    before = {p.name: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file() and p.name != "writer.lock"}
    with writing(out):  # stands for a live trainer (the lock belongs to an open file, not a process)
        assert main(["eval", str(out), "--lengths", "1x"]) == 2
        assert main(["train", str(root / "run.yaml"), "--out", str(out), "--set", "train.steps=10", "--force"]) == 2
    errors = capsys.readouterr().err.splitlines()
    assert len(errors) == 2 and all(f"error: {out}: process {os.getpid()} is writing this run dir" in e
                                    for e in errors)
    assert {p.name: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file() and p.name != "writer.lock"} == before


@pytest.mark.slow
def test_wait_lets_a_cell_take_over_when_the_old_writer_ends(root):
    # A grid cell is started with --wait: after a grid process is killed, its cells still write
    # their last checkpoint while the rerun's cells start; those wait instead of failing.
    out = root / "handover"
    cfg = load_config(root / "run.yaml", ["train.steps=10"])
    holding = threading.Event()

    def old_writer() -> None:
        with writing(out):
            holding.set()
            time.sleep(1.5)

    thread = threading.Thread(target=old_writer)
    thread.start()
    holding.wait(10)
    with pytest.raises(UserError, match="is writing this run dir"):
        run_training(cfg, out, progress="silent")
    summary = run_training(cfg, out, progress="silent", wait_s=60)
    thread.join()
    assert summary["status"] == "done"


@pytest.mark.slow
def test_a_killed_trainer_leaves_no_lock_behind(root):
    out = root / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "blockyard", "train", str(root / "run.yaml"), "--out", str(out)],
                            env=child_env(), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wait_until(lambda: writer_pid(out) == proc.pid, 120, "the trainer to hold its run dir")
    proc.send_signal(signal.SIGKILL)
    proc.wait(30)
    assert writer_pid(out) is None


# ----------------------------------------------------------------------------- grid status after a crash

SPEC = """
name: crash
description: a cell left running by a grid process that died
base:
  model: {width: 32, depth: 1, pattern: [global_attention]}
  runtime: {kernels: torch}
  data: {corpus: CORPUS, tokenizer: bytes, seq_len: 32}
  train: {steps: 5000, batch_size: 4, eval_every: 200, eval_windows: 2, log_every: 5, warmup_steps: 2,
          checkpoint_every: 20}
variants:
  one: {}
reference: one
seeds: [0, 1]
"""


@pytest.mark.slow
def test_status_after_the_grid_and_its_cell_were_killed_says_stopped(root, tmp_path):
    spec = tmp_path / "crash.yaml"
    spec.write_text(textwrap.dedent(SPEC).replace("CORPUS", str(root / "corpus.txt")))
    grid_dir = tmp_path / "grid"
    proc = start_grid(spec, grid_dir, env=child_env(BLOCKYARD_CACHE=str(root / "cache")))
    cell = grid_dir / "cells" / "one-seed0"
    try:
        wait_until(lambda: len(read_metrics(cell / "metrics.jsonl")) >= 2, 240, "the first cell's metric lines")
        assert "1 running" in status_text(grid_dir)  # alive: running
    finally:
        os.killpg(proc.pid, signal.SIGKILL)  # grid and cell at once: nobody records anything
        proc.wait(30)
    wait_until(lambda: writer_pid(cell) is None, 30, "the killed cell's lock to go")
    with open_index(grid_dir, readonly=True) as index:
        assert index.cell("one-seed0")["status"] == "running"  # what the dead grid left in its index
    text = status_text(grid_dir)
    lines = text.splitlines()
    assert lines[0].startswith("grid crash: 0/2 done, 0 running, 1 stopped, 0 failed, 1 left | no cell running")
    assert lines[1].startswith("  stopped one-seed0: step ") and lines[1].endswith("no process writes it")
    assert lines[-1] == "  (no grid process holds this dir now: rerun the grid command to resume)"


def test_a_cell_done_but_not_yet_indexed_counts_as_done(tmp_path):
    with open_index(tmp_path) as index:
        index.plan([{"id": cid, "variant": "v", "seed": s, "point": [], "config_hash": cid, "adjustments": {},
                     "planned_tokens": 1000, "flops_per_token": None, "params_total": 1, "params_non_embedding": 1}
                    for s, cid in enumerate(["finished", "next"])])
        index.mark_running("finished")
    cell = tmp_path / "cells" / "finished"
    cell.mkdir(parents=True)
    (cell / "summary.json").write_text(json.dumps({"status": "done", "steps": 10, "final_val_loss": 2.0}))
    (cell / "metrics.jsonl").write_text(json.dumps({"step": 10, "split": "train", "tokens": 1000}) + "\n")
    with contextlib.ExitStack() as alive:
        alive.enter_context(grid_lock(tmp_path))  # even while the grid process lives
        progress = grid_progress(tmp_path)
    assert (progress.done, progress.running, progress.stopped, progress.left) == (1, 0, 0, 1)
    assert read_summary(cell)["status"] == "done"
