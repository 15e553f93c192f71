"""The sweep's SQLite ledger: every segment and run, their status, timings and metrics.

Only the process that owns the sweep writes it, each result in one transaction, so a sweep
killed at any moment leaves a ledger that is consistent up to the last finished segment.
Readers (``status``, ``report``, notebooks) may open it while a sweep runs, read-only with
:meth:`Ledger.read_only`.

All SQL on the ledger's tables lives here: other modules call a method. The module imports
neither torch nor hydra (it names the engine's records through :mod:`periodscan.engine.records`
and :mod:`periodscan.engine.tree`, plain dataclasses), so reading a finished sweep stays light.
"""

from __future__ import annotations

import json
import socket
import sqlite3
import time
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import pandas as pd

from periodscan.engine.records import SegmentResult
from periodscan.engine.tree import RunSpec, Segment

FILE_NAME = "ledger.sqlite"

SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS segments (
    segment_id TEXT PRIMARY KEY, seed INTEGER, parent_id TEXT, begin_epoch INTEGER,
    end_epoch INTEGER, deficit_on INTEGER, status TEXT, seconds REAL, checkpoint_file TEXT,
    checkpoint_sha256 TEXT, diverged_at INTEGER, error TEXT, threads INTEGER, host TEXT,
    finished_at REAL
);
CREATE TABLE IF NOT EXISTS epochs (
    segment_id TEXT, epoch INTEGER, lr REAL, train_loss REAL, train_acc REAL, test_loss REAL,
    test_acc REAL, deficit_on INTEGER, seconds REAL, PRIMARY KEY (segment_id, epoch)
);
CREATE TABLE IF NOT EXISTS extras (
    segment_id TEXT, epoch INTEGER, name TEXT, value REAL, PRIMARY KEY (segment_id, epoch, name)
);
CREATE TABLE IF NOT EXISTS runs (
    run_id TEXT PRIMARY KEY, seed INTEGER, start_epoch INTEGER, length INTEGER,
    end_epoch INTEGER, is_baseline INTEGER, config_hash TEXT, status TEXT, path TEXT,
    test_acc REAL, test_loss REAL, n_test INTEGER, correct BLOB, diverged_at INTEGER,
    error TEXT, finished_at REAL, variant TEXT NOT NULL DEFAULT ''
);
"""
#: Columns added to a table after its first release: (table, column, SQL type and default).
#: A ledger written before them gains them on opening for writing; readers of such a ledger
#: see the default (runs of an old ledger have no deficit variant: "").
ADDED_COLUMNS = (("runs", "variant", "TEXT NOT NULL DEFAULT ''"),)


class Ledger:
    """Thin wrapper over one SQLite file; one method per thing the engine records or reads.

    ``Ledger(folder)`` opens (or creates) the ledger for writing; ``Ledger.read_only(folder)``
    opens an existing one with SQLite's read-only mode, for readers that must never write.
    """

    def __init__(self, folder: str | Path, *, writable: bool = True):
        self.path = Path(folder) / FILE_NAME
        if writable:
            self.conn = sqlite3.connect(self.path, timeout=30)
            self.conn.executescript(SCHEMA)
            self._add_columns()
            self.conn.commit()
        else:
            self.conn = sqlite3.connect(f"{self.path.resolve().as_uri()}?mode=ro", uri=True,
                                        timeout=30)

    @classmethod
    def read_only(cls, folder: str | Path) -> Ledger:
        """Open an existing ledger without write access (no schema change, no file created)."""
        return cls(folder, writable=False)

    def close(self) -> None:
        self.conn.close()

    def _columns(self, table: str) -> set[str]:
        return {row[1] for row in self.conn.execute(f"PRAGMA table_info({table})")}

    def _add_columns(self) -> None:
        """Bring a ledger written by an older periodscan up to :data:`ADDED_COLUMNS`."""
        for table, column, kind in ADDED_COLUMNS:
            if column not in self._columns(table):
                self.conn.execute(f"ALTER TABLE {table} ADD COLUMN {column} {kind}")

    def _variant_sql(self) -> str:
        """How a SELECT on runs reads the variant column (a constant on an old ledger)."""
        return "variant" if "variant" in self._columns("runs") else "'' AS variant"

    # --- meta -------------------------------------------------------------------------
    def get_meta(self, key: str) -> str | None:
        row = self.conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return row[0] if row else None

    def meta_values(self) -> dict[str, Any]:
        """Every meta key with its value, JSON decoded (kept as text where it is not JSON)."""
        out: dict[str, Any] = {}
        for key, value in self.conn.execute("SELECT key, value FROM meta"):
            try:
                out[key] = json.loads(value)
            except ValueError:
                out[key] = value
        return out

    def set_meta(self, **values: Any) -> None:
        with self.conn:
            for key, value in values.items():
                text = value if isinstance(value, str) else json.dumps(value)
                self.conn.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, text))

    # --- planning -----------------------------------------------------------------------
    def register(self, segments: Iterable[Segment], runs: Iterable[RunSpec], paths, config_hash):
        """Insert planned segments and runs that are not known yet (status 'pending')."""
        with self.conn:
            self.conn.executemany(
                "INSERT OR IGNORE INTO segments (segment_id, seed, parent_id, begin_epoch, "
                "end_epoch, deficit_on, status) VALUES (?, ?, ?, ?, ?, ?, 'pending')",
                [(s.segment_id, s.seed, s.parent, s.begin, s.end, int(s.deficit_on))
                 for s in segments],
            )
            self.conn.executemany(
                "INSERT OR IGNORE INTO runs (run_id, seed, start_epoch, length, end_epoch, "
                "is_baseline, config_hash, status, path, variant) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, 'pending', ?, ?)",
                [(r.run_id, r.seed, r.start, r.length, r.end, int(r.is_baseline), config_hash,
                  ",".join(paths[r.run_id]), r.variant) for r in runs],
            )

    def finished_runs(self) -> set[str]:
        """Runs with a final result (finished or diverged); failed runs are retried."""
        rows = self.conn.execute("SELECT run_id FROM runs WHERE status IN ('done', 'diverged')")
        return {r[0] for r in rows}

    def checkpoints(self) -> dict[str, tuple[str, str]]:
        """segment_id -> (file name, sha256) for every segment that stored a checkpoint."""
        rows = self.conn.execute(
            "SELECT segment_id, checkpoint_file, checkpoint_sha256 FROM segments "
            "WHERE checkpoint_file IS NOT NULL"
        )
        return {sid: (name, digest) for sid, name, digest in rows}

    # --- results ------------------------------------------------------------------------
    def record_segment(self, result: SegmentResult, checkpoint_file: str | None, digest: str | None,
                       finishes: Iterable[RunSpec], threads: int) -> None:
        """Store one segment's epochs, checkpoint reference and the runs it finishes, atomically."""
        now = time.time()
        status = result.status
        with self.conn:
            self.conn.execute(
                "UPDATE segments SET status=?, seconds=?, checkpoint_file=?, checkpoint_sha256=?, "
                "diverged_at=?, error=?, threads=?, host=?, finished_at=? WHERE segment_id=?",
                (status, result.seconds, checkpoint_file, digest, result.diverged_at, result.error,
                 threads, socket.gethostname(), now, result.segment_id),
            )
            self.conn.executemany(
                "INSERT OR REPLACE INTO epochs VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [(result.segment_id, e.epoch, e.lr, e.train_loss, e.train_acc, e.test_loss,
                  e.test_acc, int(e.deficit_on), e.seconds) for e in result.epochs],
            )
            self._insert_extras(
                (result.segment_id, epoch, name, value) for epoch, name, value in result.extras)
            if status == "done":
                self.conn.executemany(
                    "UPDATE runs SET status='done', test_acc=?, test_loss=?, n_test=?, correct=?, "
                    "error=NULL, finished_at=? WHERE run_id=?",
                    [(result.test_acc, result.test_loss, result.n_test, result.correct, now,
                      r.run_id) for r in finishes],
                )

    def mark_runs(self, run_ids: Iterable[str], status: str, *, error: str | None = None,
                  diverged_at: int | None = None, acc: float | None = None,
                  loss: float | None = None, n_test: int = 0, correct: bytes | None = None) -> None:
        """Give runs below a failed or diverged segment their outcome."""
        now = time.time()
        with self.conn:
            self.conn.executemany(
                "UPDATE runs SET status=?, error=?, diverged_at=?, test_acc=?, test_loss=?, "
                "n_test=?, correct=?, finished_at=? WHERE run_id=?",
                [(status, error, diverged_at, acc, loss, n_test, correct, now, rid)
                 for rid in run_ids],
            )

    def record_extras(self, readings: Iterable[tuple[str, int, str, float]]) -> None:
        """Store monitor readings ``(segment_id, epoch, name, value)`` in one transaction.

        For readings taken apart from training (a replay of a trained segment); a reading
        already stored under the same (segment, epoch, name) is replaced.
        """
        with self.conn:
            self._insert_extras(readings)

    def _insert_extras(self, readings: Iterable[tuple[str, int, str, float]]) -> None:
        self.conn.executemany("INSERT OR REPLACE INTO extras VALUES (?, ?, ?, ?)",
                              [(sid, int(epoch), name, float(value))
                               for sid, epoch, name, value in readings])

    # --- reading ------------------------------------------------------------------------
    def runs_frame(self) -> pd.DataFrame:
        """One row per run (without the correctness blob); ``variant`` is "" for runs of the
        config's own deficit and for baselines."""
        return pd.read_sql_query(
            "SELECT run_id, seed, start_epoch, length, end_epoch, is_baseline, status, test_acc, "
            f"test_loss, n_test, diverged_at, error, finished_at, {self._variant_sql()} "
            "FROM runs", self.conn)

    def run_paths_frame(self) -> pd.DataFrame:
        """One row per run: run_id, status, path (its segment ids, comma-separated), error."""
        return pd.read_sql_query("SELECT run_id, status, path, error FROM runs", self.conn)

    def segments_frame(self) -> pd.DataFrame:
        return pd.read_sql_query("SELECT * FROM segments", self.conn)

    def epoch_seconds_frame(self) -> pd.DataFrame:
        """Wall seconds of every recorded epoch: segment_id, seconds (one row per epoch)."""
        return pd.read_sql_query("SELECT segment_id, seconds FROM epochs", self.conn)

    def epochs_frame(self) -> pd.DataFrame:
        """Per-epoch metrics of every run, following each run's path through the tree."""
        return self._along_paths(pd.read_sql_query("SELECT * FROM epochs", self.conn))

    def extras_frame(self, prefix: str | None = None) -> pd.DataFrame:
        """Per-epoch monitor readings (name, value) of every run, along each run's path.

        ``prefix`` keeps only readings whose name starts with it (e.g. ``"fisher/"``).
        """
        return self._along_paths(self.extras_by_segment(prefix=prefix))

    def extras_by_segment(self, segment_ids: Iterable[str] | None = None,
                          prefix: str | None = None) -> pd.DataFrame:
        """Monitor readings as stored: segment_id, epoch, name, value.

        ``segment_ids`` keeps the readings of those segments only; ``prefix`` keeps names that
        start with it (compared exactly: ``_`` and ``%`` are not wildcards).
        """
        where, params = [], []
        if segment_ids is not None:
            where.append("segment_id IN (SELECT value FROM json_each(?))")
            params.append(json.dumps(sorted(set(segment_ids))))
        if prefix is not None:
            where.append("substr(name, 1, ?) = ?")
            params += [len(prefix), prefix]
        query = "SELECT segment_id, epoch, name, value FROM extras"
        if where:
            query += " WHERE " + " AND ".join(where)
        return pd.read_sql_query(query + " ORDER BY segment_id, epoch, name", self.conn,
                                 params=params)

    def _along_paths(self, epochs: pd.DataFrame) -> pd.DataFrame:
        paths = self.conn.execute("SELECT run_id, seed, start_epoch, length, path, "
                                  f"{self._variant_sql()} FROM runs")
        frames = []
        for run_id, seed, start, length, path, variant in paths:
            part = epochs[epochs.segment_id.isin(path.split(","))].assign(
                run_id=run_id, seed=seed, start_epoch=start, length=length, variant=variant)
            frames.append(part)
        if not frames:
            return epochs.assign(run_id=[], seed=[], start_epoch=[], length=[], variant=[])
        return pd.concat(frames, ignore_index=True).sort_values(["run_id", "epoch"])

    def correctness(self, run_id: str) -> tuple[bytes, int] | None:
        """A run's packed per-example correctness and its number of test examples, if stored."""
        row = self.conn.execute("SELECT correct, n_test FROM runs WHERE run_id=?",
                                (run_id,)).fetchone()
        return (row[0], row[1]) if row and row[0] is not None else None
