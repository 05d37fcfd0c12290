"""The ``data.task`` config section and the names of the probe tasks, without torch.

Kept apart from ``blockyard.data.tasks`` (which builds tensors) so that ``blockyard.config`` can
declare the section and check ``eval.probes`` without importing torch.
"""

from __future__ import annotations

import dataclasses

from blockyard.schema import opt

PROBE_TASKS = ("mqar", "passkey")  # the tasks ``eval.probes`` may name (blockyard/eval/probes.py)


@dataclasses.dataclass(frozen=True)
class TaskOptions:
    """The ``data.task`` config section: parameters of the synthetic tasks (``data.corpus: task:NAME``).

    Declared next to the tasks that read it (blockyard/data/tasks.py), as a mixer's ``Options`` sit next to the mixer;
    ``blockyard.config`` nests it under ``data.task``.
    """

    num_pairs: int = opt(8, "MQAR: key-value pairs per sequence", min=1)
    num_queries: int = opt(0, "MQAR: queries per sequence (0 = as many as pairs)", min=0)
    num_keys: int = opt(64, "MQAR: size of the key alphabet", min=2)
    num_values: int = opt(64, "MQAR: size of the value alphabet", min=2)
    copy_tokens: int = opt(16, "selective copying: tokens to copy", min=1)
    copy_vocab: int = opt(16, "selective copying: size of the alphabet of the tokens to copy", min=1)
    passkey_digits: int = opt(5, "passkey retrieval: digits of the passkey", min=1)
    num_sequences: int = opt(2048, "sequences in the fixed training pool of a task (0 = fresh ones every step)",
                             min=0)
