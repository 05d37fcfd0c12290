"""Length extrapolation (blockyard/eval/extrapolation.py, ``blockyard eval``); probes (blockyard/eval/probes.py)."""

from __future__ import annotations

import dataclasses
import json
import random
from pathlib import Path

import pytest
import torch
import torch.nn.functional as F
import yaml

from blockyard.cli import main
from blockyard.config import config_from_dict
from blockyard.data.task_options import PROBE_TASKS
from blockyard.data.tasks import KEY_SENTENCE, QUESTION, TASKS, SymbolTokenizer, passkey_symbols
from blockyard.errors import ConfigError, UserError
from blockyard.eval import extrapolation as evaluate
from blockyard.eval import probes
from blockyard.eval.generate import load_run
from blockyard.rundir import read_metrics
from blockyard.train import run_training

# ----------------------------------------------------------------------------- position buckets


def test_bucket_losses_average_to_the_total_and_match_torch():
    torch.manual_seed(0)
    logits = torch.randn(3, 37, 11)
    y = torch.randint(0, 11, (3, 37))
    y[0, :5] = -100  # unscored positions (synthetic tasks) weigh nothing
    y[2, 30:] = -100
    loss = evaluate.position_bucket_loss(logits, y, 8)
    # Reference: torch's mean cross-entropy over the scored tokens.
    assert loss.mean == pytest.approx(F.cross_entropy(logits.flatten(0, 1), y.flatten()).item(), rel=1e-6)
    counts = loss.count.tolist()
    assert sum(counts) == int((y != -100).sum())
    weighted = sum(m * c for m, c in zip(loss.bucket_means, counts, strict=True)) / sum(counts)
    assert weighted == pytest.approx(loss.mean, rel=1e-9)
    edges = evaluate.bucket_edges(37, 8)
    lo, hi = edges[3], edges[4]
    ref = F.cross_entropy(logits[:, lo:hi].flatten(0, 1), y[:, lo:hi].flatten()).item()
    assert loss.bucket_means[3] == pytest.approx(ref, rel=1e-6)


def test_bucket_edges_cover_every_position_once():
    for length, n in [(37, 8), (8, 8), (5, 8), (1024, 3)]:
        edges = evaluate.bucket_edges(length, n)
        assert edges[0] == 0 and edges[-1] == length
        assert all(b > a for a, b in zip(edges, edges[1:], strict=False))


def test_parse_lengths():
    assert evaluate.parse_lengths("1x,2x,0.5x,300", 128) == [("1x", 128), ("2x", 256), ("0.5x", 64), ("300", 300)]
    for bad in ("two", "0x", "-3", "1x,,2x"):
        with pytest.raises(UserError, match="--lengths"):
            evaluate.parse_lengths(bad, 128)


# ----------------------------------------------------------------------------- on a trained run


WORDS = "the cat sat on a mat and ran to its hat while a dog slept by the door".split()


@pytest.fixture(scope="module")
def root(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("eval")
    rng = random.Random(0)
    (root / "corpus.txt").write_text("\n".join(" ".join(rng.choice(WORDS) for _ in range(12)) for _ in range(3000)))
    return root


def train(root: Path, name: str, **sections) -> Path:
    """Train through ``blockyard train`` (the CLI plugs the probe suite into the trainer, as for a grid cell)."""
    cfg = {"model": {"width": 32, "depth": 2, "pattern": ["recurrence", "global_attention"]},
           "data": {"corpus": str(root / "corpus.txt"), "seq_len": 32, "cache_dir": str(root / "cache")},
           "train": {"steps": 30, "batch_size": 4, "warmup_steps": 2, "eval_every": 15, "checkpoint_every": 15,
                     "eval_windows": 6},
           "runtime": {"threads": 1}}
    for section, values in sections.items():
        cfg[section] = {**cfg.get(section, {}), **values}
    (root / f"{name}.yaml").write_text(yaml.safe_dump(cfg))
    assert main(["train", str(root / f"{name}.yaml"), "--out", str(root / name)]) == 0
    return root / name


@pytest.fixture(scope="module")
def run_dir(root) -> Path:
    return train(root, "text", eval={"probes": ["mqar", "passkey"], "probe_pairs": [2, 4],
                                     "probe_distances": [4, 40], "probe_sequences": 6})


@pytest.mark.slow
def test_eval_at_1x_equals_the_trainers_final_val_loss(run_dir, capsys):
    # Same checkpoint, same windows (same seed and placement rule), same fp32 forward; only the
    # summation order differs (float64 here), so the two agree to float32 rounding.
    assert main(["eval", str(run_dir), "--lengths", "1x,2x,4x", "--buckets", "4"]) == 0
    printed = capsys.readouterr().out
    result = json.loads((run_dir / "eval.json").read_text())
    summary = json.loads((run_dir / "summary.json").read_text())
    rows = {r["label"]: r for r in result["lengths"]}
    assert rows["1x"]["loss"] == pytest.approx(summary["final_val_loss"], rel=1e-6)
    assert [rows[k]["length"] for k in ("1x", "2x", "4x")] == [32, 64, 128]
    for r in rows.values():
        assert r["tokens"] == 6 * r["length"]  # eval_windows windows, every position scored
        assert sum(r["bucket_tokens"]) == r["tokens"] and len(r["bucket_loss"]) == 4
        assert sum(m * c for m, c in zip(r["bucket_loss"], r["bucket_tokens"], strict=True)) / r["tokens"] == (
            pytest.approx(r["loss"], rel=1e-9))
    assert f"{rows['4x']['loss']:.4f}" in printed and "wrote" in printed


@pytest.mark.slow
def test_eval_json_keeps_other_lengths_of_the_same_checkpoint(run_dir):
    evaluate.eval_command(run_dir, "1x")
    evaluate.eval_command(run_dir, "3x", probes="mqar")
    result = json.loads((run_dir / "eval.json").read_text())
    assert {r["label"] for r in result["lengths"]} >= {"1x", "3x"}
    assert set(result["probes"]) >= {"probe_mqar_p2_acc", "probe_mqar_acc"}
    old = {**result, "step": 999}
    assert evaluate.merge_eval(old, {**result, "lengths": [], "probes": {}})["lengths"] == []


@pytest.mark.slow
def test_eval_bad_input(run_dir, capsys):
    assert main(["eval", str(run_dir), "--lengths", "100000x"]) == 2
    assert "validation split" in capsys.readouterr().err
    assert main(["eval", str(run_dir), "--lengths", "abc"]) == 2
    assert main(["eval", str(run_dir), "--lengths", "", "--probes", ""]) == 2
    assert main(["eval", str(run_dir), "--buckets", "0"]) == 2


@pytest.mark.slow
def test_probe_accuracies_go_into_every_val_line(run_dir):
    val = [line for line in read_metrics(run_dir / "metrics.jsonl") if line["split"] == "val"]
    assert len(val) == 2
    keys = {"probe_mqar_p2_acc", "probe_mqar_p4_acc", "probe_mqar_acc",
            "probe_passkey_d4_acc", "probe_passkey_d40_acc", "probe_passkey_acc"}
    for line in val:
        assert keys <= set(line)
        assert all(0.0 <= line[k] <= 1.0 for k in keys)
        assert line["probe_mqar_acc"] == pytest.approx((line["probe_mqar_p2_acc"] + line["probe_mqar_p4_acc"]) / 2)
    # The hook recomputes what run_probes gives on the final weights.
    run = load_run(run_dir)
    assert probes.run_probes(run.model, run.cfg, run.data.tokenizer) == pytest.approx(
        {k: val[-1][k] for k in keys})


@pytest.mark.slow
def test_task_runs_extrapolate_on_longer_task_sequences(root):
    run_dir = train(root, "passkey", data={"corpus": "task:passkey", "seq_len": 80},
                    train={"steps": 15, "eval_every": 15, "checkpoint_every": 15})
    rows = evaluate.length_extrapolation(load_run(run_dir), [("1x", 80), ("2x", 160)], 2)
    assert rows[0]["loss"] == pytest.approx(json.loads((run_dir / "summary.json").read_text())["final_val_loss"],
                                            rel=1e-6)
    assert rows[1]["tokens"] == rows[0]["tokens"]  # passkey scores its digits only, whatever the length
    assert rows[0]["bucket_tokens"][0] == 0  # ... which sit at the end of the window


# ----------------------------------------------------------------------------- probes


class LookupOracle(torch.nn.Module):
    """Predicts, at each position, the token that followed the latest earlier occurrence of the
    current token: the lookup rule that solves MQAR exactly (Arora et al. 2023, sec. 3: each
    queried key occurs once in the context, followed by its value)."""

    def __init__(self, vocab_size: int) -> None:
        super().__init__()
        self.vocab_size = vocab_size
        self.dummy = torch.nn.Parameter(torch.zeros(1))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        logits = torch.zeros(*x.shape, self.vocab_size)
        for b in range(x.shape[0]):
            last: dict[int, int] = {}
            row = x[b].tolist()
            for t, tok in enumerate(row):
                if tok in last:
                    logits[b, t, row[last[tok] + 1]] = 1.0
                last[tok] = t
        return logits


def probe_cfg(**overrides):
    eval_ = {"probes": ["mqar", "passkey"], "probe_pairs": [1, 5, 20], "probe_distances": [0, 7, 300],
             "probe_sequences": 5}
    eval_.update(overrides)
    return config_from_dict({"data": {"task": {"num_keys": 20, "num_values": 30}}, "eval": eval_,
                             "train": {"batch_size": 2}})


def test_mqar_probe_is_solved_by_the_lookup_rule_and_not_by_chance():
    cfg = probe_cfg(probes=["mqar"])
    vocab = TASKS["mqar"].vocab_size(cfg.data.task)
    sets = probes.build_probe_sets(cfg, None, vocab)
    assert [s.metric for s in sets] == ["probe_mqar_p1_acc", "probe_mqar_p5_acc", "probe_mqar_p20_acc"]
    for s, pairs in zip(sets, (1, 5, 20), strict=True):
        answers = sum(int((y != -100).sum()) for _, y in s.batches)
        assert answers == 5 * pairs  # one answer per query, as many queries as pairs
    assert probes.run_probe_sets(LookupOracle(vocab), sets)["probe_mqar_acc"] == 1.0

    class Constant(LookupOracle):
        def forward(self, x):
            return torch.zeros(*x.shape, self.vocab_size)  # argmax = token 0 = <pad>, never a value

    assert probes.run_probe_sets(Constant(vocab), sets)["probe_mqar_acc"] == 0.0


def test_passkey_probe_places_the_key_exactly_d_characters_before_the_question():
    tok = SymbolTokenizer(passkey_symbols(probe_cfg().data.task), "")
    sets = probes.build_probe_sets(probe_cfg(probes=["passkey"]), tok, tok.vocab_size)
    assert [s.metric for s in sets] == ["probe_passkey_d0_acc", "probe_passkey_d7_acc", "probe_passkey_d300_acc"]
    prefix, suffix = KEY_SENTENCE.split("{key}")
    for s, distance in zip(sets, (0, 7, 300), strict=True):
        x, y = s.batches[0]
        text = tok.decode(x[0])
        key = tok.decode(y[0][y[0] != -100])
        assert len(key) == 5 and key.isdigit()
        assert text.startswith(prefix + key + suffix)
        assert text.endswith(QUESTION + key[:-1])  # x stops one token before the last digit
        assert len(text) - len(prefix + key + suffix) - len(QUESTION) - 4 == distance


def test_passkey_probe_in_a_bpe_like_tokenizer_pads_and_scores_only_the_key():
    class Words:  # tokens of unequal character length, like BPE
        vocab_size = 200

        def encode(self, text):
            return [hash(w) % 190 + 10 for w in text.split(" ")]

    rows = [probes.encode_answer_sequence(Words(), "a b c", "1"), probes.encode_answer_sequence(Words(), "a", "12")]
    x, y = probes.pad_batch(rows)
    assert x.shape == (2, 3)
    assert (y[0] != -100).tolist() == [False, False, True]
    assert (y[1] != -100).tolist() == [True, False, False]


def test_probes_that_cannot_run_are_config_errors():
    with pytest.raises(ConfigError, match=r"eval\.probes\[0\]"):
        config_from_dict({"eval": {"probes": ["nope"]}})
    with pytest.raises(ConfigError, match=r"eval\.probe_pairs\[1\]"):
        probes.build_probe_sets(probe_cfg(probes=["mqar"], probe_pairs=[2, 21]), None, 100)
    with pytest.raises(ConfigError, match="vocabulary of 40"):
        probes.build_probe_sets(probe_cfg(probes=["mqar"]), None, 40)
    mqar_tok = TASKS["mqar"].tokenizer(probe_cfg().data.task)
    with pytest.raises(ConfigError, match="passkey: this run's tokenizer cannot encode"):
        probes.build_probe_sets(probe_cfg(probes=["passkey"]), mqar_tok, 100)


def test_the_config_accepts_exactly_the_probes_that_exist():
    # config.py validates eval.probes against data.task_options.PROBE_TASKS so that it need not import the
    # evaluation code (no import cycle); the two lists must agree.
    assert tuple(probes.PROBES) == PROBE_TASKS
    for name in PROBE_TASKS:
        assert config_from_dict({"eval": {"probes": [name]}}).eval.probes == (name,)


@pytest.mark.slow
def test_a_probe_error_stops_training_before_the_run_dir_changes(root, capsys):
    args = ["--set", "eval.probes=[mqar]", "--set", "eval.probe_pairs=[65]", "--out", str(root / "never")]
    assert main(["train", str(root / "text.yaml"), *args]) == 2
    assert "eval.probe_pairs" in capsys.readouterr().err
    assert not (root / "never").exists()


def test_the_trainer_refuses_probes_that_no_hook_builder_builds(tmp_path):
    # The trainer does not import the probe suite (a higher layer); a caller that asks for probes
    # without plugging them in is told so before anything is read or written.
    with pytest.raises(ValueError, match="eval.probes is set"):
        run_training(probe_cfg(), tmp_path / "run", progress="silent")
    assert not (tmp_path / "run").exists()


def test_probe_params_leave_the_task_config_alone():
    cfg = probe_cfg()
    probes.build_probe_sets(cfg, None, 100, names=["mqar"])
    assert cfg.data.task.num_pairs == 8 and dataclasses.is_dataclass(cfg.data.task)


# ----------------------------------------------------------------------------- plots for the grid report


@pytest.mark.slow
def test_length_plot_and_seed_means(run_dir, tmp_path):
    evaluate.eval_command(run_dir, "1x,2x")
    e = evaluate.read_eval(run_dir)
    other = {**e, "lengths": [{**r, "loss": r["loss"] + 1.0} for r in e["lengths"] if r["label"] == "2x"]}
    lengths, losses = evaluate.mean_by_length([e, other])
    two = next(r for r in e["lengths"] if r["label"] == "2x")
    assert lengths == [64] and losses == [pytest.approx(two["loss"] + 0.5)]  # only lengths both runs have
    out = evaluate.plot_length_extrapolation({"a": [e], "b": [e, other]}, tmp_path / "len.png")
    assert out.read_bytes()[:4] == b"\x89PNG"
    assert evaluate.read_eval(tmp_path) is None


def test_probe_plot_reads_the_val_line_keys(tmp_path):
    line = {"loss": 1.0, "probe_mqar_p16_acc": 0.5, "probe_mqar_p4_acc": 1.0, "probe_mqar_acc": 0.75,
            "probe_passkey_d0_acc": 0.2}
    assert evaluate.probe_curves(line) == {"mqar": [(4, 1.0), (16, 0.5)], "passkey": [(0, 0.2)]}
    assert evaluate.plot_probe_accuracy({"v": [line, line]}, tmp_path / "p.png").read_bytes()[:4] == b"\x89PNG"
    assert evaluate.plot_probe_accuracy({"v": [{"loss": 1.0}]}, tmp_path / "none.png") is None


@pytest.mark.slow
def test_report_figures_from_cell_dirs(run_dir, root, tmp_path):
    evaluate.eval_command(run_dir, "1x,2x")
    plain = train(root, "plain", train={"steps": 15, "eval_every": 15, "checkpoint_every": 15})  # no probes, no eval
    written = evaluate.report_figures(tmp_path, {"probed": [run_dir], "plain": [plain]})
    assert [name for name, _ in written] == ["length_extrapolation.png", "probe_accuracy.png"]
    assert all((tmp_path / name).read_bytes()[:4] == b"\x89PNG" for name, _ in written)
    assert evaluate.report_figures(tmp_path / "empty", {"plain": [plain]}) == []
