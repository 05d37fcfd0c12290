"""What to do with a run dir before training: start fresh, resume, report it done, or refuse.

The decision reads the dir only; nothing is removed until the caller has validated the new
config, data and model (:func:`clear_records`), so a refused or failing command leaves the dir
exactly as it was. ``--force`` removes only the run's own records (``rundir.RECORD_NAMES``).
The caller holds the run dir's writer lock (``rundir.writing``) around all of this.
"""

from __future__ import annotations

import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import yaml

from blockyard.config import Config, config_from_dict, config_hash, dict_hash, saved_config_data
from blockyard.errors import UserError
from blockyard.mixers.plugins import copy_plugins, is_loaded, repair_copies, resolve_plugin_paths
from blockyard.rundir import CONFIG_FILE, PLUGIN_DIR, RECORD_NAMES, RunSummary, is_empty, read_summary


@dataclass(frozen=True)
class DirState:
    """``kind``: new (missing or empty), same (this config), other (another or unreadable config),
    foreign (files but no config.yaml)."""

    kind: str
    summary: RunSummary | None = None
    stored_hash: str | None = None


def stored_config_hash(path: Path) -> str | None:
    """``config_hash`` of a run dir's config.yaml, None when it cannot be read as a config.

    Its ``plugins`` name the copies kept in the run dir. When those are not the versions loaded
    in this process, the hash is taken from the file's dict as written: parsing it would load
    the old plugin version into the registry in place of the one this process is about to train.
    """
    try:
        data = saved_config_data(yaml.safe_load(path.read_text()))
        stored_plugins = resolve_plugin_paths(data.get("plugins"), path.parent)
        if not all(is_loaded(p) for p in stored_plugins):
            return dict_hash(data, path.parent)
        return config_hash(config_from_dict(data, path.parent))
    except (OSError, yaml.YAMLError, UserError, TypeError, AttributeError):
        return None


def inspect_run_dir(out: Path, cfg_hash: str) -> DirState:
    if out.exists() and not out.is_dir():
        raise UserError(f"{out}: exists and is not a directory (pass another --out)")
    if is_empty(out):
        return DirState("new")
    config_file = out / CONFIG_FILE
    if not config_file.exists():
        return DirState("foreign")
    stored = stored_config_hash(config_file)
    summary = read_summary(out)
    return DirState("same" if stored == cfg_hash else "other", summary=summary, stored_hash=stored)


def plan_run_dir(state: DirState, out: Path, cfg_hash: str, force: bool) -> str:
    """``fresh``, ``resume`` or ``finished`` for this dir; raises UserError when it must be left alone.

    Finished means done or diverged: rerunning a diverged config would only diverge again
    (the run is deterministic), so both need ``force`` to retrain.
    """
    if state.kind == "new":
        return "fresh"
    if force:
        return "fresh"
    if state.kind == "same":
        finished = state.summary is not None and state.summary.get("status") in ("done", "diverged")
        return "finished" if finished else "resume"
    if state.kind == "other":
        held = f"config {state.stored_hash}" if state.stored_hash else "an unreadable config.yaml"
        raise UserError(f"{out}: holds a run of {held}, not of this config ({cfg_hash}); "
                        "use --force to replace it or --out for another dir")
    raise UserError(f"{out}: is not empty and holds no run (no config.yaml); "
                    "use --force to write a run into it or --out for another dir")


def keep_plugin_copies(cfg: Config, out: Path) -> list[str] | None:
    """Copy ``cfg``'s plugin files into ``out/plugins``; the entries config.yaml names them by
    (relative to ``out``), or None without plugins."""
    if not cfg.plugins:
        return None
    return [str(p.relative_to(out)) for p in copy_plugins(cfg.plugins, out / "plugins")]


def repair_plugin_copies(cfg: Config, out: Path, warn: Callable[[str], None]) -> None:
    """Before the run dir's config is compared: a damaged plugin copy in ``out/plugins`` is moved aside
    and copied again from ``cfg``'s plugin of the recorded content (``mixers.plugins.repair_copies``)."""
    if cfg.plugins and (out / PLUGIN_DIR).is_dir():
        repair_copies(out / PLUGIN_DIR, cfg.plugins, warn)


def clear_records(out: Path) -> None:
    """Remove the run records in ``out`` (and leftover temp files of them), nothing else."""
    for name in RECORD_NAMES:
        path = out / name
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path)
        elif path.exists() or path.is_symlink():
            path.unlink()
    for name in RECORD_NAMES:
        for tmp in out.glob(f".{name}.*.tmp"):
            tmp.unlink(missing_ok=True)

