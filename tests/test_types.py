"""The package type-checks: mypy, as ``[tool.mypy]`` in pyproject.toml configures it, finds no error.

Full tier (about 30 s cold on 2 cores, a few seconds with mypy's cache in ``.mypy_cache``). mypy runs in this
process through its documented API (``mypy.api.run``), the same check as ``.venv/bin/mypy`` from the
repository root. Running a type checker in CI is common practice, no source.
"""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def run_mypy(*args: str) -> tuple[int, str]:
    """mypy with the project's configuration, from the repository root: (exit status, its report)."""
    try:
        from mypy import api
    except ImportError:
        pytest.fail("mypy is not installed: `bash scripts/setup.sh` installs the dev dependencies")
    out, err, status = api.run(["--config-file", str(ROOT / "pyproject.toml"), *args])
    return status, out + err


@pytest.mark.slow
def test_the_package_has_no_type_error(monkeypatch):
    monkeypatch.chdir(ROOT)  # the config names the package by import name, found from here
    status, report = run_mypy()
    assert status == 0, "mypy found type errors (fix them; see [tool.mypy] in pyproject.toml):\n" + report
    assert "no issues found in" in report and " source files" in report


@pytest.mark.slow
def test_the_configured_check_catches_a_planted_error(tmp_path, monkeypatch):
    # The same settings on one file with a wrong return type and a None passed on unchecked
    # (inside an unannotated function too: check_untyped_defs), so a config that checks nothing fails here.
    bad = tmp_path / "planted.py"
    bad.write_text("def f() -> int:\n    return 'x'\n\n\ndef g():\n    x: int = None\n    return x\n")
    monkeypatch.chdir(ROOT)
    status, report = run_mypy("--cache-dir", str(tmp_path / "cache"), str(bad))
    assert status == 1, report
    assert "planted.py:2: error: Incompatible return value type" in report
    assert "planted.py:6: error: Incompatible types in assignment" in report
