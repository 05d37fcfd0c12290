"""Generation through the step path (blockyard/eval/generate.py) and ``blockyard sample``."""

from __future__ import annotations

from pathlib import Path

import pytest
import torch
import yaml
from _helpers import write_word_corpus
from scipy import stats

from blockyard.cli import main
from blockyard.config import config_from_dict, load_config
from blockyard.errors import UserError
from blockyard.eval.generate import filter_top_k, generate, load_run, sample_command, sample_next
from blockyard.model import build_model
from blockyard.train import run_training

VOCAB = 50
MIXERS = {
    "rec": {"kind": "recurrence", "conv_width": 4},
    "complex": {"kind": "recurrence", "complex": True},
    "local": {"kind": "local_attention", "window": 4, "heads": 2},
    "global": {"kind": "global_attention", "heads": 2, "kv_heads": 1},
    "lstm": {"kind": "lstm"},
}
PATTERNS = [["rec"], ["complex"], ["local"], ["global"], ["lstm"], ["rec", "rec", "local"], ["lstm", "global"]]


def tiny_model(pattern, seed=0):
    # init_std 0.1 (not 0.02) so that logits differ clearly between tokens and positions: a
    # step path that dropped or misordered state would then move them far beyond the tolerance.
    cfg = config_from_dict({"model": {"width": 16, "depth": max(2, len(pattern)), "pattern": pattern,
                                      "mixers": MIXERS, "init_std": 0.1}})
    torch.manual_seed(seed)
    return build_model(cfg.model, VOCAB).eval()


@pytest.mark.parametrize("pattern", PATTERNS, ids="+".join)
def test_step_generation_equals_full_forward_recomputation(pattern):
    # The step path (KV cache, ring buffer, recurrent state + conv tail) must compute the same
    # function as forward: logits at every position of the generated sequence within 1e-4.
    model = tiny_model(pattern)
    prompt = torch.randint(0, VOCAB, (3, 5), generator=torch.Generator().manual_seed(1))
    out = generate(model, prompt, 11, temperature=1.0, seed=0)  # 16 tokens: past the window of 4
    assert out.tokens.shape == (3, 16) and torch.equal(out.tokens[:, :5], prompt)
    with torch.no_grad():
        full = model(out.tokens)
    assert full.std() > 0.05  # the comparison is not between near-constant logits
    torch.testing.assert_close(out.logits, full, atol=1e-4, rtol=0)


def test_fixed_seed_is_deterministic_and_seeds_differ():
    model = tiny_model(["rec", "local"])
    prompt = torch.zeros(2, 3, dtype=torch.long)
    a = generate(model, prompt, 30, temperature=1.0, seed=7).tokens
    b = generate(model, prompt, 30, temperature=1.0, seed=7).tokens
    c = generate(model, prompt, 30, temperature=1.0, seed=8).tokens
    assert torch.equal(a, b)
    assert not torch.equal(a, c)


def test_temperature_zero_is_greedy_argmax():
    model = tiny_model(["rec", "global"])
    prompt = torch.tensor([[3, 1, 4]])
    out = generate(model, prompt, 12, temperature=0.0)
    # Reference: greedy decoding by full recomputation (no state), one token at a time.
    tokens = prompt
    with torch.no_grad():
        for _ in range(12):
            tokens = torch.cat([tokens, model(tokens)[:, -1].argmax(-1, keepdim=True)], dim=1)
    assert torch.equal(out.tokens, tokens)
    assert torch.equal(generate(model, prompt, 12, temperature=1.0, top_k=1, seed=3).tokens, tokens)


def test_sampling_follows_softmax_with_temperature_and_top_k():
    # p_i = exp(z_i / T) / sum_j exp(z_j / T) (temperature softmax, Hinton et al. 2015, eq. 1),
    # renormalised over the k largest logits for top-k (Fan et al. 2018, sec. 5.4).
    logits = torch.tensor([2.0, 1.0, 0.5, 0.0, -1.0, -3.0])
    gen = torch.Generator().manual_seed(0)
    n = 20000
    for temperature, k in [(1.0, 0), (0.5, 0), (2.0, 3)]:
        draws = sample_next(logits.expand(n, -1), temperature=temperature, top_k=k, generator=gen)
        counts = torch.bincount(draws, minlength=6).double()
        keep = 6 if k == 0 else k
        expected = torch.softmax(logits[:keep].double() / temperature, dim=0) * n
        assert counts[keep:].sum() == 0
        assert stats.chisquare(counts[:keep].numpy(), expected.numpy()).pvalue > 1e-3
    assert torch.equal(filter_top_k(logits, 0), logits)
    assert torch.isinf(filter_top_k(logits, 2)).sum() == 4


def test_negative_temperature_is_a_user_error():
    with pytest.raises(UserError, match="temperature"):
        sample_next(torch.zeros(1, 4), temperature=-1.0)


# ----------------------------------------------------------------------------- blockyard sample on a run


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("sample")
    words = "the cat sat on a mat and ran to its hat".split()
    write_word_corpus(root / "corpus.txt", words, seed=0, lines=800, words_per_line=10)
    cfg = {"model": {"width": 32, "depth": 2, "pattern": ["rec", "local"], "mixers": MIXERS},
           "data": {"corpus": str(root / "corpus.txt"), "seq_len": 32, "cache_dir": str(root / "cache")},
           "train": {"steps": 20, "batch_size": 4, "warmup_steps": 2, "eval_every": 10, "checkpoint_every": 10,
                     "eval_windows": 2, "keep_checkpoints": 2},
           "runtime": {"threads": 1}}
    (root / "cfg.yaml").write_text(yaml.safe_dump(cfg))
    run_training(load_config(root / "cfg.yaml"), root / "run", progress="silent")
    return root / "run"


@pytest.mark.slow
def test_sample_command_is_the_step_generation_of_the_newest_checkpoint(run_dir, capsys):
    run = load_run(run_dir)
    assert run.step == 20
    ids = torch.as_tensor(run.data.tokenizer.encode("the cat"), dtype=torch.long)[None]
    expected = run.data.tokenizer.decode(generate(run.model, ids, 25, temperature=0.8, top_k=5, seed=4).tokens[0])
    assert main(["sample", str(run_dir), "--prompt", "the cat", "--tokens", "25", "--temperature", "0.8",
                 "--top-k", "5", "--seed", "4"]) == 0
    printed = capsys.readouterr().out
    assert printed == expected + "\n"
    assert printed.startswith("the cat") and len(expected.encode()) == len("the cat") + 25


@pytest.mark.slow
def test_sample_skips_a_corrupt_newest_checkpoint_without_renaming_it(run_dir, tmp_path):
    import shutil

    copy = tmp_path / "run"
    shutil.copytree(run_dir, copy)
    newest = sorted((copy / "checkpoints").glob("step_*.pt"))[-1]
    newest.write_bytes(b"garbage")
    assert load_run(copy).step == 10
    assert newest.exists()  # inference reads; it never moves a run's files


@pytest.mark.parametrize("argv, message", [
    (["--prompt", ""], "--prompt"),
    (["--prompt", "a", "--temperature", "-1"], "--temperature"),
    (["--prompt", "a", "--tokens", "-2"], "--tokens"),
    (["--prompt", "a", "--top-k", "-2"], "--top-k"),
    (["--prompt", "a", "--threads", "-1"], "--threads"),
])
@pytest.mark.slow
def test_sample_bad_arguments_exit_2(run_dir, capsys, argv, message):
    assert main(["sample", str(run_dir), *argv]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and message in err and "Traceback" not in err


@pytest.mark.slow
def test_sample_bad_run_dirs(tmp_path):
    with pytest.raises(UserError, match="no such run dir"):
        sample_command(tmp_path / "missing", "a", 1, temperature=0, top_k=0, seed=0)
    with pytest.raises(UserError, match="no config.yaml"):
        sample_command(tmp_path, "a", 1, temperature=0, top_k=0, seed=0)
    (tmp_path / "config.yaml").write_text(yaml.safe_dump({"model": {"width": 16}}))
    with pytest.raises(UserError, match="no readable checkpoint"):
        sample_command(tmp_path, "a", 1, temperature=0, top_k=0, seed=0)


# ----------------------------------------------------------------------------- decode benchmark pieces


def test_tiled_state_steps_like_a_batch_of_identical_sequences():
    from blockyard.bench.decode import states_at, tile_state
    from blockyard.mixers import state_nbytes

    model = tiny_model(["rec", "local", "global", "lstm"])
    one = states_at(model, [6])[6]
    four = tile_state(one, 4)
    assert state_nbytes(four) == 4 * state_nbytes(one)
    token = torch.tensor([7])
    with torch.no_grad():
        logits_one, _ = model.step(token, one)
        logits_four, _ = model.step(token.expand(4), four)
    torch.testing.assert_close(logits_four, logits_one.expand(4, -1), atol=1e-6, rtol=0)


def test_decode_bench_measures_the_predicted_state_and_skips_over_budget():
    from blockyard.bench.decode import decode_bench

    rows = decode_bench(models=["global", "recurrence"], contexts=[4, 8], batches=[1, 3], reps=1,
                        max_state_mib=0.2, overrides=["model.depth=1", "model.width=32"])
    done = [r for r in rows if "skipped" not in r]
    assert len(rows) == 8 and done
    assert all(r["state_bytes"] == r["predicted_state_bytes"] and r["tokens_per_s"] > 0 for r in done)
    # depth 1, width 32 global attention at 8 tokens x batch 3: 2 x 8 x 32 x 4 B x 3 = 6 KiB, in budget.
    assert not any(r["model"] == "global" and "skipped" in r for r in rows)
    tight = decode_bench(models=["global"], contexts=[8], batches=[3], reps=1, max_state_mib=4e-3,
                         overrides=["model.depth=1", "model.width=32"])
    assert "skipped" in tight[0]


def test_decode_ratios_follow_the_rows():
    # Issue 19's decode targets from the measured rows: step-time ratios at the shortest context,
    # the tokens/s ratio at the longest; models or contexts not measured give no ratio.
    from blockyard.bench.decode import decode_ratios

    def row(model, context, ms):
        return {"model": model, "context": context, "batch": 1, "step_ms": ms, "tokens_per_s": 1e3 / ms}

    rows = [row("global", 128, 2.0), row("recurrence", 128, 1.5), row("hybrid", 128, 2.4),
            row("global", 4096, 30.0), row("recurrence", 4096, 1.5), {**row("recurrence", 128, 9.0), "batch": 64}]
    got = {r["name"]: r for r in decode_ratios(rows)}
    assert got["recurrence / global step time, shortest context"]["ratio"] == pytest.approx(0.75)
    assert got["recurrence / global step time, shortest context"]["met"]
    assert got["hybrid / global step time, shortest context"]["ratio"] == pytest.approx(1.2)
    assert not got["hybrid / global step time, shortest context"]["met"]
    longest = got["recurrence / global tokens/s, longest context"]
    assert longest["context"] == 4096 and longest["ratio"] == pytest.approx(20.0) and longest["met"]
    assert decode_ratios([row("global", 128, 2.0)]) == []
