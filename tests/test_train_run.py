"""Training runs end to end: records, exact resume after kill -9 / SIGTERM / a corrupt checkpoint,
divergence, finished and foreign run dirs, bad input, bf16 fallback.

Runs use a small local text corpus written by the tests (a fixed pseudo-random word stream)
and tiny models on one thread. "Identical" means every metrics.jsonl field except the timing
ones (``rundir.TIMING_FIELDS``: tokens_per_s, wall_s), which measure the machine, not the run.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml
from _helpers import child_env, comparable, tiny_run_config

from blockyard.cli import main
from blockyard.config import config_hash, load_config
from blockyard.rundir import LOCK_FILE, TIMING_FIELDS, read_metrics
from blockyard.train import run_training
from blockyard.train import runtime as runtime_mod
from blockyard.train.progress import Bar, LogLines, Progress, make_progress

WORDS = ("the of and to in is that for it as was with be by on not he this are or his from at which but have an "
         "they you were her she there one all we their can has been if more when will would who so no").split()


# ----------------------------------------------------------------------------- helpers


def write_corpus(path: Path, n_words: int = 40_000) -> Path:
    rng = random.Random(0)
    lines = []
    for _ in range(n_words // 12):
        lines.append(" ".join(rng.choice(WORDS) for _ in range(12)) + ".")
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture(scope="module")
def workdir(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("train")
    write_corpus(root / "corpus.txt")
    return root


def config_dict(root: Path, **sections) -> dict:
    data = tiny_run_config(root, {"steps": 40, "batch_size": 4, "warmup_steps": 5, "log_every": 5, "eval_every": 10,
                                  "checkpoint_every": 10, "eval_windows": 4, "keep_checkpoints": 2})
    for section, values in sections.items():
        data[section] = {**data.get(section, {}), **values}
    return data


def write_config(root: Path, name: str, **sections) -> Path:
    path = root / f"{name}.yaml"
    path.write_text(yaml.safe_dump(config_dict(root, **sections)))
    return path


def snapshot(folder: Path) -> dict[str, tuple[str, int]]:
    """sha256 and mtime of every file under ``folder``: 'untouched' means this is unchanged.

    The writer's lock file is left out: every command that may write the dir takes it (and writes
    its pid into it) before it knows whether the input is good.
    """
    return {str(p.relative_to(folder)): (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
            for p in sorted(folder.rglob("*")) if p.is_file() and p.name != LOCK_FILE}


def cli(args: list[str], **kw) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "blockyard", "train", *args], env=child_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def wait_for_line_after(run_dir: Path, step: int, proc: subprocess.Popen, timeout: float = 120) -> None:
    """Block until metrics.jsonl has a line past ``step`` and a checkpoint exists (so a kill is mid-run)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert proc.poll() is None, proc.communicate()
        ckpts = list((run_dir / "checkpoints").glob("step_*.pt"))
        if ckpts and any(line["step"] > step for line in read_metrics(run_dir / "metrics.jsonl")):
            return
        time.sleep(0.01)
    raise AssertionError("the run did not get past the first checkpoint in time")


class SignalAt(Progress):
    """Sends ``sig`` to this process when the train line of ``step`` is logged (a deterministic Ctrl-C)."""

    def __init__(self, step: int, sig: int = signal.SIGTERM) -> None:
        self.at, self.sig = step, sig

    def step(self, line: dict) -> None:
        if line["step"] == self.at:
            os.kill(os.getpid(), self.sig)

    def message(self, text: str) -> None:
        print(text, file=sys.stderr)


# ----------------------------------------------------------------------------- a long-ish run shared by resume tests

LONG = {"model": {"width": 64, "depth": 2}, "data": {"seq_len": 64},
        "train": {"steps": 120, "batch_size": 8, "log_every": 5, "eval_every": 15, "checkpoint_every": 30}}


@pytest.fixture(scope="module")
def long_reference(workdir) -> tuple[Path, list[dict]]:
    """An uninterrupted run of the LONG config (in-process, one thread) and its comparable metrics."""
    path = write_config(workdir, "long", **LONG)
    out = workdir / "long_reference"
    summary = run_training(load_config(path), out, progress="silent")
    assert summary["status"] == "done"
    return path, comparable(out)


@pytest.mark.slow
def test_kill9_then_rerun_matches_uninterrupted(workdir, long_reference):
    path, reference = long_reference
    out = workdir / "killed"
    proc = cli([str(path), "--out", str(out)])
    wait_for_line_after(out, 30, proc)
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    before = read_metrics(out / "metrics.jsonl")
    assert json.loads((out / "summary.json").read_text())["status"] == "running"
    assert max(line["step"] for line in before) > 30  # lines past the checkpoint exist and must not be duplicated
    proc = cli([str(path), "--out", str(out)])
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert "resuming" in err
    assert comparable(out) == reference
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "done" and summary["steps"] == 120


@pytest.mark.slow
def test_sigterm_checkpoints_and_rerun_matches(workdir, long_reference):
    path, reference = long_reference
    out = workdir / "terminated"
    proc = cli([str(path), "--out", str(out)])
    wait_for_line_after(out, 30, proc)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "interrupted" and summary["interrupted_by"] == "SIGTERM"
    last_step = max(line["step"] for line in read_metrics(out / "metrics.jsonl"))
    stopped = summary["steps"]
    assert stopped >= last_step and stopped < 120
    assert (out / "checkpoints" / f"step_{stopped:07d}.pt").exists()  # the step it stopped at was checkpointed
    proc = cli([str(path), "--out", str(out)])
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert comparable(out) == reference


@pytest.mark.slow
def test_corrupt_latest_checkpoint_falls_back(workdir, long_reference, capsys):
    path, reference = long_reference
    out = workdir / "corrupt"
    cfg = load_config(path)
    summary = run_training(cfg, out, progress=SignalAt(75))
    assert summary["status"] == "interrupted" and summary["steps"] == 75
    ckpts = sorted((out / "checkpoints").glob("step_*.pt"))
    assert [p.name for p in ckpts] == ["step_0000060.pt", "step_0000075.pt"]  # keep_checkpoints = 2
    data = ckpts[-1].read_bytes()
    ckpts[-1].write_bytes(data[: len(data) // 2])  # a write cut short
    capsys.readouterr()
    summary = run_training(cfg, out, progress="silent")
    err = capsys.readouterr().err
    assert summary["status"] == "done"
    warnings = [line for line in err.splitlines() if line.startswith("warning:")]
    assert len(warnings) == 1 and "step_0000075.pt" in warnings[0], err
    assert "from the checkpoint at step 60/" in err
    assert (out / "checkpoints" / "damaged" / "step_0000075.pt").exists()  # moved aside, never deleted
    assert comparable(out) == reference
    # TensorBoard: the resumed segment purged the points the first one wrote after step 60.
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    acc = EventAccumulator(str(out / "tb"))
    acc.Reload()
    steps = [e.step for e in acc.Scalars("train/loss")]
    assert steps == [line["step"] for line in reference if line["split"] == "train"]


# ----------------------------------------------------------------------------- records


@pytest.mark.slow
def test_records_fields_and_tensorboard(workdir):
    path = write_config(workdir, "records")
    out = workdir / "records_run"
    handlers = signal.getsignal(signal.SIGINT), signal.getsignal(signal.SIGTERM)
    summary = run_training(load_config(path), out, progress="silent")
    assert (signal.getsignal(signal.SIGINT), signal.getsignal(signal.SIGTERM)) == handlers  # restored
    lines = read_metrics(out / "metrics.jsonl")
    train = [x for x in lines if x["split"] == "train"]
    val = [x for x in lines if x["split"] == "val"]
    assert [x["step"] for x in train] == [1, 5, 10, 15, 20, 25, 30, 35, 40]
    assert [x["step"] for x in val] == [10, 20, 30, 40]
    tokens_per_step = 4 * 32
    for x in train:
        assert set(x) == {"step", "split", "loss", "lr", "grad_norm", "tokens", "tokens_per_s", "wall_s"}
        assert isinstance(x["step"], int) and isinstance(x["tokens"], int)
        assert x["tokens"] == x["step"] * tokens_per_step
        assert all(isinstance(x[k], float) and math.isfinite(x[k]) for k in ("loss", "lr", "grad_norm"))
        assert x["tokens_per_s"] > 0
    # A fresh byte-level model starts near the uniform loss ln 256 (maximum entropy, Shannon 1948).
    assert abs(train[0]["loss"] - math.log(256)) < 0.5
    for x in val:
        assert set(x) == {"step", "split", "loss", "bits_per_token", "wall_s"}  # no accuracy: not a task
        assert x["bits_per_token"] == pytest.approx(x["loss"] / math.log(2))
    assert train[-1]["loss"] < train[0]["loss"] - 0.5  # it learns something
    s = json.loads((out / "summary.json").read_text())
    assert s == json.loads(json.dumps(summary))
    assert s["status"] == "done" and s["steps"] == 40 and s["tokens_seen"] == 40 * tokens_per_step
    assert s["final_val_loss"] == val[-1]["loss"]
    assert s["best_val_loss"] == min(x["loss"] for x in val)
    assert s["params"]["total"] > s["params"]["non_embedding"] > 0
    assert s["params"]["total"] - s["params"]["non_embedding"] == 256 * 32  # the (tied) embedding
    speeds = sorted(x["tokens_per_s"] for x in train)
    assert s["tokens_per_s"] == pytest.approx(speeds[len(speeds) // 2])  # median of 9 values
    assert s["wall_s"] > 0 and s["peak_rss_bytes"] > 50 * 2**20
    env = json.loads((out / "env.json").read_text())
    for key in ("python", "torch", "threads", "cpu_model", "device", "precision", "precision_reason",
                "kernels", "git_commit", "hostname", "start_time"):
        assert key in env, key
    assert env["threads"] == 1 and env["device"] == "cpu" and env["precision"] == "fp32"
    assert env["allocator"].startswith(("glibc", "unchanged"))  # blockyard.train.allocator
    assert env["python"] == ".".join(map(str, sys.version_info[:3]))
    cfg_back = load_config(out / "config.yaml")
    assert config_hash(cfg_back) == config_hash(load_config(path))
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    acc = EventAccumulator(str(out / "tb"))
    acc.Reload()
    tags = set(acc.Tags()["scalars"])
    assert {"train/loss", "train/lr", "train/grad_norm", "train/tokens_per_s", "val/loss",
            "val/bits_per_token"} <= tags
    tb_loss = {e.step: e.value for e in acc.Scalars("train/loss")}
    assert tb_loss == pytest.approx({x["step"]: x["loss"] for x in train}, rel=1e-6)  # float32 in events
    assert [e.step for e in acc.Scalars("val/loss")] == [10, 20, 30, 40]


@pytest.mark.slow
def test_log_lines_when_not_a_tty(workdir, capsys):
    path = write_config(workdir, "loglines", train={"steps": 10})
    assert main(["train", str(path), "--out", str(workdir / "loglines_run")]) == 0
    err = capsys.readouterr().err
    step_lines = [line for line in err.splitlines() if line.startswith("step ") and "/10" in line]
    assert [line.split()[1] for line in step_lines] == ["1/10", "5/10", "10/10"]
    for line in step_lines:
        for field in ("loss ", "lr ", "tok/s ", "eta "):
            assert field in line, line


def test_progress_is_a_bar_on_a_tty():
    class FakeTTY(io.StringIO):
        def isatty(self):
            return True

    assert isinstance(make_progress(None, FakeTTY()), Bar)
    assert isinstance(make_progress(None, io.StringIO()), LogLines)


@pytest.mark.slow
def test_grad_accum_uses_consecutive_micro_batches(workdir, monkeypatch):
    """Step s (1-based) reads micro-batches (s-1)*k .. (s-1)*k + k-1, so the data position is the step."""
    import blockyard.data

    calls = []
    real = blockyard.data.load_data

    def recording(cfg):
        data = real(cfg)
        inner = data.train_batch

        def train_batch(step):
            calls.append(step)
            return inner(step)

        data.train_batch = train_batch
        return data

    monkeypatch.setattr(blockyard.data, "load_data", recording)
    cfg = load_config(write_config(workdir, "accum", train={"grad_accum": 3, "batch_size": 2, "steps": 4}))
    out = workdir / "accum_run"
    run_training(cfg, out, progress="silent")
    assert calls[1:] == list(range(12))  # calls[0]: the up-front check that the split fits a window
    lines = read_metrics(out / "metrics.jsonl")
    assert lines[0]["tokens"] == 3 * 2 * 32


# ----------------------------------------------------------------------------- divergence


def test_divergence_stops_with_exit_3(workdir, capsys):
    path = write_config(workdir, "diverge", train={"lr": 30.0, "warmup_steps": 0, "grad_clip": 0.0, "steps": 40})
    out = workdir / "diverge_run"
    assert main(["train", str(path), "--out", str(out)]) == 3
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if "diverged" in line]
    assert len(lines) == 1, err
    assert "train.lr" in lines[0] and "step" in lines[0]
    assert "threshold" in lines[0] or "not finite" in lines[0]
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "diverged" and summary["steps"] < 40
    last = read_metrics(out / "metrics.jsonl")[-1]
    assert last["step"] == summary["steps"]  # the diverged step is on record
    assert last["loss"] is None or last["loss"] > 2.0 * read_metrics(out / "metrics.jsonl")[0]["loss"]
    # Rerunning would diverge again (deterministic): it is reported, not retrained.
    before = snapshot(out)
    assert main(["train", str(path), "--out", str(out)]) == 3
    assert "diverged earlier" in capsys.readouterr().err
    assert snapshot(out) == before


# ----------------------------------------------------------------------------- finished and foreign dirs


def test_done_dir_is_not_retrained_and_other_config_refused(workdir, capsys):
    path = write_config(workdir, "done")
    out = workdir / "done_run"
    assert main(["train", str(path), "--out", str(out)]) == 0
    before = snapshot(out)
    capsys.readouterr()
    assert main(["train", str(path), "--out", str(out)]) == 0
    captured = capsys.readouterr()
    assert "already done" in captured.out + captured.err
    assert snapshot(out) == before
    # Another config into the same dir: refused, dir untouched.
    assert main(["train", str(path), "--set", "train.lr=0.001", "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and str(out) in err[0] and "--force" in err[0]
    assert snapshot(out) == before
    # --force replaces it with the new config.
    assert main(["train", str(path), "--set", "train.lr=0.001", "--out", str(out), "--force"]) == 0
    assert yaml.safe_load((out / "config.yaml").read_text())["train"]["lr"] == 0.001
    assert snapshot(out)["metrics.jsonl"][0] != before["metrics.jsonl"][0]
    # --force on a finished dir of the same config retrains it, and drops `blockyard eval` results
    # of the checkpoint it replaces (a grid report would otherwise plot them for the new model).
    mtime = (out / "metrics.jsonl").stat().st_mtime_ns
    assert main(["eval", str(out), "--lengths", "1x"]) == 0 and (out / "eval.json").exists()
    assert main(["train", str(path), "--set", "train.lr=0.001", "--out", str(out), "--force"]) == 0
    assert (out / "metrics.jsonl").stat().st_mtime_ns != mtime
    assert not (out / "eval.json").exists()


@pytest.mark.slow
def test_force_keeps_files_that_are_not_records(workdir):
    out = workdir / "foreign"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    path = write_config(workdir, "foreign", train={"steps": 5})
    with pytest.raises(Exception, match="no config.yaml"):
        run_training(load_config(path), out, progress="silent")
    assert run_training(load_config(path), out, force=True, progress="silent")["status"] == "done"
    assert (out / "notes.txt").read_text() == "mine"


@pytest.mark.slow
def test_default_out_dir_is_runs_name_hash(workdir, monkeypatch, tmp_path):
    path = write_config(workdir, "defaultdir", train={"steps": 3})
    monkeypatch.chdir(tmp_path)
    assert main(["train", str(path)]) == 0
    expected = tmp_path / "runs" / "defaultdir" / config_hash(load_config(path))
    assert json.loads((expected / "summary.json").read_text())["status"] == "done"


# ----------------------------------------------------------------------------- bad input


BAD = [
    # (extra CLI args, text the one-line error must contain)
    (["--set", "train.nosuch=1"], "train.nosuch"),
    (["--set", "train.steps=many"], "train.steps"),
    (["--set", "model.depth=0"], "model.depth"),
    (["--set", "model.mixers.loc.kind=local_attention", "--set", "model.mixers.loc.window=0",
      "--set", "model.pattern=[loc]"], "model.mixers.loc.window"),
    (["--set", "model.mixers.att.kind=global_attention", "--set", "model.mixers.att.heads=5",
      "--set", "model.pattern=[att]"], "model.mixers.att.heads"),
    (["--set", "model.pattern=[nosuch_mixer]"], "model.pattern[0]"),
    (["--set", "data.tokenizer=words"], "data.tokenizer"),
    (["--set", "data.corpus=/nonexistent/corpus.txt"], "/nonexistent/corpus.txt"),
    (["--set", "train.steps"], "--set"),
    (["--set", "runtime.device=tpu"], "runtime.device"),
    (["--set", "runtime.precision=fp16"], "runtime.precision"),
    (["--set", "data.seq_len=100000"], "seq_len"),
    (["--set", "train.lr=-1"], "train.lr"),
]


@pytest.fixture(scope="module")
def existing_run(workdir) -> Path:
    path = write_config(workdir, "existing", train={"steps": 5})
    out = workdir / "existing_run"
    assert run_training(load_config(path), out, progress="silent")["status"] == "done"
    return out


@pytest.mark.parametrize("args,names", BAD, ids=[b[1] for b in BAD])
def test_bad_input_exits_2_with_one_line_and_leaves_dir(workdir, existing_run, capsys, args, names):
    before = snapshot(existing_run)
    path = workdir / "existing.yaml"
    # --force is the destructive path: even then the dir must survive a config that fails validation.
    code = main(["train", str(path), *args, "--out", str(existing_run), "--force"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("error: ") and names in err[0], err
    assert snapshot(existing_run) == before


def test_cuda_device_absent_is_a_user_error(workdir, existing_run, capsys):
    import torch

    if torch.cuda.is_available():
        pytest.skip("a CUDA device is present")
    before = snapshot(existing_run)
    code = main(["train", str(workdir / "existing.yaml"), "--set", "runtime.device=cuda", "--out",
                 str(existing_run), "--force"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "runtime.device" in err[0]
    assert snapshot(existing_run) == before


@pytest.mark.parametrize("content,names", [(None, "missing.yaml"), ("model: [unclosed", "bad.yaml"),
                                           ("- a list", "list.yaml")])
def test_bad_config_file(tmp_path, capsys, content, names):
    path = tmp_path / names
    if content is not None:
        path.write_text(content)
    assert main(["train", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ") and names in err[0]
    assert not (tmp_path / "out").exists()


# ----------------------------------------------------------------------------- precision


@pytest.mark.slow
def test_bf16_unsupported_falls_back_to_fp32(workdir, monkeypatch, capsys):
    monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (False, "simulated CPU without bf16"))
    path = write_config(workdir, "bf16_no", train={"steps": 3}, runtime={"precision": "bf16"})
    out = workdir / "bf16_no_run"
    assert run_training(load_config(path), out, progress="silent")["status"] == "done"
    err = capsys.readouterr().err
    assert any(line.startswith("warning: runtime.precision") and "fp32" in line for line in err.splitlines()), err
    env = json.loads((out / "env.json").read_text())
    assert env["precision"] == "fp32" and "simulated CPU without bf16" in env["precision_reason"]


@pytest.mark.slow
def test_bf16_supported_runs_in_bf16(workdir, monkeypatch):
    import torch

    monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (True, "simulated bf16 CPU"))
    seen = []
    real = torch.autocast

    def spy(*args, **kwargs):
        seen.append(kwargs.get("dtype"))
        return real(*args, **kwargs)

    monkeypatch.setattr(torch, "autocast", spy)
    path = write_config(workdir, "bf16_yes", train={"steps": 3}, runtime={"precision": "bf16"})
    out = workdir / "bf16_yes_run"
    summary = run_training(load_config(path), out, progress="silent")
    env = json.loads((out / "env.json").read_text())
    assert env["precision"] == "bf16"
    assert seen and set(seen) == {torch.bfloat16}
    # Loss is computed in fp32 from the bf16 logits: finite and near ln 256 this early.
    assert summary["status"] == "done" and abs(summary["final_val_loss"] - math.log(256)) < 1.0


@pytest.mark.slow
def test_timing_fields_are_the_only_difference(workdir):
    """Two identical runs agree on every non-timing field (what the resume tests rely on)."""
    path = write_config(workdir, "twice", train={"steps": 10})
    a, b = workdir / "twice_a", workdir / "twice_b"
    run_training(load_config(path), a, progress="silent")
    run_training(load_config(path), b, progress="silent")
    assert comparable(a) == comparable(b)
    raw_a = read_metrics(a / "metrics.jsonl")
    assert set(TIMING_FIELDS) <= set(raw_a[0])


# ----------------------------------------------------------------------------- other keys


@pytest.mark.slow
def test_task_run_logs_answer_accuracy(workdir):
    cfg = load_config(write_config(workdir, "task", data={"corpus": "task:mqar", "seq_len": 64},
                                   train={"steps": 10, "eval_every": 5}))
    out = workdir / "task_run"
    assert run_training(cfg, out, progress="silent")["status"] == "done"
    val = [x for x in read_metrics(out / "metrics.jsonl") if x["split"] == "val"]
    assert [x["step"] for x in val] == [5, 10]
    assert all(0.0 <= x["accuracy"] <= 1.0 for x in val)
    assert json.loads((out / "env.json").read_text())["data"]["corpus"] == "task:mqar"


@pytest.mark.slow
def test_activation_checkpointing_changes_nothing_but_memory(workdir):
    """Recomputing blocks in backward (torch.utils.checkpoint) gives the same losses and updates."""
    plain = load_config(write_config(workdir, "ac_off", train={"steps": 6}, model={"depth": 2}))
    recompute = load_config(write_config(workdir, "ac_on", train={"steps": 6}, model={"depth": 2},
                                         runtime={"activation_checkpointing": True}))
    a, b = workdir / "ac_off_run", workdir / "ac_on_run"
    run_training(plain, a, progress="silent")
    run_training(recompute, b, progress="silent")
    for x, y in zip(comparable(a), comparable(b), strict=True):
        assert x.keys() == y.keys()
        for k in x:
            assert x[k] == (y[k] if isinstance(y[k], str) else pytest.approx(y[k], rel=1e-5)), k


@pytest.mark.slow
def test_seeds_change_init_and_data(workdir):
    def first_lines(name, **train):
        cfg = load_config(write_config(workdir, name, train={"steps": 2, "log_every": 1, **train}))
        out = workdir / f"{name}_run"
        run_training(cfg, out, progress="silent")
        return comparable(out)

    base = first_lines("seed0")
    assert first_lines("seed0_again") == base
    assert first_lines("seed1", seed=1)[0]["loss"] != base[0]["loss"]
    # Same init, other batches: -1 means "follow train.seed", so data_seed=0 equals the base run.
    assert first_lines("dseed0", data_seed=0) == base
    assert first_lines("dseed5", data_seed=5)[0]["loss"] != base[0]["loss"]


@pytest.mark.slow
def test_kernels_choice_and_threads_applied(workdir):
    import torch

    threads = torch.get_num_threads()
    wanted = 3 if threads != 3 else 2  # any count other than the current one shows that it was applied
    cfg = load_config(write_config(workdir, "scan", train={"steps": 2}, model={"pattern": ["recurrence"]},
                                   runtime={"kernels": "reference", "threads": wanted}))
    out = workdir / "scan_run"
    seen = []

    def threads_hook(model, runtime):
        seen.append(torch.get_num_threads())
        return {"probe_threads": float(seen[-1])}

    summary = run_training(cfg, out, progress="silent", eval_hooks=[threads_hook])
    assert summary["status"] == "done" and seen == [wanted]  # applied while training
    assert read_metrics(out / "metrics.jsonl")[-1]["probe_threads"] == float(wanted)  # hook metrics reach val lines
    env = json.loads((out / "env.json").read_text())
    assert env["kernels"]["requested"] == "reference" and env["threads"] == wanted
    assert env["kernels"]["rg_lru_cpu"] == "PyTorch ops around the reference scan"
    assert torch.get_num_threads() == threads  # and restored after


@pytest.mark.slow
def test_token_budget_sets_the_number_of_steps(workdir):
    cfg = load_config(write_config(workdir, "budget", train={"tokens": 1000, "steps": 99}))
    summary = run_training(cfg, workdir / "budget_run", progress="silent")
    # ceil(1000 / (batch 4 x accum 1 x seq 32)) = ceil(7.8) = 8 steps
    assert summary["steps"] == summary["total_steps"] == 8 and summary["tokens_seen"] == 8 * 128


# ----------------------------------------------------------------------------- runtime.compile

COMPILED = {"model": {"width": 32, "depth": 2, "pattern": ["recurrence", "global_attention"]},
            "train": {"steps": 6, "log_every": 1, "eval_every": 3, "checkpoint_every": 3},
            "runtime": {"compile": True}}


@pytest.mark.slow
def test_compiled_run_trains_resumes_exactly_and_its_checkpoint_loads_eagerly(workdir, capsys):
    """A compiled run (recurrence: the fused op's fake kernel traced; attention: SDPA) trains, resumes
    exactly, and its checkpoint loads into an uncompiled model that computes the same val loss."""
    import torch

    from blockyard.data import load_data
    from blockyard.model import build_model
    from blockyard.train import evaluate
    from blockyard.train.checkpoint import latest_valid_checkpoint

    cfg = load_config(write_config(workdir, "compiled", **COMPILED))
    whole, parts = workdir / "compiled_whole", workdir / "compiled_parts"
    assert run_training(cfg, whole, progress="silent")["status"] == "done"
    env = json.loads((whole / "env.json").read_text())
    assert env["compile"]["requested"] and env["compile"]["active"], env["compile"]
    assert "warning: runtime.compile" not in capsys.readouterr().err
    assert run_training(cfg, parts, progress=SignalAt(3))["status"] == "interrupted"
    assert run_training(cfg, parts, progress="silent")["status"] == "done"
    assert comparable(parts) == comparable(whole)

    found = latest_valid_checkpoint(whole / "checkpoints", config_hash(cfg))
    assert not any(k.startswith("_orig_mod.") for k in found.state["model"])
    runtime, _ = runtime_mod.resolve_runtime(cfg.runtime)
    data = load_data(cfg)
    eager = build_model(cfg.model, data.vocab_size, kernels=runtime.kernels)
    eager.load_state_dict(found.state["model"])  # strict: the same keys as the eager module's
    assert "forward" not in vars(eager)
    with torch.no_grad():
        loss = evaluate(eager, data.val_batches(), runtime, is_task=False)["loss"]
    # Compiled kernels fuse elementwise ops, so the last bits may differ from eager (fp32).
    assert loss == pytest.approx(read_metrics(whole / "metrics.jsonl")[-1]["loss"], rel=1e-5)


@pytest.mark.slow
def test_compile_failure_trains_eagerly_with_a_warning(workdir, monkeypatch, capsys):
    """Where torch.compile fails (here: a simulated compiler error at the first call), the run warns,
    records why in env.json and trains exactly as an eager run (the trial step leaves no trace)."""
    import torch

    from blockyard.train import compile as compile_mod

    def failing_compile(fn):
        def compiled(*args, **kwargs):
            raise RuntimeError("simulated: no C++ compiler\nfound")
        return compiled

    monkeypatch.setattr(compile_mod.torch, "compile", failing_compile)
    small = {"train": {"steps": 4}}
    eager = run_training(load_config(write_config(workdir, "eager", **small)), workdir / "eager_run",
                         progress="silent")
    cfg = load_config(write_config(workdir, "nocompile", **small, runtime={"compile": True}))
    out = workdir / "nocompile_run"
    summary = run_training(cfg, out, progress="silent")
    err = capsys.readouterr().err
    assert ("warning: runtime.compile: torch.compile failed, training eagerly (RuntimeError: simulated: no C++ "
            "compiler found)") in err, err
    env = json.loads((out / "env.json").read_text())
    assert env["compile"] == {"requested": True, "active": False,
                              "reason": "RuntimeError: simulated: no C++ compiler found"}
    assert summary["final_val_loss"] == eager["final_val_loss"]
    assert comparable(out) == comparable(workdir / "eager_run")
    assert torch.compile is failing_compile  # the monkeypatch reached the module that compiles
