"""The training loop: one config -> one run dir (records, checkpoints), resumable exactly.

Order of work, chosen so that bad input never damages earlier results:

1. resolve the runtime (device, precision, threads, kernels) and read the run dir:
   finished -> report it and stop; another config -> refuse (unless ``force``);
2. load the data, touch one train batch and the validation windows, build the model and
   optimizer -- every input error surfaces here, before anything in the dir changes;
3. start fresh (clearing old records) or resume from the newest readable checkpoint
   (metrics.jsonl cut back to that step, TensorBoard purged after it);
4. train: step s (1-based) uses micro-batches ``data.train_batch((s - 1) * grad_accum + i)``,
   so the data position is the step itself; log, evaluate, checkpoint, check divergence;
5. write summary.json: done, diverged, interrupted (SIGINT/SIGTERM) or failed.

All of it under the run dir's writer lock (``rundir.writing``): one process writes a dir at a time.
A file that cannot be written (full disk, ...) stops the run with one line (``WriteFailed``, exit 4);
every write is atomic or cut back, so the newest checkpoint on disk stays the resume point.
"""

from __future__ import annotations

import contextlib
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

from blockyard import fs
from blockyard.config import Config, config_hash, dump_config
from blockyard.data.batches import IGNORE_INDEX, count_correct
from blockyard.errors import UserError, WriteFailed
from blockyard.rundir import (
    CHECKPOINT_DIR,
    CONFIG_FILE,
    ENV_FILE,
    METRICS_FILE,
    SUMMARY_FILE,
    TENSORBOARD_DIR,
    RunSummary,
    writing,
)
from blockyard.text import decimal_bytes
from blockyard.train import checkpoint as ckpt
from blockyard.train.allocator import keep_freed_memory
from blockyard.train.averaging import WeightAverage, ema_decay, half_life_steps
from blockyard.train.compile import compile_for_training, compile_warning
from blockyard.train.dirstate import (
    clear_records,
    inspect_run_dir,
    keep_plugin_copies,
    plan_run_dir,
    repair_plugin_copies,
)
from blockyard.train.memory import PeakRSS
from blockyard.train.optim import build_optimizer, build_scheduler, tokens_per_step, total_steps
from blockyard.train.progress import Progress, make_progress
from blockyard.train.records import MetricsLog, TensorBoardLog, environment, write_json
from blockyard.train.runtime import Runtime, resolve_runtime
from blockyard.train.signals import StopRequest

Batch = tuple[torch.Tensor, torch.Tensor]
#: An extra evaluation metric: (model, runtime) -> {name: value}, merged into each val line.
EvalHook = Callable[[nn.Module, Runtime], dict[str, float]]
#: Builds an eval hook once the run's data is loaded, before training (so a hook that cannot run fails
#: first): (config, data) -> hook, or None when the config asks for none. Layers above the trainer plug in
#: so, e.g. the probe suite (``blockyard.eval.probes.make_eval_hook``, passed in by ``blockyard train``).
EvalHookBuilder = Callable[[Config, Any], EvalHook | None]


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
    norm = torch.nn.utils.get_total_norm([g for p in params if (g := p.grad) is not None])
    # torch's clip_grad_norm_, minus its pass over every gradient where its factor is exactly 1.0
    if grad_clip > 0 and not grad_clip / (norm + 1e-6) >= 1.0:
        torch.nn.utils.clip_grads_with_norm_(params, grad_clip, norm)
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
    compiled: dict[str, Any]  # runtime.compile: requested, active, warm-up or why not (env.json)
    mixer_check: str = ""  # what the contract gate on plugin mixers found (env.json)
    allocator: str = ""  # how malloc keeps freed step memory (blockyard.train.allocator; env.json)
    average: WeightAverage | None = None  # train.ema_half_life > 0: the weights validation measures


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _build(cfg: Config, cfg_hash: str, runtime: Runtime) -> Setup:
    """Data, model, optimizer and schedule for ``cfg``; raises UserError on bad input."""
    from blockyard.data import load_data
    from blockyard.model import build_model

    data = load_data(cfg)
    first_batch = data.train_batch(0)  # a split too short for the windows fails here, not mid-run
    val_batches = list(data.val_batches())
    torch.manual_seed(cfg.train.effective_init_seed)
    model = build_model(cfg.model, data.vocab_size, activation_checkpointing=cfg.runtime.activation_checkpointing,
                        kernels=runtime.kernels)
    model.to(runtime.device)
    model.train()
    compiled = compile_for_training(model, runtime, first_batch)
    optimizer = build_optimizer(model, cfg.train)
    total = total_steps(cfg.train, cfg.data.seq_len)
    scheduler = build_scheduler(optimizer, cfg.train, total)
    average = (WeightAverage(model, ema_decay(half_life_steps(cfg.train.ema_half_life, total)))
               if cfg.train.ema_half_life > 0 else None)
    return Setup(cfg, cfg_hash, runtime, data, val_batches, model, optimizer, scheduler, total,
                 tokens_per_step(cfg.train, cfg.data.seq_len), compiled, average=average)


def _param_counts(model: nn.Module) -> dict[str, int]:
    param_groups = getattr(model, "param_groups", None)  # blockyard's models have it; a plain module not
    groups: dict[str, int] = param_groups() if param_groups is not None else {}
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
    eval_hook_builders: Sequence[EvalHookBuilder] = (),
    check: bool = True,
    wait_s: float = 0.0,
) -> dict[str, Any]:
    """Train ``cfg`` into ``out_dir`` (fresh, resumed, or not at all when done); the summary.

    ``progress``: None/"auto" (tqdm bar on a TTY, log lines otherwise), "log", "bar",
    "silent", "warnings", or a :class:`Progress`. ``eval_hooks`` and the hooks that
    ``eval_hook_builders`` build add metrics to every val line. ``check``: run the mixer contract gate on
    plugin mixers first (``blockyard.check.gate``). The run holds the dir's writer lock throughout;
    another live writer is waited for up to ``wait_s`` seconds. Raises UserError for bad input or
    a busy dir (the dir untouched), WriteFailed when a file cannot be written (nothing earlier lost).
    """
    if cfg.eval.probes and not eval_hook_builders:  # a caller's slip, not the user's: say so before any work
        raise ValueError("eval.probes is set but no eval_hook_builders were given to build the probes "
                         "(pass [blockyard.eval.probes.make_eval_hook], as `blockyard train` does)")
    out = Path(out_dir)
    cfg_hash = config_hash(cfg)
    show = make_progress(progress)
    runtime, warnings = resolve_runtime(cfg.runtime)
    with writing(out, wait_s=wait_s):
        repair_plugin_copies(cfg, out, lambda m: show.message(f"warning: {m}"))
        state = inspect_run_dir(out, cfg_hash)
        action = plan_run_dir(state, out, cfg_hash, force)
        if action == "finished":
            return _report_finished(out, state.summary or {}, show)
        for warning in warnings:
            show.message(f"warning: {warning}")
        threads_before = torch.get_num_threads()
        torch.set_num_threads(runtime.threads)
        try:
            from blockyard.check import SKIPPED, gate  # a plugin mixer that leaks is refused before anything is written

            mixer_check = gate(cfg, note=lambda m: show.message(f"note: {m}")) if check else SKIPPED
            s = _build(cfg, cfg_hash, runtime)
            s.mixer_check = mixer_check
            s.allocator = keep_freed_memory()
            from blockyard.cost.memory import warn_if_too_large  # activations that will not fit: say so first

            warn_if_too_large(cfg, s.data.vocab_size, lambda m: show.message(f"warning: {m}"))
            if why := compile_warning(s.compiled):
                show.message(f"warning: {why}")
            _warn_if_disk_short(out, s, show)
            built = (build(cfg, s.data) for build in eval_hook_builders)
            return _train(s, out, action, show, (*eval_hooks, *(hook for hook in built if hook is not None)))
        finally:
            torch.set_num_threads(threads_before)


def _report_finished(out: Path, summary: RunSummary, show: Progress) -> dict[str, Any]:
    if summary.get("status") == "diverged":
        show.message(f"{out}: diverged earlier, at step {summary.get('steps')}; not retraining "
                     "(lower train.lr, or use --force to retrain)")
    else:
        loss = summary.get("final_val_loss")
        show.message(f"{out}: already done ({summary.get('steps')} steps, val loss "
                     f"{'?' if loss is None else f'{loss:.4f}'}); not retraining (use --force to retrain)")
    return dict(summary)


def _warn_if_disk_short(out: Path, s: Setup, show: Progress) -> None:
    """Warn before training when the dir's filesystem cannot hold ``keep_checkpoints`` checkpoints
    (plus the one being written before the oldest is deleted)."""
    each = ckpt.estimate_checkpoint_bytes(s.model)
    need = (s.cfg.train.keep_checkpoints + 1) * each
    free = fs.free_bytes(out)
    if free is not None and free < need:
        show.message(f"warning: {out}: {decimal_bytes(free)} free, but train.keep_checkpoints "
                     f"{s.cfg.train.keep_checkpoints} checkpoints of about {decimal_bytes(each)} (+1 being "
                     f"written) need {decimal_bytes(need)}; the run will stop with exit code 4 when the disk "
                     "is full (free space, then rerun the same command to resume)")


def _start(s: Setup, out: Path, action: str, show: Progress) -> tuple[int, LoopState, MetricsLog, TensorBoardLog]:
    """Open the dir for writing: resume from the newest readable checkpoint, or start fresh."""
    found = None
    if action == "resume":
        fs.remove_temp_files(out)
        fs.remove_temp_files(out / CHECKPOINT_DIR)
        found = ckpt.latest_valid_checkpoint(out / CHECKPOINT_DIR, s.cfg_hash,
                                             warn=lambda m: show.message(f"warning: {m}"),
                                             note=lambda m: show.message(f"note: {m}"))
        if found is None and ckpt.damaged_checkpoints(out / CHECKPOINT_DIR):
            raise UserError(f"{out}: no checkpoint verifies (the damaged ones are in {CHECKPOINT_DIR}/damaged/); "
                            "use --force to train from scratch, or restore a good copy of the run dir")
    if found is None:
        out.mkdir(parents=True, exist_ok=True)
        clear_records(out)
        fs.atomic_write_text(out / CONFIG_FILE, dump_config(s.cfg, keep_plugin_copies(s.cfg, out)),
                             what="the run's config")
        metrics = MetricsLog(out / METRICS_FILE)
        return 0, LoopState(), metrics, TensorBoardLog(out / TENSORBOARD_DIR)
    loop = LoopState(**ckpt.restore(found, s.model, s.optimizer, s.scheduler))
    if s.average is not None and found.state.get("averaged") is not None:
        s.average.load_state_dict(found.state["averaged"])
    show.message(f"resuming {out} from the checkpoint at step {found.step}/{s.total}")
    metrics = MetricsLog.resume(out / METRICS_FILE, found.step)
    return found.step, loop, metrics, TensorBoardLog(out / TENSORBOARD_DIR, purge_step=found.step + 1)


class _Segment:
    """One process's stretch of a run: the step counter, records, timers and the pieces of a step.

    ``_train`` drives it; each method is one job (train a step, log it, validate, checkpoint,
    write the summary), so the loop itself reads as the order of work.
    """

    def __init__(self, s: Setup, out: Path, show: Progress, eval_hooks: Sequence[EvalHook]) -> None:
        self.s, self.out, self.show, self.eval_hooks = s, out, show, eval_hooks
        self.cfg = s.cfg.train
        self.step, self.loop = 0, LoopState()
        self.metrics: MetricsLog | None = None  # open() sets both before the first step
        self.tb: TensorBoardLog | None = None
        self.saved_step: int | None = None  # the newest checkpoint this run has on disk
        self.rss = PeakRSS(0)
        self.t_start = time.perf_counter()
        self.window_tokens, self.window_time = 0, 0.0

    def open(self, action: str) -> None:
        """Resume or start fresh, write env.json and a first "running" summary."""
        s = self.s
        self.step, self.loop, self.metrics, self.tb = _start(s, self.out, action, self.show)
        self.saved_step = self.step or None
        self.rss = PeakRSS(self.loop.peak_rss_bytes)
        self.t_start = time.perf_counter()
        write_json(self.out / ENV_FILE, environment(**s.runtime.facts(), compile=s.compiled, start_time=_now(),
                                                    resumed_from_step=self.step or None, data=s.data.describe(),
                                                    mixer_check=s.mixer_check, allocator=s.allocator),
                   what="the run's environment")
        if self.step == 0:
            params = _param_counts(s.model)
            self.show.message(
                f"training {s.cfg.name or 'run'} ({s.cfg_hash}) into {self.out}: {params['total']:,} params "
                f"({params['non_embedding']:,} non-embedding), {s.total} steps x {s.tokens_per_step:,} tokens, "
                f"{s.runtime.device} x{s.runtime.threads} threads, {s.runtime.precision}")
        self.finish("running")

    def records(self) -> tuple[MetricsLog, TensorBoardLog]:
        """metrics.jsonl and the TensorBoard log, which ``open`` set."""
        if self.metrics is None or self.tb is None:
            raise RuntimeError("the run's records are not open yet")
        return self.metrics, self.tb

    def wall(self) -> float:
        return self.loop.wall_s + time.perf_counter() - self.t_start

    def finish(self, status: str, **extra: Any) -> dict[str, Any]:
        self.loop.peak_rss_bytes = self.rss.sample()
        summary = build_summary(status, self.s, self.records()[0], self.loop, self.step, self.wall(), **extra)
        write_json(self.out / SUMMARY_FILE, summary, what="the run summary")
        return summary

    def save(self) -> None:
        self.loop.peak_rss_bytes = self.rss.sample()
        metrics, tb = self.records()
        metrics.sync()
        tb.flush()
        state = asdict(self.loop) | {"wall_s": self.wall()}
        s = self.s
        ckpt.save_checkpoint(self.out / CHECKPOINT_DIR, step=self.step, config_hash=s.cfg_hash, model=s.model,
                             optimizer=s.optimizer, scheduler=s.scheduler, loop=state,
                             keep=self.cfg.keep_checkpoints,
                             averaged=s.average.state_dict() if s.average is not None else None)
        self.saved_step = self.step

    def log(self, line: dict[str, Any]) -> None:
        metrics, tb = self.records()
        metrics.append(line)
        tb.log(line)

    def train_one_step(self) -> StepStats:
        """Step ``self.step + 1`` on micro-batches ``(step - 1) * grad_accum + i`` (the data position is the step)."""
        s, cfg = self.s, self.cfg
        self.step += 1
        micro = [s.data.train_batch((self.step - 1) * cfg.grad_accum + i) for i in range(cfg.grad_accum)]
        t0 = time.perf_counter()
        stats = train_step(s.model, s.optimizer, s.scheduler, micro, s.runtime, cfg.grad_clip)
        if s.average is not None:
            s.average.update()
        self.window_time += time.perf_counter() - t0
        self.window_tokens += s.tokens_per_step
        self.rss.sample()
        self.show.advance(self.step)
        if self.loop.first_loss is None:
            self.loop.first_loss = stats.loss
        return stats

    def log_train(self, stats: StepStats) -> None:
        line = {"step": self.step, "split": "train", "loss": stats.loss, "lr": stats.lr,
                "grad_norm": stats.grad_norm, "tokens": self.step * self.s.tokens_per_step,
                "tokens_per_s": self.window_tokens / self.window_time if self.window_time > 0 else 0.0,
                "wall_s": self.wall()}
        self.log(line)
        self.show.step(line)
        self.window_tokens, self.window_time = 0, 0.0

    def validate(self) -> None:
        s = self.s
        is_task = bool(s.data.is_task)
        if s.average is None:
            result = evaluate(s.model, s.val_batches, s.runtime, is_task=is_task, hooks=self.eval_hooks)
        else:  # the averaged weights are what is measured; the trained ones' loss rides along as raw_loss
            raw = evaluate(s.model, s.val_batches, s.runtime, is_task=is_task)
            with s.average.swapped_in():
                result = evaluate(s.model, s.val_batches, s.runtime, is_task=is_task, hooks=self.eval_hooks)
            result["raw_loss"] = raw["loss"]
        self.loop.last_val_loss = result["loss"]
        if self.loop.best_val_loss is None or result["loss"] < self.loop.best_val_loss:
            self.loop.best_val_loss = result["loss"]
        line = {"step": self.step, "split": "val", **result, "wall_s": self.wall()}
        self.log(line)
        self.show.val(line)

    def run(self, stop: StopRequest) -> dict[str, Any]:
        """Steps until the budget is spent, the loss diverges or a stop is requested; the summary."""
        cfg, total = self.cfg, self.s.total
        while self.step < total and not stop.requested:
            stats = self.train_one_step()
            step, first_loss = self.step, self.loop.first_loss
            assert first_loss is not None  # train_one_step sets it at step 1
            why = divergence(stats.loss, first_loss, cfg.diverge_factor)
            if why or step == 1 or step % cfg.log_every == 0 or step == total:
                self.log_train(stats)
            if why:
                self.show.close()
                self.show.message(f"diverged at step {step}: {why}; try a lower train.lr (now {cfg.lr:g})")
                return self.finish("diverged", diverged={"step": step, "loss": stats.loss, "reason": why})
            if step % cfg.eval_every == 0 or step == total:
                self.validate()
            if step % cfg.checkpoint_every == 0 or step == total or stop.requested:
                self.save()
                if step < total:
                    self.finish("running")
        self.show.close()
        if stop.requested and self.step < total:
            self.show.message(f"stopped at step {self.step}/{total} by {stop.name}; rerun the same command to resume")
            return self.finish("interrupted", interrupted_by=stop.name)
        summary = self.finish("done")
        self.show.message(f"done: {self.out}  val loss {summary['final_val_loss']:.4f} "
                          f"({summary['final_val_bits_per_token']:.3f} bits/token) after {self.step} steps "
                          f"in {self.wall():.1f}s")
        return summary

    def resume_hint(self) -> str:
        if self.saved_step is None:
            return "no checkpoint was written yet; fix that, then rerun the same command"
        return (f"the checkpoint of step {self.saved_step} stays the resume point; fix that (e.g. free space), "
                "then rerun the same command to resume")

    def record_failure(self, status: str, **extra: Any) -> None:
        """A last summary on the way out; if even that cannot be written (full disk), the older one stays."""
        if self.metrics is None:
            return
        try:
            self.finish(status, **extra)
        except (WriteFailed, OSError):
            pass

    def close(self) -> None:
        if self.metrics is not None:
            self.metrics.close()
        if self.tb is not None:
            self.tb.close()


def _train(s: Setup, out: Path, action: str, show: Progress, eval_hooks: Sequence[EvalHook]) -> dict[str, Any]:
    segment = _Segment(s, out, show, eval_hooks)
    try:
        segment.open(action)
        show.start(s.total, segment.step)
        with StopRequest(notify=show.message) as stop:
            summary = segment.run(stop)
    except KeyboardInterrupt:
        show.close()
        segment.record_failure("interrupted", interrupted_by="SIGINT")
        segment.close()
        raise
    except WriteFailed as e:
        show.close()
        segment.record_failure("failed", error=str(e))
        with contextlib.suppress(WriteFailed, OSError):
            segment.close()
        raise e.with_hint(segment.resume_hint()) from None
    except BaseException as e:
        show.close()
        segment.record_failure("failed", error=f"{e.__class__.__name__}: {e}")
        segment.close()
        raise
    segment.close()
    return summary


def exit_code(summary: dict[str, Any]) -> int:
    """0 done, 3 diverged, 128 + signal number when interrupted (130 SIGINT, 143 SIGTERM).

    Raised, not returned: 2 bad input or a busy run dir (UserError), 4 a file could not be written
    (WriteFailed).
    """
    status = summary.get("status")
    if status == "done":
        return 0
    if status == "diverged":
        return 3
    if status == "interrupted":
        return {"SIGINT": 130, "SIGTERM": 143}.get(str(summary.get("interrupted_by")), 130)
    return 1


def train_from_cli(cfg: Config, out: str | Path | None = None, force: bool = False, check: bool = True,
                   wait_s: float = 0.0, eval_hook_builders: Sequence[EvalHookBuilder] = ()) -> int:
    """``blockyard train``: run into ``out`` (default :func:`default_run_dir`); the exit code."""
    return exit_code(run_training(cfg, Path(out) if out else default_run_dir(cfg), force=force, check=check,
                                  wait_s=wait_s, eval_hook_builders=eval_hook_builders))
