"""The token cache: a corpus tokenized once into flat train/val/test arrays, reused by every run.

Layout: ``<root>/tokens/<key>/`` with ``train.bin``, ``val.bin``, ``test.bin`` (raw arrays of the
smallest unsigned dtype that holds the vocabulary), ``doc_split.npy`` (split of each document),
the tokenizer file (chars, bpe) and ``manifest.json``. The key hashes the corpus fingerprint, the
tokenizer (and BPE vocab size), the split fractions, text field, error mode and FORMAT_VERSION.

Preparation is safe under concurrency: an exclusive OS lock on ``<key>.lock`` (``fs.hold_lock``), the build
in a temporary sibling folder, the manifest written last, then one atomic ``rename``. A folder
that exists under its final name is therefore complete; a crashed build leaves only a temporary
folder, removed by the next preparer. Memory stays bounded: documents are read one at a time (a
large ``.txt`` file one chunk at a time, see ``sources.TextFile``), then measured, split and encoded
in pieces without ever being joined into one string, and appended to the split files; training
then reads the files as memmaps.

Every file of the folder, the manifest included, has its sha256 in ``sha256.json``
(``blockyard.integrity``), written inside the temporary folder so that the rename publishes both
at once. Opening a cache verifies it first: a damaged one is moved to ``<root>/tokens/damaged/``
with a one-line warning and prepared again; one from before checksums is used with a note.
"""

from __future__ import annotations

import array
import dataclasses
import hashlib
import itertools
import json
import operator
import os
import shutil
import socket
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from blockyard import fs, integrity
from blockyard.data.sources import Corpus, Document, document_chunks
from blockyard.data.tokenizers import (
    Tokenizer,
    build_tokenizer,
    load_tokenizer,
    save_tokenizer,
    storage_dtype,
    stream_pieces,
)
from blockyard.errors import ConfigError, UserError

FORMAT_VERSION = 1
SPLITS = ("train", "val", "test")
MANIFEST = "manifest.json"
SPLIT_SEED = 20231204  # fixed: the split is a property of the corpus, not of a run's seed


@dataclasses.dataclass(frozen=True)
class CacheSpec:
    """Everything besides the corpus that changes the cached arrays."""

    tokenizer: str
    bpe_vocab: int
    val_fraction: float
    test_fraction: float
    text_field: str
    errors: str

    @classmethod
    def from_config(cls, data: Any) -> CacheSpec:
        return cls(tokenizer=data.tokenizer, bpe_vocab=data.bpe_vocab if data.tokenizer == "bpe" else 0,
                   val_fraction=data.val_fraction, test_fraction=data.test_fraction,
                   text_field=data.text_field, errors=data.errors)


def cache_key(corpus: Corpus, spec: CacheSpec) -> str:
    """``<corpus>-<tokenizer>-<16 hex>``: readable, and unique per content + settings."""
    blob = json.dumps({"format": FORMAT_VERSION, "corpus": corpus.fingerprint, **dataclasses.asdict(spec)},
                      sort_keys=True)
    slug = "".join(c if c.isalnum() else "_" for c in corpus.name.split("/")[-1])[:32] or "corpus"
    return f"{slug}-{spec.tokenizer}-{hashlib.sha256(blob.encode()).hexdigest()[:16]}"


def announce_wait(lock: Path, holder: int) -> None:
    """Say why a preparer waits (another process is building the same cache)."""
    print(f"waiting for process {holder} to finish {lock.stem} ...", file=sys.stderr)


# ----------------------------------------------------------------------------- split plan


@dataclasses.dataclass(frozen=True)
class SplitPlan:
    """How text is divided: whole documents (``doc_split[i]`` in 0/1/2) or character ranges."""

    mode: str  # "documents" | "text"
    doc_split: np.ndarray  # int8 per document (documents mode; -1 everywhere in text mode)
    cuts: tuple[int, int] = (0, 0)  # text mode: train = [0, c1), val = [c1, c2), test = [c2, total)


def plan_split(lengths: np.ndarray, val_fraction: float, test_fraction: float) -> SplitPlan:
    """Assign documents to val, then test, in a fixed pseudo-random order until each holds its
    share of the characters; the rest is train. A document that would overfill a split to more
    than twice its share is skipped. Where that leaves a held-out split empty, or train empty
    (e.g. a single-document corpus), split the concatenated text into contiguous ranges instead.
    """
    n, total = len(lengths), int(lengths.sum())
    order = np.random.Generator(np.random.PCG64(SPLIT_SEED)).permutation(n)
    doc_split = np.zeros(n, dtype=np.int8)
    ok = n >= 2
    for split_id, frac in ((1, val_fraction), (2, test_fraction)):
        if frac <= 0 or not ok:
            continue
        target, taken = frac * total, 0
        for i in order:
            if taken >= target:
                break
            if doc_split[i] != 0 or taken + lengths[i] > 2 * target:
                continue
            doc_split[i] = split_id
            taken += int(lengths[i])
        ok = taken > 0
    if ok and (doc_split == 0).any() and lengths[doc_split == 0].sum() > 0:
        return SplitPlan("documents", doc_split)
    c1 = round(total * (1.0 - val_fraction - test_fraction))
    c2 = round(total * (1.0 - test_fraction))
    return SplitPlan("text", np.full(n, -1, dtype=np.int8), (c1, c2))


def split_texts(documents: Iterator[Document], plan: SplitPlan) -> Iterator[tuple[int, Iterator[str]]]:
    """(split id, the text's chunks) in corpus order: whole documents, or the part of each that falls
    in each character range (text mode), cut across chunks without joining them.

    As with ``itertools.groupby``, a part's chunks are read lazily from the document: consume (or
    skip) each part before asking for the next.
    """
    bounds = (0, plan.cuts[0], plan.cuts[1], None)
    passed = [0]  # characters of the corpus before the current chunk (text mode)
    for i, doc in enumerate(documents):
        if i >= len(plan.doc_split):
            raise UserError("data.corpus: the corpus changed while it was being prepared (more documents)")
        if plan.mode == "documents":
            yield int(plan.doc_split[i]), document_chunks(doc)
            continue
        ranges = _chunks_by_range(document_chunks(doc), bounds, passed)
        for split_id, group in itertools.groupby(ranges, key=operator.itemgetter(0)):
            yield split_id, (text for _, text in group)


def _chunks_by_range(chunks: Iterator[str], bounds: tuple, passed: list[int]) -> Iterator[tuple[int, str]]:
    """(split id, the part of a chunk in that split's range [bounds[id], bounds[id + 1])) for each
    chunk; advances ``passed[0]`` by every chunk's length."""
    for chunk in chunks:
        offset = passed[0]
        for split_id in range(3):
            lo, hi = bounds[split_id], bounds[split_id + 1]
            a = max(lo - offset, 0)
            b = len(chunk) if hi is None else min(hi - offset, len(chunk))
            if b > a:
                yield split_id, chunk[a:b]
        passed[0] = offset + len(chunk)


# ----------------------------------------------------------------------------- prepared cache


@dataclasses.dataclass(frozen=True)
class PreparedCorpus:
    path: Path
    manifest: dict
    tokenizer: Tokenizer
    splits: dict[str, np.ndarray]  # read-only memmaps (an empty split: an empty array)

    @property
    def doc_split(self) -> np.ndarray:
        return np.load(self.path / "doc_split.npy")


def is_ready(folder: Path) -> bool:
    try:
        return json.loads((folder / MANIFEST).read_text()).get("format") == FORMAT_VERSION
    except (OSError, ValueError):
        return False


def damage(folder: Path) -> list[integrity.FileCheck]:
    """The files of a ready cache folder that fail their checksums (empty: all verify). A folder from
    before checksums has none to fail: a note says it is used unverified."""
    names = [p.name for p in folder.iterdir() if p.is_file() and p.name != integrity.SUMS_FILE]
    checks = integrity.check_folder(folder, names, listed_are_required=True)
    if checks and all(c.status == integrity.UNVERIFIABLE for c in checks):
        print(f"note: token cache {folder} was prepared before checksums: used unverified (delete the folder to "
              "have it prepared again, with checksums)", file=sys.stderr)
    return [c for c in checks if c.status == integrity.DAMAGED]


def open_prepared(folder: Path) -> PreparedCorpus:
    manifest = json.loads((folder / MANIFEST).read_text())
    dtype = np.dtype(manifest["dtype"])
    splits = {}
    for name in SPLITS:
        n = manifest["tokens"][name]
        # numpy cannot map an empty file.
        splits[name] = np.memmap(folder / f"{name}.bin", dtype=dtype, mode="r", shape=(n,)) if n else \
            np.zeros(0, dtype=dtype)
    tok = load_tokenizer(manifest["tokenizer"]["kind"], folder)
    return PreparedCorpus(folder, manifest, tok, splits)


def prepare(corpus: Corpus, spec: CacheSpec, root: Path) -> PreparedCorpus:
    """The prepared cache of ``corpus`` under ``spec``: reused when present, else built once."""
    final = root / "tokens" / cache_key(corpus, spec)
    if is_ready(final) and not damage(final):
        return open_prepared(final)
    final.parent.mkdir(parents=True, exist_ok=True)
    lock = final.parent / f"{final.name}.lock"
    with fs.hold_lock(lock, wait_s=None, on_wait=lambda pid: announce_wait(lock, pid)):
        if is_ready(final):  # another process built it while we waited, or it is damaged
            broken = damage(final)
            if not broken:
                return open_prepared(final)
            moved = integrity.move_aside(final)
            print(f"warning: token cache {broken[0].path} is damaged ({broken[0].why}); moved the cache to "
                  f"{moved.parent.name}/{moved.name}, preparing it again", file=sys.stderr)
        for stale in final.parent.glob(f".tmp-{final.name}-*"):
            shutil.rmtree(stale, ignore_errors=True)  # left by a crashed preparer (we hold the lock)
        tmp = None
        try:
            with fs.reporting(final, "the token cache"):
                tmp = Path(tempfile.mkdtemp(prefix=f".tmp-{final.name}-", dir=final.parent))
                build(corpus, spec, tmp)
                if final.exists():  # an old-format, manifest-less or damaged-manifest folder: never read
                    moved = integrity.move_aside(final)
                    print(f"warning: token cache {final} has no readable manifest; moved it to "
                          f"{moved.parent.name}/{moved.name}, prepared again", file=sys.stderr)
                os.rename(tmp, final)
        except BaseException:
            if tmp is None:
                raise
            shutil.rmtree(tmp, ignore_errors=True)
            raise
    return open_prepared(final)


def document_lengths(corpus: Corpus) -> np.ndarray:
    lengths = array.array("q")
    for doc in corpus.documents():
        lengths.append(sum(len(chunk) for chunk in document_chunks(doc)))
    return np.frombuffer(lengths, dtype=np.int64) if len(lengths) else np.zeros(0, dtype=np.int64)


def build(corpus: Corpus, spec: CacheSpec, folder: Path) -> None:
    """Tokenize ``corpus`` into ``folder`` (streaming), writing the manifest last."""
    started = time.time()
    if spec.val_fraction + spec.test_fraction >= 1.0:
        raise ConfigError("data.val_fraction", "val_fraction + test_fraction must leave text for training")
    corpus.validate()
    lengths = document_lengths(corpus)
    if len(lengths) == 0 or lengths.sum() == 0:
        raise UserError(f"data.corpus: {corpus.name}: the corpus is empty ({len(lengths)} documents, no text)")
    plan = plan_split(lengths, spec.val_fraction, spec.test_fraction)
    # The training text as the very pieces the encoder sees below: bpe is trained on exactly those.
    train_pieces = (piece for split_id, part in split_texts(corpus.documents(), plan) if split_id == 0
                    for piece in stream_pieces(part))
    tok = build_tokenizer(spec.tokenizer, train_pieces, spec.bpe_vocab)
    dtype = storage_dtype(tok.vocab_size)
    counts = dict.fromkeys(SPLITS, 0)
    docs = dict.fromkeys(SPLITS, 0)
    # Tokens never outnumber the text's UTF-8 bytes (<= 4 per character): the most the arrays can need.
    most = int(lengths.sum()) * 4 * dtype.itemsize
    files: dict[str, Any] = {}
    try:
        with fs.reporting(folder, "the token cache being prepared", most):
            for name in SPLITS:
                files[name] = open(folder / f"{name}.bin", "wb")  # noqa: SIM115 - closed below
            _write_splits(corpus, plan, tok, dtype, files, counts, docs)
    finally:
        for fh in files.values():
            fh.close()
    save_tokenizer(tok, folder)
    np.save(folder / "doc_split.npy", plan.doc_split)
    manifest = {
        "format": FORMAT_VERSION,
        "corpus": corpus.name,
        "corpus_kind": corpus.kind,
        "corpus_fingerprint": corpus.fingerprint,
        "provenance": corpus.provenance,
        "tokenizer": {"kind": tok.kind, "vocab_size": tok.vocab_size,
                      "learned_size": getattr(tok, "learned_size", tok.vocab_size)},
        "dtype": dtype.name,
        "split_mode": plan.mode,
        "val_fraction": spec.val_fraction,
        "test_fraction": spec.test_fraction,
        "documents": {"total": len(lengths), **(docs if plan.mode == "documents" else {})},
        "characters": int(lengths.sum()),
        "tokens": counts,
        "text_field": spec.text_field,
        "errors": spec.errors,
        "prepared_by": {"host": socket.gethostname(), "pid": os.getpid()},
        "prepare_s": round(time.time() - started, 3),
    }
    text = json.dumps(manifest, indent=1)
    sums = {p.name: integrity.entry_of_file(p) for p in folder.iterdir() if p.is_file()}
    integrity.record(folder, {**sums, MANIFEST: integrity.entry_of_bytes(text.encode())})
    fs.atomic_write_text(folder / MANIFEST, text, what="the token cache's manifest")


def _write_splits(corpus: Corpus, plan: SplitPlan, tok: Tokenizer, dtype: np.dtype, files: dict[str, Any],
                  counts: dict[str, int], docs: dict[str, int]) -> None:
    """Encode the corpus piece by piece, appending each split's ids to its file; counts as it goes."""
    for split_id, part in split_texts(corpus.documents(), plan):
        name = SPLITS[split_id]
        docs[name] += 1
        for piece in stream_pieces(part):
            ids = tok.encode(piece)
            if ids.size and int(ids.max()) >= tok.vocab_size:
                raise RuntimeError(f"tokenizer produced id {int(ids.max())} >= vocab {tok.vocab_size}")
            files[name].write(ids.astype(dtype).tobytes())
            counts[name] += int(ids.size)
    for fh in files.values():
        fh.flush()
        os.fsync(fh.fileno())
