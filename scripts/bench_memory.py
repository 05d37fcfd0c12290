"""Memory benchmark: peak resident memory of training runs, corpora and grids, measured side by side.

Each measurement runs in a fresh subprocess (this script with ``--child JSON``), so the kernel's
high-water mark of resident memory (getrusage ``ru_maxrss``, via ``blockyard.train.memory``) is
that configuration's own peak. Sections (``--only`` picks some):

* ``peak``: a blockyard training run vs the hand-written loop of ``blockyard.bench.plain`` (width 256,
  depth 4, seq 256, batch 16); target <= 1.3x; summary.json's ``peak_rss_bytes`` is checked too.
* ``corpus``: a generated 1 GB text file (temp dir, deleted after) prepared into the token cache
  (target: peak RSS < 1 GB), then trained on (the token memmap must not be read into memory).
* ``length``: batch 1, width 256, depth 4, seq 4096 vs 8192; local attention (window 128) and
  the recurrence must grow <= 2.3x; global attention beside them for contrast.
* ``checkpointing``: depth 8 with and without ``runtime.activation_checkpointing``: the activation
  part (peak minus the RSS with model, gradients and optimizer state allocated) must drop >= 40%
  with identical losses, and hold at least a third of the estimator's autograd-saved bytes.
* ``grid``: N local workers vs one cell: the sum of RSS over the grid's process tree (psutil,
  sampled) must stay <= N x one cell's peak + 300 MB.

    .venv/bin/python scripts/bench_memory.py [--only peak,length] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

MB = 2**20
GB_FILE_BYTES = 10**9  # "1 GB" corpus
SECTIONS = ("peak", "corpus", "length", "checkpointing", "grid")


# ----------------------------------------------------------------------------- configs


def base_config(cache_dir: str, *, kind: str = "global_attention", width: int = 256, depth: int = 4,
                seq_len: int = 256, batch: int = 16, steps: int = 6, corpus: str = "pydoc",
                **runtime: Any) -> dict[str, Any]:
    """A config dict of the benchmark: pydoc bytes, no evaluation or checkpoint before the end."""
    mixer: dict[str, Any] = {"kind": kind}
    if "attention" in kind:
        mixer["heads"] = 4
    if kind == "local_attention":
        mixer["window"] = 128
    return {
        "name": f"mem-{kind}",
        "model": {"width": width, "depth": depth, "pattern": ["mix"], "mixers": {"mix": mixer}},
        "data": {"corpus": corpus, "tokenizer": "bytes", "seq_len": seq_len, "cache_dir": cache_dir},
        "train": {"steps": steps, "batch_size": batch, "eval_every": steps, "checkpoint_every": steps,
                  "eval_windows": 2, "log_every": 10},
        "runtime": runtime,
    }


# ----------------------------------------------------------------------------- child jobs


def job_plain(spec: dict[str, Any]) -> dict[str, Any]:
    """The hand-written reference loop of blockyard.bench.plain for a few steps."""
    from blockyard.bench.plain import PlainShape, plain_step_seconds
    from blockyard.train.memory import peak_rss_bytes

    plain_step_seconds(PlainShape(), spec["batch"], spec["seq_len"], spec["steps"], 0)
    return {"peak_rss_bytes": peak_rss_bytes()}


def job_train(spec: dict[str, Any]) -> dict[str, Any]:
    """``blockyard.train.run_training`` into a temp dir: this process's peak and summary.json's."""
    from blockyard.config import config_from_dict
    from blockyard.train import run_training
    from blockyard.train.memory import peak_rss_bytes

    cfg = config_from_dict(spec["config"])
    with tempfile.TemporaryDirectory(prefix="blockyard-mem-") as tmp:
        summary = run_training(cfg, Path(tmp) / "run", progress="silent")
        on_disk = json.loads((Path(tmp) / "run" / "summary.json").read_text())
    return {"peak_rss_bytes": peak_rss_bytes(), "summary_peak_rss_bytes": on_disk.get("peak_rss_bytes"),
            "status": summary.get("status"), "final_val_loss": summary.get("final_val_loss")}


def _materialise_state(model: Any, optimizer: Any) -> None:
    """Allocate the gradients and the AdamW moments without changing the run.

    A step with lr 0 on zero gradients creates exp_avg / exp_avg_sq (zeros, as a fresh AdamW's
    would be) and leaves the weights as they are; the step counters are reset to 0 after.
    """
    import torch

    for p in model.parameters():
        p.grad = torch.zeros_like(p)
    lrs = [g["lr"] for g in optimizer.param_groups]
    for g in optimizer.param_groups:
        g["lr"] = 0.0
    optimizer.step()
    for g, lr in zip(optimizer.param_groups, lrs, strict=True):
        g["lr"] = lr
    for state in optimizer.state.values():
        state["step"].zero_()


def job_steps(spec: dict[str, Any]) -> dict[str, Any]:
    """The trainer's own pieces and ``train_step``, with the RSS taken once model + optimizer are allocated."""
    import torch

    from blockyard.config import config_from_dict
    from blockyard.cost.memory import estimate_activation_memory
    from blockyard.data import load_data
    from blockyard.model import build_model
    from blockyard.train import train_step
    from blockyard.train.memory import current_rss_bytes, peak_rss_bytes
    from blockyard.train.optim import build_optimizer, build_scheduler
    from blockyard.train.runtime import resolve_runtime

    cfg = config_from_dict(spec["config"])
    runtime, _ = resolve_runtime(cfg.runtime)
    torch.set_num_threads(runtime.threads)
    data = load_data(cfg)
    batches = [data.train_batch(i) for i in range(cfg.train.steps)]
    torch.manual_seed(cfg.train.seed)
    model = build_model(cfg.model, data.vocab_size, activation_checkpointing=cfg.runtime.activation_checkpointing,
                        kernels=runtime.kernels)
    model.train()
    optimizer = build_optimizer(model, cfg.train)
    scheduler = build_scheduler(optimizer, cfg.train, cfg.train.steps)
    _materialise_state(model, optimizer)
    baseline = current_rss_bytes()
    before = peak_rss_bytes()
    losses = [train_step(model, optimizer, scheduler, [b], runtime, cfg.train.grad_clip).loss for b in batches]
    peak = peak_rss_bytes()
    est = estimate_activation_memory(cfg.model, data.vocab_size, cfg.train.batch_size, cfg.data.seq_len,
                                     activation_checkpointing=cfg.runtime.activation_checkpointing,
                                     kernels=runtime.kernels)
    return {"baseline_rss_bytes": baseline, "peak_rss_bytes": peak, "peak_before_training_bytes": before,
            "activation_bytes": peak - baseline, "losses": losses, "estimate_bytes": est.total_bytes}


def job_prepare(spec: dict[str, Any]) -> dict[str, Any]:
    """``load_data`` on a corpus not yet in the cache: tokenizes it; peak RSS, time, array sizes."""
    from blockyard.config import config_from_dict
    from blockyard.data import load_data
    from blockyard.train.memory import peak_rss_bytes

    start = time.perf_counter()
    data = load_data(config_from_dict(spec["config"]))
    arrays = {name: getattr(data, f"{name}_tokens") for name in ("train", "val", "test")}
    return {"peak_rss_bytes": peak_rss_bytes(), "seconds": time.perf_counter() - start,
            "token_bytes": int(sum(a.nbytes for a in arrays.values() if a is not None)),
            "memmapped": all(a is None or a.size == 0 or _is_memmap(a) for a in arrays.values())}


def status_bytes(*keys: str) -> dict[str, int]:
    """Fields of /proc/self/status in bytes: RssAnon is private memory, RssFile mapped file pages."""
    out = {}
    for line in Path("/proc/self/status").read_text().splitlines():
        key, _, value = line.partition(":")
        if key in keys:
            out[key] = int(value.split()[0]) * 1024
    return out


def job_read_windows(spec: dict[str, Any]) -> dict[str, Any]:
    """``spec["batches"]`` training batches from a prepared corpus: how private and file-backed RSS grow.

    Reading the token array into memory would grow RssAnon by its size; memory-mapped reads grow
    only RssFile (clean page-cache pages the kernel can drop; how many it maps per fault depends on
    its folio size, not on the program).
    """
    from blockyard.config import config_from_dict
    from blockyard.data import load_data

    keys = ("RssAnon", "RssFile")
    data = load_data(config_from_dict(spec["config"]))
    before = status_bytes(*keys)
    for step in range(spec["batches"]):
        data.train_batch(step)
    data.val_batches()
    after = status_bytes(*keys)
    return {"before": before, "after": after, "token_bytes": int(data.train_tokens.nbytes + data.val_tokens.nbytes),
            "anon_growth_bytes": after["RssAnon"] - before["RssAnon"],
            "file_growth_bytes": after["RssFile"] - before["RssFile"]}


def _is_memmap(a: Any) -> bool:
    import numpy as np

    while a is not None:
        if isinstance(a, np.memmap):
            return True
        a = getattr(a, "base", None)
    return False


JOBS = {"plain": job_plain, "train": job_train, "steps": job_steps, "prepare": job_prepare,
        "read_windows": job_read_windows}


# ----------------------------------------------------------------------------- parent side


def run_child(spec: dict[str, Any], timeout_s: float = 1800) -> dict[str, Any]:
    """Run one job in a fresh interpreter; its JSON result (the last stdout line)."""
    proc = subprocess.run([sys.executable, __file__, "--child", json.dumps(spec)], capture_output=True, text=True,
                          timeout=timeout_s)
    if proc.returncode != 0:
        raise RuntimeError(f"child {spec['job']} failed ({proc.returncode}):\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def tree_rss_bytes(root: Any) -> int:
    """Sum of RSS over a process and its descendants (shared pages count once per process)."""
    import psutil

    total = 0
    for p in [root, *root.children(recursive=True)]:
        try:
            total += p.memory_info().rss
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            pass
    return total


def sampled_peak(cmd: list[str], every_s: float = 0.1, env: dict[str, str] | None = None,
                 timeout_s: float = 1800) -> dict[str, Any]:
    """Run ``cmd``; the largest sum of RSS over its process tree seen every ``every_s`` seconds."""
    import psutil

    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, env=env)
    root = psutil.Process(proc.pid)
    peak, procs, start = 0, 0, time.monotonic()
    while proc.poll() is None:
        try:
            peak = max(peak, tree_rss_bytes(root))
            procs = max(procs, 1 + len(root.children(recursive=True)))
        except psutil.NoSuchProcess:
            break
        if time.monotonic() - start > timeout_s:
            proc.kill()
            raise RuntimeError(f"{' '.join(cmd)}: still running after {timeout_s:.0f}s")
        time.sleep(every_s)
    out = proc.stdout.read().decode(errors="replace") if proc.stdout else ""
    if proc.wait() != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed ({proc.returncode}):\n{out[-3000:]}")
    return {"peak_tree_rss_bytes": peak, "max_processes": procs, "seconds": time.monotonic() - start}


def target(name: str, value: float | None, op: str, bound: float) -> dict[str, Any]:
    met = None if value is None else {"<=": value <= bound, ">=": value >= bound, "<": value < bound}[op]
    return {"name": name, "value": value, "op": op, "bound": bound, "met": met}


def section_peak(cache_dir: str, log: Any) -> dict[str, Any]:
    """Blockyard run vs plain loop at width 256, depth 4, seq 256, batch 16."""
    plain = run_child({"job": "plain", "batch": 16, "seq_len": 256, "steps": 6})
    log(f"  plain loop        peak {plain['peak_rss_bytes'] / MB:7.0f} MiB")
    blockyard = run_child({"job": "train", "config": base_config(cache_dir)})
    log(f"  blockyard run       peak {blockyard['peak_rss_bytes'] / MB:7.0f} MiB "
        f"(summary.json: {blockyard['summary_peak_rss_bytes'] / MB:.0f} MiB)")
    ratio = blockyard["peak_rss_bytes"] / plain["peak_rss_bytes"]
    recorded = blockyard["summary_peak_rss_bytes"] or 0
    return {"plain": plain, "blockyard": blockyard, "ratio": ratio, "targets": [
        target("blockyard / plain peak RSS, w256 d4 s256 b16", ratio, "<=", 1.3),
        target("summary.json peak_rss_bytes / process peak", recorded / blockyard["peak_rss_bytes"], ">=", 0.9),
    ]}


def write_text_corpus(path: Path, nbytes: int, seed: int = 0, slabs: int = 16) -> int:
    """Write ``nbytes`` of English-looking ASCII text (random words, lines, paragraphs).

    ``slabs`` different ~4 MB slabs are generated and written in turn: memory use does not
    depend on the text, so the repetition only saves generation time.
    """
    import numpy as np

    rng = np.random.default_rng(seed)
    words = np.array(("the of and to in is that for it as was with be by on not he this are or his from at "
                      "which but have an they you were her she there been one all we their has would when if "
                      "so no will what can more out time up about into some could them other than then now "
                      "memory stream token cache window layer model train value state").split())
    texts = []
    for _ in range(slabs):
        text = " ".join(words[rng.integers(len(words), size=800_000)]) + "\n"
        texts.append(text.replace(" time ", " time.\n").replace(" model ", " model.\n\n"))
    written, i = 0, 0
    with open(path, "w", encoding="ascii") as f:
        while written < nbytes:
            text = texts[i % slabs][: nbytes - written]
            f.write(text)
            written += len(text)
            i += 1
    return written


def section_corpus(cache_dir: str, log: Any) -> dict[str, Any]:
    """Prepare a 1 GB text file into the token cache, then train on it (both in fresh processes)."""
    work = Path(tempfile.mkdtemp(prefix="blockyard-mem-corpus-"))
    try:
        text = work / "big.txt"
        t0 = time.perf_counter()
        size = write_text_corpus(text, GB_FILE_BYTES)
        log(f"  wrote {size / 1e9:.2f} GB of text in {time.perf_counter() - t0:.0f}s")
        cfg = base_config(str(work / "cache"), corpus=str(text))
        prep = run_child({"job": "prepare", "config": cfg}, timeout_s=3600)
        log(f"  prepare           peak {prep['peak_rss_bytes'] / MB:7.0f} MiB in {prep['seconds']:.0f}s "
            f"(token arrays {prep['token_bytes'] / MB:.0f} MiB, memmapped: {prep['memmapped']})")
        big = run_child({"job": "train", "config": cfg})
        small = run_child({"job": "train", "config": base_config(cache_dir)})
        extra = big["peak_rss_bytes"] - small["peak_rss_bytes"]
        log(f"  train on it       peak {big['peak_rss_bytes'] / MB:7.0f} MiB vs {small['peak_rss_bytes'] / MB:.0f} "
            f"MiB on pydoc: +{extra / MB:.0f} MiB for a {prep['token_bytes'] / MB:.0f} MiB token array")
        reads = run_child({"job": "read_windows", "config": cfg, "batches": 5000})
        log(f"  5000 batches      private RSS +{reads['anon_growth_bytes'] / MB:.0f} MiB, "
            f"mapped file pages +{reads['file_growth_bytes'] / MB:.0f} MiB")
        return {"file_bytes": size, "prepare": prep, "train_big": big, "train_small": small, "reads": reads,
                "targets": [
            target("prepare 1 GB text: peak RSS (bytes)", prep["peak_rss_bytes"], "<", 2**30),
            target("train on it: extra peak RSS / token array bytes", extra / prep["token_bytes"], "<=", 0.1),
            target("5000 batches: private RSS growth / token array bytes",
                   reads["anon_growth_bytes"] / reads["token_bytes"], "<=", 0.1),
        ]}
    finally:
        shutil.rmtree(work, ignore_errors=True)


def section_length(cache_dir: str, log: Any) -> dict[str, Any]:
    """Peak RSS at seq 4096 and 8192, batch 1, per mixer kind (trainer step, fresh process each)."""
    out: dict[str, Any] = {"targets": []}
    for kind in ("local_attention", "recurrence", "global_attention"):
        runs = {}
        for seq in (4096, 8192):
            runs[seq] = run_child({"job": "steps", "config": base_config(cache_dir, kind=kind, seq_len=seq, batch=1,
                                                                        steps=3)})
        ratio = runs[8192]["peak_rss_bytes"] / runs[4096]["peak_rss_bytes"]
        act_ratio = runs[8192]["activation_bytes"] / max(runs[4096]["activation_bytes"], 1)
        log(f"  {kind:<17} peak {runs[4096]['peak_rss_bytes'] / MB:6.0f} -> {runs[8192]['peak_rss_bytes'] / MB:6.0f}"
            f" MiB ({ratio:.2f}x); activations {runs[4096]['activation_bytes'] / MB:.0f} -> "
            f"{runs[8192]['activation_bytes'] / MB:.0f} MiB ({act_ratio:.2f}x)")
        out[kind] = {"runs": runs, "ratio": ratio, "activation_ratio": act_ratio}
        if kind != "global_attention":
            out["targets"].append(target(f"{kind}: peak RSS seq 8192 / seq 4096", ratio, "<=", 2.3))
    return out


def section_checkpointing(cache_dir: str, log: Any) -> dict[str, Any]:
    """Depth 8 with and without activation checkpointing: activation part of the peak, and the losses."""
    runs = {}
    for on in (False, True):
        cfg = base_config(cache_dir, depth=8, steps=4, activation_checkpointing=on)
        runs[on] = run_child({"job": "steps", "config": cfg})
        log(f"  checkpointing {'on ' if on else 'off'}  activations {runs[on]['activation_bytes'] / MB:6.0f} MiB "
            f"(estimate {runs[on]['estimate_bytes'] / MB:.0f} MiB), losses {[round(x, 4) for x in runs[on]['losses']]}")
    cut = 1 - runs[True]["activation_bytes"] / runs[False]["activation_bytes"]
    identical = runs[True]["losses"] == runs[False]["losses"]
    return {"off": runs[False], "on": runs[True], "cut": cut, "identical_losses": identical, "targets": [
        target("activation checkpointing: cut of the activation part, depth 8", cut, ">=", 0.4),
        target("activation checkpointing: losses identical (1 = yes)", float(identical), ">=", 1.0),
        # The probe itself: the measured activation part holds at least a third of what autograd
        # saves (allocator slack and transient buffers separate them; no upper bound, since
        # first-time imports inside a run on a fresh install add to the peak after the baseline).
        target("measured activation part / autograd-saved estimate, depth 8", runs[False]["activation_bytes"]
               / runs[False]["estimate_bytes"], ">=", 1 / 3),
    ]}


def section_grid(cache_dir: str, log: Any, workers: int = 2) -> dict[str, Any]:
    """One cell via ``blockyard train`` vs a grid of ``workers`` cells on ``workers`` local workers."""
    import yaml

    blockyard = str(Path(sys.executable).with_name("blockyard"))
    work = Path(tempfile.mkdtemp(prefix="blockyard-mem-grid-"))
    env = dict(os.environ, OMP_NUM_THREADS="1")
    try:
        base = base_config(cache_dir, steps=20, threads=1)
        base.pop("name")
        (work / "cell.yaml").write_text(yaml.safe_dump(base))
        single = sampled_peak([blockyard, "train", str(work / "cell.yaml"), "--out", str(work / "single")], env=env)
        log(f"  one cell          tree peak {single['peak_tree_rss_bytes'] / MB:6.0f} MiB")
        grid = {"name": "mem-grid", "base": base, "seeds": list(range(workers))}
        (work / "grid.yaml").write_text(yaml.safe_dump(grid))
        many = sampled_peak([blockyard, "grid", str(work / "grid.yaml"), "--out", str(work / "grid"),
                             "--workers", str(workers), "--threads", "1"], env=env)
        bound = workers * single["peak_tree_rss_bytes"] + 300 * MB
        log(f"  grid of {workers} workers  tree peak {many['peak_tree_rss_bytes'] / MB:6.0f} MiB "
            f"({many['max_processes']} processes); bound {bound / MB:.0f} MiB")
        return {"workers": workers, "single": single, "grid": many, "bound_bytes": bound, "targets": [
            target(f"grid of {workers} workers: tree RSS / ({workers} x one cell + 300 MB)",
                   many["peak_tree_rss_bytes"] / bound, "<=", 1.0),
        ]}
    finally:
        shutil.rmtree(work, ignore_errors=True)


RUNNERS = {"peak": section_peak, "corpus": section_corpus, "length": section_length,
           "checkpointing": section_checkpointing, "grid": section_grid}


def warm_cache(cache_dir: str) -> None:
    """Prepare the pydoc token cache once, so that no measured process pays for (or races on) it."""
    run_child({"job": "prepare", "config": base_config(cache_dir)})


def format_targets(result: dict[str, Any]) -> str:
    lines = ["targets:"]
    for name in SECTIONS:
        for t in result.get(name, {}).get("targets", []):
            mark = {True: "met   ", False: "MISSED", None: "n/a   "}[t["met"]]
            lines.append(f"  [{mark}] {t['name']}: {t['value']:.3g} (target {t['op']} {t['bound']:g})")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", default=",".join(SECTIONS), help=f"comma-separated sections of {SECTIONS}")
    parser.add_argument("--json", type=Path, default=None, help="also write every figure as JSON here")
    parser.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child is not None:
        spec = json.loads(args.child)
        print(json.dumps(JOBS[spec["job"]](spec)))
        return 0
    sections = [s.strip() for s in args.only.split(",") if s.strip()]
    unknown = sorted(set(sections) - set(SECTIONS))
    if unknown:
        parser.error(f"--only: unknown section(s) {', '.join(unknown)} (allowed: {', '.join(SECTIONS)})")
    result: dict[str, Any] = {"load_average": list(os.getloadavg())}
    with tempfile.TemporaryDirectory(prefix="blockyard-mem-cache-") as cache_dir:
        warm_cache(cache_dir)
        for name in sections:
            print(f"{name}:", flush=True)
            result[name] = RUNNERS[name](cache_dir, lambda s: print(s, flush=True))
    print(format_targets(result))
    if args.json:
        args.json.write_text(json.dumps(result, indent=2, default=str) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
