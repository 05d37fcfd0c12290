"""File locks and safe writes: how blockyard keeps its files whole when processes race, die or fill the disk.

- :func:`hold_lock`: an exclusive OS lock (``flock``) on a file, with the holder's pid written in it.
  The kernel drops the lock when the holder dies, even by ``kill -9``, so a stale lock never blocks.
  :func:`lock_holder` says who holds one without taking it.
- :func:`atomic_write`: temp file in the same folder, fsync, ``os.replace``: a reader (or a resume)
  sees the old file or the complete new one, never a partial write.
- :func:`append_all`: appends a whole record to an open file, or nothing (cut back on failure).
- Storage failures (disk full, quota, read-only, permission, I/O error) become one
  :class:`~blockyard.errors.WriteFailed` line naming the path, what was being written and, for
  space, how much it needed and how much is free (:func:`write_failure`, :func:`reporting`).

Everything imports this module; it imports nothing from the package but ``errors`` and ``text``.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import os
import shutil
import tempfile
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any, BinaryIO

from blockyard.errors import WriteFailed
from blockyard.text import decimal_bytes

#: errno -> how the message words it: the failures a user fixes outside blockyard (free space, fix permissions).
STORAGE_ERRORS = {
    errno.ENOSPC: "no space left on the device",
    errno.EDQUOT: "disk quota exceeded",
    errno.EROFS: "the filesystem is read-only",
    errno.EACCES: "permission denied",
    errno.EPERM: "operation not permitted",
    errno.EIO: "input/output error",
    errno.EFBIG: "file too large for this filesystem or limit",
}
_SPACE = (errno.ENOSPC, errno.EDQUOT, errno.EFBIG)
#: A lock asked for without waiting is still retried this long: a reader probing it (``lock_holder``)
#: holds it for microseconds, which must not refuse a writer.
PROBE_GRACE_S = 0.5


# ----------------------------------------------------------------------------- write failures


def free_bytes(path: Path) -> int | None:
    """Bytes free to this user on the filesystem holding ``path`` (its nearest existing ancestor)."""
    path = Path(path).absolute()
    for folder in (path, *path.parents):
        if folder.exists():
            try:
                return shutil.disk_usage(folder).free
            except OSError:
                return None
    return None


def write_failure(error: OSError, path: Path, what: str, needed_bytes: int | None = None) -> WriteFailed | None:
    """The one-line :class:`WriteFailed` for a storage ``error`` while writing ``what`` to ``path``.

    None when ``error`` is not a storage failure (a bug, or a wrong path: the caller re-raises it).
    """
    reason = None if error.errno is None else STORAGE_ERRORS.get(error.errno)
    if reason is None:
        return None
    message = f"cannot write {path} ({what}): {reason}"
    if error.errno in _SPACE:
        free = free_bytes(Path(path).parent)
        need = f"needs about {decimal_bytes(needed_bytes)}" if needed_bytes else "needs more space"
        message += f" ({need}, {'?' if free is None else decimal_bytes(free)} free there)"
    return WriteFailed(message, path=Path(path), errno=error.errno)


@contextlib.contextmanager
def reporting(path: Path, what: str, needed_bytes: int | None = None) -> Iterator[None]:
    """Turn a storage OSError inside the block into :class:`WriteFailed`; other errors pass unchanged."""
    try:
        yield
    except OSError as e:
        failure = write_failure(e, path, what, needed_bytes)
        if failure is None:
            raise
        raise failure from e


# ----------------------------------------------------------------------------- atomic writes


class _RecordingFile:
    """A binary file that remembers the first OSError of a write: serializers (``torch.save``) may
    report a failed write as their own error type, which would hide that the disk is full."""

    def __init__(self, file: BinaryIO) -> None:
        self._file = file
        self.error: OSError | None = None

    def write(self, data: Any) -> int:
        try:
            return self._file.write(data)
        except OSError as e:
            self.error = self.error or e
            raise

    def flush(self) -> None:
        self._file.flush()


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


def _umask() -> int:
    """The process's umask: from /proc on Linux, else by setting and restoring it (POSIX has no read-only call)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("Umask:"):
                return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def atomic_write(path: Path, write: Callable[[Any], Any], *, what: str = "file",
                 needed_bytes: int | None = None, before_replace: Callable[[], Any] | None = None) -> None:
    """Write ``path`` via ``write(fileobj)`` into a temp file of the same dir, fsync, then rename.

    A reader (or a later resume) sees either the old file or the complete new one, never a partial
    write, even after a crash, ``kill -9`` or a full disk (the temp file is removed then). Storage
    failures raise :class:`WriteFailed` naming ``what``; ``needed_bytes`` is quoted for space.
    ``before_replace`` runs after the fsync, before the rename (a checksum manifest names the file
    before it exists, so no complete file is ever unlisted).
    """
    path = Path(path)
    tmp: str | None = None
    try:
        with reporting(path, what, needed_bytes):
            fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
            # mkstemp makes the file 0600; give it the mode a plain open() would (0666 less the umask),
            # so reports and records stay readable by whoever could read them before.
            os.fchmod(fd, 0o666 & ~_umask())
            with os.fdopen(fd, "wb") as raw:
                f = _RecordingFile(raw)
                try:
                    write(f)
                except Exception:
                    if f.error is not None:
                        raise f.error from None
                    raise
                raw.flush()
                os.fsync(raw.fileno())
            if before_replace is not None:
                before_replace()
            os.replace(tmp, path)
            tmp = None
    finally:
        if tmp is not None:
            Path(tmp).unlink(missing_ok=True)
    fsync_dir(path.parent)


def atomic_write_text(path: Path, text: str, *, what: str = "file") -> None:
    data = text.encode()
    atomic_write(path, lambda f: f.write(data), what=what, needed_bytes=len(data))


def remove_temp_files(folder: Path) -> None:
    """Drop temp files an interrupted atomic write left behind (``.NAME.XXXX.tmp``)."""
    if Path(folder).is_dir():
        for tmp in Path(folder).glob(".*.tmp"):
            tmp.unlink(missing_ok=True)


def append_all(fd: int, data: bytes, path: Path, what: str) -> None:
    """Append all of ``data`` to the open file ``fd``, or nothing: after a failed write the file is
    cut back to its length before, so it never ends in half a record. Storage failures raise WriteFailed."""
    start = os.lseek(fd, 0, os.SEEK_END)
    view = memoryview(data)
    try:
        with reporting(path, what, len(data)):
            while view:
                view = view[os.write(fd, view):]
    except BaseException:
        with contextlib.suppress(OSError):
            os.ftruncate(fd, start)
        raise


# ----------------------------------------------------------------------------- locks


class LockBusy(Exception):
    """Another process holds the lock; ``holder`` is its pid (-1 when it has not written it yet)."""

    def __init__(self, path: Path, holder: int) -> None:
        self.path, self.holder = Path(path), holder
        super().__init__(f"{path}: held by process {holder}")


def _read_pid(fd: int) -> int:
    try:
        return int(os.pread(fd, 32, 0).split()[0])
    except (OSError, ValueError, IndexError):
        return -1


def _same_file(fd: int, path: Path) -> bool:
    """The lock file we hold is still the one at ``path`` (not unlinked by its previous holder)."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return False
    own = os.fstat(fd)
    return (st.st_dev, st.st_ino) == (own.st_dev, own.st_ino)


def _acquire(path: Path, wait_s: float | None, on_wait: Callable[[int], None] | None) -> int:
    """An fd of ``path`` holding its exclusive flock (see :func:`hold_lock`)."""
    deadline = None if wait_s is None else time.monotonic() + max(wait_s, PROBE_GRACE_S)
    told = False
    while True:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            while True:
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                    break
                except BlockingIOError:
                    holder = _read_pid(fd)
                    if deadline is not None and time.monotonic() >= deadline:
                        raise LockBusy(path, holder) from None
                    if holder > 0 and on_wait is not None and not told:
                        on_wait(holder)
                        told = True
                    time.sleep(0.05)
            if _same_file(fd, path):
                return fd
        except BaseException:
            os.close(fd)
            raise
        os.close(fd)  # the holder removed the file as it let go: lock the new one instead


@contextlib.contextmanager
def hold_lock(path: Path, *, wait_s: float | None = 0.0, on_wait: Callable[[int], None] | None = None
              ) -> Iterator[None]:
    """Hold an exclusive OS lock on ``path`` (created if missing) for the block, with our pid in it.

    ``wait_s``: 0 = do not wait (raise :class:`LockBusy` naming the holder's pid), None = wait as
    long as it takes, else wait up to that many seconds. ``on_wait(pid)`` is called once if we wait.
    The holder may delete ``path`` inside the block (a later locker then creates a fresh one).
    """
    path = Path(path)
    fd = _acquire(path, wait_s, on_wait)
    try:
        with contextlib.suppress(OSError):  # the pid is for messages only: a full disk must not stop the lock
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        yield
    finally:
        with contextlib.suppress(OSError):
            os.ftruncate(fd, 0)
        os.close(fd)  # closing the last fd releases the flock


def lock_holder(path: Path) -> int | None:
    """The pid holding the lock at ``path`` now (-1: held, pid not yet written), None when nobody holds it."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return None
    try:
        try:
            # A shared lock is granted only when nobody holds the exclusive one.
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        except BlockingIOError:
            return _read_pid(fd)
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)
