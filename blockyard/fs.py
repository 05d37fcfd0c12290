"""File-system helpers shared by every layer; imports nothing from the package.

``exclusive_lock``: an advisory ``fcntl.flock`` held for a block, so that concurrent processes
(grid workers, two shells) prepare a cache entry or fetch a corpus once.
"""

from __future__ import annotations

import contextlib
import fcntl
import sys
from collections.abc import Iterator
from pathlib import Path


@contextlib.contextmanager
def exclusive_lock(path: Path) -> Iterator[None]:
    """Hold an exclusive advisory lock on ``path`` (created if missing) for the block."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a+") as fh:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            print(f"waiting for another process to finish {path.stem} ...", file=sys.stderr)
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)
