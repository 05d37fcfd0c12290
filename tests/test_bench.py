"""Correctness of the benchmarks and the memory estimator (no timing assertions: speed lives in scripts/).

* the plain reference loop of ``blockyard.bench.plain`` computes the same function as blockyard's model;
* the benchmark's JSON has every field a comparison between commits reads;
* the profile's per-block split charges backward time to the right block;
* the activation-memory estimate equals what torch's autograd actually saves, and warns on huge configs;
* activation checkpointing changes memory, not losses;
* the memory probe of scripts/bench_memory.py runs the job it was given and sums RSS over a process tree.

Whether a figure is plausible for this machine (RSS bands, activation vs estimate) is a target of
scripts/bench_memory.py, not a test.
"""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import pytest
import torch
from torch.utils._python_dispatch import TorchDispatchMode

from blockyard.bench import quality as bench_quality
from blockyard.bench import speed as bench_speed
from blockyard.bench.cases import BenchCase, blockyard_run, loop_efficiency, loop_tokens_per_s
from blockyard.bench.command import bench_command
from blockyard.bench.plain import (
    PlainShape,
    PlainTransformer,
    load_blockyard_weights,
    plain_optimizer,
    plain_shape_of,
    plain_train_step,
    random_batches,
)
from blockyard.bench.profile import _is_scan, event_buckets, labelled_forward, step_time_shares
from blockyard.bench.quality import QUALITY_LR, run_quality
from blockyard.bench.report import format_report
from blockyard.bench.speed import run_bench
from blockyard.config import config_from_dict
from blockyard.cost.memory import (
    estimate_activation_memory,
    memory_warning,
    saved_bytes_by_part,
    warn_if_too_large,
)
from blockyard.kernels import build
from blockyard.model import build_model
from blockyard.train import runtime as runtime_mod

ROOT = Path(__file__).resolve().parents[1]


def tiny_cfg(kind: str = "global_attention", **model):
    mixer = {"kind": kind}
    if "attention" in kind:
        mixer["heads"] = 4
    if kind == "local_attention":
        mixer["window"] = 8
    return config_from_dict({"model": {"width": 32, "depth": 2, "pattern": ["mix"], "mixers": {"mix": mixer},
                                       **model}})


# ----------------------------------------------------------------------------- plain reference


def test_plain_reference_matches_blockyard_model_loss_and_gradients():
    # The plain loop is a hand-written transformer on torch primitives (SDPA, nn.RMSNorm, F.gelu);
    # with blockyard's model weights it must give the same loss and the same gradients, else the
    # speed ratio would compare two different computations.
    torch.manual_seed(0)
    model = build_model(tiny_cfg().model, 256)
    plain = PlainTransformer(plain_shape_of(model), max_len=24)
    load_blockyard_weights(plain, model)
    x, y = random_batches(256, 3, 24, 1)[0]
    losses = []
    for m in (model, plain):
        loss = torch.nn.functional.cross_entropy(m(x).flatten(0, 1), y.flatten())
        loss.backward()
        losses.append(loss)
    torch.testing.assert_close(losses[0], losses[1], rtol=1e-6, atol=1e-6)
    torch.testing.assert_close(model.embed.weight.grad, plain.embed.weight.grad, rtol=1e-5, atol=1e-7)
    torch.testing.assert_close(model.blocks[1].mixer.qkv.weight.grad, plain.blocks[1].qkv.weight.grad,
                               rtol=1e-5, atol=1e-7)
    torch.testing.assert_close(model.blocks[0].mlp.proj_in.weight.grad, plain.blocks[0].up.weight.grad,
                               rtol=1e-5, atol=1e-7)


def test_plain_train_step_decreases_the_loss_on_a_repeated_batch():
    torch.manual_seed(0)
    plain = PlainTransformer(PlainShape(vocab=64, width=32, depth=1, heads=2, mlp_hidden=64), 16)
    opt = plain_optimizer(plain, lr=1e-2)
    x, y = random_batches(64, 4, 16, 1)[0]
    first = plain_train_step(plain, opt, x, y)
    for _ in range(60):
        last = plain_train_step(plain, opt, x, y)
    assert last < 0.5 * first  # memorising one batch: a broken backward or optimizer would not


class _OpLog(TorchDispatchMode):
    """Records the name of every aten op dispatched (forward, backward and optimizer alike)."""

    def __init__(self) -> None:
        super().__init__()
        self.ops: list[str] = []

    def __torch_dispatch__(self, func, types, args=(), kwargs=None):
        self.ops.append(str(func))
        return func(*args, **(kwargs or {}))


@pytest.mark.parametrize("bf16", [False, True])
def test_plain_train_step_does_exactly_what_a_hand_written_step_does(bf16):
    # The honest reference: the benchmark's plain step dispatches the very ops of the textbook loop
    # (forward, cross-entropy, backward, optimizer.step(), zero_grad(); common practice, no source),
    # one by one in the same order, and ends with the same weights. Any extra pass (a copy, a norm,
    # a sync) would show up as an extra op. bf16: the ops of autocast, whether or not this CPU is fast at them.
    shape = PlainShape(vocab=64, width=32, depth=2, heads=2, mlp_hidden=64)
    x, y = random_batches(64, 2, 16, 1)[0]
    logs, models = [], []
    for hand_written in (False, True):
        torch.manual_seed(0)
        model = PlainTransformer(shape, 16)
        opt = plain_optimizer(model)
        plain_train_step(model, opt, x, y, bf16=bf16)  # AdamW's state exists from here on: a steady step
        with _OpLog() as log:
            if hand_written:
                with torch.autocast("cpu", dtype=torch.bfloat16, enabled=bf16):
                    logits = model(x)
                loss = torch.nn.functional.cross_entropy(logits.float().flatten(0, 1), y.flatten())
                loss.backward()
                opt.step()
                opt.zero_grad()
            else:
                plain_train_step(model, opt, x, y, bf16=bf16)
        logs.append(log.ops)
        models.append(model)
    assert len(logs[0]) > 100 and logs[0] == logs[1]
    for a, b in zip(models[0].parameters(), models[1].parameters(), strict=True):
        assert torch.equal(a, b)


def test_median_ratio_brackets_each_blockyard_figure_by_the_plain_ones_around_it():
    # Rounds plain, blockyard, plain, blockyard, plain: a load that slows everything by the same
    # factor within a round cancels. Round 1: 90 / mean(100, 80) = 1.0; round 2: 72 / mean(80, 60)
    # = 1.0286; the closing pass holds the plain figure only. Other ratios stay within one round.
    rounds = [{"plain-fp32": 100.0, "attention-fp32": 90.0, "recurrence-fp32": 45.0},
              {"plain-fp32": 80.0, "attention-fp32": 72.0, "recurrence-fp32": 40.0},
              {"plain-fp32": 60.0}]
    assert bench_speed._median_ratio(rounds, "attention-fp32", "plain-fp32") == pytest.approx((1.0 + 72 / 70) / 2)
    assert bench_speed._median_ratio(rounds, "recurrence-fp32", "attention-fp32") == pytest.approx(
        (0.5 + 40 / 72) / 2)


def test_loop_tokens_per_s_reads_wall_clock_between_log_lines():
    lines = [{"split": "train", "step": 1, "tokens": 100, "wall_s": 1.0},
             {"split": "train", "step": 10, "tokens": 1000, "wall_s": 5.0},
             {"split": "val", "step": 10, "wall_s": 6.0},
             {"split": "train", "step": 20, "tokens": 2000, "wall_s": 7.0},
             {"split": "train", "step": 30, "tokens": 3000, "wall_s": 11.0}]
    # Windows 10 -> 20 (1000 tokens in 2 s) and 20 -> 30 (in 4 s): the best one counts.
    assert loop_tokens_per_s(lines, warmup=10) == pytest.approx(1000 / 2.0)
    with pytest.raises(ValueError, match="raise --steps"):
        loop_tokens_per_s(lines, warmup=25)  # one train line left


def test_loop_efficiency_compares_the_loop_clock_with_the_step_clock_in_each_window():
    lines = [{"split": "train", "step": 10, "tokens": 1000, "wall_s": 5.0, "tokens_per_s": 400.0},
             {"split": "val", "step": 10, "wall_s": 6.0},
             {"split": "train", "step": 20, "tokens": 2000, "wall_s": 8.0, "tokens_per_s": 400.0},
             {"split": "train", "step": 30, "tokens": 3000, "wall_s": 10.5, "tokens_per_s": 500.0},
             {"split": "train", "step": 40, "tokens": 4000, "wall_s": 13.0, "tokens_per_s": 400.0}]
    # Windows: 1000 tokens in 3 s of loop (333/s) vs 400/s of steps; 400/s vs 500/s; 400/s vs 400/s.
    assert loop_efficiency(lines, warmup=10) == pytest.approx(1000 / 3 / 400)  # median of 0.833, 0.8, 1.0
    with pytest.raises(ValueError, match="raise --steps"):
        loop_efficiency(lines, warmup=35)


# ----------------------------------------------------------------------------- benchmark output


def test_bench_runs_print_their_warnings_but_not_their_start_and_end_lines(tmp_path, monkeypatch, capsys):
    # The benchmark prints its own progress; each timed run's "training ... / done ..." is noise there.
    monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (False, "simulated AVX2 CPU"))
    case = BenchCase("tiny", "global_attention", 16, 2, "bf16", width=16, depth=1)
    run = blockyard_run(case, 11, 1, tmp_path / "cache", threads=1)
    assert run["summary"]["status"] == "done"
    err = capsys.readouterr().err.splitlines()
    assert err and all(line.startswith("warning: runtime.precision: bf16 unsupported") for line in err), err


def test_bench_json_has_the_fields_a_comparison_reads(tmp_path, monkeypatch):
    monkeypatch.setenv("BLOCKYARD_CACHE", str(tmp_path / "cache"))
    cases = (BenchCase("attention-fp32", "global_attention", 32, 2, width=32, depth=1),
             BenchCase("recurrence-fp32", "recurrence", 32, 2, width=32, depth=1))
    result = run_bench(steps=11, warmup=1, rounds=1, cases=cases, log=lambda s: None,
                             gemm_n=128, copy_bytes=2**20, scan_shape=(2, 32, 16), pairs=6)
    text = json.dumps(result, default=str)
    result = json.loads(text)
    assert {"machine", "peaks", "configs", "ratios", "scan", "profile", "targets", "per_round"} <= set(result)
    assert all(v > 0 for v in result["peaks"].values())
    names = {row["name"] for row in result["configs"]}
    assert names == {"plain-fp32", "attention-fp32", "recurrence-fp32"}
    for row in result["configs"]:
        assert row["tokens_per_s"] > 0 and row["flops_per_token"] > 0 and 0 < row["mfu"]
    assert result["ratios"]["blockyard_over_plain_fp32"] > 0
    assert result["ratios"]["recurrence_over_attention_s256"] > 0
    assert result["ratios"]["bf16_over_fp32_attention"] is None  # not measured in this run
    # Paired steps: only the ratios whose configs ran, 6 per-pair values, an interval.
    assert set(result["ratios_paired"]) == {"recurrence_over_attention_s256", "blockyard_over_plain_fp32"}
    p = result["ratios_paired"]["recurrence_over_attention_s256"]
    assert len(p["values"]) == 6 and p["low"] <= p["median"] <= p["high"] and p["loop_efficiency"] == 1.0
    target = next(t for t in result["targets"] if t["name"].endswith("seq 256"))
    assert target["value"] == p["median"] and target["interval"] == [p["low"], p["high"]]
    # Against the plain loop: scaled by the trainer loop's own efficiency, read from its run.
    q = result["ratios_paired"]["blockyard_over_plain_fp32"]
    assert 0 < q["loop_efficiency"] <= 1.5 and "x the loop's efficiency" in next(
        t for t in result["targets"] if t["name"].endswith("global attention fp32"))["note"]
    assert "paired steps [95%]" in format_report(result)
    assert {t["name"] for t in result["targets"]} >= {"blockyard train / plain loop tokens/s, global attention fp32"}
    assert "torch" in result["scan"]["backends"]
    shares = result["profile"]["attention-fp32"]["share"]
    assert sum(shares.values()) == pytest.approx(1.0)
    assert {"mixer:global_attention", "mlp", "optimizer", "head/loss"} <= set(shares)
    report = format_report(result)
    assert "tokens/s" in report and "targets:" in report and "mixer:recurrence" in report


def test_quality_check_pairs_seeds_and_bounds_the_mean_difference(monkeypatch):
    # Fake runs: bf16 is 2% / 0% / 1% above fp32 for seeds 0 / 1 / 2. Mean +1%; the 95% interval
    # is mean +- t(0.975, 2) * sd / sqrt(3) with sd = 1% (t = 4.303, Student's t table).
    seen = []

    def fake_run(case, steps, warmup, cache, threads, **train):
        seen.append((case.precision, train["seed"], steps))
        assert train["lr"] == QUALITY_LR
        base = 2.0 + train["seed"]
        factor = {0: 1.02, 1: 1.0, 2: 1.01}[train["seed"]] if case.precision == "bf16" else 1.0
        return {"tokens_per_s": 1.0, "summary": {"final_val_loss": base * factor}}

    monkeypatch.setattr(bench_quality, "blockyard_run", fake_run)
    monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (True, "simulated bf16 CPU"))
    q = run_quality(steps=40, seeds=3, log=lambda s: None)
    assert sorted(seen) == sorted((p, s, 40) for p in ("fp32", "bf16") for s in range(3))
    assert q["mean_relative_difference"] == pytest.approx(0.01)
    half = 4.303 * 0.01 / 3**0.5
    assert q["ci95"] == pytest.approx([0.01 - half, 0.01 + half], abs=1e-4)
    assert q["targets"][0]["value"] == pytest.approx(0.01) and q["targets"][0]["bound"] == 0.01
    assert q["targets"][0]["met"] is None  # the interval [-1.5%, +3.5%] straddles the 1% bound
    text = format_report({"quality": q})
    assert "after 40 steps, peak lr 0.001" in text
    assert "seed 0: fp32 2.0000, bf16 2.0400 (+2.00%)" in text and "mean bf16 - fp32: +1.00%" in text
    assert "[unsure]" in text


def _buckets_by_op(model, x, y) -> tuple[dict[str, set[str]], dict[str, set[str]]]:
    """Profile one forward + backward of ``model``: for each forward op and each backward node, the
    buckets its time was charged to (what was charged where, not how long it took)."""
    from torch.profiler import ProfilerActivity, profile

    with labelled_forward(model), profile(activities=[ProfilerActivity.CPU]) as prof:
        loss = torch.nn.functional.cross_entropy(model(x).flatten(0, 1), y.flatten())
        loss.backward()
    forward: dict[str, set[str]] = {}
    backward: dict[str, set[str]] = {}
    for event, bucket in event_buckets(list(prof.events())):
        if event.name.startswith("autograd::engine::evaluate_function: "):
            backward.setdefault(event.name.split(": ", 1)[1], set()).add(bucket)
        elif event.name.startswith("aten::"):
            forward.setdefault(event.name, set()).add(bucket)
    return forward, backward


def test_profile_charges_backward_ops_to_the_block_that_ran_forward():
    # GELU runs only in the MLP, SDPA only in attention, the embedding lookup and the loss once each:
    # their forward ops and, through autograd's sequence numbers, their backward nodes must land in
    # those blocks' buckets.
    # (runtime.kernels: chunked keeps the MLP's GeGLU as torch's ops; the C++ op's case follows.)
    torch.manual_seed(0)
    model = build_model(tiny_cfg().model, 64, kernels="torch")
    x, y = random_batches(64, 2, 16, 1)[0]
    forward, backward = _buckets_by_op(model, x, y)
    assert forward["aten::gelu"] == backward["GeluBackward0"] == {"mlp"}
    sdpa = [name for name in backward if name.startswith("ScaledDotProduct")]
    assert sdpa and all(backward[name] == {"mixer:global_attention"} for name in sdpa)
    assert forward["aten::scaled_dot_product_attention"] == {"mixer:global_attention"}
    assert forward["aten::embedding"] == backward["EmbeddingBackward0"] == {"embedding"}
    assert backward["NllLossBackward0"] == {"head/loss"}
    assert {"mlp", "mixer:global_attention", "head/loss"} <= backward["MmBackward0"]  # every linear layer's
    # The hooks are removed afterwards: a later forward opens no profiler ranges.
    assert all(not m._forward_pre_hooks for m in model.modules())


def test_profile_charges_the_fused_geglu_to_the_mlp():
    if build.load_kernels() is None:
        pytest.skip(f"C++ kernels unavailable: {build.build_status()['error']}")
    torch.manual_seed(0)
    model = build_model(tiny_cfg().model, 64, kernels="compiled")
    x, y = random_batches(64, 2, 16, 1)[0]
    _, backward = _buckets_by_op(model, x, y)
    geglu = [name for name in backward if "blockyard_geglu" in name]
    assert geglu and all(backward[name] == {"mlp"} for name in geglu)
    assert "GeluBackward0" not in backward


def test_profile_splits_the_scan_out_of_the_recurrence():
    from torch.profiler import ProfilerActivity, profile

    torch.manual_seed(0)
    model = build_model(tiny_cfg("recurrence").model, 64)
    x, _ = random_batches(64, 2, 64, 1)[0]
    with labelled_forward(model), profile(activities=[ProfilerActivity.CPU]) as prof:
        model(x).sum().backward()
    events = list(prof.events())
    buckets = {bucket for _, bucket in event_buckets(events)}
    assert {"scan", "mixer:recurrence"} <= buckets
    assert set(step_time_shares(events)) == buckets  # the shares sum exactly the buckets' events
    assert _is_scan("autograd::engine::evaluate_function: _ChunkedScanBackward")
    assert _is_scan("blockyard::rg_lru") and _is_scan("GeneratedBackwardFor_blockyard_rg_lru_defaultBackward")
    assert not _is_scan("aten::mm")
    assert not _is_scan("blockyard::causal_conv") and not _is_scan("GeneratedBackwardFor_blockyard_causal_conv_default")


def test_bench_command_rejects_bad_arguments(tmp_path):
    from blockyard.errors import UserError

    with pytest.raises(UserError, match="--steps"):
        bench_command(steps=5, warmup=3)
    with pytest.raises(UserError, match="--json"):
        bench_command(json_path=str(tmp_path))
    with pytest.raises(UserError, match="--quality-lr"):
        bench_command(quality=True, quality_lr=0.0)
    with pytest.raises(UserError, match="--cases attention,recurrence-fp32: unknown attention; allowed: attention-"):
        bench_command(cases="attention,recurrence-fp32")
    with pytest.raises(UserError, match="no name given"):
        bench_command(cases=" , ")
    for pairs in (-1, 5):
        with pytest.raises(UserError, match="--pairs"):
            bench_command(pairs=pairs)


def test_bench_cases_choose_a_subset_in_the_table_order():
    from blockyard.bench.command import chosen_cases

    assert [c.name for c in chosen_cases("recurrence-fp32, attention-fp32")] == ["attention-fp32", "recurrence-fp32"]
    assert len(chosen_cases(None)) == len(bench_speed.CASES)


def test_bench_cli_bad_quality_lr_is_a_one_line_error(capsys):
    from blockyard.cli import main

    assert main(["bench", "--quality", "--quality-lr", "-1"]) == 2
    err = capsys.readouterr().err.strip()
    assert "--quality-lr -1.0" in err and "\n" not in err and "Traceback" not in err


# ----------------------------------------------------------------------------- memory estimate


@pytest.mark.parametrize("kind", ["global_attention", "local_attention", "recurrence"])
def test_estimate_equals_what_autograd_saves_on_real_tensors(kind):
    # Ground truth: the tensors torch's autograd really saves in a CPU forward + loss. The estimate
    # runs the same model under FakeTensorMode (no storage) and must count exactly the same bytes.
    cfg = tiny_cfg(kind)
    torch.manual_seed(0)
    model = build_model(cfg.model, 256)
    real_parts, _, _ = saved_bytes_by_part(model, torch.zeros(3, 40, dtype=torch.long))
    est = estimate_activation_memory(cfg.model, 256, 3, 40)
    assert est.parts == real_parts
    assert est.saved_bytes == sum(real_parts.values()) > 0


def test_estimate_is_linear_in_batch_and_checkpointing_keeps_less():
    cfg = config_from_dict({"model": {"width": 64, "depth": 8}})
    one = estimate_activation_memory(cfg.model, 256, 1, 64)
    four = estimate_activation_memory(cfg.model, 256, 4, 64)
    assert four.saved_bytes == pytest.approx(4 * one.saved_bytes, rel=0.02)
    ckpt = estimate_activation_memory(cfg.model, 256, 4, 64, activation_checkpointing=True)
    # Chen et al. 2016: keeping block inputs only, plus one block recomputed at a time.
    block = max(v for k, v in four.parts.items() if k.startswith("block:"))
    outside = four.parts["embedding"] + four.parts["head/loss"]
    assert ckpt.saved_bytes == outside + 8 * four.block_input_bytes + block
    assert ckpt.saved_bytes < 0.5 * four.saved_bytes
    assert four.block_input_bytes == 4 * 64 * 64 * 4  # (B, T, D) float32


@pytest.mark.parametrize("kind", ["global_attention", "local_attention", "recurrence", "lstm"])
def test_coarse_bound_is_above_the_precise_estimate(kind):
    # The pre-check may only skip configs that surely fit: its bound must exceed the counted bytes.
    from blockyard.cost.memory import coarse_bound_bytes

    for width, expansion in ((64, 3.0), (64, 0.5), (128, 8.0)):
        cfg = config_from_dict({"model": {"width": width, "depth": 2, "pattern": [kind], "mlp_expansion": expansion},
                                "data": {"seq_len": 96}, "train": {"batch_size": 2}})
        est = estimate_activation_memory(cfg.model, 256, 2, 96)
        assert coarse_bound_bytes(cfg, 256) > est.total_bytes


@pytest.mark.slow  # about a minute: the estimator traces a width-2048, depth-48 model at 8,192 tokens
def test_huge_config_warns_with_estimate_and_suggestions():
    cfg = config_from_dict({"model": {"width": 2048, "depth": 48}, "data": {"seq_len": 8192},
                            "train": {"batch_size": 64}})
    seen = []
    message = warn_if_too_large(cfg, 256, seen.append, available_bytes=16 * 2**30)
    assert seen == [message]
    assert "GiB" in message and "16.00 GiB" in message
    assert "runtime.activation_checkpointing: true" in message
    assert "train.batch_size" in message
    # The same config with memory to spare: no warning.
    assert memory_warning(cfg, 256, available_bytes=2**60) is None


@pytest.mark.slow
def test_trainer_warns_before_training_when_activations_will_not_fit(tmp_path, monkeypatch, capsys):
    # The machine is made to look tiny (64 KiB available) instead of building a huge config.
    import blockyard.cost.memory as me
    from blockyard.train import run_training

    monkeypatch.setattr(me, "available_memory_bytes", lambda: 2**16)
    cfg = config_from_dict({"model": {"width": 32, "depth": 1}, "data": {"seq_len": 32, "cache_dir": str(tmp_path)},
                            "train": {"steps": 1, "batch_size": 4, "eval_windows": 2}})
    run_training(cfg, tmp_path / "run", progress="silent")
    err = capsys.readouterr().err
    warning = next(line for line in err.splitlines() if "estimated activation memory" in line)
    assert warning.startswith("warning: ") and "0.00 GiB of memory available" in warning
    assert err.index("estimated activation memory") < err.index("training ")  # before the first step
    assert me.memory_warning(cfg, 256, available_bytes=2**40) is None


def test_warning_suggests_a_batch_that_fits():
    cfg = config_from_dict({"model": {"width": 64, "depth": 2}, "data": {"seq_len": 128},
                            "train": {"batch_size": 32}})
    per_seq = estimate_activation_memory(cfg.model, 256, 1, 128).total_bytes
    message = memory_warning(cfg, 256, available_bytes=int(per_seq * 5.5))
    batch = int(message.split("train.batch_size <= ")[1].split()[0])
    assert 4 <= batch <= 6


# ----------------------------------------------------------------------------- checkpointing, memory probe


def test_activation_checkpointing_gives_identical_losses_and_gradients():
    # Recomputing a block in backward replays the same ops on the same inputs: bitwise equal results.
    from blockyard.train import train_step
    from blockyard.train.optim import build_optimizer, build_scheduler
    from blockyard.train.runtime import resolve_runtime

    cfg = config_from_dict({"model": {"width": 32, "depth": 3, "pattern": ["global_attention", "recurrence"]},
                            "train": {"steps": 3}})
    runtime, _ = resolve_runtime(cfg.runtime)
    x, y = random_batches(256, 2, 16, 1)[0]
    results = []
    for on in (False, True):
        torch.manual_seed(0)
        model = build_model(cfg.model, 256, activation_checkpointing=on)
        opt = build_optimizer(model, cfg.train)
        sched = build_scheduler(opt, cfg.train, 3)
        losses = [train_step(model, opt, sched, [(x, y)], runtime, 1.0).loss for _ in range(3)]
        results.append((losses, [p.detach().clone() for p in model.parameters()]))
    assert results[0][0] == results[1][0]
    for a, b in zip(results[0][1], results[1][1], strict=True):
        assert torch.equal(a, b)


def _bench_memory():
    spec = importlib.util.spec_from_file_location("bench_memory", ROOT / "scripts" / "bench_memory.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_memory_probe_runs_the_steps_it_was_given(tmp_path):
    from blockyard.kernels import kernels_info

    # Build (or find) the scan kernel first: a first build inside the child would import the
    # compiler tooling after its baseline and be counted as activation memory.
    kernels_info()
    bm = _bench_memory()
    cfg = bm.base_config(str(tmp_path / "cache"), width=32, depth=2, seq_len=32, batch=4, steps=2)
    out = bm.run_child({"job": "steps", "config": cfg}, timeout_s=300)
    assert len(out["losses"]) == 2 and all(loss > 0 for loss in out["losses"])
    # The kernel's high-water mark of RSS (getrusage) can only be at or above an RSS read before it.
    assert out["peak_rss_bytes"] >= out["baseline_rss_bytes"] > 0
    assert out["activation_bytes"] == out["peak_rss_bytes"] - out["baseline_rss_bytes"]
    # The estimate the benchmark compares with is the estimator's own figure for this config.
    est = estimate_activation_memory(config_from_dict(cfg).model, 256, 4, 32)
    assert out["estimate_bytes"] == est.total_bytes


class _FakeProcess:
    """A process of a fake tree for ``tree_rss_bytes``: its RSS, its descendants, or gone."""

    def __init__(self, rss: int, children: list[_FakeProcess] = (), gone: bool = False) -> None:
        self.rss, self._children, self.gone = rss, list(children), gone

    def children(self, recursive: bool = False) -> list[_FakeProcess]:
        assert recursive
        return [d for c in self._children for d in (c, *c.children(recursive=True))]

    def memory_info(self):
        import psutil

        if self.gone:
            raise psutil.NoSuchProcess(0)
        return type("MemoryInfo", (), {"rss": self.rss})()


def test_tree_rss_sums_the_process_and_every_descendant():
    bm = _bench_memory()
    tree = _FakeProcess(10, [_FakeProcess(200, [_FakeProcess(3000)]), _FakeProcess(40_000, gone=True),
                             _FakeProcess(500_000)])
    assert bm.tree_rss_bytes(tree) == 10 + 200 + 3000 + 500_000  # a process that exited counts 0


@pytest.mark.slow
def test_sampled_peak_sees_the_child_processes():
    import sys

    bm = _bench_memory()
    parent = "import subprocess, sys; subprocess.run([sys.executable, '-c', 'import time; time.sleep(1.5)'])"
    out = bm.sampled_peak([sys.executable, "-c", parent], every_s=0.05)
    assert out["max_processes"] >= 2 and out["peak_tree_rss_bytes"] > 0
    with pytest.raises(RuntimeError, match="failed"):
        bm.sampled_peak([sys.executable, "-c", "raise SystemExit(3)"])


@pytest.mark.parametrize(("factors", "met"), [((1.001, 1.002, 1.0015), True), ((1.05, 1.06, 1.055), False)])
def test_quality_check_decides_only_when_the_interval_is_on_one_side(monkeypatch, factors, met):
    def fake_run(case, steps, warmup, cache, threads, **train):
        factor = factors[train["seed"]] if case.precision == "bf16" else 1.0
        return {"tokens_per_s": 1.0, "summary": {"final_val_loss": 3.0 * factor}}

    monkeypatch.setattr(bench_quality, "blockyard_run", fake_run)
    monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (True, "simulated bf16 CPU"))
    assert run_quality(steps=40, seeds=3, log=lambda s: None)["targets"][0]["met"] is met


def test_without_bf16_units_the_quality_check_emulates_bf16_and_says_so(monkeypatch):
    # The bf16 side would fall back to fp32 and match fp32 exactly (a 0% difference that proves
    # nothing), so it runs as bf16_emulated, and the report and the target say so.
    seen = []

    def fake_run(case, steps, warmup, cache, threads, **train):
        seen.append(case.precision)
        factor = 1.002 if case.precision != "fp32" else 1.0
        return {"tokens_per_s": 1.0, "summary": {"final_val_loss": (3.0 + 0.01 * train["seed"]) * factor}}

    monkeypatch.setattr(bench_quality, "blockyard_run", fake_run)
    monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (False, "simulated AVX2 CPU"))
    q = run_quality(steps=40, seeds=3, log=lambda s: None)
    assert sorted(seen) == ["bf16_emulated"] * 3 + ["fp32"] * 3
    assert q["bf16"] == "bf16_emulated" and q["mean_relative_difference"] == pytest.approx(0.002)
    assert q["targets"][0]["met"] is True and "emulated" in q["targets"][0]["note"]
    text = format_report({"quality": q})
    assert "bf16 side run as bf16_emulated: no bf16 units here (simulated AVX2 CPU)" in text
    assert "seed 0: fp32 3.0000, bf16_emulated 3.0060 (+0.20%)" in text


def test_without_bf16_units_the_speed_benchmark_skips_bf16_cases(tmp_path, monkeypatch):
    # torch emulates bf16 on such CPUs at ~1% of fp32 speed: the plain bf16 twin would run for hours.
    monkeypatch.setenv("BLOCKYARD_CACHE", str(tmp_path / "cache"))
    monkeypatch.setattr(runtime_mod, "cpu_bf16_support", lambda: (False, "simulated AVX2 CPU"))
    plain_calls = []
    real_plain = bench_speed.plain_tokens_per_s

    def plain(*args, bf16=False, **kwargs):
        plain_calls.append(bf16)
        return real_plain(*args, bf16=bf16, **kwargs)

    monkeypatch.setattr(bench_speed, "plain_tokens_per_s", plain)
    cases = (BenchCase("attention-fp32", "global_attention", 32, 2, width=32, depth=1),
             BenchCase("attention-bf16", "global_attention", 32, 2, "bf16", width=32, depth=1))
    result = run_bench(steps=11, warmup=1, rounds=1, profile=False, cases=cases, log=lambda s: None,
                             gemm_n=64, copy_bytes=2**20, scan_shape=(2, 32, 16))
    assert plain_calls == [False, False]  # the round's fp32 twin and the closing plain pass
    assert {row["name"] for row in result["configs"]} == {"plain-fp32", "attention-fp32"}
    assert "gemm_bf16_gflops" not in result["peaks"]
    assert result["skipped"] == {"cases": ["attention-bf16"], "reason": "simulated AVX2 CPU"}
    target = next(t for t in result["targets"] if t["name"].startswith("bf16 / fp32"))
    assert target["met"] is None and target["note"] == "not measurable here: simulated AVX2 CPU"
    text = format_report(json.loads(json.dumps(result, default=str)))
    assert "bf16 GEMM not measured" in text and "skipped: attention-bf16 (simulated AVX2 CPU)" in text


def test_ratio_at_equal_mfu_is_the_ratio_of_peak_over_flops():
    # Arithmetic of the definition (MFU = tokens/s x FLOPs per token / peak): two configs at the same
    # MFU have tokens/s in the ratio of their peak / FLOPs per token.
    peaks = {"gemm_fp32_gflops": 100.0, "gemm_bf16_gflops": 220.0}
    rows = {"a": {"precision": "fp32", "flops_per_token": 30.0}, "b": {"precision": "fp32", "flops_per_token": 20.0},
            "c": {"precision": "bf16", "flops_per_token": 20.0}}
    assert bench_speed._equal_mfu_ratio(rows, peaks, "b", "a") == pytest.approx(1.5)
    assert bench_speed._equal_mfu_ratio(rows, peaks, "c", "b") == pytest.approx(2.2)
    assert bench_speed._equal_mfu_ratio(rows, peaks, "c", "missing") is None
    text = format_report({"ratios": {"x": 1.1}, "ratios_median_of_rounds": {"x": 1.0},
                          "ratios_at_equal_mfu": {"x": 1.5}})
    assert "1.10x" in text and "1.50x" in text and "at equal MFU" in text
