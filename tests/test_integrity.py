"""Checksummed files: damage is found on read, moved aside, and the run falls back to a good copy.

Sources: sha256 is FIPS 180-4 (here hashlib's, checked against a value computed by hand-written
reference below); checksum on write and verify on read is the common practice of trusted storage
(common practice, no source). Each damage test injects one kind of damage into a real run dir of a
tiny model (seconds), checks the one-line warning naming the file and the fallback, and, where a
good checkpoint remains, that the resumed run's metric lines equal those of an undamaged run
("identical" as in test_train_run.py: every field except the timing ones).
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import pytest
import yaml
from _helpers import comparable, tiny_run_config, write_word_corpus
from conftest import EXAMPLE_PLUGINS

from blockyard import integrity
from blockyard.cli import main
from blockyard.config import load_config
from blockyard.train import run_training
from blockyard.verify import reopen_if_final_checkpoint_damaged

WORDS = "the of and to in is that for it as was with be by on not he this are or his from at".split()
TRAIN = {"steps": 30, "batch_size": 4, "warmup_steps": 3, "log_every": 5, "eval_every": 10, "checkpoint_every": 10,
         "eval_windows": 2, "keep_checkpoints": 3}
NEWEST = "step_0000030.pt"
RUNTIME = {"threads": 1, "kernels": "torch"}  # no process builds the compiled kernels


@pytest.fixture(scope="module")
def root(tmp_path_factory) -> Path:
    """A corpus, a run config and one undamaged run of it (``root/reference``)."""
    root = tmp_path_factory.mktemp("integrity")
    write_word_corpus(root / "corpus.txt", WORDS, seed=3, lines=400)
    (root / "run.yaml").write_text(yaml.safe_dump(tiny_run_config(root, TRAIN, runtime=RUNTIME)))
    assert run_training(load_config(root / "run.yaml"), root / "reference", progress="silent")["status"] == "done"
    return root


def damaged_copy(root: Path, name: str) -> Path:
    """A copy of the reference run dir, marked unfinished so that a rerun resumes it."""
    return unfinished_copy(root / "reference", root / name)


def unfinished_copy(source: Path, out: Path) -> Path:
    shutil.copytree(source, out)
    summary = json.loads((out / "summary.json").read_text())
    (out / "summary.json").write_text(json.dumps({**summary, "status": "interrupted"}))
    return out


def rerun(root: Path, out: Path, capsys) -> tuple[int, str]:
    capsys.readouterr()
    code = main(["train", str(root / "run.yaml"), "--out", str(out)])
    return code, capsys.readouterr().err


def verify(path: Path, capsys) -> tuple[int, str]:
    capsys.readouterr()
    code = main(["verify", str(path)])
    return code, capsys.readouterr().out


def zero_range(path: Path) -> None:
    data = bytearray(path.read_bytes())
    mid = len(data) // 2
    data[mid:mid + 64] = bytes(64)
    path.write_bytes(bytes(data))


def flip_bit(path: Path, offset: int | None = None) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 3 if offset is None else offset] ^= 0x10
    path.write_bytes(bytes(data))


def truncate(path: Path) -> None:
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def drop_entry(path: Path) -> None:
    sums = path.parent / integrity.SUMS_FILE
    data = json.loads(sums.read_text())
    del data["files"][path.name]
    sums.write_text(json.dumps(data))


# ----------------------------------------------------------------------------- the hash and the manifest


def test_sha256_matches_the_fips_180_4_test_vector(tmp_path):
    # FIPS 180-4 / NIST example "abc": ba7816bf... (the published digest, from the standard's examples)
    (tmp_path / "abc").write_bytes(b"abc")
    assert integrity.entry_of_file(tmp_path / "abc").sha256 == \
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    writer = integrity.HashingWriter(open(tmp_path / "copy", "wb"))  # noqa: SIM115 - closed below
    writer.write(b"ab")
    writer.write(memoryview(b"c"))
    writer._file.close()
    assert writer.entry() == integrity.entry_of_file(tmp_path / "abc")


def test_checkpoint_write_records_its_hash_before_it_takes_its_name(root):
    folder = root / "reference" / "checkpoints"
    manifest = integrity.read_manifest(folder)
    names = sorted(p.name for p in folder.glob("step_*.pt"))
    assert names == ["step_0000010.pt", "step_0000020.pt", NEWEST]
    for name in names:  # recorded from the bytes as written, equal to the file read back
        assert manifest[name] == integrity.entry_of_file(folder / name)
        assert hashlib.sha256((folder / name).read_bytes()).hexdigest() == manifest[name].sha256


# ----------------------------------------------------------------------------- damage to a checkpoint


@pytest.mark.parametrize("damage, why", [
    (zero_range, "sha256"),
    (flip_bit, "sha256"),
    (truncate, "bytes"),
    (drop_entry, "not listed"),
], ids=["zeroed-range", "flipped-bit", "truncated", "missing-entry"])
def test_damaged_newest_checkpoint_is_found_moved_aside_and_the_run_resumes_exactly(root, capsys, damage, why):
    out = damaged_copy(root, f"damaged-{damage.__name__}")
    damage(out / "checkpoints" / NEWEST)
    code, printed = verify(out, capsys)
    assert code == 1
    line = next(ln for ln in printed.splitlines() if NEWEST in ln)
    assert line.startswith("DAMAGED") and why in line, printed
    code, err = rerun(root, out, capsys)
    assert code == 0, err
    warnings = [ln for ln in err.splitlines() if ln.startswith("warning:")]
    assert len(warnings) == 1 and NEWEST in warnings[0] and "damaged" in warnings[0], err
    assert "from the checkpoint at step 20/30" in err
    assert (out / "checkpoints" / "damaged" / NEWEST).exists()  # moved aside, never deleted
    assert comparable(out) == comparable(root / "reference")
    assert verify(out, capsys)[0] == 0  # the retrained step 30 verifies; damaged/ is not looked at


def test_no_checkpoint_verifies_exit_2_saying_what_to_do(root, capsys):
    out = damaged_copy(root, "all-damaged")
    for path in (out / "checkpoints").glob("step_*.pt"):
        flip_bit(path)
    code, err = rerun(root, out, capsys)
    assert code == 2
    assert err.count("\nerror:") + err.startswith("error:") == 1
    assert "no checkpoint verifies" in err and "--force" in err
    assert sorted(p.name for p in (out / "checkpoints" / "damaged").iterdir()) == \
        ["step_0000010.pt", "step_0000020.pt", NEWEST]
    code, err = rerun(root, out, capsys)  # again: still refused, never a silent fresh start
    assert code == 2 and "no checkpoint verifies" in err


# ----------------------------------------------------------------------------- the token cache and plugin copies


def test_damaged_token_cache_is_moved_aside_and_prepared_again(root, capsys):
    (cache,) = (p for p in (root / "cache" / "tokens").glob("*-bytes-*") if p.is_dir())
    flip_bit(cache / "train.bin", offset=100)
    code, printed = verify(cache, capsys)
    assert code == 1 and "DAMAGED       train.bin: sha256" in printed, printed
    out = damaged_copy(root, "cache-damaged")
    (out / "checkpoints" / NEWEST).unlink()  # so that the resumed steps read the (re-prepared) tokens
    code, err = rerun(root, out, capsys)
    assert code == 0, err
    warnings = [ln for ln in err.splitlines() if ln.startswith("warning:")]
    assert len(warnings) == 1 and "token cache" in warnings[0] and "train.bin" in warnings[0], err
    assert (root / "cache" / "tokens" / "damaged" / cache.name / "train.bin").exists()
    assert verify(cache, capsys)[0] == 0
    assert comparable(out) == comparable(root / "reference")


def test_a_token_cache_from_before_checksums_is_used_with_a_note_that_says_how_to_rebuild_it(tmp_path, capsys):
    from blockyard.data.cache import damage

    folder = tmp_path / "plays-bytes-0123"
    folder.mkdir()
    (folder / "train.bin").write_bytes(b"\x01\x02")
    (folder / "manifest.json").write_text("{}")
    assert damage(folder) == []  # nothing to fail: used, not moved aside
    err = capsys.readouterr().err
    assert err.startswith(f"note: token cache {folder} was prepared before checksums") and err.count("\n") == 1
    assert "delete the folder" in err


@pytest.fixture(scope="module")
def delay_run(root) -> tuple[Path, Path]:
    """The delay block (examples/plugins/delay.py, written without the package's helpers) trained 20 steps."""
    cfg = tiny_run_config(root, {**TRAIN, "steps": 20}, model={"width": 32, "depth": 1, "pattern": ["delay"]},
                          runtime=RUNTIME)
    cfg["plugins"] = [str(EXAMPLE_PLUGINS / "delay.py")]
    (root / "delay.yaml").write_text(yaml.safe_dump(cfg))
    out = root / "delay-run"
    assert main(["train", str(root / "delay.yaml"), "--out", str(out)]) == 0
    return root / "delay.yaml", out


def test_one_step_delay_block_passes_check_and_trains_with_one_note(delay_run, capsys):
    """Contract (common practice, no source): y_t = W x_(t-1) is causal, mixes in time, and its step path
    equals its forward; its unmarked projection is a warning row, not a failure."""
    capsys.readouterr()
    assert main(["check", str(EXAMPLE_PLUGINS / "delay.py")]) == 0
    table = capsys.readouterr().out
    assert "delay  residual_out   warn" in table and "1 with a warning" in table
    _, out = delay_run
    assert json.loads((out / "summary.json").read_text())["steps"] == 20
    assert "delay" in json.loads((out / "env.json").read_text())["mixer_check"]
    config, fresh = delay_run[0], delay_run[0].parent / "delay-again"
    capsys.readouterr()
    assert main(["train", str(config), "--out", str(fresh)]) == 0
    notes = [ln for ln in capsys.readouterr().err.splitlines() if "residual_out" in ln]
    assert len(notes) == 1 and notes[0].startswith("note:") and "init_std / sqrt(2 x depth)" in notes[0], notes


def test_damaged_plugin_copy_is_moved_aside_and_copied_again(delay_run, capsys):
    config, reference = delay_run
    out = unfinished_copy(reference, config.parent / "plugin-damaged")
    (out / "checkpoints" / "step_0000020.pt").unlink()  # resume from step 10: the copy's code trains steps 11-20
    copy = out / "plugins" / "delay.py"
    copy.write_text(copy.read_text().replace("x[:, :-1]", "x[:, 1:]"))  # a changed byte range: now it leaks
    code, printed = verify(out, capsys)
    assert code == 1 and "DAMAGED       plugins/delay.py" in printed, printed
    capsys.readouterr()
    assert main(["train", str(config), "--out", str(out)]) == 0
    err = capsys.readouterr().err
    warnings = [ln for ln in err.splitlines() if ln.startswith("warning:")]
    assert len(warnings) == 1 and "plugins/delay.py" in warnings[0] and "copied again" in warnings[0], err
    assert (out / "plugins" / "damaged" / "delay.py").exists()
    assert copy.read_bytes() == (EXAMPLE_PLUGINS / "delay.py").read_bytes()
    assert comparable(out) == comparable(reference)


def test_a_damaged_plugin_copy_is_never_loaded(delay_run, tmp_path, capsys):
    _, reference = delay_run
    out = tmp_path / "run"
    shutil.copytree(reference, out)
    copy = out / "plugins" / "delay.py"
    copy.write_text(copy.read_text() + "\n# edited\n")
    capsys.readouterr()
    assert main(["check", str(out / "config.yaml")]) == 2  # the run dir's config names the damaged copy
    err = capsys.readouterr().err
    assert err.startswith(f"error: plugin {copy.resolve()}: damaged") and err.count("\n") == 1, err


# ----------------------------------------------------------------------------- before checksums; grids


def test_a_run_dir_from_before_checksums_is_unverifiable_and_resumes_with_a_note(root, capsys):
    out = damaged_copy(root, "before-checksums")
    (out / "checkpoints" / integrity.SUMS_FILE).unlink()
    (out / "checkpoints" / NEWEST).unlink()
    code, printed = verify(out, capsys)
    assert code == 0 and "unverifiable  checkpoints/step_0000020.pt" in printed
    assert "note: unverifiable files were written before checksums" in printed
    code, err = rerun(root, out, capsys)
    assert code == 0, err
    assert "note: checkpoint" in err and "written before checksums" in err
    assert not [ln for ln in err.splitlines() if ln.startswith("warning:")], err
    assert comparable(out) == comparable(root / "reference")


def test_verify_clean_dir_and_bad_paths(root, tmp_path, capsys):
    code, printed = verify(root / "reference", capsys)
    assert code == 0 and "3 files: 3 ok, 0 damaged, 0 unverifiable" in printed, printed
    assert main(["verify", str(tmp_path / "missing")]) == 2
    assert main(["verify", str(tmp_path)]) == 2  # nothing to verify there: say so
    assert "holds no checkpoints" in capsys.readouterr().err


def test_grid_reopens_a_finished_cell_whose_final_checkpoint_is_damaged(root, capsys):
    out = root / "cell"
    shutil.copytree(root / "reference", out)
    assert reopen_if_final_checkpoint_damaged(out) is None  # undamaged: left alone
    zero_range(out / "checkpoints" / NEWEST)
    reason = reopen_if_final_checkpoint_damaged(out)
    assert reason and NEWEST in reason
    assert json.loads((out / "summary.json").read_text())["status"] == "interrupted"
    code, err = rerun(root, out, capsys)  # what the grid's cell command then does
    assert code == 0 and "from the checkpoint at step 20/30" in err, err
    assert comparable(out) == comparable(root / "reference")


def test_grid_reconcile_sends_a_finished_cell_with_a_damaged_final_checkpoint_back_to_train(root, tmp_path,
                                                                                          capsys):
    from _helpers import earlier_grid_dir

    from blockyard.grid.index import open_index
    from blockyard.grid.run import _reconcile

    grid_dir = earlier_grid_dir(tmp_path, """
        name: earlier
        base: {model: {width: 32, depth: 1}, data: {seq_len: 32}}
        seeds: [0]
    """)
    cell = grid_dir / "cells" / "base-seed0"
    shutil.rmtree(cell)
    shutil.copytree(root / "reference", cell)
    with open_index(grid_dir) as index:
        assert _reconcile(grid_dir, index) == []  # verifies: stays finished
        flip_bit(cell / "checkpoints" / NEWEST)
        assert _reconcile(grid_dir, index) == ["base-seed0"]
        (row,) = index.cells()
        assert row["status"] == "interrupted" and NEWEST in row["message"]
    assert "cell base-seed0: final checkpoint step_0000030.pt damaged" in capsys.readouterr().out
    assert (cell / "checkpoints" / "damaged" / NEWEST).exists()
