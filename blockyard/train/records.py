"""What a run dir holds besides checkpoints: metrics.jsonl, TensorBoard events, summary.json, env.json.

``metrics.jsonl`` has one JSON object per line, in step order:

- train lines (every ``train.log_every`` steps, step 1 and the last step):
  ``step, split="train", loss, lr, grad_norm, tokens, tokens_per_s, wall_s``
- val lines (every ``train.eval_every`` steps and the last step):
  ``step, split="val", loss, bits_per_token`` and ``accuracy`` on synthetic tasks, ``wall_s``

``loss`` is in nats per target token. Non-finite numbers are written as ``null`` (strict JSON).
The timing fields (:data:`TIMING_FIELDS`) differ between two runs of the same config; every other
field is a deterministic function of the config (same machine and thread count), which is what
exact resume promises.
"""

from __future__ import annotations

import json
import math
import os
import platform
import socket
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

import torch

#: ``blockyard eval``'s results inside a run dir (they describe one checkpoint of one config).
EVAL_FILE = "eval.json"

#: Files and folders a run owns inside its dir; ``--force`` removes these and nothing else.
RECORD_NAMES = ("config.yaml", "metrics.jsonl", "summary.json", "env.json", "checkpoints", "tb", EVAL_FILE,
                "plugins")

#: Fields that measure time and so differ between otherwise identical runs.
TIMING_FIELDS = ("tokens_per_s", "wall_s")


# ----------------------------------------------------------------------------- atomic files


def fsync_dir(path: Path) -> None:
    """Make a rename inside ``path`` durable (POSIX: the directory entry lives in the dir)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write(path: Path, write: Any) -> None:
    """Write ``path`` via ``write(fileobj)`` into a temp file of the same dir, fsync, then rename.

    A reader (or a later resume) sees either the old file or the complete new one, never a
    partial write, even after a crash or ``kill -9``.
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            write(f)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)


def atomic_write_text(path: Path, text: str) -> None:
    atomic_write(path, lambda f: f.write(text.encode()))


def json_safe(value: Any) -> Any:
    """``value`` with non-finite floats replaced by None (JSON has no NaN or infinity)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def write_json(path: Path, data: dict[str, Any]) -> None:
    atomic_write_text(path, json.dumps(json_safe(data), indent=2) + "\n")


def read_json(path: Path) -> dict[str, Any] | None:
    """The JSON object in ``path``, or None when missing or unreadable."""
    try:
        data = json.loads(Path(path).read_text())
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


# ----------------------------------------------------------------------------- metrics.jsonl


def parse_metrics(text: str) -> list[dict[str, Any]]:
    """The metric lines of ``text``, stopping at the first unparseable line (a write cut by a kill)."""
    lines = []
    for raw in text.splitlines():
        if not raw.strip():
            continue
        try:
            line = json.loads(raw)
        except ValueError:
            break
        if not isinstance(line, dict) or "step" not in line:
            break
        lines.append(line)
    return lines


def read_metrics(path: Path) -> list[dict[str, Any]]:
    try:
        return parse_metrics(Path(path).read_text())
    except FileNotFoundError:
        return []


def without_timing(line: dict[str, Any]) -> dict[str, Any]:
    """A metric line minus :data:`TIMING_FIELDS`: what two identical runs agree on exactly."""
    return {k: v for k, v in line.items() if k not in TIMING_FIELDS}


def format_line(line: dict[str, Any]) -> str:
    return json.dumps(json_safe(line)) + "\n"


class MetricsLog:
    """Appends lines to ``metrics.jsonl`` and keeps them in memory for the summary."""

    def __init__(self, path: Path, lines: list[dict[str, Any]] | None = None) -> None:
        self.path = Path(path)
        self.lines: list[dict[str, Any]] = list(lines or [])
        self._file = open(self.path, "a", encoding="utf-8")  # noqa: SIM115 - closed in close()

    @classmethod
    def resume(cls, path: Path, step: int) -> MetricsLog:
        """Keep the lines up to and including ``step`` (those a checkpoint at ``step`` has seen).

        Lines written after that checkpoint and before an interruption would be written again by
        the resumed run, so they are dropped; the file is rewritten atomically.
        """
        kept = [line for line in read_metrics(path) if line["step"] <= step]
        atomic_write_text(path, "".join(format_line(line) for line in kept))
        return cls(path, kept)

    def append(self, line: dict[str, Any]) -> None:
        self._file.write(format_line(line))
        self._file.flush()
        self.lines.append(line)

    def sync(self) -> None:
        """Make the lines written so far durable (called with each checkpoint)."""
        self._file.flush()
        os.fsync(self._file.fileno())

    def close(self) -> None:
        if not self._file.closed:
            self._file.flush()
            self._file.close()

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

        self.writer = SummaryWriter(log_dir=str(log_dir), purge_step=purge_step)

    def log(self, line: dict[str, Any]) -> None:
        step, split = line["step"], line["split"]
        for key, value in line.items():
            if key in ("step", "split") or isinstance(value, bool) or not isinstance(value, (int, float)):
                continue
            if isinstance(value, float) and not math.isfinite(value):
                continue
            self.writer.add_scalar(f"{split}/{key}", value, global_step=step)

    def flush(self) -> None:
        self.writer.flush()

    def close(self) -> None:
        self.writer.close()


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
    """Versions, machine and ``run_facts`` (device, threads, precision, scan backend, ...)."""
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
