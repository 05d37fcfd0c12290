"""The grid dir's guards: its lock, what it may hold, and moving changed cells aside instead of deleting them.

A grid dir holding cells of another spec (another tune block, other verdict rules) is refused
unless ``--force``, which moves the changed cells' dirs to ``GRID_DIR/superseded/``. Earlier
versions of the grid file are kept as ``grid.<n>.yaml``. Nothing here deletes a result.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from pathlib import Path

from blockyard import fs
from blockyard.errors import UserError
from blockyard.grid.index import INDEX_NAME
from blockyard.grid.plan import PlannedCell
from blockyard.grid.spec import Design
from blockyard.grid.status import LOCK_NAME, cell_dir
from blockyard.grid.tuning import Tuning


@contextlib.contextmanager
def grid_lock(grid_dir: Path) -> Iterator[None]:
    """Hold ``GRID_DIR/grid.lock`` (an OS lock: released by the kernel even after kill -9)."""
    try:
        with fs.reporting(grid_dir / LOCK_NAME, "the grid's lock"), contextlib.ExitStack() as held:
            held.enter_context(fs.hold_lock(grid_dir / LOCK_NAME))
            lock = held.pop_all()
    except fs.LockBusy as busy:
        holder = f"pid {busy.holder}" if busy.holder > 0 else ""
        raise UserError(f"{grid_dir}: another grid process{f' ({holder})' if holder else ''} is running this "
                        f"grid; watch it with: blockyard grid --status {grid_dir}") from None
    with lock:
        yield


def check_grid_dir(grid_dir: Path) -> bool:
    """True when ``grid_dir`` already holds a grid; refuses a non-empty dir that is not one."""
    if grid_dir.exists() and not grid_dir.is_dir():
        raise UserError(f"{grid_dir}: exists and is not a directory (pass another --out)")
    if (grid_dir / INDEX_NAME).exists():
        return True
    if grid_dir.is_dir() and any(grid_dir.iterdir()):
        raise UserError(f"{grid_dir}: is not empty and holds no grid ({INDEX_NAME} missing); pass another --out")
    return False


def cell_changes(old: dict[str, str], new: dict[str, str]) -> tuple[list[str], list[str], list[str]]:
    """(changed, added, removed) cell ids between two maps of cell id -> config hash."""
    changed = sorted(i for i in new if i in old and old[i] != new[i])
    added = sorted(i for i in new if i not in old)
    removed = sorted(i for i in old if i not in new)
    return changed, added, removed


def refuse_changed_spec(grid_dir: Path, grid_file: str | Path, old: dict[str, str], new: dict[str, str],
                        force: bool, hint: str = "", grows: bool = False) -> None:
    """Refuse (unless ``force``) a spec whose cells differ from the grid dir's; ``grows``: a seed schedule,
    whose potential cells not run yet are expected, not new."""
    changed, added, removed = cell_changes(old, new)
    if grows:
        added = []
    if not old or force or not (changed or added or removed):
        return
    what = ", ".join(f"{len(v)} {k}" for k, v in (("changed", changed), ("new", added), ("removed", removed)) if v)
    example = (changed or added or removed)[0]
    raise UserError(
        f"{grid_dir}: holds a grid whose cells differ from {grid_file} ({what}; e.g. {example}){hint}; pass --out "
        "for a new grid dir, or --force to run the new cells here (changed and removed cells are moved to "
        "superseded/, nothing is deleted)")


def refuse_changed_tuning(grid_dir: Path, grid_file: str | Path, old: str | None, new: str, has_cells: bool,
                          force: bool) -> None:
    """A changed (added, removed) ``tune`` block changes the verdict cells' values: like a changed grid.
    Compared as parsed blocks, so a block recorded before a key existed equals one with its default."""
    if force or not has_cells or Tuning.from_json(old) == Tuning.from_json(new):
        return
    raise UserError(
        f"{grid_dir}: holds a grid whose tune block differs from {grid_file}'s (it decides each variant's "
        "value, so the verdict cells would change); pass --out for a new grid dir, or --force to run it here "
        "(changed cells are moved to superseded/, nothing is deleted)")


def refuse_changed_design(grid_dir: Path, grid_file: str | Path, old: str | None, new: Design, force: bool) -> None:
    """A changed smallest effect, seed schedule or null control moves the goalposts of verdicts already seen."""
    if old is None or force or Design.from_json(old) == new:
        return
    raise UserError(
        f"{grid_dir}: its verdict rules (smallest_effect, seeds schedule, null_control) differ from {grid_file}'s; "
        "changing them after seeing results invalidates the error guarantee: pass --out for a new grid dir, or "
        "--force to apply them here anyway (the report then says so)")


def _unique_path(path: Path) -> Path:
    if not path.exists():
        return path
    n = 2
    while path.with_name(f"{path.name}.{n}").exists():
        n += 1
    return path.with_name(f"{path.name}.{n}")


def archive_spec(grid_dir: Path, text: str) -> None:
    """Write grid.yaml; an earlier, different copy is kept as grid.<n>.yaml."""
    current = grid_dir / "grid.yaml"
    if current.exists() and current.read_text() != text:
        n = 1
        while (grid_dir / f"grid.{n}.yaml").exists():
            n += 1
        current.rename(grid_dir / f"grid.{n}.yaml")
    if not current.exists():
        fs.atomic_write_text(current, text, what="the grid spec")


def supersede(grid_dir: Path, ids: list[str], old_hashes: dict[str, str]) -> list[str]:
    """Move the dirs (and configs, logs) of cells whose config changed to superseded/; returns what moved."""
    moved = []
    for cid in ids:
        target = _unique_path(grid_dir / "superseded" / f"{cid}.{old_hashes.get(cid, 'old')}")
        for src, name in ((cell_dir(grid_dir, cid), "run"), (grid_dir / "configs" / f"{cid}.yaml", "config.yaml"),
                          (grid_dir / "logs" / f"{cid}.log", "train.log")):
            if src.exists():
                target.mkdir(parents=True, exist_ok=True)
                src.rename(target / name)
        if target.exists():
            moved.append(str(target.relative_to(grid_dir)))
    return moved


def plugin_copies(p: PlannedCell, grid_dir: Path) -> list[str] | None:
    """Copy the cell's plugin files into GRID_DIR/plugins; the entries its config names them by
    (relative to GRID_DIR/configs), or None without plugins."""
    if not p.cell.cfg.plugins:
        return None
    from blockyard.mixers.plugins import copy_plugins  # imports torch: not at module level, or `grid --status` would

    return [f"../plugins/{c.name}" for c in copy_plugins(p.cell.cfg.plugins, grid_dir / "plugins")]


def write_if_changed(path: Path, text: str) -> None:
    """Write a cell's config file unless it already holds ``text`` (its mtime then stays)."""
    if not path.exists() or path.read_text() != text:
        fs.atomic_write_text(path, text, what="a cell's config")
