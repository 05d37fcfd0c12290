"""Token cache: reuse without reading the source, concurrent preparers, crash leftovers, splits by
document and by text range, memmaps and dtypes, split-length errors, vocab_size_for."""

from __future__ import annotations

import hashlib
import json
import multiprocessing
from pathlib import Path

import numpy as np
import pytest

from blockyard.config import config_from_dict
from blockyard.data import load_data, vocab_size_for
from blockyard.data import sources as src
from blockyard.data.cache import MANIFEST, CacheSpec, cache_key, plan_split, prepare
from blockyard.errors import ConfigError, UserError

WORDS = "river stone lamp copper wheat orchard lantern meadow harbour thistle candle".split()


def make_docs(folder: Path, n: int, seed: int = 0) -> list[str]:
    """``n`` distinct documents of varied length (each starts with its own number)."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    texts = []
    for i in range(n):
        words = rng.choice(WORDS, size=int(rng.integers(40, 120)))
        text = f"doc {i:03d}: " + " ".join(words) + ".\n"
        (folder / f"d{i:03d}.txt").write_text(text)
        texts.append(text)
    return texts


def cfg_for(corpus: str, cache: Path, **data):
    return config_from_dict({"data": {"corpus": corpus, "cache_dir": str(cache), "seq_len": 32, **data},
                             "train": {"batch_size": 4, "eval_windows": 4}})


def test_split_is_disjoint_by_document_and_matches_utf8(tmp_path):
    texts = make_docs(tmp_path / "c", 40)
    data = load_data(cfg_for(str(tmp_path / "c"), tmp_path / "cache", val_fraction=0.1, test_fraction=0.2))
    doc_split = data.prepared.doc_split
    assert data.prepared.manifest["split_mode"] == "documents"
    assert sorted(np.unique(doc_split).tolist()) == [0, 1, 2]
    # Reference: each split is the UTF-8 bytes (Python's codec) of exactly its documents, in order.
    for split_id, arr in enumerate((data.train_tokens, data.val_tokens, data.test_tokens)):
        expected = "".join(t for t, s in zip(texts, doc_split, strict=True) if s == split_id).encode()
        assert bytes(arr) == expected
    for text in texts:  # every document's marker lives in exactly one split
        marker = text[:8].encode()
        homes = [bytes(a).count(marker) for a in (data.train_tokens, data.val_tokens, data.test_tokens)]
        assert sorted(homes) == [0, 0, 1]
    total = sum(len(t) for t in texts)
    assert 0.1 <= len(data.val_tokens) / total <= 0.2 + 0.05  # at least its share, at most twice
    assert 0.2 <= len(data.test_tokens) / total <= 0.4


def test_single_document_splits_by_contiguous_text_ranges(tmp_path):
    text = " ".join(WORDS * 200)
    (tmp_path / "one.txt").write_text(text)
    data = load_data(cfg_for(str(tmp_path / "one.txt"), tmp_path / "cache", val_fraction=0.1, test_fraction=0.05))
    assert data.prepared.manifest["split_mode"] == "text"
    parts = [bytes(a) for a in (data.train_tokens, data.val_tokens, data.test_tokens)]
    assert b"".join(parts) == text.encode()
    assert [len(p) for p in parts] == [round(len(text) * 0.85), round(len(text) * 0.95) - round(len(text) * 0.85),
                                       len(text) - round(len(text) * 0.95)]


def test_plan_split_skips_a_document_that_would_overfill_and_falls_back():
    lengths = np.array([1000] + [10] * 30, dtype=np.int64)
    plan = plan_split(lengths, 0.05, 0.05)
    assert plan.mode == "documents" and plan.doc_split[0] == 0  # the big one stays in train
    assert plan_split(np.array([100, 100]), 0.05, 0.05).mode == "text"  # no doc fits 2x a 5% share
    assert plan_split(np.array([500]), 0.1, 0.0).cuts == (450, 500)


def test_cache_is_reused_without_reading_the_source(tmp_path, monkeypatch):
    make_docs(tmp_path / "c", 12)
    cfg = cfg_for(str(tmp_path / "c"), tmp_path / "cache", tokenizer="chars")
    first = load_data(cfg)

    def no_reading(*args, **kwargs):
        raise AssertionError("the source was read although the cache is ready")

    monkeypatch.setattr(src, "local_documents", no_reading)
    monkeypatch.setattr(src, "check_utf8", no_reading)
    second = load_data(cfg)
    assert second.fingerprint == first.fingerprint
    assert np.array_equal(second.train_tokens, first.train_tokens)
    assert second.tokenizer.chars == first.tokenizer.chars
    assert isinstance(second.train_tokens, np.memmap)  # read in place, no copy into memory
    assert second.train_tokens.dtype == np.uint8  # chars of a small text: < 256 ids
    assert len(list((tmp_path / "cache" / "tokens").iterdir())) == 2  # the folder and its lock file


def _prepare_in_child(corpus: str, cache: str, queue, second_waits) -> None:
    import blockyard.data.cache as cache_mod

    original_build, original_announce = cache_mod.build, cache_mod.announce_wait

    def build_once_the_other_waits(*args, **kwargs):
        # A barrier: whoever builds first goes on only once the other preparer is blocked on the lock,
        # so the two overlap for sure (not by timing).
        if not second_waits.wait(timeout=120):
            raise AssertionError("the second preparer never waited on the lock")
        return original_build(*args, **kwargs)

    def announce_and_signal(*args, **kwargs):
        original_announce(*args, **kwargs)
        second_waits.set()

    cache_mod.build = build_once_the_other_waits
    cache_mod.announce_wait = announce_and_signal
    data = load_data(cfg_for(corpus, Path(cache), tokenizer="bpe", bpe_vocab=300))
    digest = hashlib.sha256(bytes(data.train_tokens) + bytes(data.val_tokens) + bytes(data.test_tokens)).hexdigest()
    queue.put((digest, data.prepared.manifest["prepared_by"]["pid"], str(data.prepared.path)))


@pytest.mark.slow
def test_two_concurrent_preparers_get_one_identical_cache(tmp_path):
    make_docs(tmp_path / "c", 30)
    ctx = multiprocessing.get_context("spawn")
    queue, second_waits = ctx.Queue(), ctx.Event()
    procs = [ctx.Process(target=_prepare_in_child,
                         args=(str(tmp_path / "c"), str(tmp_path / "cache"), queue, second_waits))
             for _ in range(2)]
    for p in procs:
        p.start()
    results = [queue.get(timeout=180) for _ in procs]
    for p in procs:
        p.join(timeout=60)
        assert p.exitcode == 0
    assert second_waits.is_set()  # they did overlap: one waited for the other's lock
    assert results[0] == results[1]  # same arrays, same folder, and one preparer (same pid)
    tokens_dir = tmp_path / "cache" / "tokens"
    assert sorted(p.name for p in tokens_dir.iterdir()) == sorted([Path(results[0][2]).name,
                                                                   Path(results[0][2]).name + ".lock"])
    assert sorted(f.name for f in Path(results[0][2]).iterdir()) == sorted(
        ["train.bin", "val.bin", "test.bin", "doc_split.npy", "tokenizer.json", MANIFEST, "sha256.json"])


def test_crash_leftovers_are_never_read_and_get_cleaned(tmp_path):
    make_docs(tmp_path / "c", 12)
    cfg = cfg_for(str(tmp_path / "c"), tmp_path / "cache")
    corpus = src.resolve_corpus(cfg.data.corpus, tmp_path / "cache")
    spec = CacheSpec.from_config(cfg.data)
    final = tmp_path / "cache" / "tokens" / cache_key(corpus, spec)
    final.mkdir(parents=True)
    (final / "train.bin").write_bytes(b"\x00" * 10)  # a half-written folder: no manifest
    stale = final.parent / f".tmp-{final.name}-dead"
    stale.mkdir()
    prepared = prepare(corpus, spec, tmp_path / "cache")
    assert not stale.exists()
    assert bytes(prepared.splits["train"]).startswith(b"doc ")
    manifest = json.loads((final / MANIFEST).read_text())
    assert manifest["tokens"]["train"] == len(prepared.splits["train"])


def test_cache_key_depends_on_every_setting(tmp_path):
    make_docs(tmp_path / "c", 3)
    corpus = src.resolve_corpus(str(tmp_path / "c"), tmp_path)
    base = CacheSpec.from_config(cfg_for("x", tmp_path).data)
    keys = {cache_key(corpus, base)}
    for change in ({"tokenizer": "chars"}, {"val_fraction": 0.1}, {"test_fraction": 0.1}, {"text_field": "body"},
                   {"errors": "replace"}):
        keys.add(cache_key(corpus, CacheSpec(**{**base.__dict__, **change})))
    bpe = CacheSpec(**{**base.__dict__, "tokenizer": "bpe", "bpe_vocab": 512})
    keys |= {cache_key(corpus, bpe), cache_key(corpus, CacheSpec(**{**bpe.__dict__, "bpe_vocab": 1024}))}
    assert len(keys) == 8
    # bpe_vocab only matters for bpe: two byte configs with different bpe_vocab share a cache
    assert CacheSpec.from_config(cfg_for("x", tmp_path, bpe_vocab=999).data) == base


def test_short_split_names_the_split_and_its_tokens(tmp_path):
    make_docs(tmp_path / "c", 20)
    with pytest.raises(UserError, match=r"^data\.seq_len: the val split of .* has \d+ tokens, fewer than "
                                        r"seq_len \+ 1 = 4097"):
        load_data(cfg_for(str(tmp_path / "c"), tmp_path / "cache", seq_len=4096))
    with pytest.raises(ConfigError, match=r"^data\.val_fraction: must be > 0"):
        load_data(cfg_for(str(tmp_path / "c"), tmp_path / "cache", val_fraction=0.0))
    with pytest.raises(ConfigError, match=r"^data\.val_fraction: val_fraction \+ test_fraction"):
        load_data(cfg_for(str(tmp_path / "c"), tmp_path / "cache", val_fraction=0.5, test_fraction=0.5))


def test_bpe_cache_dtype_describe_and_vocab_size_for(tmp_path):
    cfg = cfg_for("pydoc", tmp_path / "cache", tokenizer="bpe", bpe_vocab=400)
    assert vocab_size_for(cfg) == 400  # cheap: no cache needed
    assert not (tmp_path / "cache").exists()
    data = load_data(cfg)
    assert data.vocab_size == 400 and data.train_tokens.dtype == np.uint16
    import pydoc_data.topics

    topics = [pydoc_data.topics.topics[k] for k in sorted(pydoc_data.topics.topics)]
    train_text = "".join(t for t, s in zip(topics, data.prepared.doc_split, strict=True) if s == 0)
    assert data.tokenizer.decode(data.train_tokens) == train_text  # the cached tokens round-trip the text
    info = data.describe()
    assert info["tokens"] == {"train": len(data.train_tokens), "val": len(data.val_tokens),
                              "test": len(data.test_tokens)}
    assert info["cache_path"] == str(data.prepared.path) and info["tokenizer"] == "bpe"
    chars = cfg_for("pydoc", tmp_path / "cache", tokenizer="chars")
    assert vocab_size_for(chars) == load_data(chars).vocab_size == len(load_data(chars).tokenizer.chars) + 1
    assert vocab_size_for(cfg_for("pydoc", tmp_path / "cache")) == 256
