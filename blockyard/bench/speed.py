"""The speed benchmark: peaks, every case beside its plain-loop twin over several rounds, the scan, a profile.

Everything is measured side by side in one process, so the figures that matter are ratios:

* **peaks**: fp32 and bf16 GEMM GFLOP/s and memory-copy GB/s of this machine, now;
* **configs**: tokens/s of blockyard's trainer (``blockyard.train``'s own loop, with its records,
  batching, schedule and clipping) for a global-attention and a recurrence model, fp32 and bf16,
  at seq 256 and 2048, compiled (``runtime.compile``) at seq 256, and of the plain reference loop at
  the same shapes (plain, blockyard, plain, ...: a closing plain pass ends the rounds); model FLOPs
  utilisation = tokens/s x training FLOPs per token (``blockyard.cost``) / GEMM peak;
* **paired steps**: each ratio again with the two configs' steps alternated (``blockyard.bench.paired``),
  free of the drift between whole runs; the targets read these;
* **scan**: the linear scan fwd+bwd against one elementwise multiply-add fwd+bwd;
* **profile**: one training step under ``torch.profiler``, its time split by block kind.
"""

from __future__ import annotations

import dataclasses
import os
import statistics
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import torch

from blockyard.bench.cases import CASES, PLAIN_TWINS, BenchCase, blockyard_run, trainer_parts
from blockyard.bench.paired import DEFAULT_PAIRS, median_with_interval, paired_ratios
from blockyard.bench.peaks import copy_gbytes_per_s, gemm_gflops, machine_facts
from blockyard.bench.plain import PlainShape, plain_stepper, plain_tokens_per_s
from blockyard.bench.profile import profile_step
from blockyard.bench.scan import scan_figures
from blockyard.bench.targets import speed_targets
from blockyard.cost.analytic import flops_per_token

# The ratios the report prints and the targets read: name -> (numerator case, denominator case).
RATIO_PAIRS = {
    "blockyard_over_plain_fp32": ("attention-fp32", "plain-fp32"),
    "blockyard_over_plain_bf16": ("attention-bf16", "plain-bf16"),
    "bf16_over_fp32_attention": ("attention-bf16", "attention-fp32"),
    "bf16_over_fp32_recurrence": ("recurrence-bf16", "recurrence-fp32"),
    "bf16_over_fp32_plain": ("plain-bf16", "plain-fp32"),
    "recurrence_over_attention_s256": ("recurrence-fp32", "attention-fp32"),
    "recurrence_over_attention_s2048": ("recurrence-fp32-s2048", "attention-fp32-s2048"),
    "compiled_over_eager_attention": ("attention-fp32-compiled", "attention-fp32"),
    "compiled_over_eager_recurrence": ("recurrence-fp32-compiled", "recurrence-fp32"),
}


def run_bench(steps: int = 30, warmup: int = 10, rounds: int = 2, profile: bool = True,
              cases: tuple[BenchCase, ...] = CASES, log: Callable[[str], None] = print,
              gemm_n: int = 1024, copy_bytes: int = 256 * 2**20,
              scan_shape: tuple[int, int, int] = (16, 256, 256), threads: int = 0,
              pairs: int = DEFAULT_PAIRS) -> dict[str, Any]:
    """Measure peaks, every case (``rounds`` times, interleaved with the plain loop), paired steps,
    the scan and a profile.

    ``pairs``: alternated step pairs per ratio (0: none; ``blockyard.bench.paired``).
    ``gemm_n``, ``copy_bytes`` and ``scan_shape`` size the peak and scan measurements (the tests
    shrink them). ``threads`` (0 = every core) applies to everything measured, both loops alike.
    """
    threads_before = torch.get_num_threads()
    torch.set_num_threads(threads or os.cpu_count() or 1)
    try:
        return _run_bench(steps, warmup, rounds, profile, cases, log, gemm_n, copy_bytes, scan_shape, threads,
                          pairs)
    finally:
        torch.set_num_threads(threads_before)


def _run_bench(steps: int, warmup: int, rounds: int, profile: bool, cases: tuple[BenchCase, ...],
               log: Callable[[str], None], gemm_n: int, copy_bytes: int, scan_shape: tuple[int, int, int],
               threads: int, pairs: int) -> dict[str, Any]:
    from blockyard.data import load_data
    from blockyard.train.allocator import keep_freed_memory

    # The trainer keeps freed step memory (blockyard.train.allocator); set it before the first
    # measurement, so that the plain loop runs under the same malloc settings throughout.
    result: dict[str, Any] = {"machine": machine_facts(), "steps": steps, "warmup": warmup, "rounds": rounds,
                              "allocator": keep_freed_memory()}
    if not result["machine"]["bf16"]:
        cases = _without_bf16_cases(cases, result, log)
    with tempfile.TemporaryDirectory(prefix="blockyard-bench-cache-") as cache:
        cache_dir = Path(cache)
        per_round: list[dict[str, float]] = []
        peaks: list[dict[str, float]] = []
        runs: dict[str, Any] = {}
        for i in range(rounds):
            log(f"round {i + 1}/{rounds}: peaks ({result['machine']['threads']} threads) ...")
            peaks.append(_peaks(result["machine"]["bf16"], gemm_n, copy_bytes))
            speeds, runs = _round(cases, steps, warmup, cache_dir, threads, log)
            per_round.append(speeds)
        # A closing pass of the plain loop alone: each blockyard figure then sits between two plain
        # ones (plain, blockyard, plain, blockyard, plain), and _median_ratio compares it with both.
        log("closing plain pass ...")
        per_round.append(_plain_pass(cases, steps, warmup, log))
        # A peak is a ceiling: the best round's measurement is the least disturbed one.
        result["peaks"] = {key: max(p[key] for p in peaks) for key in peaks[0]}
        result["peaks_per_round"] = peaks
        vocab = load_data(runs[cases[0].name]["config"]).vocab_size
        result["configs"] = _config_rows(cases, per_round, runs, result["peaks"], vocab)
        result["per_round"] = per_round
        if pairs:
            result["ratios_paired"] = _paired(cases, pairs, cache_dir, threads, runs, log)
        log("scan ...")
        result["scan"] = scan_figures(scan_shape)
        if profile:
            result["profile"] = _profiles(cases, cache_dir, threads, log)
    result["ratios"] = {key: _ratio(per_round, *pair) for key, pair in RATIO_PAIRS.items()}
    if "configs" in result:
        rows = {row["name"]: row for row in result["configs"]}
        result["ratios_at_equal_mfu"] = {key: _equal_mfu_ratio(rows, result["peaks"], *pair)
                                         for key, pair in RATIO_PAIRS.items()}
    result["ratios_median_of_rounds"] = {key: _median_ratio(per_round, *pair) for key, pair in RATIO_PAIRS.items()}
    result["load_average_after"] = list(os.getloadavg())
    result["targets"] = [dataclasses.asdict(t) | {"met": t.met} for t in speed_targets(result)]
    return result


def _without_bf16_cases(cases: tuple[BenchCase, ...], result: dict[str, Any],
                        log: Callable[[str], None]) -> tuple[BenchCase, ...]:
    """The fp32 cases only, with the skipped ones and the reason noted in ``result``.

    torch emulates bf16 on a CPU without bf16 units at a small fraction of fp32 speed (measured on
    an AVX2 host: 0.7 vs 108 GFLOP/s): the plain loop's bf16 twin would run for hours and
    blockyard's own bf16 cases would fall back to fp32, so neither is a bf16 measurement.
    """
    reason = result["machine"]["bf16_reason"]
    skipped = [c.name for c in cases if c.precision == "bf16"]
    result["skipped"] = {"cases": skipped, "reason": reason}
    if skipped:
        log(f"bf16 cases skipped ({', '.join(skipped)}): {reason}")
    return tuple(c for c in cases if c.precision != "bf16")


def _peaks(bf16: bool, gemm_n: int, copy_bytes: int) -> dict[str, float]:
    """One round's GEMM peaks (bf16 only where the CPU has bf16 units) and copy bandwidth."""
    peak = {"gemm_fp32_gflops": gemm_gflops(torch.float32, gemm_n)}
    if bf16:
        peak["gemm_bf16_gflops"] = gemm_gflops(torch.bfloat16, gemm_n)
    return peak | {"copy_gbytes_per_s": copy_gbytes_per_s(copy_bytes)}


def _plain_shape(case: BenchCase) -> PlainShape:
    """The plain reference loop's model at ``case``'s width and depth."""
    return PlainShape(width=case.width, depth=case.depth, mlp_hidden=3 * case.width)


def _plain_twin(case: BenchCase, steps: int, warmup: int) -> float:
    """Tokens/s of the plain reference loop at ``case``'s shape and precision."""
    return plain_tokens_per_s(_plain_shape(case), case.batch, case.seq_len, steps - warmup, warmup,
                              bf16=case.precision == "bf16")


def _plain_pass(cases: tuple[BenchCase, ...], steps: int, warmup: int,
                log: Callable[[str], None]) -> dict[str, float]:
    """The plain twins alone, once each."""
    speeds = {}
    for case in cases:
        if twin := PLAIN_TWINS.get(case.name):
            speeds[twin] = _plain_twin(case, steps, warmup)
            log(f"  {twin:<24} {speeds[twin]:>9.0f} tokens/s")
    return speeds


def _round(cases: tuple[BenchCase, ...], steps: int, warmup: int, cache_dir: Path, threads: int,
           log: Callable[[str], None]) -> tuple[dict[str, float], dict[str, Any]]:
    """One pass over the plain loop and every case: tokens/s by name, and blockyard's summaries."""
    speeds: dict[str, float] = {}
    summaries: dict[str, Any] = {}
    for case in cases:
        if twin := PLAIN_TWINS.get(case.name):
            speeds[twin] = _plain_twin(case, steps, warmup)
            log(f"  {twin:<24} {speeds[twin]:>9.0f} tokens/s")
        run = blockyard_run(case, steps, warmup, cache_dir, threads)
        speeds[case.name] = run["tokens_per_s"]
        summaries[case.name] = run
        log(f"  {case.name:<24} {speeds[case.name]:>9.0f} tokens/s")
    return speeds, summaries


def _paired(cases: tuple[BenchCase, ...], pairs: int, cache_dir: Path, threads: int, runs: dict[str, Any],
            log: Callable[[str], None]) -> dict[str, dict[str, Any]]:
    """Each ratio of RATIO_PAIRS whose configs ran, by alternated steps (``blockyard.bench.paired``).

    Against the plain loop, the trainer's ``train_step`` alternates with the plain step, and each
    pair's ratio is scaled by the trainer loop's own efficiency (``loop_efficiency`` of this run's
    timed case: its wall clock over its step clock, same windows), so the figure is the train
    command's, records and all.
    """
    by_name = {c.name: c for c in cases}
    twins = {PLAIN_TWINS[name] for name in by_name if name in PLAIN_TWINS}
    out: dict[str, dict[str, Any]] = {}
    for key, (num, den) in RATIO_PAIRS.items():
        if num not in by_name or (den not in by_name and den not in twins):
            continue
        a = by_name[num]
        log(f"paired steps {num} / {den} ({pairs} pairs) ...")
        if den in twins:
            plain = _plain_shape(a)
            den_step = plain_stepper(plain, a.batch, a.seq_len, bf16=a.precision == "bf16")
            scale, den_tokens = runs[num]["loop_efficiency"], a.tokens_per_step
        else:
            b = by_name[den]
            den_step, scale, den_tokens = trainer_parts(b, cache_dir, threads).step, 1.0, b.tokens_per_step
        values = paired_ratios(trainer_parts(a, cache_dir, threads).step, den_step, pairs=pairs,
                               num_tokens=a.tokens_per_step, den_tokens=den_tokens)
        values = [v * scale for v in values]
        out[key] = median_with_interval(values) | {"values": values, "loop_efficiency": scale}
    return out


def _profiles(cases: tuple[BenchCase, ...], cache_dir: Path, threads: int,
              log: Callable[[str], None]) -> dict[str, Any]:
    """A profiled (eager) step of each case at the shortest sequence length, fp32 and bf16."""
    out = {}
    shortest = min(c.seq_len for c in cases)
    for case in cases:
        if case.seq_len == shortest and not case.compile:
            log(f"profile {case.name} ...")
            out[case.name] = profile_step(case, cache_dir, threads=threads)
    return out


def _ratio(rounds: list[dict[str, float]], num: str, den: str) -> float | None:
    """Best tokens/s of ``num`` over the best of ``den``, each over the rounds.

    Other processes only ever slow a measurement down, so the best round of each config is the
    least disturbed one; a ratio of per-round values would mix a quiet round with a loaded one.
    """
    nums = [r[num] for r in rounds if num in r]
    dens = [r[den] for r in rounds if den in r]
    return max(nums) / max(dens) if nums and dens else None


def _median_ratio(rounds: list[dict[str, float]], num: str, den: str) -> float | None:
    """Median over rounds of num/den measured in the same round (the better figure under steady load).

    Where ``den`` is the plain loop (measured before each round's blockyard case and once more at
    the end), ``num`` is compared with the mean of the ``den`` before and after
    it, so a drift of the load during the round cancels to first order.
    """
    values = []
    for i, r in enumerate(rounds):
        if num in r and den in r:
            after = rounds[i + 1].get(den) if i + 1 < len(rounds) and den.startswith("plain") else None
            values.append(r[num] / (r[den] if after is None else (r[den] + after) / 2))
    return statistics.median(values) if values else None


def _peak_of(precision: str, peaks: dict[str, float]) -> float:
    """The GEMM peak (GFLOP/s) that a config of ``precision`` is measured against."""
    return peaks["gemm_bf16_gflops" if precision == "bf16" else "gemm_fp32_gflops"]


def _equal_mfu_ratio(rows: dict[str, dict[str, Any]], peaks: dict[str, float], num: str, den: str) -> float | None:
    """The tokens/s ratio ``num`` / ``den`` would show if both ran at the same MFU: the ratio of
    their (GEMM peak / training FLOPs per token). A measured ratio above it means ``num`` uses its
    peak better than ``den``; a target above it asks for exactly that (the FLOPs alone cannot give it)."""
    a, b = rows.get(num), rows.get(den)
    if a is None or b is None:
        return None
    return (_peak_of(a["precision"], peaks) / a["flops_per_token"]) / (_peak_of(b["precision"], peaks)
                                                                       / b["flops_per_token"])


def _config_rows(cases: tuple[BenchCase, ...], per_round: list[dict[str, float]], runs: dict[str, Any],
                 peaks: dict[str, float], vocab: int) -> list[dict[str, Any]]:
    """One row per measured config: best tokens/s over rounds, achieved GFLOP/s and MFU against its GEMM peak."""
    rows = []
    plain = {twin: case for case in cases if (twin := PLAIN_TWINS.get(case.name))}
    for name in per_round[0]:
        case = plain.get(name) or next(c for c in cases if c.name == name)
        tokens_per_s = max(r[name] for r in per_round if name in r)
        flops = flops_per_token(runs[case.name]["config"], vocab, with_head=True)
        peak = _peak_of(case.precision, peaks)
        gflops = tokens_per_s * flops / 1e9
        row = {"name": name, "loop": "plain" if name in plain else "blockyard", "kind": case.kind,
               "precision": case.precision, "seq_len": case.seq_len, "batch": case.batch,
               "tokens_per_s": tokens_per_s, "flops_per_token": flops, "gflops": gflops, "mfu": gflops / peak}
        if name not in plain:
            summary = runs[name]["summary"]
            # The trainer's own figure: the median over its log windows (step 1's included) of
            # train_step time alone, so loop overhead shows as tokens_per_s falling below it.
            row["step_tokens_per_s"] = summary.get("tokens_per_s")
        rows.append(row)
    return rows
