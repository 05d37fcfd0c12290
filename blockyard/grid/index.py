"""The grid index: one SQLite database per grid dir recording every cell and its outcome.

Writes are transactions opened with ``BEGIN IMMEDIATE`` (the write lock is taken up front, so
two writers never deadlock upgrading a read lock) under a busy timeout, so concurrent writers
(the grid process, Ray result handlers, a second terminal's ``--status`` reads) are safe.
The rollback journal (SQLite's default) is kept rather than WAL, which needs shared memory that
network filesystems do not provide. A write that fails for lack of space (or a read-only
filesystem, permissions, I/O) is rolled back by SQLite and raised as the one-line ``WriteFailed``.
"""

from __future__ import annotations

import contextlib
import errno
import json
import sqlite3
import time
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any, TypedDict

from blockyard import fs
from blockyard.rundir import RunSummary

INDEX_NAME = "index.sqlite"
BUSY_TIMEOUT_S = 60.0

# Cell statuses: pending (planned, never started), running, and the trainer's outcomes
# (done, diverged, failed, interrupted).
# Meta key a grid with seeds until decided keeps: "open" while a later round may add seeds, else "complete".
ROUNDS_META, ROUNDS_OPEN, ROUNDS_COMPLETE = "rounds", "open", "complete"
FINISHED = ("done", "diverged")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS cells (
    id TEXT PRIMARY KEY,
    position INTEGER NOT NULL,      -- order in the plan (variant, axis point, seed)
    variant TEXT NOT NULL,
    seed INTEGER NOT NULL,
    point TEXT NOT NULL,            -- JSON list of [dotted axis key, value]
    config_hash TEXT NOT NULL,
    adjustments TEXT NOT NULL,      -- JSON mapping of fairness adjustments
    planned_tokens INTEGER NOT NULL,
    flops_per_token REAL,
    status TEXT NOT NULL DEFAULT 'pending',
    attempts INTEGER NOT NULL DEFAULT 0,
    started_at REAL,
    ended_at REAL,
    exit_code INTEGER,
    message TEXT,
    final_val_loss REAL,
    best_val_loss REAL,
    params_total INTEGER,
    params_non_embedding INTEGER,
    tokens_seen INTEGER,
    steps INTEGER,
    wall_s REAL,
    tokens_per_s REAL,
    peak_rss_bytes INTEGER
);
"""



class PlanRow(TypedDict):
    """A planned cell as ``GridIndex.plan`` takes it (``blockyard.grid.plan.plan_rows`` writes them)."""

    id: str
    variant: str
    seed: int
    point: list[list[Any]]  # [[dotted axis key, value]], in the axes' order
    config_hash: str
    adjustments: dict[str, Any]
    planned_tokens: int
    flops_per_token: float | None
    params_total: int | None
    params_non_embedding: int | None


class CellRow(TypedDict):
    """One cell's record as ``GridIndex.cells`` returns it: the columns above, point and adjustments decoded.

    What flows from the index to the verdicts, the report and ``--status``; the summary columns are None
    until the cell has finished (and stay None where its summary lacks them).
    """

    id: str
    position: int
    variant: str
    seed: int
    point: list[tuple[str, Any]]  # [(dotted axis key, value)], in the axes' order
    config_hash: str
    adjustments: dict[str, Any]  # fairness adjustments: dotted key -> value used
    planned_tokens: int
    flops_per_token: float | None
    status: str  # pending, running, done, diverged, failed, interrupted
    attempts: int
    started_at: float | None
    ended_at: float | None
    exit_code: int | None
    message: str | None
    final_val_loss: float | None
    best_val_loss: float | None
    params_total: int | None
    params_non_embedding: int | None
    tokens_seen: int | None
    steps: int | None
    wall_s: float | None
    tokens_per_s: float | None
    peak_rss_bytes: int | None


# SQLite's primary result codes (sqlite.org/rescode.html) for storage failures, as the errno they stand for.
_SQLITE_STORAGE = {13: errno.ENOSPC, 10: errno.EIO, 8: errno.EROFS, 3: errno.EACCES, 14: errno.EACCES}

_SUMMARY_COLUMNS = ("final_val_loss", "best_val_loss", "tokens_seen", "steps", "wall_s", "tokens_per_s",
                    "peak_rss_bytes")


class GridIndex:
    """Access to ``GRID_DIR/index.sqlite``; each method is one short transaction."""

    def __init__(self, path: str | Path, *, readonly: bool = False) -> None:
        """Open (and create, unless ``readonly``) the index; ``readonly`` never writes to the file."""
        self.path = Path(path)
        # isolation_level=None: no implicit transactions; we open them explicitly.
        target = f"file:{self.path.resolve()}?mode=ro" if readonly else str(self.path)
        with self._reporting():
            self._db = sqlite3.connect(target, timeout=BUSY_TIMEOUT_S, isolation_level=None, uri=readonly)
            self._db.row_factory = sqlite3.Row
            self._db.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_S * 1000)}")
        if readonly:
            return
        with self.transaction() as db:
            for statement in _SCHEMA.split(";"):
                if statement.strip():
                    db.execute(statement)

    def close(self) -> None:
        self._db.close()

    def __enter__(self) -> GridIndex:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextlib.contextmanager
    def _reporting(self) -> Iterator[None]:
        """SQLite's storage failures (disk full, read-only, I/O) as ``WriteFailed``; other errors unchanged."""
        try:
            yield
        except sqlite3.Error as e:
            code = getattr(e, "sqlite_errorcode", None)
            number = None if code is None else _SQLITE_STORAGE.get(code & 0xFF)
            failure = None if number is None else fs.write_failure(OSError(number, str(e)), self.path, "the grid index")
            if failure is None:
                raise
            raise failure from None

    @contextlib.contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """BEGIN IMMEDIATE ... COMMIT (ROLLBACK on error)."""
        with self._reporting():
            self._db.execute("BEGIN IMMEDIATE")
            try:
                yield self._db
                self._db.execute("COMMIT")
            except BaseException:
                if self._db.in_transaction:  # SQLite may have rolled back by itself (e.g. disk full)
                    with contextlib.suppress(sqlite3.Error):
                        self._db.execute("ROLLBACK")
                raise

    # ----- meta

    def get_meta(self, key: str) -> str | None:
        row = self._db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else row["value"]

    def set_meta(self, items: dict[str, str]) -> None:
        with self.transaction() as db:
            db.executemany("INSERT OR REPLACE INTO meta (key, value) VALUES (?, ?)", list(items.items()))

    # ----- cells

    def plan(self, rows: Sequence[PlanRow]) -> None:
        """Insert planned cells; a cell already present with the same config hash keeps its record.

        A cell whose config hash changed (only after ``--force``) is reset to pending.
        """
        columns = ("id", "position", "variant", "seed", "point", "config_hash", "adjustments", "planned_tokens",
                   "flops_per_token", "params_total", "params_non_embedding")
        insert = f"INSERT INTO cells ({', '.join(columns)}) VALUES ({', '.join('?' * len(columns))})"
        with self.transaction() as db:
            for position, row in enumerate(rows):
                values = (row["id"], position, row["variant"], row["seed"], json.dumps(row["point"]),
                          row["config_hash"], json.dumps(row["adjustments"], sort_keys=True),
                          row["planned_tokens"], row["flops_per_token"], row["params_total"],
                          row["params_non_embedding"])
                old = db.execute("SELECT config_hash FROM cells WHERE id = ?", (row["id"],)).fetchone()
                if old is not None and old["config_hash"] == row["config_hash"]:
                    db.execute("UPDATE cells SET position = ? WHERE id = ?", (position, row["id"]))
                    continue
                if old is not None:
                    db.execute("DELETE FROM cells WHERE id = ?", (row["id"],))
                db.execute(insert, values)

    def remove_unplanned(self, keep: set[str]) -> list[str]:
        """Drop cells that are no longer in the plan (their dirs stay on disk); returns their ids."""
        with self.transaction() as db:
            ids = [r["id"] for r in db.execute("SELECT id FROM cells")]
            gone = [i for i in ids if i not in keep]
            db.executemany("DELETE FROM cells WHERE id = ?", [(i,) for i in gone])
        return gone

    def mark_running(self, cell_id: str, started_at: float | None = None) -> None:
        with self.transaction() as db:
            db.execute(
                "UPDATE cells SET status = 'running', attempts = attempts + 1, started_at = ?, ended_at = NULL, "
                "exit_code = NULL, message = NULL WHERE id = ?",
                (time.time() if started_at is None else started_at, cell_id),
            )

    def mark_finished(
        self,
        cell_id: str,
        status: str,
        *,
        summary: RunSummary | None = None,
        exit_code: int | None = None,
        message: str | None = None,
        ended_at: float | None = None,
    ) -> None:
        """Record a cell's outcome and, from its summary.json, its final metrics."""
        fields: Mapping[str, Any] = summary or {}  # an older summary may lack any key
        params = fields.get("params") or {}
        values: dict[str, Any] = {c: fields.get(c) for c in _SUMMARY_COLUMNS}
        if params:
            values["params_total"] = params.get("total")
            values["params_non_embedding"] = params.get("non_embedding")
        sets = ", ".join(f"{c} = ?" for c in values)
        with self.transaction() as db:
            db.execute(
                f"UPDATE cells SET status = ?, ended_at = ?, exit_code = ?, message = ?, {sets} WHERE id = ?",
                (status, time.time() if ended_at is None else ended_at, exit_code, message, *values.values(),
                 cell_id),
            )

    def cells(self) -> list[CellRow]:
        """Every cell's record (point and adjustments decoded), in plan order."""
        rows = self._db.execute("SELECT * FROM cells ORDER BY position").fetchall()
        out = []
        for r in rows:
            d = dict(r)
            d["point"] = [tuple(p) for p in json.loads(d["point"])]
            d["adjustments"] = json.loads(d["adjustments"])
            out.append(CellRow(**d))  # type: ignore[typeddict-item]  # the columns are CellRow's keys
        return out

    def cell(self, cell_id: str) -> CellRow | None:
        return next((c for c in self.cells() if c["id"] == cell_id), None)


def open_index(grid_dir: str | Path, *, readonly: bool = False) -> GridIndex:
    return GridIndex(Path(grid_dir) / INDEX_NAME, readonly=readonly)
