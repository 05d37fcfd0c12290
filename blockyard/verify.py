"""``blockyard verify PATH``, and the grid's check of a finished cell's final checkpoint.

Checks, read-only, every file under PATH whose damage would change a result against the sha256
its folder recorded (``blockyard.integrity``): checkpoints (``checkpoints/step_*.pt``), plugin
copies (``plugins/*.py`` of a run or grid dir) and token caches (a folder holding a token
``manifest.json``: every file). PATH may be a run dir, a grid dir, a token cache or any folder
holding them; files already moved to a ``damaged/`` folder are not looked at again.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from blockyard import fs, integrity
from blockyard.errors import UserError
from blockyard.rundir import CHECKPOINT_DIR, PLUGIN_DIR, SUMMARY_FILE, RunSummary, read_summary

_TOKEN_MANIFEST = "manifest.json"  # blockyard.data.cache.MANIFEST (not imported: it pulls in numpy)


@dataclass(frozen=True)
class _Protected:
    """The files of a folder to check, whether its manifest's entries must all be present, and what an
    unlisted file is (a plugin copy from before checksums may sit beside newer, listed ones)."""

    names: list[str]
    listed_are_required: bool = False
    unlisted: str = integrity.DAMAGED


def _protected(folder: Path) -> _Protected | None:
    files = sorted(p.name for p in folder.iterdir() if p.is_file() and p.name != integrity.SUMS_FILE)
    if folder.name == CHECKPOINT_DIR:
        return _Protected([n for n in files if n.startswith("step_") and n.endswith(".pt")])
    if folder.name == PLUGIN_DIR:
        return _Protected([n for n in files if n.endswith(".py")], unlisted=integrity.UNVERIFIABLE)
    if _TOKEN_MANIFEST in files and any(n.endswith(".bin") for n in files):
        return _Protected(files, listed_are_required=True)
    return None


def _folders(root: Path) -> Iterator[Path]:
    yield root
    for sub in sorted(p for p in root.iterdir() if p.is_dir() and not p.is_symlink()):
        if sub.name != integrity.DAMAGED_DIR:
            yield from _folders(sub)


def verify_tree(root: Path) -> list[integrity.FileCheck]:
    """Every protected file under ``root`` judged against its folder's manifest (reads only)."""
    checks: list[integrity.FileCheck] = []
    for folder in _folders(root):
        found = _protected(folder)
        if found is not None:
            checks += integrity.check_folder(folder, found.names, listed_are_required=found.listed_are_required,
                                             unlisted=found.unlisted)
    return checks


def verify_command(target: str) -> tuple[str, int]:
    """The report of ``blockyard verify``: one line per file and a total; 0 when nothing is damaged, else 1."""
    root = Path(target)
    if not root.is_dir():
        raise UserError(f"verify: {target}: no such directory (give a run dir, a grid dir or a token cache)")
    checks = verify_tree(root)
    if not checks:
        raise UserError(f"verify: {target}: holds no checkpoints, plugin copies or token caches "
                        "(give a run dir, a grid dir or a token cache)")
    lines = [f"{c.status if c.status != integrity.DAMAGED else 'DAMAGED':<12}  {_rel(c.path, root)}"
             + (f": {c.why}" if c.why and c.status == integrity.DAMAGED else "") for c in checks]
    counts = {s: sum(c.status == s for c in checks) for s in (integrity.OK, integrity.DAMAGED, integrity.UNVERIFIABLE)}
    lines.append("")
    lines.append(f"{len(checks)} files: {counts[integrity.OK]} ok, {counts[integrity.DAMAGED]} damaged, "
                 f"{counts[integrity.UNVERIFIABLE]} unverifiable")
    if counts[integrity.UNVERIFIABLE]:
        lines.append("note: unverifiable files were written before checksums (no sha256.json beside them); "
                     "they load with a note and cannot be checked")
    if counts[integrity.DAMAGED]:
        lines.append("damaged files are moved aside and replaced by the newest good copy when the run or grid "
                     "is rerun (a token cache is prepared again)")
    return "\n".join(lines), 1 if counts[integrity.DAMAGED] else 0


def _rel(path: Path, root: Path) -> str:
    try:
        return str(path.relative_to(root))
    except ValueError:
        return str(path)


def reopen_if_final_checkpoint_damaged(run_dir: Path) -> str | None:
    """A finished (done) run whose newest checkpoint fails its checksum: move it aside and mark the run
    interrupted, so the trainer resumes it from the newest good checkpoint. Returns what was done, or None."""
    summary = read_summary(run_dir)
    if not summary or summary.get("status") != "done":
        return None
    folder = Path(run_dir) / CHECKPOINT_DIR
    newest = sorted(folder.glob("step_*.pt"))
    if not newest:
        return None
    verdict = integrity.check_file(newest[-1])
    if verdict.status != integrity.DAMAGED:
        return None
    moved = integrity.move_aside(newest[-1])
    reason = f"final checkpoint {newest[-1].name} damaged ({verdict.why}); moved to {moved.parent.name}/"
    reopened: RunSummary = {**summary, "status": "interrupted", "interrupted_by": "damaged checkpoint",
                            "reopened": reason}
    fs.atomic_write_text(Path(run_dir) / SUMMARY_FILE, json.dumps(reopened, indent=1), what="the run summary")
    return reason
