"""User mixers from Python files: the config key ``plugins`` (a list of files) loads them here.

A plugin file is an ordinary Python file that defines one or more ``@register_mixer`` classes
(``from blockyard.mixers import Mixer, register_mixer``); loading it adds them to ``MIXERS`` so
``model.mixers.<name>.kind`` may name them. Each file is loaded by path under a module name made
of its content hash alone (``blockyard_plugin_<sha256[:16]>``): the same content is the same
module in every process and under any file name (the copy a run dir, a grid dir or a Ray worker
loads included), executed once per process. An edited file is a new module whose classes
replace those of the earlier version.

A file must be self-contained (it may import installed packages, not files beside it). What goes
wrong while loading it is a one-line ``UserError`` with the file and line.
"""

from __future__ import annotations

import hashlib
import importlib.util
import shutil
import sys
import traceback
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from blockyard import integrity
from blockyard.errors import ConfigError, UserError
from blockyard.mixers.base import MIXERS, PLUGIN_MODULE_PREFIX, Mixer, register_mixer

# Module name -> the mixer classes it registered (loaded modules are never executed twice).
_LOADED: dict[str, tuple[type[Mixer], ...]] = {}


def file_digest(path: str | Path) -> str:
    """sha256 of the file's bytes (hex): the plugin's identity in config hashes and module names."""
    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError as e:
        raise UserError(f"plugin {path}: cannot read ({e.strerror or e.__class__.__name__})") from None


def module_name(digest: str) -> str:
    return f"{PLUGIN_MODULE_PREFIX}{digest[:16]}"


def resolve_plugin_paths(raw: Any, base_dir: Path | None = None) -> list[Path]:
    """Validate the ``plugins`` value (a list of paths) and make each path absolute.

    Relative paths resolve against ``base_dir`` (the config file's folder), else the current
    directory. Each must name an existing ``.py`` file.
    """
    if raw is None:
        return []
    if not isinstance(raw, (list, tuple)) or not all(isinstance(p, str) and p for p in raw):
        raise ConfigError("plugins", f"expected a list of Python file paths, got {raw!r}")
    paths = []
    for i, entry in enumerate(raw):
        path = Path(entry).expanduser()
        if not path.is_absolute():
            path = (base_dir or Path.cwd()) / path
        path = path.resolve()
        if not path.is_file():
            raise ConfigError(f"plugins[{i}]", f"{path}: no such file")
        if path.suffix != ".py":
            raise ConfigError(f"plugins[{i}]", f"{path}: expected a Python file (.py)")
        if path not in paths:
            paths.append(path)
    return paths


def _error_line(e: BaseException, path: Path) -> int | None:
    """The line of ``path`` where ``e`` was raised (a syntax error's own line, else the last frame there)."""
    if isinstance(e, SyntaxError) and e.filename and Path(e.filename).resolve() == path:
        return e.lineno
    line = None
    for frame in traceback.extract_tb(e.__traceback__):
        if frame.filename and Path(frame.filename).resolve() == path:
            line = frame.lineno
    return line


def load_plugin(path: str | Path) -> tuple[type[Mixer], ...]:
    """Execute the plugin file at ``path`` (once per content) and register its mixers; returns them."""
    path = Path(path).resolve()
    check_plugin_copy(path)
    name = module_name(file_digest(path))
    if name in _LOADED:
        for cls in _LOADED[name]:  # again the newest version, if an edited file was loaded in between
            register_mixer(cls)
        return _LOADED[name]
    before = dict(MIXERS)
    spec = importlib.util.spec_from_file_location(name, path)
    if spec is None or spec.loader is None:
        raise UserError(f"plugin {path}: cannot be loaded as a Python module")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module  # dataclasses and pickle look classes up here
    try:
        spec.loader.exec_module(module)
    except (Exception, SystemExit) as e:
        sys.modules.pop(name, None)
        MIXERS.clear()
        MIXERS.update(before)
        line = _error_line(e, path)
        detail = str(e).strip().splitlines()[0] if str(e).strip() else ""
        where = f"{path}, line {line}" if line else str(path)
        raise UserError(f"plugin {where}: {e.__class__.__name__}{': ' + detail if detail else ''}") from None
    classes = tuple(cls for cls in MIXERS.values() if cls.__module__ == name)
    if not classes:
        sys.modules.pop(name, None)
        raise UserError(f"plugin {path}: registers no mixer (decorate a Mixer subclass with @register_mixer "
                        "and give it a 'kind')")
    _LOADED[name] = classes
    return classes


def load_plugins(paths: Sequence[str | Path]) -> list[str]:
    """Load every file of ``paths`` in order; returns the mixer kinds they registered.

    Two files that define the same kind are refused (which one a config meant is unclear).
    """
    source: dict[str, Path] = {}
    for i, path in enumerate(map(Path, paths)):
        for cls in load_plugin(path):
            if cls.kind in source:
                raise ConfigError(f"plugins[{i}]", f"{path} defines mixer kind {cls.kind!r}, as {source[cls.kind]} "
                                  "does; give one of them another kind")
            source[cls.kind] = path
    return list(source)


def is_loaded(path: str | Path) -> bool:
    """True when this content of ``path`` is loaded and its classes are the registered ones."""
    name = module_name(file_digest(path))
    return name in _LOADED and all(MIXERS.get(cls.kind) is cls for cls in _LOADED[name])


def plugin_kinds() -> dict[str, str]:
    """kind -> plugin file, for the registered mixers that came from plugin files."""
    return {kind: str(getattr(sys.modules.get(cls.__module__), "__file__", "?"))
            for kind, cls in MIXERS.items() if cls.__module__.startswith(PLUGIN_MODULE_PREFIX)}


def copy_plugins(paths: Sequence[str | Path], folder: Path, warn: Callable[[str], None] | None = None) -> list[Path]:
    """Copy each plugin file into ``folder`` (created), keeping its name; returns the copies' paths.

    A file there of the same name and other bytes (another version, or another file of that
    name) is never overwritten: the copy then carries the start of its digest in its name. Each
    copy's sha256 is recorded in ``folder/sha256.json``; damaged copies are repaired first
    (:func:`repair_copies`).
    """
    folder.mkdir(parents=True, exist_ok=True)
    repair_copies(folder, paths, warn)
    copies: list[Path] = []
    recorded: dict[str, integrity.Entry] = {}
    for path in map(Path, paths):
        digest = file_digest(path)
        target = folder / path.name
        if target.exists() and file_digest(target) != digest:
            target = folder / f"{path.stem}_{digest[:8]}{path.suffix}"
        if not target.exists():
            _copy_file(path, target)
        recorded[target.name] = integrity.Entry(digest, target.stat().st_size)
        copies.append(target)
    integrity.record(folder, recorded)
    return copies


def _copy_file(source: Path, target: Path) -> None:
    tmp = target.with_name(f".{target.name}.tmp")
    shutil.copyfile(source, tmp)
    tmp.replace(target)


def repair_copies(folder: Path, originals: Sequence[str | Path], warn: Callable[[str], None] | None = None) -> None:
    """Move each copy in ``folder`` whose bytes differ from those ``folder/sha256.json`` recorded to
    ``folder/damaged/`` (one warning line each), and copy it again from the one of ``originals`` with
    the recorded content; without such an original it stays missing (the config then names another plugin)."""
    try:
        manifest = integrity.read_manifest(folder) or {}
    except integrity.UnreadableManifest as e:
        (warn or _stderr_warning)(f"{e}; the plugin copies there are not verified")
        return
    by_digest = {file_digest(p): Path(p) for p in originals}
    for name, entry in manifest.items():
        copy = folder / name
        if not copy.exists() or (verdict := integrity.check_file(copy)).status != integrity.DAMAGED:
            continue
        moved = integrity.move_aside(copy)
        source = by_digest.get(entry.sha256)
        if source is not None:
            _copy_file(source, copy)
        again = f"copied again from {source}" if source else "no plugin of this config has the recorded content"
        (warn or _stderr_warning)(f"plugin copy {copy} is damaged ({verdict.why}); moved to "
                                  f"{moved.parent.name}/{moved.name}, {again}")


def _stderr_warning(message: str) -> None:
    print(f"warning: {message}", file=sys.stderr)


def check_plugin_copy(path: Path) -> None:
    """Refuse a plugin file whose folder's manifest records other bytes for it (a damaged copy)."""
    verdict = integrity.check_file(path, unlisted=integrity.UNVERIFIABLE)
    if verdict.status == integrity.DAMAGED:
        raise UserError(f"plugin {path}: damaged ({verdict.why}); rerun with the original plugin file in the config "
                        "to copy it again, or restore the file")
