"""Synthetic probe tasks: MQAR solved by a lookup table and at chance by a key-blind guess,
selective copying answers, passkey digits, masks, minimum lengths, pools, answer_accuracy."""

from __future__ import annotations

import re
from collections import Counter

import numpy as np
import pytest
import torch

from blockyard.config import config_from_dict
from blockyard.data import answer_accuracy, load_data, mqar_batch, passkey_batch, selective_copy_batch, task_batches
from blockyard.data.tasks import SEP, TASKS, TaskOptions, mqar_queries
from blockyard.errors import ConfigError


def task_cfg(name: str, seq_len: int, task: dict | None = None, **train):
    return config_from_dict({"data": {"corpus": f"task:{name}", "seq_len": seq_len, "task": task or {}},
                             "train": {"batch_size": 8, "eval_windows": 12, **train}})


def test_mqar_lookup_table_solves_it_and_key_blind_guess_is_at_chance():
    p = TaskOptions(num_pairs=6, num_queries=10, num_keys=20, num_values=16)
    x, y = mqar_batch(p, seed=0, step=0, batch=800, seq_len=40)
    assert x.shape == y.shape == (800, 40)
    assert int(x.max()) < TASKS["mqar"].vocab_size(p) == 2 + 20 + 16
    hits = total = 0
    answers = []
    for xs, ys in zip(x.tolist(), y.tolist(), strict=True):
        table = dict(zip(xs[0 : 2 * p.num_pairs : 2], xs[1 : 2 * p.num_pairs : 2], strict=True))
        assert xs[2 * p.num_pairs] == SEP
        positions = [t for t, v in enumerate(ys) if v != -100]
        assert len(positions) == mqar_queries(p) == 10
        for t in positions:
            assert xs[t] in xs[: 2 * p.num_pairs : 2]  # every queried key appeared earlier, as a key
            hits += table[xs[t]] == ys[t]
            total += 1
            answers.append(ys[t])
    assert hits == total  # an exact lookup table (a Python dict of the pairs) solves MQAR
    # A guess that ignores the key scores 1/num_values in expectation (values i.i.d. uniform);
    # the most frequent value does so up to sampling noise (8000 answers: sd about 0.003).
    best = Counter(answers).most_common(1)[0][1] / total
    assert abs(best - 1 / p.num_values) < 0.015


def test_mqar_keys_distinct_and_queries_drawn_uniformly_with_replacement():
    p = TaskOptions(num_pairs=5, num_queries=0, num_keys=8, num_values=4)  # 0: as many queries as pairs
    x, y = mqar_batch(p, seed=3, step=2, batch=4000, seq_len=30)
    slots, repeated = Counter(), 0
    for xs, ys in zip(x.tolist(), y.tolist(), strict=True):
        keys = xs[0:10:2]
        assert len(set(keys)) == 5
        queried = [xs[t] for t, v in enumerate(ys) if v != -100]
        assert len(queried) == 5 and set(queried) <= set(keys)
        slots.update(keys.index(k) for k in queried)
        repeated += len(set(queried)) < 5
    # Each query picks one of the 5 pairs uniformly: P(some key asked twice) = 1 - 5!/5^5 = 0.9616
    # (birthday problem); a permutation would give 0. Sd over 4000 sequences about 0.003.
    assert abs(repeated / 4000 - (1 - 120 / 5**5)) < 0.015
    assert max(slots.values()) / min(slots.values()) < 1.1  # 20000 draws, 5 slots: sd about 1.4% each
    with pytest.raises(ConfigError, match=r"^data\.task\.num_pairs: 9 pairs need as many distinct keys"):
        load_data(task_cfg("mqar", 64, {"num_pairs": 9, "num_keys": 8}))


def test_mqar_last_query_cannot_be_answered_by_elimination():
    # A key-blind rule that answers "a context value not yet given as an answer" (the shortcut a
    # permutation of queries allows: 100% on the last query) must do no better than a random context
    # value on the last query. With replacement: P(right) = 1/4 for 4 pairs, values mostly distinct.
    p = TaskOptions(num_pairs=4, num_queries=0, num_keys=16, num_values=64)
    x, y = mqar_batch(p, seed=1, step=0, batch=3000, seq_len=16)
    hits = 0
    for xs, ys in zip(x.tolist(), y.tolist(), strict=True):
        values = xs[1:8:2]
        positions = [t for t, v in enumerate(ys) if v != -100]
        given = [ys[t] for t in positions[:-1]]
        left = [v for v in values if v not in given] or values
        hits += left[0] == ys[positions[-1]]
    assert hits / 3000 < 0.4  # a permutation of the keys would give 1.0 here


def test_selective_copy_answers_are_the_scattered_tokens_in_order():
    p = TaskOptions(copy_tokens=6, copy_vocab=5)
    x, y = selective_copy_batch(p, seed=1, step=0, batch=200, seq_len=40)
    tok = TASKS["selective_copy"].tokenizer(p)
    for xs, ys in zip(x.tolist(), y.tolist(), strict=True):
        region = xs[: 40 - 6]
        scattered = [t for t in region if t != 0]
        assert len(scattered) == 6 and all(2 <= t < 2 + 5 for t in scattered)
        assert xs[40 - 6] == SEP
        answers = [v for v in ys if v != -100]
        assert answers == scattered
        assert tok.encode(tok.decode(xs)).tolist() == xs


def test_passkey_answer_digits_equal_the_hidden_key():
    p = TaskOptions(passkey_digits=7)
    x, y = passkey_batch(p, seed=5, step=1, batch=100, seq_len=300)
    tok = TASKS["passkey"].tokenizer(p)
    positions = set()
    for xs, ys in zip(x, y, strict=True):
        text = tok.decode(xs)
        hidden = re.search(r"Note the code (\d+) and keep it\. ", text)
        assert hidden is not None and len(hidden.group(1)) == 7
        assert text.endswith("Which code was noted? The code is " + hidden.group(1)[:-1])
        answer = tok.decode(ys[ys != -100])
        assert answer == hidden.group(1)
        assert hidden.start() == 0 or text[hidden.start() - 2 : hidden.start()] == ". "  # at a sentence boundary
        positions.add(hidden.start())
    assert len(positions) > 3  # the key moves around the filler


@pytest.mark.parametrize("name,task,minimum", [
    ("mqar", {"num_pairs": 4, "num_queries": 3}, 2 * 4 + 2 * 3),
    ("selective_copy", {"copy_tokens": 5}, 10),
    ("passkey", {"passkey_digits": 4},
     len("Note the code 1234 and keep it. ") + len("Which code was noted? The code is ") + 4 - 1),
])
def test_minimum_seq_len_is_exact(name, task, minimum):
    data = load_data(task_cfg(name, minimum, task))  # just fits: one window of seq_len + 1 tokens
    x, y = data.train_batch(0)
    assert x.shape == (8, minimum)
    assert (y != -100).any()
    with pytest.raises(ConfigError, match=rf"^data\.seq_len: {minimum - 1} is too short for task:{name} .*"
                                          rf"\(minimum {minimum}\)"):
        load_data(task_cfg(name, minimum - 1, task))


def test_unknown_task_is_a_config_error():
    with pytest.raises(ConfigError, match=r"^data\.corpus: task:sorting is not a task \(known: task:mqar"):
        load_data(task_cfg("sorting", 64))


def test_task_data_interface_pool_and_val():
    cfg = task_cfg("mqar", 48, {"num_sequences": 4}, seed=2)
    data = load_data(cfg)
    assert data.is_task and data.train_tokens is None and data.val_tokens is None and data.test_tokens is None
    assert data.vocab_size == data.tokenizer.vocab_size == 2 + 64 + 64
    seen = {tuple(row) for step in range(30) for row in data.train_batch(step)[0].tolist()}
    assert len(seen) == 4  # a fixed pool of 4 sequences
    assert torch.equal(load_data(cfg).train_batch(7)[0], data.train_batch(7)[0])
    val = data.val_batches()
    assert [b[0].shape[0] for b in val] == [8, 4]
    assert not {tuple(r) for b in val for r in b[0].tolist()} & seen  # val: its own stream, not the pool
    probe = task_batches("mqar", cfg.data.task, 2, 12, 48, batch_size=5)
    assert torch.equal(torch.cat([b[0] for b in probe]), torch.cat([b[0] for b in val]))
    assert torch.equal(torch.cat([b[1] for b in probe]), torch.cat([b[1] for b in val]))
    assert data.describe()["train_pool"] == 4 and data.fingerprint.startswith("task-mqar-")


def test_fresh_sequences_when_the_pool_is_zero():
    cfg = task_cfg("selective_copy", 40, {"num_sequences": 0, "copy_tokens": 4}, seed=9)
    data = load_data(cfg)
    rows = {tuple(r) for step in range(5) for r in data.train_batch(step)[0].tolist()}
    assert len(rows) == 40  # 5 steps x 8 fresh sequences
    assert torch.equal(data.train_batch(3)[0], selective_copy_batch(cfg.data.task, 9, 3, 8, 40)[0])


def test_answer_accuracy_counts_answer_positions_only():
    y = torch.tensor([[-100, 2, -100, 1], [0, -100, -100, -100]])
    logits = torch.zeros(2, 4, 3)
    logits[0, 1, 2] = 1  # right
    logits[0, 3, 0] = 1  # wrong (answer 1)
    logits[1, 0, 0] = 1  # right
    logits[0, 0, 1] = logits[1, 2, 2] = 5  # off-answer positions: ignored
    # Reference: the count by hand, 2 right of 3 answers.
    assert answer_accuracy(logits, y) == pytest.approx(2 / 3)
    assert np.isnan(answer_accuracy(logits, torch.full((2, 4), -100)))
    x, y = mqar_batch(TaskOptions(), 0, 0, 4, 64)
    perfect = torch.nn.functional.one_hot(y.clamp(min=0), 130).float()
    assert answer_accuracy(perfect, y) == 1.0
