"""File locks, atomic writes and write-failure messages (blockyard/fs.py), and the torch-free run-dir
reader (blockyard/rundir.py).

The lock semantics checked here are those of flock(2) (Linux man-pages: a lock belongs to an open
file description and is released when its last descriptor closes, including when the process
dies) and the write semantics those of rename(2) (POSIX: the new name refers to the old or the new
file, never to neither or a mix).
"""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from _helpers import FailingFile

from blockyard import fs, rundir
from blockyard.errors import UserError, WriteFailed

REPO = Path(__file__).resolve().parents[1]


# ----------------------------------------------------------------------------- importing without torch


@pytest.mark.slow
def test_reading_run_dirs_does_not_import_torch():
    # `blockyard grid --status` runs beside an overnight grid: it must start in a blink, so the
    # run-dir reader, the file helpers and the status line import neither torch nor numpy.
    code = ("import sys, blockyard.rundir, blockyard.fs, blockyard.grid.status\n"
            "print(sorted(m for m in ('torch', 'numpy') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60,
                         env={**os.environ, "PYTHONPATH": str(REPO)}, check=True).stdout
    assert out.strip() == "[]"


# ----------------------------------------------------------------------------- locks


def test_a_lock_names_its_holder_and_refuses_a_second_holder(tmp_path):
    lock = tmp_path / "x.lock"
    assert fs.lock_holder(lock) is None  # no file yet
    with fs.hold_lock(lock):
        assert fs.lock_holder(lock) == os.getpid()
        with pytest.raises(fs.LockBusy) as busy, fs.hold_lock(lock):  # another open file description
            pass
        assert busy.value.holder == os.getpid()
    assert fs.lock_holder(lock) is None


def test_a_waiting_locker_gets_the_lock_when_the_holder_lets_go(tmp_path):
    lock = tmp_path / "x.lock"
    told: list[int] = []
    holding = threading.Event()

    def hold_briefly() -> None:
        with fs.hold_lock(lock):
            holding.set()
            time.sleep(0.8)

    thread = threading.Thread(target=hold_briefly)
    thread.start()
    holding.wait(10)
    with fs.hold_lock(lock, wait_s=30, on_wait=told.append):
        assert fs.lock_holder(lock) == os.getpid()
    thread.join()
    assert told == [os.getpid()]  # the waiter was told once who it waits for


@pytest.mark.slow
def test_a_killed_holder_leaves_no_stale_lock(tmp_path):
    lock = tmp_path / "x.lock"
    code = ("import sys, time\nfrom blockyard import fs\n"
            "with fs.hold_lock(__import__('pathlib').Path(sys.argv[1])):\n"
            "    print('held', flush=True)\n    time.sleep(600)\n")
    proc = subprocess.Popen([sys.executable, "-c", code, str(lock)], stdout=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONPATH": str(REPO)})
    try:
        assert proc.stdout.readline().strip() == "held"
        assert fs.lock_holder(lock) == proc.pid
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
    assert fs.lock_holder(lock) is None  # the kernel dropped it with the process
    with fs.hold_lock(lock):
        pass


def test_a_lock_file_removed_by_its_holder_is_not_shared(tmp_path):
    # The holder may delete the lock file as it lets go (a run dir left empty is removed); a waiter
    # that had opened the old file must then lock a file at the path, not the orphan, or a third
    # process creating a new file would hold "the" lock at the same time.
    lock = tmp_path / "x.lock"
    seen: list[int | None] = []

    def waiter() -> None:
        with fs.hold_lock(lock, wait_s=30):
            seen.append(fs.lock_holder(lock))

    with fs.hold_lock(lock):
        thread = threading.Thread(target=waiter)
        thread.start()
        time.sleep(0.3)  # the waiter has opened the file and polls for its lock
        lock.unlink()
    thread.join(30)
    assert seen == [os.getpid()]


# ----------------------------------------------------------------------------- atomic writes and failures


def test_atomic_write_keeps_the_old_file_when_the_write_fails(tmp_path):
    path = tmp_path / "summary.json"
    path.write_text("old")

    def half_then_full(f):
        f.write(b"new and half")
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with pytest.raises(WriteFailed) as failed:
        fs.atomic_write(path, half_then_full, what="the run summary", needed_bytes=2_500_000)
    assert path.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["summary.json"]  # no temp file left
    message = str(failed.value)
    assert message.startswith(f"cannot write {path} (the run summary): no space left on the device (needs about "
                              "2.5 MB, ")
    assert message.endswith(" free there)") and "\n" not in message
    assert failed.value.exit_code == 4


def test_a_serializer_that_hides_the_os_error_still_reports_the_disk(tmp_path, monkeypatch):
    # torch.save can report a failed write as its own RuntimeError ("unexpected pos"); the
    # OSError underneath is what the user must hear about.
    real_fdopen = os.fdopen
    monkeypatch.setattr(os, "fdopen", lambda fd, mode: FailingFile(real_fdopen(fd, mode), errno.EDQUOT))

    def serializer(f):
        try:
            f.write(b"weights")
        except OSError:
            raise RuntimeError("[enforce fail at inline_container.cc] unexpected pos") from None

    with pytest.raises(WriteFailed, match=r"\(the checkpoint of step 3\): disk quota exceeded"):
        fs.atomic_write(tmp_path / "step_3.pt", serializer, what="the checkpoint of step 3")
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(("number", "words"), [(errno.ENOSPC, "no space left"), (errno.EDQUOT, "quota"),
                                               (errno.EROFS, "read-only"), (errno.EACCES, "permission denied"),
                                               (errno.EIO, "input/output error")])
def test_each_storage_error_is_one_line(tmp_path, number, words):
    failure = fs.write_failure(OSError(number, os.strerror(number)), tmp_path / "f", "the report", 10)
    assert isinstance(failure, WriteFailed) and isinstance(failure, UserError)
    assert words in str(failure) and str(tmp_path / "f") in str(failure) and "the report" in str(failure)
    assert ("free there" in str(failure)) == (number in (errno.ENOSPC, errno.EDQUOT))


def test_other_os_errors_are_not_called_storage_failures(tmp_path):
    assert fs.write_failure(OSError(errno.ENOENT, "gone"), tmp_path / "f", "x") is None
    with pytest.raises(FileNotFoundError), fs.reporting(tmp_path / "f", "x"):
        raise FileNotFoundError(errno.ENOENT, "gone")


def test_append_all_never_leaves_half_a_line(tmp_path, monkeypatch):
    path = tmp_path / "metrics.jsonl"
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT)
    fs.append_all(fd, b'{"step": 1}\n', path, "a line")
    real_write = os.write

    def short_then_full(fd_, data):
        if fd_ != fd:
            return real_write(fd_, data)
        if len(data) > 4:  # write(2) may write part of a buffer before the disk is full ...
            return real_write(fd_, bytes(data[:4]))
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))  # ... and fail on the rest

    monkeypatch.setattr(os, "write", short_then_full)
    with pytest.raises(WriteFailed, match="no space left"):
        fs.append_all(fd, b'{"step": 2}\n', path, "a line")
    monkeypatch.undo()
    os.close(fd)
    assert path.read_bytes() == b'{"step": 1}\n'


def test_free_space_is_the_nearest_existing_folders(tmp_path):
    free = fs.free_bytes(tmp_path / "not" / "yet")  # the nearest existing folder's filesystem
    assert free == os.statvfs(tmp_path).f_bavail * os.statvfs(tmp_path).f_frsize


# ----------------------------------------------------------------------------- rundir


def test_writing_refuses_a_second_writer_and_cleans_up_after_itself(tmp_path):
    out = tmp_path / "run"
    with rundir.writing(out):
        assert rundir.writer_pid(out) == os.getpid()
        with pytest.raises(UserError) as busy, rundir.writing(out):
            pass
    message = str(busy.value)
    assert message.startswith(f"{out}: process {os.getpid()} is writing this run dir; watch it with: tail -f ")
    assert not out.exists()  # it created the dir and wrote nothing: gone again
    out.mkdir()
    (out / "config.yaml").write_text("x")
    with rundir.writing(out):
        pass
    assert sorted(p.name for p in out.iterdir()) == ["config.yaml", "writer.lock"]
    assert rundir.writer_pid(out) is None


def test_metric_lines_and_summary_are_read_as_the_trainer_wrote_them(tmp_path):
    (tmp_path / "metrics.jsonl").write_text(json.dumps({"step": 1, "split": "train", "tokens": 64}) + "\n"
                                            + json.dumps({"step": 1, "split": "val", "loss": 2.0}) + "\n"
                                            + '{"step": 2, "split": "tr')  # a write cut by a kill
    (tmp_path / "summary.json").write_text(json.dumps({"status": "running", "steps": 1}))
    assert [line["split"] for line in rundir.read_metrics(tmp_path / "metrics.jsonl")] == ["train", "val"]
    assert rundir.last_train_line(tmp_path) == {"step": 1, "split": "train", "tokens": 64}
    assert rundir.summary_status(tmp_path) == "running"
    assert rundir.read_summary(tmp_path / "missing") is None
    assert [rundir.format_duration(s) for s in (59.6, 75.2, 3725)] == ["1m00s", "1m15s", "1h02m"]


@pytest.mark.parametrize("mask", [0o022, 0o077, 0o002])
def test_atomic_writes_get_the_mode_a_plain_open_would(tmp_path, mask):
    """POSIX open(2) with O_CREAT gives 0666 & ~umask (POSIX.1-2017, open()); mkstemp's 0600 must not leak."""
    old = os.umask(mask)
    try:
        fs.atomic_write_text(tmp_path / "report.md", "x")
        (tmp_path / "plain.md").write_text("x")
    finally:
        os.umask(old)
    assert (tmp_path / "report.md").stat().st_mode & 0o777 == (tmp_path / "plain.md").stat().st_mode & 0o777 \
        == 0o666 & ~mask
