"""What a run dir holds besides checkpoints: metrics.jsonl, TensorBoard events, summary.json, env.json.

``metrics.jsonl`` has one JSON object per line, in step order:

- train lines (every ``train.log_every`` steps, step 1 and the last step):
  ``step, split="train", loss, lr, grad_norm, tokens, tokens_per_s, wall_s``
- val lines (every ``train.eval_every`` steps and the last step):
  ``step, split="val", loss, bits_per_token`` and ``accuracy`` on synthetic tasks, ``wall_s``

``loss`` is in nats per target token. Non-finite numbers are written as ``null`` (strict JSON).
The timing fields (``rundir.TIMING_FIELDS``) differ between two runs of the same config; every other
field is a deterministic function of the config (same machine and thread count), which is what
exact resume promises. Reading a run dir back (without torch) is ``blockyard.rundir``'s job.
"""

from __future__ import annotations

import json
import math
import os
import platform
import socket
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any

import torch

from blockyard import fs
from blockyard.rundir import read_metrics

# ----------------------------------------------------------------------------- json records


def json_safe(value: Any) -> Any:
    """``value`` with non-finite floats replaced by None (JSON has no NaN or infinity)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def write_json(path: Path, data: dict[str, Any], *, what: str = "") -> None:
    """``data`` as indented JSON, written atomically (``what`` names it in a write-failure message)."""
    fs.atomic_write_text(path, json.dumps(json_safe(data), indent=2) + "\n", what=what or Path(path).name)


# ----------------------------------------------------------------------------- metrics.jsonl


def format_line(line: dict[str, Any]) -> str:
    return json.dumps(json_safe(line)) + "\n"


class MetricsLog:
    """Appends lines to ``metrics.jsonl`` and keeps them in memory for the summary.

    Each line is appended whole or not at all (``fs.append_all``): a full disk leaves no half line.
    """

    def __init__(self, path: Path, lines: list[dict[str, Any]] | None = None) -> None:
        self.path = Path(path)
        self.lines: list[dict[str, Any]] = list(lines or [])
        with fs.reporting(self.path, "the metrics"):
            self._fd: int | None = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)

    @classmethod
    def resume(cls, path: Path, step: int) -> MetricsLog:
        """Keep the lines up to and including ``step`` (those a checkpoint at ``step`` has seen).

        Lines written after that checkpoint and before an interruption would be written again by
        the resumed run, so they are dropped; the file is rewritten atomically.
        """
        kept = [line for line in read_metrics(path) if line["step"] <= step]
        fs.atomic_write_text(path, "".join(format_line(line) for line in kept), what="the metrics")
        return cls(path, kept)

    def append(self, line: dict[str, Any]) -> None:
        assert self._fd is not None, "append after close"
        fs.append_all(self._fd, format_line(line).encode(), self.path, f"the metrics line of step {line['step']}")
        self.lines.append(line)

    def sync(self) -> None:
        """Make the lines written so far durable (called with each checkpoint)."""
        if self._fd is not None:
            with fs.reporting(self.path, "the metrics"):
                os.fsync(self._fd)

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None

    def of_split(self, split: str) -> list[dict[str, Any]]:
        return [line for line in self.lines if line.get("split") == split]


# ----------------------------------------------------------------------------- tensorboard


class TensorBoardLog:
    """The numeric fields of each metric line as scalars ``<split>/<field>`` at ``step``.

    On resume, ``purge_step`` makes TensorBoard drop points after the checkpoint that an
    interrupted segment had already written, so no step appears twice.
    """

    def __init__(self, log_dir: Path, purge_step: int | None = None) -> None:
        from torch.utils.tensorboard import SummaryWriter

        _quiet_event_thread_errors()
        self.log_dir = Path(log_dir)
        with self._reporting():
            self.writer = SummaryWriter(log_dir=str(log_dir), purge_step=purge_step)

    def _reporting(self) -> Any:
        return fs.reporting(self.log_dir, "TensorBoard events")

    def log(self, line: dict[str, Any]) -> None:
        step, split = line["step"], line["split"]
        with self._reporting():
            for key, value in line.items():
                if key in ("step", "split") or isinstance(value, bool) or not isinstance(value, (int, float)):
                    continue
                if isinstance(value, float) and not math.isfinite(value):
                    continue
                self.writer.add_scalar(f"{split}/{key}", value, global_step=step)

    def flush(self) -> None:
        with self._reporting():
            self.writer.flush()

    def close(self) -> None:
        with self._reporting():
            self.writer.close()


def _quiet_event_thread_errors() -> None:
    """Keep an OSError of TensorBoard's writer thread from printing a thread traceback.

    TensorBoard writes events from a background thread, which stores the error and re-raises it at
    the next ``add_scalar`` / ``flush`` in the main thread; there :class:`TensorBoardLog` turns it
    into the one-line write failure. Other threads' errors still reach the previous hook.
    """
    previous = threading.excepthook
    if getattr(previous, "blockyard_quiet_events", False):
        return

    def hook(args: Any) -> None:
        if isinstance(args.exc_value, OSError) and type(args.thread).__name__ == "_AsyncWriterThread":
            return
        previous(args)

    hook.blockyard_quiet_events = True  # type: ignore[attr-defined]
    threading.excepthook = hook


# ----------------------------------------------------------------------------- env.json


def cpu_model() -> str:
    """The CPU's model name from /proc/cpuinfo (Linux), else what ``platform`` knows."""
    try:
        for raw in Path("/proc/cpuinfo").read_text().splitlines():
            key, _, value = raw.partition(":")
            if key.strip() == "model name":
                return value.strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def git_commit() -> str | None:
    """HEAD of the git repo holding the blockyard package, or None (not a checkout, no git)."""
    package_dir = Path(__file__).resolve().parent.parent
    try:
        out = subprocess.run(["git", "rev-parse", "HEAD"], cwd=package_dir, capture_output=True, text=True,
                             timeout=10, check=False)
    except (OSError, subprocess.SubprocessError):
        return None
    commit = out.stdout.strip()
    return commit if out.returncode == 0 and commit else None


def environment(**run_facts: Any) -> dict[str, Any]:
    """Versions, machine and ``run_facts`` (device, threads, precision, kernels, ...)."""
    return {
        "python": sys.version.split()[0],
        "torch": torch.__version__,
        "platform": platform.platform(),
        "cpu_model": cpu_model(),
        "cpu_count": os.cpu_count(),
        "hostname": socket.gethostname(),
        "git_commit": git_commit(),
        **run_facts,
    }
