"""Helpers shared by the test files: mixers built as a model gets them, the example plugins, and a
mixer registry that each test leaves as it found it (plugin files add kinds to it). Helpers for tiny
runs and grids on disk live in ``_helpers.py``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
import torch

from blockyard.config import config_from_dict
from blockyard.kernels import build
from blockyard.mixers import MIXERS

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE_PLUGINS = ROOT / "examples" / "plugins"
LINEAR_ATTENTION = EXAMPLE_PLUGINS / "linear_attention.py"
LEAKY = EXAMPLE_PLUGINS / "leaky_linear_attention.py"


@pytest.fixture(scope="module")
def kernels():
    """Build the C++ kernels once per test module (tens of seconds on a fresh machine); skip without a compiler."""
    if build.find_compiler() is None:
        pytest.skip("no C++ compiler on this machine")
    assert build.load_kernels() is not None, build.build_status()["error"]


def mixer_options(kind: str, width: int = 32, **options: Any) -> Any:
    """``kind``'s options with its defaults filled in and validated at ``width`` by the config system."""
    model = {"width": width, "depth": 1, "pattern": ["m"], "mixers": {"m": {"kind": kind, **options}}}
    return config_from_dict({"model": model}).model.mixers["m"].options


def make_mixer(kind: str, width: int = 32, *, seed: int = 0, **options: Any) -> Any:
    """A seeded mixer of ``kind`` with config-validated options, as the model builder makes it."""
    opts = mixer_options(kind, width, **options)
    torch.manual_seed(seed)
    return MIXERS[kind](width, opts, layer=0, depth=1)


@pytest.fixture(autouse=True)
def _registry_left_as_found():
    """Kinds a test's plugin files registered are removed after it (the loaded modules stay cached)."""
    before = dict(MIXERS)
    yield
    MIXERS.clear()
    MIXERS.update(before)
