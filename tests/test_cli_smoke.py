"""One subprocess smoke test per command: the real ``blockyard`` entry point starts, refuses bad input
with exit 2 and one line on stderr, and prints no traceback.

Every other exit code is checked in-process through ``blockyard.cli.main()`` (the fast tier); these
child processes (about 2 s each for the torch import) run in the full tier. The exit code 2 for
bad input is the project's own rule (DEVELOPERS.md), no outside source.
"""

from __future__ import annotations

import subprocess
import sys

import pytest
from _helpers import child_env

pytestmark = pytest.mark.slow  # full tier: child processes

# command -> (arguments after it, a word the one error line must hold); paths under {tmp} do not exist
BAD_INPUT = {
    "train": (["{tmp}/missing.yaml"], "missing.yaml"),
    "blocks": (["{tmp}/missing.yaml"], "missing.yaml"),
    "grid": (["{tmp}/missing.yaml", "--out", "{tmp}/out"], "missing.yaml"),
    "report": (["{tmp}/no-grid"], "no-grid"),
    "corpus": (["fetch"], "give a NAME"),
    "bench": (["--quality", "--quality-lr", "-1"], "quality-lr"),
    "sample": (["{tmp}/no-run", "--prompt", "the"], "no-run"),
    "eval": (["{tmp}/no-run"], "no-run"),
    "check": (["{tmp}/missing.py"], "missing.py"),
    "verify": (["{tmp}/missing-dir"], "missing-dir"),
}


def test_every_command_has_a_smoke_test():
    from blockyard.cli import build_parser

    parser = build_parser()
    (sub,) = [a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction"]
    assert set(sub.choices) == set(BAD_INPUT)


@pytest.mark.parametrize("command", sorted(BAD_INPUT))
def test_the_real_command_refuses_bad_input_with_exit_2_and_one_line(tmp_path, command):
    args, word = BAD_INPUT[command]
    argv = [a.replace("{tmp}", str(tmp_path)) for a in args]
    proc = subprocess.run([sys.executable, "-m", "blockyard", command, *argv], capture_output=True, text=True,
                          timeout=300, env=child_env(), cwd=tmp_path)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert proc.stderr.startswith("error: ") and proc.stderr.count("\n") == 1, proc.stderr
    assert word in proc.stderr and "Traceback" not in proc.stderr
