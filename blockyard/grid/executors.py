"""Executors: run cells as ordinary training processes, here or on a Ray cluster.

Every cell is the same command whichever executor runs it::

    python -m blockyard train GRID_DIR/configs/<cell>.yaml --out GRID_DIR/cells/<cell> --wait 120

so a cell dir is an ordinary run dir, and rerunning the command resumes an interrupted cell from
its checkpoint (the trainer does that). One process writes a run dir at a time: ``--wait`` lets a
cell of a grid process that was just killed write its last checkpoint before the rerun's cell
takes over, instead of refusing it. Its stdout/stderr go to ``GRID_DIR/logs/<cell>.log``.

The local executor keeps up to ``workers`` such subprocesses running from the grid process's
main thread. On Linux each child asks the kernel for SIGTERM when the grid process dies
(``PR_SET_PDEATHSIG``), so even ``kill -9`` of the grid stops its cells, which then checkpoint.
The Ray executor runs the same command inside Ray tasks (``num_cpus`` = threads per cell); with a
multi-machine cluster the grid dir must be on a filesystem every machine sees at the same path.

Both run the same loop (``run_jobs``); what differs, how a cell is started, found ended and stopped,
is a ``Launcher``: ``LocalProcesses`` or ``RayTasks``.
"""

from __future__ import annotations

import dataclasses
import os
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any, Protocol

from blockyard.errors import UserError

# How long stopped cells get to write their checkpoint before they are killed.
STOP_GRACE_S = 120.0


@dataclasses.dataclass(frozen=True)
class CellJob:
    """One cell to train: where its config is, where its run dir and log go, how many threads."""

    id: str
    config_path: Path
    out_dir: Path
    log_path: Path
    threads: int
    check: bool = True  # False: the cell trains with --no-check (the grid was started with it)

    def command(self) -> list[str]:
        return [sys.executable, "-m", "blockyard", "train", str(self.config_path), "--out", str(self.out_dir),
                "--wait", f"{STOP_GRACE_S:g}", *([] if self.check else ["--no-check"])]


class Events(Protocol):
    """What an executor tells the grid: a cell started, a cell ended (with the exit code), time passed."""

    def started(self, job: CellJob) -> None: ...

    def finished(self, job: CellJob, exit_code: int | None, message: str | None) -> None: ...

    def tick(self) -> None: ...


class GridStopped(Exception):
    """The grid process was asked to stop (SIGINT / SIGTERM); running cells were stopped cleanly."""

    def __init__(self, signum: int) -> None:
        self.signum = signum
        super().__init__(signal.Signals(signum).name)


def child_env(threads: int) -> dict[str, str]:
    """The environment of a cell process: thread pools sized to the cell's share of the cores."""
    env = dict(os.environ)
    for var in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
        env[var] = str(threads)
    return env


def _load_libc() -> Any:
    """libc, loaded here in the parent: the forked child must not import or load anything."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        import ctypes

        return ctypes.CDLL("libc.so.6", use_errno=True)
    except OSError:
        return None


_LIBC = _load_libc()
_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>


def _die_with_parent(parent_pid: int) -> Callable[[], None] | None:
    """preexec_fn: SIGTERM this child when the process that started it dies (Linux prctl)."""
    if _LIBC is None:
        return None
    prctl = _LIBC.prctl

    def setup() -> None:
        prctl(_PR_SET_PDEATHSIG, int(signal.SIGTERM))
        if os.getppid() != parent_pid:  # the parent died before prctl took effect
            os.kill(os.getpid(), signal.SIGTERM)

    return setup


def start_command(command: list[str], log_path: Path, threads: int, tag: str = "") -> subprocess.Popen:
    """Start a cell's command, its output appended to ``log_path`` after a dated header line (``tag`` in it)."""
    log_path.parent.mkdir(parents=True, exist_ok=True)
    log = open(log_path, "ab")  # noqa: SIM115 - the child holds it; closed right after the fork
    try:
        log.write(f"\n=== {time.strftime('%Y-%m-%d %H:%M:%S')} {tag}{' '.join(command)}\n".encode())
        log.flush()
        return subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL,
                                env=child_env(threads), preexec_fn=_die_with_parent(os.getpid()))
    finally:
        log.close()


class _StopSignals:
    """While active, SIGINT / SIGTERM to the grid process raise GridStopped in the main loop."""

    def __enter__(self) -> _StopSignals:
        self._previous = {s: signal.signal(s, self._handle) for s in (signal.SIGINT, signal.SIGTERM)}
        return self

    def _handle(self, signum: int, frame: Any) -> None:
        raise GridStopped(signum)

    def __exit__(self, *exc: Any) -> None:
        for s, handler in self._previous.items():
            signal.signal(s, handler)


Running = dict[str, tuple[CellJob, Any]]  # job id -> (job, the launcher's handle), in start order
Ended = tuple[str, int | None, str | None]  # job id, exit code (None: no code, e.g. a lost Ray worker), message


class Launcher(Protocol):
    """What differs between executors: how a cell is started, how ended cells are found, how all are stopped."""

    def start(self, job: CellJob) -> Any:
        """Start ``job``; returns the handle ``ended`` and ``stop`` get back."""
        ...

    def ended(self, running: Running) -> list[Ended]:
        """(job id, exit code, message) of the running cells that ended, waiting a moment when none has."""
        ...

    def stop(self, running: Running) -> dict[str, int | None]:
        """Stop every running cell cleanly (it checkpoints), waiting up to ``STOP_GRACE_S``; each one's exit code."""
        ...


def run_jobs(jobs: list[CellJob], workers: int, events: Events, launcher: Launcher) -> None:
    """The one executor loop: keep up to ``workers`` cells running, report each start and end to ``events``;
    on SIGINT / SIGTERM stop the running cells through ``launcher``, record them, and raise GridStopped."""
    queue = list(jobs)
    running: Running = {}
    with _StopSignals():
        try:
            while queue or running:
                while queue and len(running) < workers:
                    job = queue.pop(0)
                    running[job.id] = (job, launcher.start(job))
                    events.started(job)
                for cid, code, message in launcher.ended(running) if running else []:
                    job, _handle = running.pop(cid)
                    events.finished(job, code, message)
                events.tick()
        except GridStopped:
            signal.signal(signal.SIGINT, signal.SIG_IGN)  # a second Ctrl-C must not cut the cleanup
            codes = launcher.stop(running)
            for cid, (job, _handle) in running.items():
                events.finished(job, codes.get(cid), "stopped by the grid")
            raise


@dataclasses.dataclass(frozen=True)
class LocalProcesses:
    """Cells as child processes of the grid process, polled every ``poll_s`` seconds."""

    poll_s: float = 0.5

    def start(self, job: CellJob) -> subprocess.Popen:
        return start_command(job.command(), job.log_path, job.threads)

    def ended(self, running: Running) -> list[Ended]:
        out: list[Ended] = [(cid, code, None) for cid, (_job, proc) in running.items()
                            if (code := proc.poll()) is not None]
        if not out:
            time.sleep(self.poll_s)
        return out

    def stop(self, running: Running) -> dict[str, int | None]:
        """SIGTERM every running cell (the trainer checkpoints and exits 143), wait, kill what outlives the grace."""
        for _job, proc in running.values():
            if proc.poll() is None:
                try:
                    proc.send_signal(signal.SIGTERM)
                except ProcessLookupError:
                    pass
        deadline = time.monotonic() + STOP_GRACE_S
        codes: dict[str, int | None] = {}
        for cid, (_job, proc) in running.items():
            try:
                codes[cid] = proc.wait(timeout=max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                proc.kill()
                codes[cid] = proc.wait()
        return codes


def run_local(jobs: list[CellJob], workers: int, events: Events, *, poll_s: float = 0.5) -> None:
    """Run ``jobs`` as subprocesses, at most ``workers`` at a time; raises GridStopped on a signal."""
    run_jobs(jobs, workers, events, LocalProcesses(poll_s))


# ----------------------------------------------------------------------------- ray


def import_ray() -> Any:
    try:
        import ray
    except ImportError:
        raise UserError("--executor ray needs Ray: pip install '.[ray]' (or pip install 'ray[default]')") from None
    return ray


def run_cell_command(command: list[str], log_path: str, threads: int) -> int:
    """Body of a Ray task: run one cell's command to its end; stop it cleanly if the task is cancelled."""
    proc = start_command(command, Path(log_path), threads, "(ray) ")
    try:
        return proc.wait()
    except BaseException:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=STOP_GRACE_S)
        except subprocess.TimeoutExpired:
            proc.kill()
        raise


def connect_ray(address: str | None, cores: int) -> Any:
    """``ray.init`` on an existing cluster (``address``) or a fresh local instance; returns the module."""
    ray = import_ray()
    kwargs: dict[str, Any] = {"log_to_driver": False, "configure_logging": False}
    try:
        if address:
            ray.init(address=address, **kwargs)
        else:
            ray.init(num_cpus=cores, include_dashboard=False, **kwargs)
    except (ConnectionError, RuntimeError, ValueError) as e:
        first = str(e).strip().splitlines()[0] if str(e).strip() else e.__class__.__name__
        raise UserError(f"--address {address or '(local)'}: cannot start or reach Ray ({first})") from None
    return ray


@dataclasses.dataclass(frozen=True)
class RayTasks:
    """Cells as Ray tasks (``run_cell_command``, ``num_cpus`` = the cell's threads), waited on ``poll_s`` at a time."""

    ray: Any  # the connected module (``connect_ray``)
    task: Any  # ``ray.remote(run_cell_command)``
    poll_s: float = 1.0

    def start(self, job: CellJob) -> Any:
        return self.task.options(num_cpus=job.threads, max_retries=0, name=f"cell {job.id}").remote(
            job.command(), str(job.log_path), job.threads)

    def ended(self, running: Running) -> list[Ended]:
        by_ref = {ref: cid for cid, (_job, ref) in running.items()}
        ready, _ = self.ray.wait(list(by_ref), num_returns=1, timeout=self.poll_s)
        out: list[Ended] = []
        for ref in ready:
            try:
                out.append((by_ref[ref], int(self.ray.get(ref)), None))
            except Exception as e:  # a lost worker or node: the cell is failed, the grid goes on
                out.append((by_ref[ref], None, f"ray task failed: {str(e).strip().splitlines()[-1][:200]}"))
        return out

    def stop(self, running: Running) -> dict[str, int | None]:
        """Cancel every task (``run_cell_command`` then SIGTERMs its cell, which checkpoints) and wait for it."""
        for _job, ref in running.values():
            self.ray.cancel(ref)
        for _job, ref in running.values():
            try:
                self.ray.get(ref, timeout=STOP_GRACE_S)
            except Exception:
                pass
        return dict.fromkeys(running, 143)


def run_ray(jobs: list[CellJob], workers: int | None, events: Events, *, address: str | None, cores: int,
            poll_s: float = 1.0) -> None:
    """Run ``jobs`` as Ray tasks (at most ``workers`` in flight; None: as the cluster's CPUs allow)."""
    ray = connect_ray(address, cores)
    try:
        if workers is None:
            cpus = int(ray.cluster_resources().get("CPU", 1))
            workers = max(1, cpus // max(1, min((j.threads for j in jobs), default=1)))
        run_jobs(jobs, workers, events, RayTasks(ray, ray.remote(run_cell_command), poll_s))
    finally:
        ray.shutdown()
