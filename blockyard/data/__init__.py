"""Data: corpora (sources), tokenizers, the token cache, batches and synthetic probe tasks.

Entry points: ``load_data(cfg) -> TokenData`` and ``vocab_size_for(cfg)``; for probing a model on
a task later, ``task_batches`` and ``answer_accuracy``.
"""

from blockyard.data.loader import CorpusData, TaskData, TokenData, load_data, vocab_size_for
from blockyard.data.tasks import TASKS, answer_accuracy, mqar_batch, passkey_batch, selective_copy_batch, task_batches

__all__ = [
    "TASKS",
    "CorpusData",
    "TaskData",
    "TokenData",
    "answer_accuracy",
    "load_data",
    "mqar_batch",
    "passkey_batch",
    "selective_copy_batch",
    "task_batches",
    "vocab_size_for",
]
