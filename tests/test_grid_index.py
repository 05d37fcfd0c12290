"""The grid index: transactional writes under concurrent processes, plan updates, read-only access."""

from __future__ import annotations

import multiprocessing as mp
from pathlib import Path

import pytest

from blockyard.grid.index import GridIndex

WRITERS = 4
ROUNDS = 30


def _row(cid: str, chash: str = "aaaa", position_seed: int = 0) -> dict:
    return {"id": cid, "variant": "v", "seed": position_seed, "point": [], "config_hash": chash, "adjustments": {},
            "planned_tokens": 100, "flops_per_token": 1.0, "params_total": 10, "params_non_embedding": 5}


def _writer(path: str, k: int) -> None:
    index = GridIndex(path)
    for i in range(ROUNDS):
        # A read-modify-write in Python: lost updates (no transaction) or lock-upgrade deadlocks
        # (a deferred transaction) would show as a wrong total or an exception.
        with index.transaction() as db:
            value = int(db.execute("SELECT value FROM meta WHERE key = 'counter'").fetchone()["value"])
            db.execute("UPDATE meta SET value = ? WHERE key = 'counter'", (str(value + 1),))
        index.mark_running("shared")
        index.mark_running(f"own{k}")
        index.mark_finished(f"own{k}", "done", summary={"final_val_loss": float(i), "params": {"total": 10}})
    index.close()


@pytest.mark.slow
def test_concurrent_writers_lose_no_update(tmp_path):
    path = tmp_path / "index.sqlite"
    with GridIndex(path) as index:
        index.plan([_row("shared")] + [_row(f"own{k}") for k in range(WRITERS)])
        index.set_meta({"counter": "0"})
    ctx = mp.get_context("fork")
    procs = [ctx.Process(target=_writer, args=(str(path), k)) for k in range(WRITERS)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(120)
    assert [p.exitcode for p in procs] == [0] * WRITERS
    with GridIndex(path, readonly=True) as index:
        assert index.get_meta("counter") == str(WRITERS * ROUNDS)
        cells = {c["id"]: c for c in index.cells()}
    assert cells["shared"]["attempts"] == WRITERS * ROUNDS
    for k in range(WRITERS):
        own = cells[f"own{k}"]
        assert (own["status"], own["attempts"], own["final_val_loss"]) == ("done", ROUNDS, ROUNDS - 1)
        assert own["ended_at"] >= own["started_at"]


def test_plan_keeps_records_of_unchanged_cells_and_resets_changed_ones(tmp_path):
    path = tmp_path / "index.sqlite"
    with GridIndex(path) as index:
        index.plan([_row("a"), _row("b")])
        index.mark_running("a")
        index.mark_finished("a", "done", summary={"final_val_loss": 2.0})
        index.mark_running("b")
        index.mark_finished("b", "done", summary={"final_val_loss": 3.0})
        index.plan([_row("b", "bbbb"), _row("a")])  # b's config changed; plan order changed
        cells = index.cells()
    assert [c["id"] for c in cells] == ["b", "a"]
    assert (cells[1]["status"], cells[1]["final_val_loss"]) == ("done", 2.0)
    assert (cells[0]["status"], cells[0]["final_val_loss"], cells[0]["config_hash"]) == ("pending", None, "bbbb")


def test_readonly_access_never_writes(tmp_path):
    path = tmp_path / "index.sqlite"
    with GridIndex(path) as index:
        index.plan([_row("a")])
    before = Path(path).read_bytes(), Path(path).stat().st_mtime_ns
    with GridIndex(path, readonly=True) as index:
        assert index.cell("a")["status"] == "pending"
    assert (Path(path).read_bytes(), Path(path).stat().st_mtime_ns) == before
