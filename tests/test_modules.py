"""Every module of the package imports, so the fast tier touches each one.

The fast tier (``bash scripts/test.sh``) leaves out end-to-end runs, child processes, kills, grids
and lessons; this test keeps a module that only those reach from breaking unseen (a syntax error,
a renamed import). The module list is read from the source tree, so a new module is covered the
moment it is added. Importing every module as a smoke test is common practice, no source.
"""

from __future__ import annotations

import importlib
from pathlib import Path

import pytest

PACKAGE_DIR = Path(__file__).resolve().parent.parent / "blockyard"


def package_modules(package_dir: Path) -> list[str]:
    """The dotted name of every module under ``package_dir`` (a package is named by its folder), less
    ``__main__`` files: importing one runs the command line (the subprocess smoke tests start it)."""
    names = []
    for path in sorted(package_dir.rglob("*.py")):
        parts = list(path.relative_to(package_dir.parent).with_suffix("").parts)
        if parts[-1] == "__main__":
            continue
        if parts[-1] == "__init__":
            parts.pop()
        names.append(".".join(parts))
    return names


def test_the_module_list_is_the_source_tree():
    names = package_modules(PACKAGE_DIR)
    assert "blockyard" in names and "blockyard.cli" in names and "blockyard.grid.run" in names
    assert len(names) == len([p for p in PACKAGE_DIR.rglob("*.py") if p.name != "__main__.py"])


@pytest.mark.parametrize("name", package_modules(PACKAGE_DIR))
def test_every_module_imports(name):
    assert importlib.import_module(name).__name__ == name
