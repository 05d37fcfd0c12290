"""Tokenizers: text <-> integer ids. ``bytes`` (UTF-8, vocab 256), ``chars`` (the training split's
characters plus an unknown id) and ``bpe`` (byte-level BPE trained with the ``tokenizers`` library).

Every tokenizer round-trips the text it was built from: bytes and byte-level BPE round-trip any
string, chars any string made of its characters. ``encode`` returns an ``np.ndarray`` of int64.
Long texts are encoded in pieces (:func:`text_pieces`) cut where no tokenizer here merges across
the cut, so piecewise encoding equals encoding the whole text (bar a hard cut, see there). A text
that arrives in chunks is cut into the very same pieces by :func:`stream_pieces`.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Protocol

import numpy as np

if TYPE_CHECKING:  # the type only: the code imports the library where it uses it
    from tokenizers import Tokenizer as LibraryTokenizer

UNKNOWN_CHAR = "\ufffd"
PIECE_CHARS = 1 << 20


class Tokenizer(Protocol):
    kind: str
    vocab_size: int

    def encode(self, text: str) -> np.ndarray: ...

    def decode(self, ids: Iterable[int]) -> str: ...


# A cut c (pieces ...text[:c] | text[c:]...) where no byte-level BPE merge can span: just after a
# newline between two non-space characters, or just before a single space between two of them.
_CLEAN_CUT = re.compile(r"(?<=\S\n)(?=\S)|(?<=\S)(?= \S)")


def text_pieces(text: str, max_chars: int = PIECE_CHARS) -> Iterator[str]:
    """Consecutive slices of ``text`` (joined they give ``text``) of at most ``max_chars``
    characters, cut at clean places so that encoding the pieces equals encoding the whole.

    Byte-level BPE pre-tokenizes with the pattern of Radford et al. 2019 (technical report), under which a
    newline between non-space characters is a pre-token of its own and a single space before a
    non-space character opens a pre-token, so no merge spans such a cut (bytes and chars are per
    symbol anyway). A window with no clean place (no space or newline at all) is cut hard.
    """
    start, n = 0, len(text)
    while n - start > max_chars:
        cut = _next_cut(text, start, max_chars)
        yield text[start:cut]
        start = cut
    if start < n or n == 0:
        yield text[start:]


def _next_cut(text: str, start: int, max_chars: int) -> int:
    """The last clean cut in ``(start, start + max_chars]``, else the hard cut ``start + max_chars``.

    It reads only ``text[start - 1 : start + max_chars + 2]`` (the cut pattern looks at most two
    characters behind and one ahead), which is what lets :func:`stream_pieces` cut a chunked text alike.
    """
    hi = start + max_chars
    for lo in (max(start + 1, hi - 4096), start + 1):  # look near the end first: usually enough
        found = [m.start() for m in _CLEAN_CUT.finditer(text, lo, hi + 2) if start < m.start() <= hi]
        if found:
            return found[-1]
    return hi


def stream_pieces(chunks: Iterable[str], max_chars: int = PIECE_CHARS) -> Iterator[str]:
    """``text_pieces("".join(chunks), max_chars)`` without joining the whole: the same pieces, holding
    about one chunk plus one piece.

    Where a chunk ends is never a cut by itself: the text after the last cut is carried over to the
    next chunks, and a cut is only decided once the buffer holds all that :func:`_next_cut` reads
    (one character before the piece, two past ``max_chars``), so the chunking cannot change an id.
    Small chunks are gathered until they add a piece's worth, so each character is copied O(1) times.
    """
    buf, start = "", 0  # buf[start:] is not yet yielded; buf[start - 1] is kept as look-behind context
    pending: list[str] = []
    pending_chars = 0
    for chunk in chunks:
        pending.append(chunk)
        pending_chars += len(chunk)
        if pending_chars < max_chars + 2:
            continue
        carried, start = _carry(buf, start)
        buf = ""  # drop the old buffer before the new one is built: one chunk less held at a time
        buf, pending, pending_chars = "".join(carried + pending), [], 0
        while len(buf) - start >= max_chars + 2:
            cut = _next_cut(buf, start, max_chars)
            yield buf[start:cut]
            start = cut
    carried, start = _carry(buf, start)
    buf = "".join(carried + pending)
    while len(buf) - start > max_chars:  # the end of the text is known now: the rule of text_pieces
        cut = _next_cut(buf, start, max_chars)
        yield buf[start:cut]
        start = cut
    if start < len(buf) or not buf:
        yield buf[start:]


def _carry(buf: str, start: int) -> tuple[list[str], int]:
    """What of ``buf`` to keep (from ``start - 1`` on; [] if nothing) and where ``start`` lies in it.

    A list, so that ``"".join`` of a single string returns it as is: a one-string document is never copied.
    """
    keep = max(start - 1, 0)
    return ([buf[keep:]] if len(buf) > keep else []), start - keep


def _as_ids(ids: Iterable[int]) -> np.ndarray:
    return np.asarray(ids if not isinstance(ids, np.ndarray) else ids, dtype=np.int64).reshape(-1)


class ByteTokenizer:
    """UTF-8 bytes: id = byte value."""

    kind = "bytes"
    vocab_size = 256

    def encode(self, text: str) -> np.ndarray:
        return np.frombuffer(text.encode("utf-8"), dtype=np.uint8).astype(np.int64)

    def decode(self, ids: Iterable[int]) -> str:
        arr = _as_ids(ids)
        if arr.size and (arr.min() < 0 or arr.max() > 255):
            raise ValueError("byte ids must lie in 0..255")
        # A window may cut a multi-byte character: render the pieces as U+FFFD.
        return arr.astype(np.uint8).tobytes().decode("utf-8", errors="replace")


class CharTokenizer:
    """Characters of the training text, sorted by code point, id = rank; one extra unknown id."""

    kind = "chars"

    def __init__(self, chars: str) -> None:
        if list(chars) != sorted(set(chars)):
            raise ValueError("chars must be sorted and unique")
        self.chars = chars
        self._points = np.array([ord(c) for c in chars], dtype=np.uint32)
        self.unknown_id = len(chars)
        self.vocab_size = len(chars) + 1

    @classmethod
    def from_texts(cls, texts: Iterable[str]) -> CharTokenizer:
        seen: set[str] = set()
        for text in texts:
            seen.update(text)
        return cls("".join(sorted(seen)))

    def encode(self, text: str) -> np.ndarray:
        points = np.frombuffer(text.encode("utf-32-le", errors="surrogatepass"), dtype="<u4")
        if not len(self._points):
            return np.full(points.shape, self.unknown_id, dtype=np.int64)
        rank = np.searchsorted(self._points, points)
        found = self._points[np.minimum(rank, len(self._points) - 1)] == points
        return np.where(found, rank, self.unknown_id).astype(np.int64)

    def decode(self, ids: Iterable[int]) -> str:
        table = self.chars + UNKNOWN_CHAR
        return "".join(table[i] for i in _as_ids(ids).tolist())

    def save(self, path: Path) -> None:
        path.write_text(json.dumps({"kind": self.kind, "chars": self.chars}, ensure_ascii=True))

    @classmethod
    def load(cls, path: Path) -> CharTokenizer:
        return cls(json.loads(path.read_text())["chars"])


def bpe_trainer_settings(vocab_size: int) -> dict:
    """The BpeTrainer arguments: the full byte alphabet first, no special tokens; min_frequency 2 as in
    the tokenizers library's own ByteLevelBPETokenizer (a pair seen once is not worth a merge)."""
    from tokenizers import pre_tokenizers

    return {"vocab_size": vocab_size, "min_frequency": 2, "special_tokens": [],
            "initial_alphabet": pre_tokenizers.ByteLevel.alphabet(), "show_progress": False}


class BpeTokenizer:
    """Byte-level BPE (Sennrich et al. 2016 on bytes, as in Radford et al. 2019) from ``tokenizers``.

    ``vocab_size`` is the configured id space (``data.bpe_vocab``); ``learned_size`` <= it is what
    training found room for (a small corpus may run out of pairs worth merging).
    """

    kind = "bpe"

    def __init__(self, backend: LibraryTokenizer, vocab_size: int) -> None:
        self.backend = backend
        self.vocab_size = vocab_size
        self.learned_size = backend.get_vocab_size()
        if self.learned_size > vocab_size:
            raise ValueError(f"learned vocabulary {self.learned_size} exceeds {vocab_size}")

    @staticmethod
    def empty_backend() -> LibraryTokenizer:
        from tokenizers import Tokenizer as LibraryTokenizer
        from tokenizers import decoders, models, pre_tokenizers

        backend = LibraryTokenizer(models.BPE())
        backend.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=True)
        backend.decoder = decoders.ByteLevel()
        return backend

    @classmethod
    def train(cls, texts: Iterable[str], vocab_size: int) -> BpeTokenizer:
        from tokenizers import trainers

        backend = cls.empty_backend()
        trainer = trainers.BpeTrainer(**bpe_trainer_settings(vocab_size))
        backend.train_from_iterator((p for t in texts for p in text_pieces(t)), trainer=trainer)
        return cls(backend, vocab_size)

    def encode(self, text: str) -> np.ndarray:
        return np.asarray(self.backend.encode(text).ids, dtype=np.int64)

    def decode(self, ids: Iterable[int]) -> str:
        return self.backend.decode(_as_ids(ids).tolist(), skip_special_tokens=False)

    def save(self, path: Path) -> None:
        path.write_text(json.dumps({"kind": self.kind, "vocab_size": self.vocab_size,
                                    "backend": json.loads(self.backend.to_str())}))

    @classmethod
    def load(cls, path: Path) -> BpeTokenizer:
        from tokenizers import Tokenizer as LibraryTokenizer

        data = json.loads(path.read_text())
        return cls(LibraryTokenizer.from_str(json.dumps(data["backend"])), data["vocab_size"])


TOKENIZER_FILE = "tokenizer.json"


def build_tokenizer(kind: str, train_texts: Iterable[str], bpe_vocab: int) -> Tokenizer:
    """A tokenizer of ``kind`` fitted to the training texts (bytes needs none)."""
    if kind == "bytes":
        return ByteTokenizer()
    if kind == "chars":
        return CharTokenizer.from_texts(train_texts)
    if kind == "bpe":
        return BpeTokenizer.train(train_texts, bpe_vocab)
    raise ValueError(f"unknown tokenizer kind {kind!r}")


def save_tokenizer(tok: Tokenizer, folder: Path) -> None:
    if isinstance(tok, (CharTokenizer, BpeTokenizer)):
        tok.save(folder / TOKENIZER_FILE)


def load_tokenizer(kind: str, folder: Path) -> Tokenizer:
    if kind == "bytes":
        return ByteTokenizer()
    if kind == "chars":
        return CharTokenizer.load(folder / TOKENIZER_FILE)
    if kind == "bpe":
        return BpeTokenizer.load(folder / TOKENIZER_FILE)
    raise ValueError(f"unknown tokenizer kind {kind!r}")


def storage_dtype(vocab_size: int) -> np.dtype:
    """The smallest unsigned integer type that holds every id below ``vocab_size``."""
    for dt in (np.uint8, np.uint16, np.uint32):
        if vocab_size - 1 <= np.iinfo(dt).max:
            return np.dtype(dt)
    return np.dtype(np.uint64)
