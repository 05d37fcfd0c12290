"""Batches: a pure function of (data seed, step) across objects, resumes and processes; fixed
validation windows; windows are contiguous slices; start offsets uniform."""

from __future__ import annotations

import hashlib
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from scipy import stats

from blockyard.config import config_from_dict
from blockyard.data import load_data
from blockyard.data.batches import train_window_starts, val_window_starts


def cfg_for(cache: Path, seed: int = 0, **over):
    data = {"corpus": "pydoc", "cache_dir": str(cache), "seq_len": 64, **over.pop("data", {})}
    train = {"batch_size": 8, "eval_windows": 10, "seed": seed, **over.pop("train", {})}
    return config_from_dict({"data": data, "train": train, **over})


def digest(batches) -> str:
    h = hashlib.sha256()
    for x, y in batches:
        h.update(x.numpy().tobytes() + y.numpy().tobytes())
    return h.hexdigest()


@pytest.fixture(scope="module")
def cache(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("cache")


def test_batches_are_a_pure_function_of_seed_and_step_across_a_resume(cache):
    uninterrupted = load_data(cfg_for(cache))
    full = [uninterrupted.train_batch(s) for s in range(10)]
    resumed = load_data(cfg_for(cache))  # a fresh object, as after a restart from step 5
    for step in range(5, 10):
        x, y = resumed.train_batch(step)
        assert torch.equal(x, full[step][0]) and torch.equal(y, full[step][1])
    assert not torch.equal(full[0][0], full[1][0])
    other = load_data(cfg_for(cache, seed=1))
    assert not torch.equal(other.train_batch(0)[0], full[0][0])
    # train.data_seed decouples the data from the init seed: same data seed, same batches
    same_data = load_data(cfg_for(cache, seed=7, train={"data_seed": 0}))
    assert torch.equal(same_data.train_batch(3)[0], full[3][0])


@pytest.mark.slow
def test_batch_stream_identical_in_another_process(cache):
    here = digest(load_data(cfg_for(cache)).train_batch(s) for s in range(5))
    code = (
        "import hashlib, sys\n"
        "from pathlib import Path\n"
        "sys.path.insert(0, sys.argv[2])\n"
        "from test_data_batches import cfg_for, digest\n"
        "from blockyard.data import load_data\n"
        "d = load_data(cfg_for(Path(sys.argv[1])))\n"
        "print(digest(d.train_batch(s) for s in range(5)))\n"
    )
    out = subprocess.run([sys.executable, "-c", code, str(cache), str(Path(__file__).parent)],
                         capture_output=True, text=True, timeout=120, check=True)
    assert out.stdout.strip() == here


def test_windows_are_contiguous_slices_with_shifted_targets(cache):
    data = load_data(cfg_for(cache))
    x, y = data.train_batch(4)
    assert x.shape == y.shape == (8, 64) and x.dtype == y.dtype == torch.long
    starts = train_window_starts(0, 4, 8, len(data.train_tokens), 64)
    tokens = np.asarray(data.train_tokens)
    for i, s in enumerate(starts):
        assert x[i].tolist() == tokens[s : s + 64].tolist()
        assert y[i].tolist() == tokens[s + 1 : s + 65].tolist()
    assert (y != -100).all()  # text corpora: every position carries loss


def test_train_starts_are_uniform_over_valid_offsets():
    # Reference: Pearson's chi-square goodness of fit to the uniform distribution (scipy).
    n_tokens, seq_len = 10_000, 99
    starts = np.concatenate([train_window_starts(3, s, 64, n_tokens, seq_len) for s in range(200)])
    assert starts.min() >= 0 and starts.max() <= n_tokens - seq_len - 1
    counts, _ = np.histogram(starts, bins=20, range=(0, n_tokens - seq_len))
    assert stats.chisquare(counts).pvalue > 1e-4


def test_val_windows_fixed_non_overlapping_and_shared_by_variants(cache):
    base = load_data(cfg_for(cache))
    batches = base.val_batches()
    assert [b[0].shape[0] for b in batches] == [8, 2]  # 10 windows in batches of 8
    variant = load_data(cfg_for(cache, model={"width": 64, "depth": 2}, train={"batch_size": 3, "lr": 1e-3}))
    assert digest([(torch.cat([b[0] for b in batches]), torch.cat([b[1] for b in batches]))]) == digest(
        [(torch.cat([b[0] for b in variant.val_batches()]), torch.cat([b[1] for b in variant.val_batches()]))])
    starts = val_window_starts(0, 10, len(base.val_tokens), 64)
    assert np.all(np.diff(starts) >= 65)  # disjoint windows of 65 tokens
    assert starts[-1] + 65 <= len(base.val_tokens)
    assert not np.array_equal(starts, val_window_starts(1, 10, len(base.val_tokens), 64))


def test_val_windows_overlap_evenly_when_the_split_is_short():
    starts = val_window_starts(0, 5, 100, 49)  # room for 2 disjoint windows of 50, 5 asked
    assert starts.tolist() == [0, 12, 25, 38, 50]
    with pytest.raises(ValueError):
        val_window_starts(0, 5, 49, 49)
