"""Graceful stop on Ctrl-C (SIGINT) or SIGTERM: finish the step, checkpoint, exit 128 + signal.

The handlers are installed only while a run trains and the previous ones restored after. A
second Ctrl-C raises KeyboardInterrupt at once (for a user who does not want to wait).
Handlers can only be installed from the main thread; elsewhere (threaded executors) the
default behaviour stays.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Callable
from typing import Any


class StopRequest:
    """Context manager recording the first SIGINT / SIGTERM in ``signum``."""

    SIGNALS = (signal.SIGINT, signal.SIGTERM)

    def __init__(self, notify: Callable[[str], None] | None = None) -> None:
        self.signum: int | None = None
        self.notify = notify
        self._previous: dict[int, Any] = {}

    @property
    def requested(self) -> bool:
        return self.signum is not None

    @property
    def name(self) -> str | None:
        return signal.Signals(self.signum).name if self.signum is not None else None

    def _handle(self, signum: int, frame: Any) -> None:
        if self.signum is not None and signum == signal.SIGINT:
            raise KeyboardInterrupt
        if self.signum is None:
            self.signum = signum
            if self.notify:
                self.notify(f"{signal.Signals(signum).name}: finishing this step and writing a checkpoint"
                            + (" (Ctrl-C again to stop without one)" if signum == signal.SIGINT else ""))

    def __enter__(self) -> StopRequest:
        if threading.current_thread() is threading.main_thread():
            for sig in self.SIGNALS:
                self._previous[sig] = signal.signal(sig, self._handle)
        return self

    def __exit__(self, *exc: Any) -> None:
        for sig, previous in self._previous.items():
            signal.signal(sig, previous)
        self._previous.clear()
