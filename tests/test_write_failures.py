"""A full disk (or a read-only one) while writing each kind of file: one line, exit code 4, nothing lost.

Each path is checked by making the real write fail the way write(2) fails on a full disk (ENOSPC,
"No space left on device"), patched at the call that writes the bytes; where the test may mount a
small tmpfs (a user namespace, or root), one run also fills a real filesystem. After the failure the
last good checkpoint is the resume point, no partial file is left, and rerunning the same command
once space is free finishes with metrics equal to an uninterrupted run's (the trainer's promise,
``rundir.TIMING_FIELDS`` aside).
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from _helpers import FailingFile, child_env, comparable, write_tiny_run

from blockyard.cli import main
from blockyard.config import load_config
from blockyard.errors import WriteFailed
from blockyard.grid.index import open_index
from blockyard.rundir import read_summary
from blockyard.train import run_training

ENOSPC = OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
pytestmark = pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="finds a file's name via /proc (Linux)")


def fd_name(fd: int) -> str:
    try:
        return os.readlink(f"/proc/self/fd/{fd}")
    except OSError:
        return ""


@pytest.fixture(scope="module")
def root(tmp_path_factory) -> Path:
    words = "the of and to in is that for it as was with be by on not he this are or his".split()
    train = {"steps": 20, "batch_size": 4, "warmup_steps": 2, "log_every": 2, "eval_every": 5,
             "checkpoint_every": 5, "eval_windows": 2, "keep_checkpoints": 1}
    return write_tiny_run(tmp_path_factory.mktemp("full"), words, seed=1, train=train)


@pytest.fixture(scope="module")
def reference(root) -> list[dict]:
    """The metrics of the same config trained without any failure."""
    run_training(load_config(root / "run.yaml"), root / "reference", progress="silent")
    return comparable(root / "reference")


def temp_files(folder: Path) -> list[str]:
    return [p.name for p in folder.rglob("*.tmp")]


def train_cli(root: Path, out: Path, capsys) -> tuple[int, list[str]]:
    capsys.readouterr()
    code = main(["train", str(root / "run.yaml"), "--out", str(out)])
    return code, [line for line in capsys.readouterr().err.splitlines() if line.startswith("error:")]


def check_resumes_to_reference(root: Path, out: Path, reference: list[dict], capsys) -> None:
    code, errors = train_cli(root, out, capsys)
    assert (code, errors) == (0, [])
    assert comparable(out) == reference


# ----------------------------------------------------------------------------- the trainer's files


@pytest.mark.slow
def test_checkpoint(root, reference, capsys, monkeypatch):
    import torch

    from blockyard.train import checkpoint

    real_save = torch.save

    def save_then_fill_the_disk(state, f):
        if state["step"] == 10:  # the second checkpoint: half its bytes reach the disk, then it is full
            f.write(b"PK\x03\x04 a torn zip")
            raise ENOSPC
        real_save(state, f)

    monkeypatch.setattr(checkpoint.torch, "save", save_then_fill_the_disk)
    out = root / "ckpt"
    code, errors = train_cli(root, out, capsys)
    assert code == 4 and len(errors) == 1
    assert errors[0].startswith(f"error: cannot write {out}/checkpoints/step_0000010.pt (the checkpoint of step 10): "
                                "no space left on the device (needs about ")
    assert errors[0].endswith("; the checkpoint of step 5 stays the resume point; fix that (e.g. free space), "
                              "then rerun the same command to resume")
    assert sorted(p.name for p in (out / "checkpoints").iterdir()) == ["sha256.json", "step_0000005.pt"]
    assert temp_files(out) == []
    assert read_summary(out)["status"] == "failed"
    monkeypatch.undo()
    check_resumes_to_reference(root, out, reference, capsys)


@pytest.mark.slow
def test_metrics_line(root, reference, capsys, monkeypatch):
    real_write = os.write

    def fill_on_step_12(fd, data):
        if fd_name(fd).endswith("metrics.jsonl") and b'"step": 12,' in bytes(data):
            real_write(fd, bytes(data[:10]))  # part of the line lands, then the disk is full
            raise ENOSPC
        return real_write(fd, data)

    monkeypatch.setattr(os, "write", fill_on_step_12)
    out = root / "metrics"
    code, errors = train_cli(root, out, capsys)
    monkeypatch.undo()
    assert code == 4 and len(errors) == 1
    assert f"cannot write {out}/metrics.jsonl (the metrics line of step 12): no space left" in errors[0]
    assert "the checkpoint of step 10 stays the resume point" in errors[0]
    text = (out / "metrics.jsonl").read_text()
    assert text.endswith("\n") and [json.loads(raw)["step"] for raw in text.splitlines()][-1] == 10  # no torn line
    check_resumes_to_reference(root, out, reference, capsys)


@pytest.mark.slow
def test_tensorboard_events(root, reference, capsys, monkeypatch):
    from tensorboard.summary.writer import record_writer

    real_write = record_writer.RecordWriter.write
    lines = []

    def fill_after_some_events(self, data):
        lines.append(data)
        if len(lines) > 30:
            raise ENOSPC
        real_write(self, data)

    monkeypatch.setattr(record_writer.RecordWriter, "write", fill_after_some_events)
    out = root / "events"
    capsys.readouterr()
    code = main(["train", str(root / "run.yaml"), "--out", str(out)])
    err = capsys.readouterr().err
    monkeypatch.undo()
    assert code == 4
    assert f"error: cannot write {out}/tb (TensorBoard events): no space left" in err
    assert "Traceback" not in err and "Exception in thread" not in err  # TensorBoard's writer thread stays quiet
    check_resumes_to_reference(root, out, reference, capsys)


def fail_atomic_writes_of(monkeypatch, prefix: str, number: int = errno.ENOSPC) -> None:
    """Make writes to the temp files of ``prefix``* (fs.atomic_write's ``.NAME.XXXX.tmp``) fail with ``number``."""
    real_fdopen = os.fdopen

    def fdopen(fd, *args, **kwargs):
        raw = real_fdopen(fd, *args, **kwargs)
        return FailingFile(raw, number) if Path(fd_name(fd)).name.startswith(f".{prefix}") else raw

    monkeypatch.setattr(os, "fdopen", fdopen)


@pytest.mark.slow
def test_summary(root, reference, capsys, monkeypatch):
    fail_atomic_writes_of(monkeypatch, "summary.json")
    out = root / "summary"
    code, errors = train_cli(root, out, capsys)
    monkeypatch.undo()
    assert code == 4 and len(errors) == 1
    assert errors[0].startswith(f"error: cannot write {out}/summary.json (the run summary): no space left on the "
                                "device (needs about ")
    assert "no checkpoint was written yet" in errors[0]
    assert not (out / "summary.json").exists() and temp_files(out) == []
    check_resumes_to_reference(root, out, reference, capsys)


@pytest.mark.slow
def test_low_free_space_is_warned_about_before_training(root, capsys, monkeypatch):
    from blockyard import fs

    monkeypatch.setattr(fs, "free_bytes", lambda path: 1000)
    main(["train", str(root / "run.yaml"), "--out", str(root / "warned"), "--set", "train.steps=1"])
    warnings = [line for line in capsys.readouterr().err.splitlines() if "free, but train.keep_checkpoints" in line]
    assert len(warnings) == 1 and warnings[0].startswith(f"warning: {root / 'warned'}: 1.0 KB free")


# ----------------------------------------------------------------------------- token cache, grid index, report


def test_token_cache(root, tmp_path, monkeypatch):
    from blockyard.data import cache, load_data

    real_open = open

    class FullDisk:
        def __init__(self, raw):
            self.raw = raw

        def write(self, data):
            self.raw.write(data[: len(data) // 2])  # part of the piece lands, then the disk is full
            raise ENOSPC

        def __getattr__(self, name):
            return getattr(self.raw, name)

    def open_full(path, mode="r", *args, **kwargs):
        f = real_open(path, mode, *args, **kwargs)
        return FullDisk(f) if str(path).endswith("train.bin") else f

    monkeypatch.setattr(cache, "open", open_full, raising=False)
    cfg = load_config(root / "run.yaml", [f"data.cache_dir={tmp_path}"])
    with pytest.raises(WriteFailed) as failed:
        load_data(cfg)
    message = str(failed.value)
    assert "(the token cache being prepared): no space left on the device (needs about " in message
    tokens = tmp_path / "tokens"
    assert [p.name for p in tokens.iterdir() if not p.name.endswith(".lock")] == []  # the temp folder went too
    monkeypatch.undo()
    assert load_data(cfg).train_tokens.size > 0


def test_grid_index(tmp_path):
    with open_index(tmp_path) as index:
        # SQLite's own "database or disk is full" (SQLITE_FULL), from a page limit instead of a full disk.
        index._db.execute(f"PRAGMA max_page_count = {index._db.execute('PRAGMA page_count').fetchone()[0]}")
        rows = [{"id": f"cell-{i}", "variant": "v", "seed": i, "point": [], "config_hash": "h" * 40,
                 "adjustments": {"note": "x" * 500}, "planned_tokens": 1, "flops_per_token": None,
                 "params_total": 1, "params_non_embedding": 1} for i in range(50)]
        with pytest.raises(WriteFailed, match=rf"^cannot write {tmp_path}/index.sqlite \(the grid index\): no space"):
            index.plan(rows)
        assert index.cells() == []  # rolled back as a whole
        assert not index._db.in_transaction
    with sqlite3.connect(tmp_path / "index.sqlite") as db:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def test_report(tmp_path, monkeypatch):
    from test_grid_report import make_grid

    from blockyard.grid.report import write_report

    make_grid(tmp_path, {"ref": {0: 2.0, 1: 2.1}, "b": {0: 1.9, 1: 2.0}})
    write_report(tmp_path)
    before = (tmp_path / "report.md").read_bytes()
    fail_atomic_writes_of(monkeypatch, "report.md")
    with pytest.raises(WriteFailed, match=rf"^cannot write {tmp_path}/report.md \(the report\): no space left"):
        write_report(tmp_path)
    assert (tmp_path / "report.md").read_bytes() == before and temp_files(tmp_path) == []


# ----------------------------------------------------------------------------- a real small filesystem


def can_mount_tmpfs() -> str | None:
    """Why a test cannot mount a tmpfs of its own here (None: it can, in a new user + mount namespace)."""
    if shutil.which("unshare") is None:
        return "no unshare(1)"
    probe = subprocess.run(["unshare", "-rm", "sh", "-c", "mount -t tmpfs -o size=64k none /mnt"],
                           capture_output=True, text=True, timeout=30)
    return None if probe.returncode == 0 else f"cannot mount a tmpfs: {probe.stderr.strip()[:120]}"


@pytest.mark.slow
def test_a_real_full_filesystem_then_read_only_then_freed(root, reference, tmp_path):
    why = can_mount_tmpfs()
    if why:
        pytest.skip(why)
    ckpt = (root / "reference" / "checkpoints" / "step_0000020.pt").stat().st_size
    others = sum(-(-p.stat().st_size // 4096) * 4096 for p in (root / "reference").rglob("*")
                 if p.is_file() and p.suffix != ".pt")
    # Room for one checkpoint and a half: the second (written before the first is deleted) cannot fit.
    size_kb = (others + ckpt * 3 // 2) // 1024 + 8
    disk, out = tmp_path / "disk", tmp_path / "disk" / "run"
    disk.mkdir()
    train = f"{sys.executable} -m blockyard train {root / 'run.yaml'} --out {out}"
    script = textwrap.dedent(f"""
        mount -t tmpfs -o size={size_kb}k none {disk}
        {train} 2> {tmp_path}/full.err; echo $? > {tmp_path}/full.code
        cp -a {out} {tmp_path}/after_full
        mount -o remount,ro {disk}
        {train} 2> {tmp_path}/ro.err; echo $? > {tmp_path}/ro.code
        mount -o remount,rw,size=64m {disk}
        {train} 2> {tmp_path}/freed.err; echo $? > {tmp_path}/freed.code
        cp -a {out} {tmp_path}/after_freed
    """)
    subprocess.run(["unshare", "-rm", "sh", "-c", script], timeout=600, check=True, env=child_env())

    def result(name: str) -> tuple[int, list[str]]:
        return int((tmp_path / f"{name}.code").read_text()), (tmp_path / f"{name}.err").read_text().splitlines()

    code, err = result("full")
    assert code == 4 and "Traceback" not in "\n".join(err), err
    assert any("free, but train.keep_checkpoints 1 checkpoints" in line for line in err)  # warned up front
    assert err[-1].startswith(f"error: cannot write {out}/checkpoints/step_0000010.pt (the checkpoint of step 10): "
                              "no space left on the device (needs about ")
    assert "the checkpoint of step 5 stays the resume point" in err[-1]
    after = tmp_path / "after_full"
    assert sorted(p.name for p in (after / "checkpoints").iterdir()) == ["sha256.json", "step_0000005.pt"]
    assert temp_files(after) == []
    code, err = result("ro")
    assert code == 4 and len(err) == 1 and "the filesystem is read-only" in err[0], err
    code, err = result("freed")
    assert code == 0 and any("from the checkpoint at step 5/" in line for line in err), err
    assert comparable(tmp_path / "after_freed") == reference
