"""Decode benchmark: tokens/s of the step path and the state it carries, vs context length and batch.

For each model (the laptop-size presets: global attention, local attention, recurrence, the
2:1 hybrid) the prompt is stepped once at batch 1 up to the longest context, keeping the state
at each measured context L (states are immutable, so keeping them is free of copies). At each
L, ``reps`` decode steps are timed from that same state (so the context stays L), at batch 1
and, tiling the state over the batch, at a large batch; the models take turns, ``rounds`` times
(round-robin, so a busy machine slows all alike), and the median round counts. At batch 1 the
ratios of issue 19's decode targets are printed and kept in the JSON (``decode_ratios``).
Reported: ms per step, tokens/s (batch / step time), the state's measured bytes
(``state_nbytes``) beside the cost model's prediction (``blockyard.cost.state_bytes``).
Combinations whose predicted state exceeds ``max_state_mib`` are skipped (a global-attention
KV cache at batch 64 and 4k tokens is GBs).

The figures measure this implementation on this machine: the KV cache grows by concatenation
(one copy of the cache per step), the local-attention ring buffer is copied once per step
(states are never written in place), the recurrence steps through one fused C++ call where
the kernels built; this is what ``blockyard sample`` runs.
"""

from __future__ import annotations

import dataclasses
import json
import statistics
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import torch

from blockyard.config import Config, load_config
from blockyard.cost import analytic as cost
from blockyard.errors import UserError
from blockyard.mixers import state_nbytes
from blockyard.model import LanguageModel, build_model
from blockyard.plotting import pyplot
from blockyard.text import aligned_table, binary_bytes

REPO = Path(__file__).resolve().parents[2]
VOCAB = 256  # byte tokens, as the presets

# name -> (preset, overrides): the four patterns at the presets' width, depth and MLP.
MODELS: dict[str, tuple[str, list[str]]] = {
    "global": ("attention-global.yaml", []),
    "local": ("attention-global.yaml", ["model.pattern=[local_attention]",
                                        "model.mixers={local_attention: {kind: local_attention, window: 128}}"]),
    "recurrence": ("recurrence-only.yaml", []),
    "hybrid": ("hybrid-2r1l.yaml", []),
}


def tile_state(state: Any, batch: int) -> Any:
    """A batch-1 step state repeated ``batch`` times along dim 0 (every tensor of a state is batch-first)."""
    if isinstance(state, torch.Tensor):
        if state.shape[0] != 1:
            raise ValueError(f"expected a batch-1 state tensor, got shape {tuple(state.shape)}")
        return state.expand(batch, *state.shape[1:]).contiguous()
    if isinstance(state, list):
        return [tile_state(s, batch) for s in state]
    if dataclasses.is_dataclass(state) and not isinstance(state, type):
        return dataclasses.replace(state, **{f.name: tile_state(getattr(state, f.name), batch)
                                             for f in dataclasses.fields(state)
                                             if isinstance(getattr(state, f.name), torch.Tensor)})
    return state


@torch.no_grad()
def states_at(model: LanguageModel, contexts: list[int], seed: int = 0) -> dict[int, list[Any]]:
    """The batch-1 states after stepping random tokens to each of ``contexts``."""
    gen = torch.Generator().manual_seed(seed)
    tokens = torch.randint(0, model.vocab_size, (max(contexts),), generator=gen)
    states = model.init_state(1)
    out = {0: states} if 0 in contexts else {}
    for t in range(max(contexts)):
        _, states = model.step(tokens[t : t + 1], states)
        if t + 1 in contexts:
            out[t + 1] = states
    return out


# Each timing runs for at least this long (more reps for fast steps): a batch-1 step takes a few ms,
# and 8 of them (tens of ms) were measured to swing the batch-1 ratios by 30% on a quiet 2-core machine.
MIN_TIMED_S = 0.1
MAX_REPS = 200


@torch.no_grad()
def time_steps(model: LanguageModel, states: list[Any], batch: int, reps: int) -> float:
    """Median seconds of one decode step from ``states`` (each rep from the same state): at least
    ``reps`` steps, more for a fast step so that they span ``MIN_TIMED_S`` (at most ``MAX_REPS``)."""
    token = torch.zeros(batch, dtype=torch.long)
    t0 = time.perf_counter()
    model.step(token, states)  # warm-up: allocator, kernels; its time sizes the rep count
    warm = time.perf_counter() - t0
    reps = min(MAX_REPS, max(reps, int(MIN_TIMED_S / max(warm, 1e-6))))
    times = []
    for _ in range(reps):
        t0 = time.perf_counter()
        model.step(token, states)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


@dataclasses.dataclass
class _Subject:
    """One benchmarked model: its config, the module in eval mode and its states by context."""

    name: str
    cfg: Config
    model: LanguageModel
    snapshots: dict[int, list[Any]]


def prepare(name: str, cfg: Config, contexts: list[int]) -> _Subject:
    torch.manual_seed(0)
    model = build_model(cfg.model, VOCAB).eval()
    return _Subject(name, cfg, model, states_at(model, contexts))


def bench_models(subjects: list[_Subject], contexts: list[int], batches: list[int], reps: int, rounds: int,
                 max_state_bytes: int) -> list[dict[str, Any]]:
    """Rows per (model, context, batch); at each (context, batch) the models are timed in turn,
    ``rounds`` times round-robin (so load from other processes hits all alike), median of rounds."""
    rows = []
    for L in contexts:
        for batch in batches:
            timed: dict[str, list[float]] = {}
            states: dict[str, Any] = {}
            for sub in subjects:
                predicted = cost.state_bytes(sub.cfg, L, batch=batch)
                if predicted <= max_state_bytes:
                    states[sub.name] = sub.snapshots[L] if batch == 1 else tile_state(sub.snapshots[L], batch)
                    timed[sub.name] = []
            for _ in range(rounds):
                for sub in subjects:
                    if sub.name in states:
                        timed[sub.name].append(time_steps(sub.model, states[sub.name], batch, reps))
            for sub in subjects:
                predicted = cost.state_bytes(sub.cfg, L, batch=batch)
                row = {"model": sub.name, "pattern": list(sub.cfg.model.pattern), "context": L, "batch": batch,
                       "predicted_state_bytes": predicted}
                if sub.name not in states:
                    rows.append({**row, "skipped": f"state {binary_bytes(predicted)} > budget"})
                    continue
                step_s = statistics.median(timed[sub.name])
                rows.append({**row, "step_ms": 1e3 * step_s, "tokens_per_s": batch / step_s,
                             "state_bytes": state_nbytes(states[sub.name])})
            states.clear()
    return rows


# Issue 19's decode targets at batch 1: (name, numerator model, denominator model, context (None:
# the shortest / longest measured), figure, comparison, bound). Step-time ratios: lower is better.
DECODE_TARGETS = (
    ("recurrence / global step time, shortest context", "recurrence", "global", "shortest", "step_ms", "<=", 1.0),
    ("hybrid / global step time, shortest context", "hybrid", "global", "shortest", "step_ms", "<=", 1.1),
    ("recurrence / global tokens/s, longest context", "recurrence", "global", "longest", "tokens_per_s", ">=", 8.0),
)


def decode_ratios(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The target ratios at batch 1 from ``rows`` (those whose models were measured)."""
    done = {(r["model"], r["context"]): r for r in rows if r["batch"] == 1 and "skipped" not in r}
    contexts = sorted({c for _, c in done})
    out = []
    for name, num, den, where, figure, op, bound in DECODE_TARGETS:
        if not contexts:
            break
        ctx = contexts[0] if where == "shortest" else contexts[-1]
        a, b = done.get((num, ctx)), done.get((den, ctx))
        if a is None or b is None:
            continue
        ratio = a[figure] / b[figure]
        met = ratio <= bound if op == "<=" else ratio >= bound
        out.append({"name": name, "context": ctx, "ratio": ratio, "target": f"{op} {bound}", "met": met})
    return out


def format_ratios(ratios: list[dict[str, Any]]) -> str:
    return "\n".join(f"{r['name']} ({r['context']}): {r['ratio']:.2f}x (target {r['target']}: "
                     f"{'met' if r['met'] else 'NOT met'})" for r in ratios)


def format_rows(rows: list[dict[str, Any]]) -> str:
    header = ["model", "batch", "context", "step ms", "tokens/s", "state (measured)", "state (cost model)"]
    lines = []
    for r in rows:
        if "skipped" in r:
            lines.append([r["model"], str(r["batch"]), str(r["context"]), "-", "-", r["skipped"],
                          binary_bytes(r["predicted_state_bytes"])])
            continue
        lines.append([r["model"], str(r["batch"]), str(r["context"]), f"{r['step_ms']:.2f}",
                      f"{r['tokens_per_s']:,.0f}", binary_bytes(r["state_bytes"]),
                      binary_bytes(r["predicted_state_bytes"])])
    return aligned_table(header, lines, right=True)


def plot_rows(rows: list[dict[str, Any]], path: Path) -> None:
    """Two panels: decode tokens/s vs context (one line per model and batch), state bytes vs context."""
    plt = pyplot()
    fig, (ax_speed, ax_state) = plt.subplots(1, 2, figsize=(11, 4))
    keys = sorted({(r["model"], r["batch"]) for r in rows}, key=lambda k: (k[1], k[0]))
    for model, batch in keys:
        done = [r for r in rows if r["model"] == model and r["batch"] == batch and "skipped" not in r]
        if done:
            style = "-" if batch == 1 else "--"
            ax_speed.plot([r["context"] for r in done], [r["tokens_per_s"] for r in done], style, marker="o", ms=3,
                          label=f"{model}, batch {batch}")
        if batch == 1:
            every = [r for r in rows if r["model"] == model and r["batch"] == batch]
            ax_state.plot([r["context"] for r in every], [r["predicted_state_bytes"] for r in every], marker="o",
                          ms=3, label=model)
    for ax, ylabel in ((ax_speed, "decode tokens/s"), (ax_state, "state bytes per sequence")):
        ax.set_xscale("log", base=2)
        ax.set_yscale("log")
        ax.set_xlabel("context length (tokens)")
        ax.set_ylabel(ylabel)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=7)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=120)
    plt.close(fig)


def decode_bench(*, models: list[str] | None = None, contexts: list[int] | None = None,
                 batches: list[int] | None = None, reps: int = 8, rounds: int = 3, max_state_mib: float = 512.0,
                 overrides: list[str] | None = None, echo: Callable[[str], None] | None = None) -> list[dict[str, Any]]:
    """Rows of the decode benchmark (see the module docstring); ``echo`` gets a line per model."""
    names = models or list(MODELS)
    for name in names:
        if name not in MODELS:
            raise UserError(f"--models: {name!r} is not one of {', '.join(MODELS)}")
    contexts = sorted(contexts or [128, 512, 1024, 2048, 4096])
    if contexts[0] < 1:
        raise UserError("--contexts: lengths must be >= 1")
    subjects = []
    for name in names:
        preset, extra = MODELS[name]
        cfg = load_config(REPO / "configs" / preset, [*extra, *(overrides or [])])
        if echo:
            echo(f"{name}: prefilling {max(contexts)} tokens by stepping")
        subjects.append(prepare(name, cfg, contexts))
    if echo:
        echo(f"timing {len(subjects)} models round-robin, {rounds} rounds")
    return bench_models(subjects, contexts, batches or [1, 64], reps, rounds, int(max_state_mib * 2**20))


def bench_decode_command(*, models: list[str] | None = None, contexts: list[int] | None = None,
                         batches: list[int] | None = None, reps: int = 8, rounds: int = 3, max_state_mib: float = 512.0,
                         json_path: str | None = None, plot_path: str | None = None,
                         overrides: list[str] | None = None, echo: Callable[[str], None] | None = None,
                         threads: int = 1) -> str:
    """Run the decode benchmark on ``threads`` torch threads (0: torch's default); the table as text
    (and JSON / PNG files when paths are given). One thread by default: a decode step is too small
    to share, and on a busy machine more threads mostly wait on each other."""
    before = torch.get_num_threads()
    if threads:
        torch.set_num_threads(threads)
    try:
        rows = decode_bench(models=models, contexts=contexts, batches=batches, reps=reps, rounds=rounds,
                            max_state_mib=max_state_mib, overrides=overrides, echo=echo)
    finally:
        used = torch.get_num_threads()
        torch.set_num_threads(before)
    ratios = decode_ratios(rows)
    text = (f"decode: median over {rounds} round-robin rounds of the median of {reps} or more steps (at least "
            f"{MIN_TIMED_S:g} s of them) from the same state, {used} thread(s)\n" + format_rows(rows))
    if ratios:
        text += "\nbatch-1 ratios, measured side by side:\n" + format_ratios(ratios)
    if json_path:
        Path(json_path).parent.mkdir(parents=True, exist_ok=True)
        Path(json_path).write_text(json.dumps({"threads": used, "reps": reps, "rounds": rounds, "rows": rows,
                                               "ratios": ratios}, indent=2) + "\n")
        text += f"\nwrote {json_path}"
    if plot_path:
        plot_rows(rows, Path(plot_path))
        text += f"\nwrote {plot_path}"
    return text
