"""``load_data(cfg)``: the one entry point from a config to batches, for corpora and tasks alike.

Both kinds of data expose the same surface (see :class:`TokenData`): ``vocab_size``,
``tokenizer``, ``is_task``, ``train_batch(step)``, ``val_batches()``, the split arrays (corpora
only), ``fingerprint`` and ``describe()``.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

import numpy as np
import torch

from blockyard.data.batches import gather_windows, stream_rng, train_window_starts, val_windows
from blockyard.data.cache import SPLITS, CacheSpec, PreparedCorpus, prepare
from blockyard.data.sources import cache_root, resolve_corpus
from blockyard.data.tasks import PICK_STREAM, POOL_STREAM, Task, get_task
from blockyard.errors import ConfigError, UserError
from blockyard.schema import to_dict

Batch = tuple[torch.Tensor, torch.Tensor]


class TokenData:
    """What the trainer sees. ``train_batch(step)`` is a pure function of (data seed, step)."""

    vocab_size: int
    tokenizer: Any
    is_task: bool
    fingerprint: str
    train_tokens: np.ndarray | None = None
    val_tokens: np.ndarray | None = None
    test_tokens: np.ndarray | None = None

    def train_batch(self, step: int) -> Batch:
        raise NotImplementedError

    def val_batches(self, length: int | None = None) -> list[Batch]:
        """The fixed validation windows, cut at ``length`` tokens (default: ``data.seq_len``)."""
        raise NotImplementedError

    def describe(self) -> dict[str, Any]:
        raise NotImplementedError


class CorpusData(TokenData):
    """Windows of a prepared text corpus (memmaps; nothing is copied into memory)."""

    is_task = False
    train_tokens: np.ndarray  # a corpus has all three splits (an empty split is an empty array)
    val_tokens: np.ndarray
    test_tokens: np.ndarray

    def __init__(self, prepared: PreparedCorpus, seq_len: int, seed: int, batch_size: int, eval_windows: int):
        self.prepared = prepared
        self.seq_len, self.seed, self.batch_size, self.eval_windows = seq_len, seed, batch_size, eval_windows
        self.tokenizer = prepared.tokenizer
        self.vocab_size = int(prepared.manifest["tokenizer"]["vocab_size"])
        self.train_tokens = prepared.splits["train"]
        self.val_tokens = prepared.splits["val"]
        self.test_tokens = prepared.splits["test"]
        self.fingerprint = prepared.path.name

    def train_batch(self, step: int) -> Batch:
        starts = train_window_starts(self.seed, step, self.batch_size, len(self.train_tokens), self.seq_len)
        return gather_windows(self.train_tokens, starts, self.seq_len)

    def val_batches(self, length: int | None = None) -> list[Batch]:
        return val_windows(self.val_tokens, self.seed, self.eval_windows, length or self.seq_len, self.batch_size)

    def describe(self) -> dict[str, Any]:
        m = self.prepared.manifest
        return {
            "corpus": m["corpus"],
            "corpus_fingerprint": m["corpus_fingerprint"],
            "provenance": m["provenance"],
            "tokenizer": m["tokenizer"]["kind"],
            "vocab_size": self.vocab_size,
            "learned_vocab_size": m["tokenizer"]["learned_size"],
            "split_mode": m["split_mode"],
            "documents": m["documents"],
            "tokens": dict(m["tokens"]),
            "cache_path": str(self.prepared.path),
            "fingerprint": self.fingerprint,
        }


class TaskData(TokenData):
    """A synthetic task: a fixed pool of training sequences (or fresh ones), fixed val sequences."""

    is_task = True

    def __init__(self, task: Task, params: Any, seq_len: int, seed: int, batch_size: int, eval_windows: int):
        task.validate(params, seq_len)
        self.task, self.params = task, params
        self.seq_len, self.seed, self.batch_size, self.eval_windows = seq_len, seed, batch_size, eval_windows
        self.tokenizer = task.tokenizer(params)
        self.vocab_size = task.vocab_size(params)
        blob = json.dumps({"task": task.name, "params": to_dict(params), "seq_len": seq_len}, sort_keys=True)
        self.fingerprint = f"task-{task.name}-{hashlib.sha256(blob.encode()).hexdigest()[:16]}"

    def train_batch(self, step: int) -> Batch:
        pool = self.params.num_sequences
        if pool == 0:
            return self.task.make_batch(self.params, self.seed, step, self.batch_size, self.seq_len)
        picks = stream_rng(self.seed, PICK_STREAM, step).integers(0, pool, size=self.batch_size)
        return self.task.sequences(self.params, self.seed, POOL_STREAM, picks, self.seq_len)

    def val_batches(self, length: int | None = None) -> list[Batch]:
        return self.task.val_batches(self.params, self.seed, self.eval_windows, length or self.seq_len,
                                     self.batch_size)

    def describe(self) -> dict[str, Any]:
        return {
            "corpus": f"task:{self.task.name}",
            "task": self.task.summary,
            "params": to_dict(self.params),
            "tokenizer": "symbols",
            "vocab_size": self.vocab_size,
            "train_pool": self.params.num_sequences or "fresh every step",
            "val_sequences": self.eval_windows,
            "cache_path": None,
            "fingerprint": self.fingerprint,
        }


def task_name(corpus: str) -> str | None:
    scheme, sep, rest = corpus.partition(":")
    return rest if sep and scheme == "task" else None


def check_split_lengths(prepared: PreparedCorpus, seq_len: int) -> None:
    """Each split in use must hold one window of seq_len + 1 tokens."""
    m = prepared.manifest
    for name in SPLITS:
        n = m["tokens"][name]
        if name == "test" and m["test_fraction"] == 0:
            continue
        if n < seq_len + 1:
            raise UserError(f"data.seq_len: the {name} split of {m['corpus']} has {n} tokens, fewer than "
                            f"seq_len + 1 = {seq_len + 1}; lower data.seq_len or raise data.{name}_fraction "
                            f"(or use a larger corpus)")


def prepare_corpus(data: Any) -> PreparedCorpus:
    """Resolve and prepare (or reuse) the token cache of a text ``data`` config section."""
    if data.val_fraction <= 0:
        raise ConfigError("data.val_fraction", "must be > 0 for a text corpus: validation windows come from it")
    root = cache_root(data.cache_dir)
    corpus = resolve_corpus(data.corpus, root, data.text_field, data.errors)
    return prepare(corpus, CacheSpec.from_config(data), root)


def load_data(cfg: Any) -> TokenData:
    """Data of ``cfg.data`` with the run's data seed, batch size and number of eval windows."""
    d, t = cfg.data, cfg.train
    name = task_name(d.corpus)
    if name is not None:
        return TaskData(get_task(name), d.task, d.seq_len, t.effective_data_seed, t.batch_size, t.eval_windows)
    prepared = prepare_corpus(d)
    check_split_lengths(prepared, d.seq_len)
    return CorpusData(prepared, d.seq_len, t.effective_data_seed, t.batch_size, t.eval_windows)


def vocab_size_for(cfg: Any) -> int:
    """The vocabulary size ``load_data(cfg)`` will report; cheap except for ``chars``, which
    needs the prepared cache (built here if missing)."""
    d = cfg.data
    name = task_name(d.corpus)
    if name is not None:
        return get_task(name).vocab_size(d.task)
    if d.tokenizer == "bytes":
        return 256
    if d.tokenizer == "bpe":
        return d.bpe_vocab
    return int(prepare_corpus(d).manifest["tokenizer"]["vocab_size"])
