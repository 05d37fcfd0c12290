"""The registry of temporal mixers: the single list read by the config, the CLI and the tests.

Adding a mixer: write ``blockyard/mixers/<name>.py`` with a ``@register_mixer`` class (see
``base.Mixer``), then add the module name to ``_MODULES`` below.
"""

from __future__ import annotations

import importlib

from blockyard.mixers.base import MIXERS, Mixer, register_mixer, state_nbytes

_MODULES = ("attention", "recurrence", "lstm")

for _name in _MODULES:
    importlib.import_module(f"blockyard.mixers.{_name}")

__all__ = ["MIXERS", "Mixer", "register_mixer", "state_nbytes"]
