"""Tokenizers: bytes against str.encode, chars round trip and unknown id, BPE against the
``tokenizers`` library's own byte-level BPE, piecewise encoding, storage dtypes, schema limits."""

from __future__ import annotations

import numpy as np
import pytest

from blockyard.config import config_from_dict
from blockyard.data.tokenizers import (
    BpeTokenizer,
    ByteTokenizer,
    CharTokenizer,
    build_tokenizer,
    storage_dtype,
    text_pieces,
)
from blockyard.errors import ConfigError

MIXED = "Plain ASCII, accents: café naïve, Greek: λόγος, CJK: 漢字, emoji: 🙂, tab\tand\nnewline."


@pytest.fixture(scope="module")
def pydoc_texts() -> list[str]:
    import pydoc_data.topics

    topics = pydoc_data.topics.topics
    return [topics[k] for k in sorted(topics)[:25]]


def test_bytes_equal_python_utf8():
    tok = ByteTokenizer()
    ids = tok.encode(MIXED)
    assert ids.tolist() == list(MIXED.encode("utf-8"))  # reference: Python's UTF-8 codec
    assert tok.decode(ids) == MIXED
    assert tok.vocab_size == 256
    assert tok.decode(ids[: MIXED.encode().index("é".encode()) + 1]).endswith("\ufffd")  # a cut character
    with pytest.raises(ValueError):
        tok.decode([256])


def test_chars_round_trip_sorted_vocab_and_unknown_id():
    train = ["hello world", "low wold"]
    tok = CharTokenizer.from_texts(train)
    assert tok.chars == "".join(sorted(set("".join(train))))  # sorted by code point, like sorted(str)
    assert tok.vocab_size == len(tok.chars) + 1 and tok.unknown_id == len(tok.chars)
    for text in train:
        ids = tok.encode(text)
        assert ids.tolist() == [tok.chars.index(c) for c in text]
        assert tok.decode(ids) == text
    ids = tok.encode("hex!")
    assert ids.tolist() == [tok.chars.index("h"), tok.chars.index("e"), tok.unknown_id, tok.unknown_id]
    assert tok.decode(ids) == "he\ufffd\ufffd"
    wide = CharTokenizer.from_texts([MIXED])
    assert wide.decode(wide.encode(MIXED)) == MIXED  # astral-plane characters (emoji) included


def test_bpe_round_trips_and_matches_the_library_reference(pydoc_texts):
    from tokenizers import ByteLevelBPETokenizer

    vocab = 400
    ours = BpeTokenizer.train(pydoc_texts, vocab)
    # Reference: the tokenizers library's own byte-level BPE class, trained with the same settings.
    ref = ByteLevelBPETokenizer(add_prefix_space=False)
    ref.train_from_iterator(pydoc_texts, vocab_size=vocab, min_frequency=2, special_tokens=[], show_progress=False)
    assert ours.learned_size == ref.get_vocab_size() == vocab
    for text in [*pydoc_texts[:5], MIXED]:
        ids = ours.encode(text)
        assert ids.tolist() == ref.encode(text).ids
        assert ours.decode(ids) == ref.decode(ref.encode(text).ids) == text  # byte-level: any string round-trips
    assert int(ids.max()) < vocab


def test_bpe_save_load_and_vocab_space(tmp_path, pydoc_texts):
    tok = BpeTokenizer.train(pydoc_texts[:3], 2000)
    assert tok.vocab_size == 2000 and 256 < tok.learned_size <= 2000  # a small text may not fill the space
    tok.save(tmp_path / "t.json")
    again = BpeTokenizer.load(tmp_path / "t.json")
    assert again.encode(MIXED).tolist() == tok.encode(MIXED).tolist() and again.vocab_size == 2000


def test_text_pieces_join_and_encode_like_the_whole():
    import pydoc_data.topics

    texts = [pydoc_data.topics.topics[k] for k in sorted(pydoc_data.topics.topics)]
    bpe = BpeTokenizer.train(texts[:25], 600)
    for max_chars in (300, 2000):
        for text in texts:
            pieces = list(text_pieces(text, max_chars=max_chars))
            assert "".join(pieces) == text
            assert all(len(p) <= max_chars for p in pieces)
            # Reference: the library encoding the whole text at once.
            assert np.concatenate([bpe.encode(p) for p in pieces]).tolist() == bpe.backend.encode(text).ids
    assert list(text_pieces("")) == [""]
    assert list(text_pieces("x" * 100, max_chars=64)) == ["x" * 64, "x" * 36]  # nowhere clean: hard cut
    assert list(text_pieces("ab cd\nef", max_chars=4)) == ["ab", " cd\n", "ef"]


def test_build_tokenizer_kinds(pydoc_texts):
    assert isinstance(build_tokenizer("bytes", [], 0), ByteTokenizer)
    chars = build_tokenizer("chars", iter(pydoc_texts), 0)
    assert chars.decode(chars.encode(pydoc_texts[0])) == pydoc_texts[0]
    with pytest.raises(ValueError):
        build_tokenizer("words", [], 0)


def test_storage_dtype_is_the_smallest_that_fits():
    # Reference: numpy's integer limits.
    assert storage_dtype(256) == np.uint8
    assert storage_dtype(257) == np.uint16
    assert storage_dtype(np.iinfo(np.uint16).max + 1) == np.uint16
    assert storage_dtype(np.iinfo(np.uint16).max + 2) == np.uint32


def test_schema_rejects_unknown_tokenizer_and_small_bpe_vocab():
    with pytest.raises(ConfigError, match=r"^data\.tokenizer: 'words' is not allowed"):
        config_from_dict({"data": {"tokenizer": "words"}})
    # 256 byte symbols + at least one merge.
    with pytest.raises(ConfigError, match=r"^data\.bpe_vocab: 256 is too small \(must be >= 257\)"):
        config_from_dict({"data": {"tokenizer": "bpe", "bpe_vocab": 256}})
