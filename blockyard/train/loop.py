"""The training loop: one config -> one run dir (records, checkpoints), resumable exactly.

Order of work, chosen so that bad input never damages earlier results:

1. resolve the runtime (device, precision, threads, scan backend) and read the run dir:
   finished -> report it and stop; another config -> refuse (unless ``force``);
2. load the data, touch one train batch and the validation windows, build the model and
   optimizer -- every input error surfaces here, before anything in the dir changes;
3. start fresh (clearing old records) or resume from the newest readable checkpoint
   (metrics.jsonl cut back to that step, TensorBoard purged after it);
4. train: step s (1-based) uses micro-batches ``data.train_batch((s - 1) * grad_accum + i)``,
   so the data position is the step itself; log, evaluate, checkpoint, check divergence;
5. write summary.json: done, diverged, interrupted (SIGINT/SIGTERM) or failed.
"""

from __future__ import annotations

import math
import statistics
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from blockyard.config import Config, config_hash, dump_config
from blockyard.data.batches import IGNORE_INDEX, count_correct
from blockyard.train import checkpoint as ckpt
from blockyard.train.memory import PeakRSS
from blockyard.train.optim import build_optimizer, build_scheduler, tokens_per_step, total_steps
from blockyard.train.progress import Progress, make_progress
from blockyard.train.records import MetricsLog, TensorBoardLog, atomic_write_text, environment, write_json
from blockyard.train.rundir import clear_records, inspect_run_dir, keep_plugin_copies, plan_run_dir, remove_temp_files
from blockyard.train.runtime import Runtime, resolve_runtime
from blockyard.train.signals import StopRequest

Batch = tuple[torch.Tensor, torch.Tensor]
#: An extra evaluation metric: (model, runtime) -> {name: value}, merged into each val line.
EvalHook = Callable[[nn.Module, Runtime], dict[str, float]]


# ----------------------------------------------------------------------------- math of one step


def token_loss_sum(logits: torch.Tensor, targets: torch.Tensor) -> tuple[torch.Tensor, int]:
    """Cross-entropy in nats summed over target positions != -100 (in fp32), and their count."""
    loss = F.cross_entropy(logits.float().flatten(0, -2), targets.flatten(), ignore_index=IGNORE_INDEX,
                           reduction="sum")
    return loss, int((targets != IGNORE_INDEX).sum())


@dataclass(frozen=True)
class StepStats:
    loss: float  # nats per target token over all micro-batches of the step
    grad_norm: float  # global L2 norm before clipping
    lr: float  # the lr this update used


def train_step(
    model: nn.Module,
    optimizer: torch.optim.Optimizer,
    scheduler: Any,
    micro_batches: Sequence[Batch],
    runtime: Runtime,
    grad_clip: float,
) -> StepStats:
    """One optimizer update over ``micro_batches``.

    Each micro-batch's summed loss is divided by the target count of the whole step before
    backward, so the accumulated gradient is that of the mean over every target token of the
    step: identical (up to rounding) to one batch holding all micro-batches.
    """
    count = sum(int((y != IGNORE_INDEX).sum()) for _, y in micro_batches)
    denom = max(count, 1)
    optimizer.zero_grad(set_to_none=True)
    loss_sum = 0.0
    for x, y in micro_batches:
        x, y = x.to(runtime.device), y.to(runtime.device)
        with runtime.autocast():
            logits = model(x)
        loss, _ = token_loss_sum(logits, y)
        with runtime.numerics():  # autocast covers the forward only; an emulation must see backward too
            (loss / denom).backward()
        loss_sum += loss.item()
    params = [p for p in model.parameters() if p.grad is not None]
    if grad_clip > 0:
        norm = torch.nn.utils.clip_grad_norm_(params, grad_clip)
    else:
        norm = torch.nn.utils.get_total_norm([p.grad for p in params])
    lr = optimizer.param_groups[0]["lr"]
    optimizer.step()
    scheduler.step()
    return StepStats(loss=loss_sum / denom, grad_norm=float(norm), lr=float(lr))


@torch.no_grad()
def evaluate(
    model: nn.Module,
    batches: Sequence[Batch],
    runtime: Runtime,
    *,
    is_task: bool,
    hooks: Sequence[EvalHook] = (),
) -> dict[str, float]:
    """Mean loss over every scored target token of ``batches``, bits per token, task accuracy.

    ``accuracy`` (tasks only) is the share of scored positions whose argmax is the target.
    ``hooks`` add further metrics (the probe suite plugs in here).
    """
    was_training = model.training
    model.eval()
    try:
        loss_sum, count, correct = 0.0, 0, 0
        for x, y in batches:
            x, y = x.to(runtime.device), y.to(runtime.device)
            with runtime.autocast():
                logits = model(x)
            loss, n = token_loss_sum(logits, y)
            loss_sum += loss.item()
            count += n
            if is_task:
                correct += count_correct(logits, y)[0]
        if count == 0:
            raise ValueError("the validation windows hold no scored target tokens")
        mean = loss_sum / count
        out = {"loss": mean, "bits_per_token": mean / math.log(2)}
        if is_task:
            out["accuracy"] = correct / count
        for hook in hooks:
            out.update(hook(model, runtime))
        return out
    finally:
        model.train(was_training)


def divergence(loss: float, first_loss: float, factor: float) -> str | None:
    """Why ``loss`` counts as diverged (non-finite, or above ``factor`` x the first loss), or None."""
    if not math.isfinite(loss):
        return f"loss {loss} is not finite"
    threshold = factor * first_loss
    if loss > threshold:
        return (f"loss {loss:.4f} > threshold {threshold:.4f} "
                f"(train.diverge_factor {factor:g} x first loss {first_loss:.4f})")
    return None


# ----------------------------------------------------------------------------- run state


@dataclass
class LoopState:
    """What the loop itself must carry across a resume (saved in every checkpoint)."""

    first_loss: float | None = None  # divergence reference: the loss of step 1
    best_val_loss: float | None = None
    last_val_loss: float | None = None
    wall_s: float = 0.0  # training time of earlier segments
    peak_rss_bytes: int = 0


@dataclass
class Setup:
    cfg: Config
    cfg_hash: str
    runtime: Runtime
    data: Any
    val_batches: list[Batch]
    model: nn.Module
    optimizer: torch.optim.Optimizer
    scheduler: Any
    total: int
    tokens_per_step: int
    mixer_check: str = ""  # what the contract gate on plugin mixers found (env.json)


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _build(cfg: Config, cfg_hash: str, runtime: Runtime) -> Setup:
    """Data, model, optimizer and schedule for ``cfg``; raises UserError on bad input."""
    from blockyard.data import load_data
    from blockyard.model import build_model

    data = load_data(cfg)
    data.train_batch(0)  # a split too short for the windows fails here, not mid-run
    val_batches = list(data.val_batches())
    torch.manual_seed(cfg.train.effective_init_seed)
    model = build_model(cfg.model, data.vocab_size, activation_checkpointing=cfg.runtime.activation_checkpointing,
                        scan_backend=runtime.scan_backend)
    model.to(runtime.device)
    model.train()
    optimizer = build_optimizer(model, cfg.train)
    total = total_steps(cfg.train, cfg.data.seq_len)
    scheduler = build_scheduler(optimizer, cfg.train, total)
    return Setup(cfg, cfg_hash, runtime, data, val_batches, model, optimizer, scheduler, total,
                 tokens_per_step(cfg.train, cfg.data.seq_len))


def _param_counts(model: nn.Module) -> dict[str, int]:
    groups = model.param_groups() if hasattr(model, "param_groups") else {}
    total = groups.get("total", sum(p.numel() for p in model.parameters()))
    return {"total": int(total), "non_embedding": int(groups.get("non_embedding", total))}


def build_summary(
    status: str, s: Setup, metrics: MetricsLog, loop: LoopState, step: int, wall_s: float, **extra: Any
) -> dict[str, Any]:
    """summary.json: status, final and best val loss, params, tokens, time, speed, memory."""
    val = [line for line in metrics.of_split("val") if line.get("loss") is not None]
    speeds = [line["tokens_per_s"] for line in metrics.of_split("train") if line.get("tokens_per_s")]
    return {
        "status": status,
        "name": s.cfg.name,
        "config_hash": s.cfg_hash,
        "steps": step,
        "total_steps": s.total,
        "tokens_seen": step * s.tokens_per_step,
        "final_val_loss": val[-1]["loss"] if val else None,
        "final_val_bits_per_token": val[-1]["bits_per_token"] if val else None,
        "best_val_loss": loop.best_val_loss,
        "params": _param_counts(s.model),
        "wall_s": wall_s,
        "tokens_per_s": statistics.median(speeds) if speeds else None,
        "peak_rss_bytes": loop.peak_rss_bytes,
        "updated_at": _now(),
        **extra,
    }


# ----------------------------------------------------------------------------- the run


def default_run_dir(cfg: Config) -> Path:
    """``runs/<config name>/<short config hash>`` under the current directory."""
    return Path("runs") / (cfg.name or "run") / config_hash(cfg)


def run_training(
    cfg: Config,
    out_dir: str | Path,
    *,
    force: bool = False,
    progress: str | Progress | None = None,
    eval_hooks: Sequence[EvalHook] = (),
    check: bool = True,
) -> dict[str, Any]:
    """Train ``cfg`` into ``out_dir`` (fresh, resumed, or not at all when done); the summary.

    ``progress``: None/"auto" (tqdm bar on a TTY, log lines otherwise), "log", "bar",
    "silent", "warnings", or a :class:`Progress`. ``check``: run the mixer contract gate on
    plugin mixers first (``blockyard.check.gate``). Raises UserError for bad input (the dir untouched).
    """
    out = Path(out_dir)
    cfg_hash = config_hash(cfg)
    show = make_progress(progress)
    runtime, warnings = resolve_runtime(cfg.runtime)
    state = inspect_run_dir(out, cfg_hash)
    action = plan_run_dir(state, out, cfg_hash, force)
    if action == "finished":
        summary = state.summary or {}
        if summary.get("status") == "diverged":
            show.message(f"{out}: diverged earlier, at step {summary.get('steps')}; not retraining "
                         "(lower train.lr, or use --force to retrain)")
        else:
            loss = summary.get("final_val_loss")
            show.message(f"{out}: already done ({summary.get('steps')} steps, val loss "
                         f"{'?' if loss is None else f'{loss:.4f}'}); not retraining (use --force to retrain)")
        return summary
    for warning in warnings:
        show.message(f"warning: {warning}")

    threads_before = torch.get_num_threads()
    torch.set_num_threads(runtime.threads)
    try:
        from blockyard.check import SKIPPED, gate  # a plugin mixer that leaks is refused before anything is written

        mixer_check = gate(cfg) if check else SKIPPED
        s = _build(cfg, cfg_hash, runtime)
        s.mixer_check = mixer_check
        from blockyard.cost.memory import warn_if_too_large  # activations that will not fit: say so first

        warn_if_too_large(cfg, s.data.vocab_size, lambda m: show.message(f"warning: {m}"))
        from blockyard.eval.probes import make_eval_hook  # eval.probes; builds (and checks) the probes before training

        probes = make_eval_hook(cfg, s.data)
        return _train(s, out, action, show, (*eval_hooks, probes) if probes else tuple(eval_hooks))
    finally:
        torch.set_num_threads(threads_before)


def _start(s: Setup, out: Path, action: str, show: Progress) -> tuple[int, LoopState, MetricsLog, TensorBoardLog]:
    """Open the dir for writing: resume from the newest readable checkpoint, or start fresh."""
    found = None
    if action == "resume":
        remove_temp_files(out)
        remove_temp_files(out / "checkpoints")
        found = ckpt.latest_valid_checkpoint(out / "checkpoints", s.cfg_hash,
                                             warn=lambda m: show.message(f"warning: {m}"))
    if found is None:
        out.mkdir(parents=True, exist_ok=True)
        clear_records(out)
        atomic_write_text(out / "config.yaml", dump_config(s.cfg, keep_plugin_copies(s.cfg, out)))
        metrics = MetricsLog(out / "metrics.jsonl")
        return 0, LoopState(), metrics, TensorBoardLog(out / "tb")
    loop = LoopState(**ckpt.restore(found, s.model, s.optimizer, s.scheduler))
    show.message(f"resuming {out} from the checkpoint at step {found.step}/{s.total}")
    metrics = MetricsLog.resume(out / "metrics.jsonl", found.step)
    return found.step, loop, metrics, TensorBoardLog(out / "tb", purge_step=found.step + 1)


def _train(s: Setup, out: Path, action: str, show: Progress, eval_hooks: Sequence[EvalHook]) -> dict[str, Any]:
    cfg = s.cfg.train
    step, loop, metrics, tb = _start(s, out, action, show)
    write_json(out / "env.json", environment(**s.runtime.facts(), start_time=_now(),
                                              resumed_from_step=step if step else None, data=s.data.describe(),
                                              mixer_check=s.mixer_check))
    params = _param_counts(s.model)
    if step == 0:
        show.message(f"training {s.cfg.name or 'run'} ({s.cfg_hash}) into {out}: {params['total']:,} params "
                     f"({params['non_embedding']:,} non-embedding), {s.total} steps x {s.tokens_per_step:,} tokens, "
                     f"{s.runtime.device} x{s.runtime.threads} threads, {s.runtime.precision}")
    rss = PeakRSS(loop.peak_rss_bytes)
    t_start = time.perf_counter()
    window_tokens, window_time = 0, 0.0

    def wall() -> float:
        return loop.wall_s + time.perf_counter() - t_start

    def finish(status: str, **extra: Any) -> dict[str, Any]:
        loop.peak_rss_bytes = rss.sample()
        summary = build_summary(status, s, metrics, loop, step, wall(), **extra)
        write_json(out / "summary.json", summary)
        return summary

    def save() -> None:
        loop.peak_rss_bytes = rss.sample()
        metrics.sync()
        tb.flush()
        state = asdict(loop) | {"wall_s": wall()}
        ckpt.save_checkpoint(out / "checkpoints", step=step, config_hash=s.cfg_hash, model=s.model,
                             optimizer=s.optimizer, scheduler=s.scheduler, loop=state, keep=cfg.keep_checkpoints)

    def log(line: dict[str, Any]) -> None:
        metrics.append(line)
        tb.log(line)

    finish("running")
    show.start(s.total, step)
    try:
        with StopRequest(notify=show.message) as stop:
            while step < s.total and not stop.requested:
                step += 1
                micro = [s.data.train_batch((step - 1) * cfg.grad_accum + i) for i in range(cfg.grad_accum)]
                t0 = time.perf_counter()
                stats = train_step(s.model, s.optimizer, s.scheduler, micro, s.runtime, cfg.grad_clip)
                window_time += time.perf_counter() - t0
                window_tokens += s.tokens_per_step
                rss.sample()
                show.advance(step)
                if loop.first_loss is None:
                    loop.first_loss = stats.loss
                why = divergence(stats.loss, loop.first_loss, cfg.diverge_factor)
                if why or step == 1 or step % cfg.log_every == 0 or step == s.total:
                    line = {"step": step, "split": "train", "loss": stats.loss, "lr": stats.lr,
                            "grad_norm": stats.grad_norm, "tokens": step * s.tokens_per_step,
                            "tokens_per_s": window_tokens / window_time if window_time > 0 else 0.0,
                            "wall_s": wall()}
                    log(line)
                    show.step(line)
                    window_tokens, window_time = 0, 0.0
                if why:
                    show.close()
                    show.message(f"diverged at step {step}: {why}; try a lower train.lr (now {cfg.lr:g})")
                    return finish("diverged", diverged={"step": step, "loss": stats.loss, "reason": why})
                if step % cfg.eval_every == 0 or step == s.total:
                    result = evaluate(s.model, s.val_batches, s.runtime, is_task=bool(s.data.is_task),
                                      hooks=eval_hooks)
                    loop.last_val_loss = result["loss"]
                    if loop.best_val_loss is None or result["loss"] < loop.best_val_loss:
                        loop.best_val_loss = result["loss"]
                    line = {"step": step, "split": "val", **result, "wall_s": wall()}
                    log(line)
                    show.val(line)
                if step % cfg.checkpoint_every == 0 or step == s.total or stop.requested:
                    save()
                    if step < s.total:
                        finish("running")
            show.close()
            if stop.requested and step < s.total:
                show.message(f"stopped at step {step}/{s.total} by {stop.name}; rerun the same command to resume")
                return finish("interrupted", interrupted_by=stop.name)
        summary = finish("done")
        show.message(f"done: {out}  val loss {summary['final_val_loss']:.4f} "
                     f"({summary['final_val_bits_per_token']:.3f} bits/token) after {step} steps in {wall():.1f}s")
        return summary
    except KeyboardInterrupt:
        show.close()
        finish("interrupted", interrupted_by="SIGINT")
        raise
    except BaseException as e:
        show.close()
        finish("failed", error=f"{e.__class__.__name__}: {e}")
        raise
    finally:
        metrics.close()
        tb.close()


def exit_code(summary: dict[str, Any]) -> int:
    """0 done, 3 diverged, 128 + signal number when interrupted (130 SIGINT, 143 SIGTERM)."""
    status = summary.get("status")
    if status == "done":
        return 0
    if status == "diverged":
        return 3
    if status == "interrupted":
        return {"SIGINT": 130, "SIGTERM": 143}.get(summary.get("interrupted_by"), 130)
    return 1


def train_from_cli(cfg: Config, out: str | Path | None = None, force: bool = False, check: bool = True) -> int:
    """``blockyard train``: run into ``out`` (default :func:`default_run_dir`); the exit code."""
    return exit_code(run_training(cfg, Path(out) if out else default_run_dir(cfg), force=force, check=check))
