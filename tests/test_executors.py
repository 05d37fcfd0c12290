"""The one executor loop (``run_jobs``) driven by a launcher that runs nothing: concurrency, events, stopping.

The real launchers (local processes, Ray tasks) are exercised end to end by test_grid_run.py,
test_grid_ray.py and the kill tests; here the loop's own promises are checked in milliseconds.
"""

from __future__ import annotations

import signal
from pathlib import Path
from typing import Any

import pytest

from blockyard.grid.executors import CellJob, GridStopped, Running, run_jobs


def _jobs(n: int) -> list[CellJob]:
    return [CellJob(id=f"c{i}", config_path=Path("x.yaml"), out_dir=Path("out"), log_path=Path("log"), threads=1)
            for i in range(n)]


class Recorder:
    def __init__(self) -> None:
        self.log: list[tuple[str, str, Any]] = []

    def started(self, job: CellJob) -> None:
        self.log.append(("start", job.id, None))

    def finished(self, job: CellJob, exit_code: int | None, message: str | None) -> None:
        self.log.append(("end", job.id, (exit_code, message)))

    def tick(self) -> None:
        pass


class FakeLauncher:
    """Each job 'runs' for ``rounds`` calls of ``ended`` and exits with its index; ``signal_at``: the call of
    ``ended`` that receives SIGTERM (raised as GridStopped, as the loop's signal handler does)."""

    def __init__(self, rounds: int, signal_at: int | None = None) -> None:
        self.rounds, self.signal_at, self.calls, self.most_running = rounds, signal_at, 0, 0
        self.stopped: list[str] = []

    def start(self, job: CellJob) -> dict[str, int]:
        return {"left": self.rounds}

    def ended(self, running: Running) -> list[tuple[str, int | None, str | None]]:
        self.calls += 1
        self.most_running = max(self.most_running, len(running))
        if self.calls == self.signal_at:
            raise GridStopped(signal.SIGTERM)
        out = []
        for cid, (_job, handle) in running.items():
            handle["left"] -= 1
            if handle["left"] == 0:
                out.append((cid, int(cid[1:]), None))
        return out

    def stop(self, running: Running) -> dict[str, int | None]:
        self.stopped = list(running)
        return dict.fromkeys(running, 143)


def test_loop_keeps_at_most_workers_running_and_reports_each_start_and_end_once() -> None:
    events, launcher = Recorder(), FakeLauncher(rounds=2)
    run_jobs(_jobs(5), 2, events, launcher)
    assert launcher.most_running == 2
    assert [e[1] for e in events.log if e[0] == "start"] == ["c0", "c1", "c2", "c3", "c4"]  # plan order
    ends = {e[1]: e[2] for e in events.log if e[0] == "end"}
    assert ends == {f"c{i}": (i, None) for i in range(5)}
    # A cell is reported ended only after it was reported started.
    for i, (kind, cid, _) in enumerate(events.log):
        if kind == "end":
            assert ("start", cid, None) in events.log[:i]


def test_a_signal_stops_the_running_cells_records_them_and_raises() -> None:
    events, launcher = Recorder(), FakeLauncher(rounds=3, signal_at=2)
    before = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    with pytest.raises(GridStopped):
        run_jobs(_jobs(4), 2, events, launcher)
    assert launcher.stopped == ["c0", "c1"]  # the queued c2, c3 never started
    assert [e for e in events.log if e[0] == "end"] == [("end", "c0", (143, "stopped by the grid")),
                                                        ("end", "c1", (143, "stopped by the grid"))]
    assert {s: signal.getsignal(s) for s in before} == before  # the loop's handlers (and SIG_IGN) were undone
