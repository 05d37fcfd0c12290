"""Content checksums for the files whose damage would change a result, checked on read.

A folder that holds protected files (checkpoints, plugin copies, a token cache) keeps a small
manifest, ``sha256.json``, beside them: each file's sha256 (FIPS 180-4) and size, recorded when
the file was written and written atomically itself. Readers check a file against it before
using it (checksum on write, verify on read: common practice of trusted storage, no source):

- ``ok``: the file's bytes hash to the recorded digest;
- ``damaged``: they do not, the file is shorter or longer, its entry is missing from a manifest
  that exists, or the manifest cannot be read;
- ``unverifiable``: the folder has no manifest (written before checksums existed): used, with a note.

A damaged file is never deleted: :func:`move_aside` puts it under ``damaged/`` in its folder.
This module imports only the standard library and ``blockyard.fs``: the data, mixer and train
layers all use it.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Collection, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

from blockyard import fs

SUMS_FILE = "sha256.json"
DAMAGED_DIR = "damaged"
FORMAT = 1
OK, DAMAGED, UNVERIFIABLE = "ok", "damaged", "unverifiable"
_CHUNK = 1 << 20


@dataclass(frozen=True)
class Entry:
    """A recorded file: its sha256 (hex) and size in bytes."""

    sha256: str
    size_bytes: int


@dataclass(frozen=True)
class FileCheck:
    """One file against its folder's manifest: ``status`` is ok, damaged or unverifiable; ``why`` says how."""

    path: Path
    status: str
    why: str = ""


class HashingWriter:
    """A write-only file that hashes (sha256) and counts what passes through it to ``file``."""

    def __init__(self, file: BinaryIO | Any) -> None:
        self._file = file
        self.digest = hashlib.sha256()
        self.size_bytes = 0

    def write(self, data: Any) -> int:
        n = self._file.write(data)
        self.digest.update(data)
        self.size_bytes += memoryview(data).nbytes
        return n

    def flush(self) -> None:
        self._file.flush()

    def entry(self) -> Entry:
        return Entry(self.digest.hexdigest(), self.size_bytes)


def entry_of_bytes(data: bytes) -> Entry:
    return Entry(hashlib.sha256(data).hexdigest(), len(data))


def entry_of_file(path: Path) -> Entry:
    """sha256 and size of the file at ``path``, read in 1 MiB chunks (a token cache can be GBs)."""
    digest, size = hashlib.sha256(), 0
    with open(path, "rb") as f:
        while chunk := f.read(_CHUNK):
            digest.update(chunk)
            size += len(chunk)
    return Entry(digest.hexdigest(), size)


# ----------------------------------------------------------------------------- the manifest


class UnreadableManifest(ValueError):
    """The folder's sha256.json exists but is not a manifest (itself damaged)."""


def read_manifest(folder: Path) -> dict[str, Entry] | None:
    """name -> Entry of ``folder``'s sha256.json; None without one; raises UnreadableManifest when damaged."""
    path = Path(folder) / SUMS_FILE
    try:
        text = path.read_text()
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError) as e:
        raise UnreadableManifest(f"{path}: unreadable ({e.__class__.__name__})") from None
    try:
        data = json.loads(text)
        return {name: Entry(str(e["sha256"]), int(e["bytes"])) for name, e in data["files"].items()}
    except (ValueError, KeyError, TypeError, AttributeError):
        raise UnreadableManifest(f"{path}: not a checksum manifest") from None


def record(folder: Path, add: dict[str, Entry] | None = None, drop: Iterable[str] = ()) -> None:
    """Add (or replace) entries of ``folder``'s manifest and drop others, in one atomic write.

    A manifest that cannot be read is replaced (its own damage was reported where it was read).
    """
    try:
        entries = read_manifest(folder) or {}
    except UnreadableManifest:
        entries = {}
    entries.update(add or {})
    for name in drop:
        entries.pop(name, None)
    files = {name: {"sha256": e.sha256, "bytes": e.size_bytes} for name, e in sorted(entries.items())}
    text = json.dumps({"format": FORMAT, "algorithm": "sha256", "files": files}, indent=1)
    fs.atomic_write_text(Path(folder) / SUMS_FILE, text, what="the checksum manifest")


# ----------------------------------------------------------------------------- checking


def judge(path: Path, actual: Entry, manifest: dict[str, Entry] | None, unlisted: str = DAMAGED) -> FileCheck:
    """``actual`` (the bytes as read) against ``manifest``'s entry for ``path``; a file the manifest does not
    list is ``unlisted`` (damaged where every file is recorded before it takes its name: checkpoints)."""
    path = Path(path)
    if manifest is None:
        return FileCheck(path, UNVERIFIABLE, f"no {SUMS_FILE} beside it (written before checksums)")
    expected = manifest.get(path.name)
    if expected is None:
        return FileCheck(path, unlisted, f"not listed in {SUMS_FILE}")
    if actual.size_bytes != expected.size_bytes:
        return FileCheck(path, DAMAGED, f"{actual.size_bytes:,d} bytes, {expected.size_bytes:,d} recorded")
    if actual.sha256 != expected.sha256:
        return FileCheck(path, DAMAGED, f"sha256 {actual.sha256[:12]}..., {expected.sha256[:12]}... recorded")
    return FileCheck(path, OK)


def _manifest_or_damage(folder: Path) -> tuple[dict[str, Entry] | None, str | None]:
    try:
        return read_manifest(folder), None
    except UnreadableManifest as e:
        return None, str(e)


def check_file(path: Path, unlisted: str = DAMAGED) -> FileCheck:
    """Hash the file at ``path`` and judge it against its folder's manifest (see :func:`judge`)."""
    path = Path(path)
    manifest, broken = _manifest_or_damage(path.parent)
    if broken:
        return FileCheck(path, DAMAGED, broken)
    try:
        actual = entry_of_file(path)
    except OSError as e:
        return FileCheck(path, DAMAGED, f"unreadable ({e.strerror or e.__class__.__name__})")
    return judge(path, actual, manifest, unlisted)


def check_bytes(path: Path, data: bytes) -> FileCheck:
    """Judge ``data`` (the file at ``path``, already read) against its folder's manifest."""
    manifest, broken = _manifest_or_damage(Path(path).parent)
    if broken:
        return FileCheck(Path(path), DAMAGED, broken)
    return judge(path, entry_of_bytes(data), manifest)


def check_folder(folder: Path, names: Collection[str], *, listed_are_required: bool = False,
                 unlisted: str = DAMAGED) -> list[FileCheck]:
    """Each file ``names`` lists (present in ``folder``), and with ``listed_are_required`` each file the
    manifest lists that is gone, judged against the manifest (``unlisted``: see :func:`judge`)."""
    folder = Path(folder)
    manifest, broken = _manifest_or_damage(folder)
    results = []
    for name in sorted(names):
        path = folder / name
        results.append(FileCheck(path, DAMAGED, broken) if broken else check_file(path, unlisted))
    if listed_are_required and manifest:
        results += [FileCheck(folder / name, DAMAGED, "listed in sha256.json but missing")
                    for name in sorted(set(manifest) - set(names))]
    return results


def move_aside(path: Path) -> Path:
    """Move a damaged file or folder into ``damaged/`` of its folder (never overwriting); its new path."""
    path = Path(path)
    target_dir = path.parent / DAMAGED_DIR
    target_dir.mkdir(exist_ok=True)
    target = target_dir / path.name
    n = 1
    while target.exists():
        target = target_dir / f"{path.name}.{n}"
        n += 1
    path.replace(target)
    fs.fsync_dir(path.parent)
    return target
