"""The registry of temporal mixers: the single list read by the config, the CLI and the tests.

Adding a mixer: write ``blockyard/mixers/<name>.py`` with a ``@register_mixer`` class (see
``base.Mixer``), then add the module name to ``_MODULES`` below. A user's own mixer needs no
edit here: a config's ``plugins`` files are loaded by ``blockyard/mixers/plugins.py`` and their
``@register_mixer`` classes join this registry.
"""

from __future__ import annotations

import importlib

from blockyard.mixers.base import MIXERS, Mixer, mark_residual_out, register_mixer, state_nbytes

_MODULES = ("attention", "recurrence", "lstm")

for _name in _MODULES:
    importlib.import_module(f"blockyard.mixers.{_name}")

#: The kinds this package ships (a plugin may not take one of these names).
BUILTIN_KINDS = frozenset(MIXERS)

__all__ = ["BUILTIN_KINDS", "MIXERS", "Mixer", "mark_residual_out", "register_mixer", "state_nbytes"]
