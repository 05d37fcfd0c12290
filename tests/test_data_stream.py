"""Streamed reading of large .txt files: the same text as the datasets text builder, the same pieces
as the whole-string rule, the same token cache for bytes / chars / bpe, data.errors alike, and what bounds the memory of
preparing a large file (its peak RSS is a benchmark: scripts/bench_memory.py)."""

from __future__ import annotations

import random
from pathlib import Path

import numpy as np
import pytest

from blockyard.config import config_from_dict
from blockyard.data import load_data
from blockyard.data import sources as src
from blockyard.data.tokenizers import PIECE_CHARS, BpeTokenizer, stream_pieces, text_pieces
from blockyard.errors import UserError

TINY_CHUNK = 97  # bytes: cuts 2-, 3- and 4-byte characters and \r\n pairs all over
WORDS = ("river stone λόγος café naïve 漢字 lantern 🙂 meadow harbour thistle candle the of and to in a "
         "copper wheat").split()


def generated_text(n_words: int, seed: int = 0) -> str:
    """Words of 1- to 4-byte characters; single and double spaces, tabs, LF, CRLF and lone CR."""
    rng = np.random.default_rng(seed)
    seps = np.array([" ", " ", " ", " ", "  ", "\t", "\n", "\r\n", "\n\n", "\r"])
    words = np.array(WORDS)[rng.integers(len(WORDS), size=n_words)]
    return "".join(np.char.add(words, seps[rng.integers(len(seps), size=n_words)]).tolist())


def cfg_for(corpus: str, cache: Path, **data):
    return config_from_dict({"data": {"corpus": corpus, "cache_dir": str(cache), "seq_len": 16, **data},
                             "train": {"batch_size": 4, "eval_windows": 4}})


def stream_everything(monkeypatch) -> None:
    """Every .txt file above 1 KiB is read by TextFile, 97 bytes at a time."""
    monkeypatch.setattr(src, "STREAM_TXT_BYTES", 1024)
    monkeypatch.setattr(src, "TXT_CHUNK_BYTES", TINY_CHUNK)


def datasets_document(path: Path, errors: str) -> str:
    """Reference: the text the datasets library's text builder gives for the file as one document."""
    datasets = src.import_datasets()
    ds = datasets.load_dataset("text", data_files=[str(path)], split="train", streaming=True,
                               sample_by="document", encoding_errors=errors)
    (row,) = list(ds)
    return row["text"]


# ----------------------------------------------------------------------------- pieces


def test_stream_pieces_equal_the_whole_string_pieces_for_any_chunking():
    # Reference: text_pieces on the joined text (the rule of the non-streamed path), for random texts
    # with clean cuts, texts with none (hard cuts) and cuts that need the character before a chunk.
    rng = random.Random(0)
    alphabets = ["ab é漢🙂 \n\n  \t", "abc", "a b", " \n", "ab\n", "x"]
    for _ in range(3000):
        n = rng.randint(0, 300)
        alphabet = rng.choice(alphabets)
        text = "".join(rng.choice(alphabet) for _ in range(n))
        bounds = sorted(rng.sample(range(n + 1), rng.randint(0, min(n, 30)))) if n else []
        chunks = [text[a:b] for a, b in zip([0, *bounds], [*bounds, n], strict=True)]
        chunks.insert(rng.randint(0, len(chunks)), "")
        max_chars = rng.randint(1, 40)
        assert list(stream_pieces(chunks, max_chars)) == list(text_pieces(text, max_chars))
    assert list(stream_pieces([])) == list(text_pieces("")) == [""]
    one = "word " * 10
    assert next(iter(stream_pieces([one], max_chars=1000))) is one  # a one-string document is not copied


def test_streamed_pieces_encode_like_the_whole_text_with_bpe():
    text = generated_text(4000, seed=1)
    bpe = BpeTokenizer.train([text], 400)
    chunks = [text[i:i + 13] for i in range(0, len(text), 13)]
    pieces = list(stream_pieces(chunks, max_chars=500))
    assert len(pieces) > 20
    # Reference: the tokenizers library encoding the whole text at once.
    assert np.concatenate([bpe.encode(p) for p in pieces]).tolist() == bpe.backend.encode(text).ids


# ----------------------------------------------------------------------------- reading


def test_text_file_reads_what_the_datasets_text_builder_reads(tmp_path):
    # A BOM (kept as text by the utf-8 codec), then text whose chunks of TINY_CHUNK bytes end in
    # \r: half of them with the \n opening the next chunk, half a lone \r.
    raw = bytearray("\ufeff".encode())
    words = iter(generated_text(4000, seed=2).split(" "))
    for k in range(1, 40):
        while len(raw) + len(word := next(words).encode() + b" ") < k * TINY_CHUNK - 1:
            raw += word
        raw += b"x" * (k * TINY_CHUNK - 1 - len(raw)) + (b"\r\n" if k % 2 else b"\rx")
    raw += generated_text(2000, seed=3).encode()
    path = tmp_path / "t.txt"
    path.write_bytes(bytes(raw))
    reference = datasets_document(path, "strict")
    assert "\r" not in reference and reference.startswith("\ufeff")
    for chunk in (1, 2, 3, TINY_CHUNK, 1 << 20):
        chunks = list(src.TextFile(path, "strict", chunk).chunks())
        assert "".join(chunks) == reference
    assert len(list(src.TextFile(path, "strict", TINY_CHUNK).chunks())) > 100


def test_text_file_replace_matches_datasets_and_strict_names_the_offset(tmp_path):
    good = generated_text(1000, seed=3).encode()
    bad_at = 5 * TINY_CHUNK + 50  # beyond the first chunk
    data = good[:bad_at] + b"\xff" + good[bad_at:] + b"\xe2\x82"  # a stray byte, and a cut-off character at EOF
    path = tmp_path / "bad.txt"
    path.write_bytes(data)
    text = "".join(src.TextFile(path, "replace", TINY_CHUNK).chunks())
    assert text == datasets_document(path, "replace")
    assert text == data.decode("utf-8", errors="replace").replace("\r\n", "\n").replace("\r", "\n")  # CPython codec
    # Read without the validate pass (the file changed after it): still the file and offset.
    with pytest.raises(UserError, match=rf"bad\.txt: undecodable UTF-8 at byte offset {bad_at} "):
        "".join(src.TextFile(path, "strict", TINY_CHUNK).chunks())


def test_large_txt_files_are_streamed_small_ones_go_through_datasets(tmp_path, monkeypatch):
    stream_everything(monkeypatch)
    sizes = {"a.txt": 2000, "b.txt": 100, "c.txt": 200, "d.txt": 5000, "e.txt": 10}  # characters
    for name, n_chars in sizes.items():
        (tmp_path / name).write_text(generated_text(n_chars, seed=n_chars)[:n_chars], newline="")
    docs = list(src.resolve_corpus(str(tmp_path), tmp_path).documents())
    kinds = [type(d).__name__ for d in docs]
    assert kinds == ["TextFile", "str", "str", "TextFile", "str"]  # sorted by name; 1 KiB threshold
    # Reference: each file read whole by the datasets text builder.
    expected = [datasets_document(tmp_path / name, "strict") for name in sorted(sizes)]
    assert ["".join(src.document_chunks(d)) for d in docs] == expected


# ----------------------------------------------------------------------------- the token cache


def cache_contents(data) -> dict:
    """The arrays, tokenizer file and manifest of a prepared cache, bar who prepared it and when."""
    folder = data.prepared.path
    manifest = {k: v for k, v in data.prepared.manifest.items() if k not in ("prepared_by", "prepare_s")}
    tokenizer = (folder / "tokenizer.json").read_text() if (folder / "tokenizer.json").exists() else None
    return {"train": data.train_tokens.tolist(), "val": data.val_tokens.tolist(),
            "test": data.test_tokens.tolist(), "doc_split": data.prepared.doc_split.tolist(),
            "manifest": manifest, "tokenizer": tokenizer, "key": folder.name}


@pytest.fixture(scope="module")
def big_text() -> str:
    """About 2.5 MB: words of 1- to 4-byte characters, and one stretch of 1.1 M characters without a
    space or newline, so that the 1 M-character pieces need a hard cut. The stretch mixes letters and
    digits: short pre-tokens keep BPE fast, and a hard cut elsewhere would split some of them."""
    rng = np.random.default_rng(7)
    run = "".join(np.array(list("abcdefgé漢123"))[rng.integers(12, size=1_100_000)].tolist())
    text = generated_text(100_000, seed=4) + run + generated_text(60_000, seed=5)
    assert PIECE_CHARS in {len(p) for p in text_pieces(text)}  # a hard cut, inside the run
    return text


@pytest.mark.parametrize(("tokenizer", "extra"), [("bytes", {}), ("chars", {}), ("bpe", {"bpe_vocab": 300})])
def test_streamed_file_prepares_to_the_whole_string_cache(tmp_path, monkeypatch, big_text, tokenizer, extra):
    path = tmp_path / "big.txt"
    path.write_bytes(big_text.encode())
    settings = {"tokenizer": tokenizer, "val_fraction": 0.1, "test_fraction": 0.05, **extra}
    whole = cache_contents(load_data(cfg_for(str(path), tmp_path / "whole", **settings)))  # via datasets
    stream_everything(monkeypatch)
    monkeypatch.setattr(src, "text_documents", lambda *a: pytest.fail("the large file went through datasets"))
    streamed = cache_contents(load_data(cfg_for(str(path), tmp_path / "streamed", **settings)))
    assert whole["manifest"]["split_mode"] == "text" and whole["manifest"]["characters"] > 1.5 * PIECE_CHARS
    assert streamed == whole  # same key, arrays, vocabulary / merges and manifest
    if tokenizer == "bytes":  # reference: Python's codec on the file, newlines translated as open() does
        assert bytes(np.array(whole["train"] + whole["val"] + whole["test"], dtype=np.uint8)) == \
            big_text.replace("\r\n", "\n").replace("\r", "\n").encode()


def test_streamed_folder_of_documents_prepares_to_the_whole_string_cache(tmp_path, monkeypatch):
    corpus = tmp_path / "c"
    corpus.mkdir()
    for i in range(12):  # every other file above the 1 KiB threshold
        (corpus / f"d{i:02d}.txt").write_text(generated_text(800 if i % 2 else 60, seed=10 + i), newline="")
    settings = {"tokenizer": "bpe", "bpe_vocab": 300, "val_fraction": 0.1, "test_fraction": 0.1}
    whole = cache_contents(load_data(cfg_for(str(corpus), tmp_path / "whole", **settings)))
    stream_everything(monkeypatch)
    streamed = cache_contents(load_data(cfg_for(str(corpus), tmp_path / "streamed", **settings)))
    assert whole["manifest"]["split_mode"] == "documents"
    assert streamed == whole


def test_errors_strict_and_replace_on_a_streamed_file(tmp_path, monkeypatch):
    good = generated_text(3000, seed=6).encode()
    bad_at = 40 * TINY_CHUNK + 11
    path = tmp_path / "big.txt"
    path.write_bytes(good[:bad_at] + b"\xfe" + good[bad_at:bad_at + 500] + b"\xc3(" + good[bad_at + 500:])
    settings = {"val_fraction": 0.1, "test_fraction": 0.0}
    with pytest.warns(UserWarning):
        whole = cache_contents(load_data(cfg_for(str(path), tmp_path / "whole", errors="replace", **settings)))
    stream_everything(monkeypatch)
    with pytest.raises(UserError, match=rf"big\.txt: undecodable UTF-8 at byte offset {bad_at} .*data\.errors"):
        load_data(cfg_for(str(path), tmp_path / "streamed", **settings))
    with pytest.warns(UserWarning, match=rf"big\.txt: 2 undecodable UTF-8 sequence\(s\), the first at byte offset "
                                         rf"{bad_at}"):
        streamed = cache_contents(load_data(cfg_for(str(path), tmp_path / "streamed", errors="replace", **settings)))
    assert streamed == whole
    assert bytes(np.array(whole["train"] + whole["val"], dtype=np.uint8)).count("\ufffd".encode()) == 2


# ----------------------------------------------------------------------------- what bounds memory


def write_generated_file(path: Path, nbytes: int) -> None:
    """``nbytes`` of generated text (whole characters only, no \r), written slab by slab."""
    slab = generated_text(200_000, seed=8).replace("\r", "").encode()
    with open(path, "wb") as f:
        written = 0
        while written < nbytes:
            part = slab[: nbytes - written].decode("utf-8", errors="ignore").encode()  # no cut character
            written += f.write(part + b" " * (min(len(slab), nbytes - written) - len(part)))


def test_preparing_a_large_file_never_holds_it_whole(tmp_path, monkeypatch):
    # What keeps preparing's memory small: the file is read a chunk at a time and encoded a piece
    # at a time, so no string ever holds more than one piece of it. The peak RSS this buys is
    # measured by scripts/bench_memory.py (section "corpus": a 1 GB file), not timed here.
    from blockyard.data import cache

    stream_everything(monkeypatch)
    nbytes = 3 * PIECE_CHARS
    path = tmp_path / "big.txt"
    write_generated_file(path, nbytes)
    longest = {"chunk": 0, "piece": 0}

    def measured(name, inner):
        def wrapper(*args, **kwargs):
            for text in inner(*args, **kwargs):
                longest[name] = max(longest[name], len(text))
                yield text
        return wrapper

    monkeypatch.setattr(cache, "document_chunks", measured("chunk", cache.document_chunks))
    monkeypatch.setattr(cache, "stream_pieces", measured("piece", cache.stream_pieces))
    data = load_data(cfg_for(str(path), tmp_path / "cache", tokenizer="bytes"))
    assert sum(len(a) for a in (data.train_tokens, data.val_tokens, data.test_tokens)) == nbytes  # all of it
    assert 0 < longest["chunk"] <= TINY_CHUNK
    assert 0 < longest["piece"] <= PIECE_CHARS + 2 < nbytes / 2
