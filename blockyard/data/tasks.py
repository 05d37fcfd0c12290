"""Synthetic probe tasks, generated from the seed (no files); loss and accuracy on answers only.

- ``mqar``: multi-query associative recall (Arora et al. 2023, arXiv:2312.04927):
  ``num_pairs`` key-value pairs (distinct keys), a separator, then queries ``key value``, each key
  drawn uniformly with replacement from the pairs; each queried value is an answer. The rest of
  the window is padding.
- ``selective_copy``: selective copying (Gu & Dao 2023, arXiv:2312.00752, sec. 3.1): ``copy_tokens`` data
  tokens scattered in order among blank tokens, a separator, then the data tokens again, in order;
  those are the answers.
- ``passkey``: passkey retrieval (Mohtashami & Jaggi 2023, arXiv:2305.16300): a number hidden
  at a sentence boundary in repeated filler text, asked for at the end; its digits are the answers.
  Filler, sentences and symbols are our own.

A window is ``seq_len + 1`` tokens; x is all but the last, y all but the first, with
``y = -100`` wherever the next token is not an answer. Sequence ``i`` of stream ``s`` comes from a
generator seeded by (seed, s, i) only, so batches do not depend on what was generated before.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable

import numpy as np
import torch

from blockyard.data.batches import IGNORE_INDEX, chunked, count_correct, stream_rng
from blockyard.data.task_options import TaskOptions
from blockyard.errors import ConfigError

POOL_STREAM = 11  # the fixed training pool (data.task.num_sequences > 0)
FRESH_STREAM = 12  # fresh sequences per step (make_batch; pool size 0)
PICK_STREAM = 13  # which pool sequences a training step takes
VAL_STREAM = 14  # validation / probing sequences

PAD, SEP = 0, 1  # mqar
BLANK = 0  # selective copy (SEP = 1 as well)

FILLER = ("Snow lies on the far hills. A cart rolls down the lane. The mill wheel turns. "
          "Smoke drifts over the roofs. ")
KEY_SENTENCE = "Note the code {key} and keep it. "
QUESTION = "Which code was noted? The code is "

Sequence = tuple[np.ndarray, np.ndarray]  # (tokens: seq_len + 1 ids, answer: bool mask over them)


class SymbolTokenizer:
    """Ids <-> the task's symbols; text is symbols joined by ``joiner`` ("" = one char each)."""

    kind = "symbols"

    def __init__(self, symbols: Iterable[str], joiner: str) -> None:
        self.symbols = tuple(symbols)
        self.joiner = joiner
        self.vocab_size = len(self.symbols)
        self._ids = {s: i for i, s in enumerate(self.symbols)}
        if len(self._ids) != len(self.symbols):
            raise ValueError("symbols must be unique")

    def encode(self, text: str) -> np.ndarray:
        parts = list(text) if self.joiner == "" else text.split()
        try:
            return np.array([self._ids[p] for p in parts], dtype=np.int64)
        except KeyError as e:
            raise ValueError(f"{e.args[0]!r} is not a symbol of this task") from None

    def decode(self, ids: Iterable[int]) -> str:
        return self.joiner.join(self.symbols[int(i)] for i in np.asarray(ids).reshape(-1))


# ----------------------------------------------------------------------------- MQAR


def mqar_queries(p: TaskOptions) -> int:
    return p.num_queries or p.num_pairs


def mqar_min_seq_len(p: TaskOptions) -> int:
    return 2 * p.num_pairs + 2 * mqar_queries(p)  # pairs + separator + queries = seq_len + 1 at least


def mqar_check(p: TaskOptions) -> None:
    if p.num_pairs > p.num_keys:
        raise ConfigError("data.task.num_pairs", f"{p.num_pairs} pairs need as many distinct keys, "
                                                 f"but data.task.num_keys is {p.num_keys}")


def mqar_symbols(p: TaskOptions) -> list[str]:
    return ["<pad>", "<sep>", *(f"k{i}" for i in range(p.num_keys)), *(f"v{i}" for i in range(p.num_values))]


def mqar_sequence(p: TaskOptions, rng: np.random.Generator, seq_len: int) -> Sequence:
    """``k v k v ... <sep> k v k v ... <pad>...``: values uniform, keys distinct, queried keys drawn
    with replacement. (Asking the keys as a permutation would let a model answer the last query by
    elimination, "the context value not yet asked for", without binding any key to its value.)"""
    n_pairs, n_queries = p.num_pairs, mqar_queries(p)
    key_ids = 2 + rng.choice(p.num_keys, size=n_pairs, replace=False)
    value_ids = 2 + p.num_keys + rng.integers(0, p.num_values, size=n_pairs)
    order = rng.integers(0, n_pairs, size=n_queries)
    context = np.stack([key_ids, value_ids], axis=1).reshape(-1)
    queries = np.stack([key_ids[order], value_ids[order]], axis=1).reshape(-1)
    body = np.concatenate([context, [SEP], queries])
    tokens = np.full(seq_len + 1, PAD, dtype=np.int64)
    tokens[: body.size] = body
    answer = np.zeros(seq_len + 1, dtype=bool)
    answer[2 * n_pairs + 2 : 2 * n_pairs + 1 + 2 * n_queries : 2] = True
    return tokens, answer


# ----------------------------------------------------------------------------- selective copying


def copy_min_seq_len(p: TaskOptions) -> int:
    return 2 * p.copy_tokens  # a region with room for every data token, the separator, the copies


def copy_symbols(p: TaskOptions) -> list[str]:
    return [".", "<sep>", *(f"t{i}" for i in range(p.copy_vocab))]


def copy_sequence(p: TaskOptions, rng: np.random.Generator, seq_len: int) -> Sequence:
    """``[region of seq_len - C tokens: C data tokens at sorted random places, blanks elsewhere]
    <sep> [the C data tokens in order]``."""
    n = p.copy_tokens
    region = seq_len - n
    places = np.sort(rng.choice(region, size=n, replace=False))
    data = 2 + rng.integers(0, p.copy_vocab, size=n)
    tokens = np.full(seq_len + 1, BLANK, dtype=np.int64)
    tokens[places] = data
    tokens[region] = SEP
    tokens[region + 1 :] = data
    answer = np.zeros(seq_len + 1, dtype=bool)
    answer[region + 1 :] = True
    return tokens, answer


# ----------------------------------------------------------------------------- passkey


def passkey_min_seq_len(p: TaskOptions) -> int:
    return len(KEY_SENTENCE.format(key="0" * p.passkey_digits)) + len(QUESTION) + p.passkey_digits - 1


def passkey_symbols(p: TaskOptions) -> list[str]:
    return sorted(set(FILLER + KEY_SENTENCE.replace("{key}", "") + QUESTION + "0123456789"))


def passkey_text(p: TaskOptions, rng: np.random.Generator, seq_len: int) -> tuple[str, str]:
    """(window text of seq_len + 1 characters, the passkey) with the key at a sentence boundary."""
    key = "".join(str(d) for d in rng.integers(0, 10, size=p.passkey_digits))
    sentence = KEY_SENTENCE.format(key=key)
    n_filler = seq_len + 1 - len(sentence) - len(QUESTION) - len(key)
    filler = (FILLER * (n_filler // len(FILLER) + 1))[:n_filler]
    boundaries = [0] + [i + 2 for i in range(n_filler - 1) if filler[i : i + 2] == ". "]
    cut = boundaries[int(rng.integers(0, len(boundaries)))]
    return filler[:cut] + sentence + filler[cut:] + QUESTION + key, key


def passkey_sequence(p: TaskOptions, rng: np.random.Generator, seq_len: int) -> Sequence:
    text, key = passkey_text(p, rng, seq_len)
    tokens = SymbolTokenizer(passkey_symbols(p), "").encode(text)
    answer = np.zeros(seq_len + 1, dtype=bool)
    answer[-len(key) :] = True
    return tokens, answer


# ----------------------------------------------------------------------------- registry


@dataclasses.dataclass(frozen=True)
class Task:
    name: str
    summary: str
    symbols: Callable[[TaskOptions], list[str]]
    joiner: str
    min_seq_len: Callable[[TaskOptions], int]
    sequence: Callable[[TaskOptions, np.random.Generator, int], Sequence]
    check: Callable[[TaskOptions], None] = lambda p: None

    def vocab_size(self, p: TaskOptions) -> int:
        return len(self.symbols(p))

    def tokenizer(self, p: TaskOptions) -> SymbolTokenizer:
        return SymbolTokenizer(self.symbols(p), self.joiner)

    def validate(self, p: TaskOptions, seq_len: int) -> None:
        """ConfigError for parameters the task cannot honour, or a window too short for them."""
        self.check(p)
        need = self.min_seq_len(p)
        if seq_len < need:
            raise ConfigError("data.seq_len", f"{seq_len} is too short for task:{self.name} with these "
                                              f"data.task settings (minimum {need})")

    def sequences(self, p: TaskOptions, seed: int, stream: int, indices: Iterable[int],
                  seq_len: int) -> tuple[torch.Tensor, torch.Tensor]:
        """(x, y) for sequences ``indices`` of ``stream``; y = -100 off the answers."""
        rows = [self.sequence(p, stream_rng(seed, stream, int(i)), seq_len) for i in indices]
        tokens = np.stack([t for t, _ in rows])
        answer = np.stack([a for _, a in rows])
        y = np.where(answer[:, 1:], tokens[:, 1:], IGNORE_INDEX)
        return torch.from_numpy(tokens[:, :-1].copy()), torch.from_numpy(y)

    def val_batches(self, p: TaskOptions, seed: int, n: int, seq_len: int,
                    batch_size: int) -> list[tuple[torch.Tensor, torch.Tensor]]:
        """The ``n`` fixed validation sequences (``VAL_STREAM``) at ``seq_len``, in batches of ``batch_size``."""
        self.validate(p, seq_len)
        x, y = self.sequences(p, seed, VAL_STREAM, range(n), seq_len)
        return chunked(x, y, batch_size)

    def make_batch(self, p: TaskOptions, seed: int, step: int, batch: int,
                   seq_len: int) -> tuple[torch.Tensor, torch.Tensor]:
        """Batch ``step`` of fresh sequences: sequences step*batch .. step*batch + batch - 1."""
        self.validate(p, seq_len)
        return self.sequences(p, seed, FRESH_STREAM, range(step * batch, (step + 1) * batch), seq_len)


TASKS: dict[str, Task] = {
    t.name: t
    for t in (
        Task("mqar", "multi-query associative recall (Arora et al. 2023)", mqar_symbols, " ",
             mqar_min_seq_len, mqar_sequence, mqar_check),
        Task("selective_copy", "selective copying (Gu & Dao 2023)", copy_symbols, " ",
             copy_min_seq_len, copy_sequence),
        Task("passkey", "passkey retrieval in filler text (Mohtashami & Jaggi 2023)", passkey_symbols, "",
             passkey_min_seq_len, passkey_sequence),
    )
}


#: The tasks ``eval.probes`` can run at growing sizes during training (built by blockyard/eval/probes.py);
#: named here, beside the tasks, so that the config validates ``eval.probes`` without the evaluation code.


def get_task(name: str) -> Task:
    if name not in TASKS:
        raise ConfigError("data.corpus", f"task:{name} is not a task (known: {', '.join(f'task:{t}' for t in TASKS)})")
    return TASKS[name]


def mqar_batch(params: TaskOptions, seed: int, step: int, batch: int, seq_len: int) -> tuple[torch.Tensor, ...]:
    return TASKS["mqar"].make_batch(params, seed, step, batch, seq_len)


def selective_copy_batch(params: TaskOptions, seed: int, step: int, batch: int,
                         seq_len: int) -> tuple[torch.Tensor, ...]:
    return TASKS["selective_copy"].make_batch(params, seed, step, batch, seq_len)


def passkey_batch(params: TaskOptions, seed: int, step: int, batch: int, seq_len: int) -> tuple[torch.Tensor, ...]:
    return TASKS["passkey"].make_batch(params, seed, step, batch, seq_len)


def task_batches(name: str, params: TaskOptions, seed: int, n: int, seq_len: int,
                 batch_size: int = 32) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """``n`` validation sequences of a task in batches: what ``load_data(...).val_batches()``
    gives for ``task:name`` with ``train.eval_windows = n``; for probing any model."""
    return get_task(name).val_batches(params, seed, n, seq_len, batch_size)


def answer_accuracy(logits: torch.Tensor, y: torch.Tensor) -> float:
    """Share of answer positions (y != -100) where the argmax of the logits is the answer."""
    correct, scored = count_correct(logits, y)
    return correct / scored if scored else float("nan")
