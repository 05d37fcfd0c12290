"""Data: corpora (sources), tokenizers, the token cache, batches and synthetic probe tasks.

Entry points: ``load_data(cfg) -> TokenData`` and ``vocab_size_for(cfg)``; for probing a model on
a task later, ``task_batches`` and ``answer_accuracy``. The names below load their module on first
use, so that importing a torch-free submodule (``blockyard.data.task_options``, which the config
schema needs) does not import torch.
"""

from __future__ import annotations

import importlib
from typing import Any

_EXPORTS = {
    "CorpusData": "loader",
    "TaskData": "loader",
    "TokenData": "loader",
    "load_data": "loader",
    "vocab_size_for": "loader",
    "TASKS": "tasks",
    "answer_accuracy": "tasks",
    "mqar_batch": "tasks",
    "passkey_batch": "tasks",
    "selective_copy_batch": "tasks",
    "task_batches": "tasks",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    if name not in _EXPORTS:
        raise AttributeError(f"module 'blockyard.data' has no attribute {name!r}")
    return getattr(importlib.import_module(f"blockyard.data.{_EXPORTS[name]}"), name)
