"""What a person watching a run sees: a tqdm bar on a terminal, plain log lines otherwise.

Both go to stderr, so stdout stays free for a command's result. Log lines (not a TTY, e.g.
a grid worker's log file) are written every ``train.log_every`` steps:
``step 120/300  loss 2.3456  lr 2.10e-03  tok/s 12,345  eta 1m23s``.
"""

from __future__ import annotations

import sys
import time
from typing import Any, TextIO

from blockyard.rundir import format_duration


class Progress:
    """Interface: the trainer calls ``start``, ``advance`` after every step, ``step`` per train log
    line, ``val`` per val line, ``message`` for anything else, and ``close``."""

    def start(self, total: int, initial: int) -> None: ...

    def advance(self, step: int) -> None: ...

    def step(self, line: dict[str, Any]) -> None: ...

    def val(self, line: dict[str, Any]) -> None: ...

    def message(self, text: str) -> None: ...

    def close(self) -> None: ...


class Silent(Progress):
    """Messages only (warnings, start and end lines); no per-step output."""

    def __init__(self, stream: TextIO | None = None) -> None:
        self.stream = stream

    def message(self, text: str) -> None:
        print(text, file=self.stream or sys.stderr, flush=True)


class WarningsOnly(Silent):
    """Warnings only: for callers that run many short trainings and print their own lines (the benchmark)."""

    def message(self, text: str) -> None:
        if text.startswith("warning"):
            super().message(text)


class LogLines(Silent):
    """One plain line per train log line, with an ETA from this segment's mean step time."""

    def start(self, total: int, initial: int) -> None:
        self.total, self.initial = total, initial
        self.t0 = time.perf_counter()

    def step(self, line: dict[str, Any]) -> None:
        step = line["step"]
        done = step - self.initial
        elapsed = time.perf_counter() - self.t0
        eta = elapsed / done * (self.total - step) if done > 0 else float("nan")
        parts = [
            f"step {step}/{self.total}",
            f"loss {_number(line['loss'])}",
            f"lr {line['lr']:.2e}",
            f"tok/s {line['tokens_per_s']:,.0f}",
            f"eta {format_duration(eta)}" if eta == eta else "eta ?",
        ]
        self.message("  ".join(parts))

    def val(self, line: dict[str, Any]) -> None:
        self.message(_val_text(line))


class Bar(Progress):
    """A tqdm bar showing loss and tokens/s (tqdm adds rate and ETA); val results above it."""

    def __init__(self, stream: TextIO | None = None) -> None:
        self.stream = stream or sys.stderr
        self.bar: Any = None

    def start(self, total: int, initial: int) -> None:
        from tqdm import tqdm

        self.bar = tqdm(total=total, initial=initial, file=self.stream, unit="step", dynamic_ncols=True)
        self.last = initial

    def advance(self, step: int) -> None:
        self.bar.update(step - self.last)
        self.last = step

    def step(self, line: dict[str, Any]) -> None:
        self.advance(line["step"])
        self.bar.set_postfix_str(f"loss {_number(line['loss'])}  tok/s {line['tokens_per_s']:,.0f}")

    def val(self, line: dict[str, Any]) -> None:
        self.message(_val_text(line))

    def message(self, text: str) -> None:
        if self.bar is not None:
            self.bar.write(text, file=self.stream)
        else:
            print(text, file=self.stream, flush=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def _number(value: float | None, digits: int = 4) -> str:
    return "nan" if value is None else f"{value:.{digits}f}"


def _val_text(line: dict[str, Any]) -> str:
    text = f"step {line['step']}  val loss {_number(line['loss'])}  ({_number(line['bits_per_token'], 3)} bits/token)"
    if "accuracy" in line:
        text += f"  accuracy {_number(line['accuracy'], 3)}"
    return text


def make_progress(kind: str | Progress | None = None, stream: TextIO | None = None) -> Progress:
    """``None``/``"auto"``: a bar on a TTY, log lines otherwise; ``"bar"``, ``"log"``, ``"silent"``, ``"warnings"``."""
    if isinstance(kind, Progress):
        return kind
    stream = stream or sys.stderr
    if kind in (None, "auto"):
        kind = "bar" if getattr(stream, "isatty", lambda: False)() else "log"
    if kind == "bar":
        return Bar(stream)
    if kind == "log":
        return LogLines(stream)
    if kind == "silent":
        return Silent(stream)
    if kind == "warnings":
        return WarningsOnly(stream)
    raise ValueError(f"unknown progress kind {kind!r}")
