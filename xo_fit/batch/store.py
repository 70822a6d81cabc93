"""The batch's results store (``DIR/results.sqlite``, stdlib sqlite3) and the folder's lock.

One row per job and stage: name, hash, status (running, done, failed,
interrupted), the stage's own start and end, cost, metrics (JSON), the error
of a failure, the job's folder and file. Only the coordinator writes it, and
only through :class:`Store`'s methods. A change is committed at once, or, inside
``with store.batch():``, all the changes of the block in one transaction (the
coordinator records what its workers sent in one go).
"""

from __future__ import annotations

import json
import os
import sqlite3
import time
from contextlib import contextmanager
from pathlib import Path
from collections.abc import Iterable, Iterator

from xo_fit.errors import XoFitError

SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    job TEXT NOT NULL,
    stage TEXT NOT NULL,
    hash TEXT NOT NULL,
    status TEXT NOT NULL,          -- running, done, failed, interrupted
    started REAL,
    finished REAL,
    cost REAL,
    metrics TEXT,                  -- JSON
    error TEXT,
    folder TEXT,
    source TEXT,
    PRIMARY KEY (job, stage)
)
"""
COLUMNS = ("job", "stage", "hash", "status", "started", "finished", "cost", "metrics", "error", "folder", "source")
INTERRUPTED = "interrupted: the batch stopped before this stage ended; run the batch again"


class BatchStopped(XoFitError):
    """The batch stopped before its end (a signal, a full disk, a lost cluster): its unfinished stages are marked
    interrupted. ``code`` is the command's exit code (1; 128 + the signal's number for a signal)."""

    def __init__(self, message: str, *, code: int = 1, **where) -> None:
        super().__init__(message, **where)
        self.code = code


class Store:
    """The batch's sqlite store: rows read and written through its methods only."""

    def __init__(self, folder: Path) -> None:
        self.path = folder / "results.sqlite"
        self.depth = 0
        try:
            self.db = sqlite3.connect(self.path, timeout=30)
            self.db.execute(SCHEMA)
            self.db.commit()
            self.db.execute(f"SELECT {', '.join(COLUMNS)} FROM runs LIMIT 1").fetchall()
        except sqlite3.DatabaseError as e:
            raise XoFitError(f"the results store is damaged or not one ({e}); move it away to start the batch "
                             "afresh (the job folders are kept)", path=self.path) from None

    def rows(self) -> dict[tuple[str, str], dict]:
        """Every row, by (job, stage), as a dict of the columns (metrics still JSON text)."""
        cur = self._do(f"SELECT {', '.join(COLUMNS)} FROM runs")
        return {(r[0], r[1]): dict(zip(COLUMNS, r)) for r in cur.fetchall()}

    @contextmanager
    def batch(self) -> Iterator[None]:
        """The changes made in the block committed together, once, at its end."""
        self.depth += 1
        try:
            yield
        except BaseException:
            self.depth -= 1
            if self.depth == 0:  # what was recorded before the failure is kept
                try:
                    self.db.commit()
                except sqlite3.Error:
                    pass
            raise
        self.depth -= 1
        if self.depth == 0:
            self._commit()

    def started(self, entries: Iterable[tuple[str, str, str, str, str]]) -> None:
        """Rows (job, stage, hash, folder, source) set running, in one transaction."""
        now = time.time()
        with self.batch():
            for job, stage, h, folder, source in entries:
                self.set(job, stage, hash=h, status="running", started=now, finished=None, cost=None, metrics=None,
                         error=None, folder=folder, source=source)

    def done(self, job: str, stage: str, h: str, *, started: float, finished: float, cost, metrics: dict) -> None:
        """Set the row (job, stage) done, with its hash, start and end times (s since the epoch), cost and
        metrics."""
        self.set(job, stage, hash=h, status="done", started=started, finished=finished, cost=cost, metrics=metrics,
                 error=None)

    def failed(self, job: str, stage: str, h: str, error: str, **fields) -> None:
        """Set the row (job, stage) failed now with its hash and error message; ``fields`` sets other columns."""
        self.set(job, stage, hash=h, status="failed", finished=time.time(), error=error, **fields)

    def forget_load_failures(self, jobs: Iterable[str]) -> None:
        """Drop the "load" rows of jobs that load now."""
        with self.batch():
            for job in jobs:
                self._do("DELETE FROM runs WHERE job = ? AND stage = 'load'", (job,))

    def interrupt_running(self) -> int:
        """Rows still running become interrupted (to be run again); returns how many. Never raises: it runs
        while the batch is stopping, perhaps for a full disk."""
        try:
            n = self.db.execute("UPDATE runs SET status = 'interrupted', error = COALESCE(error, ?) "
                                "WHERE status = 'running'", (INTERRUPTED,)).rowcount
            self.db.commit()
            return n
        except sqlite3.Error:
            return 0

    def set(self, job: str, stage: str, **fields) -> None:
        """Insert or update one row's given columns (metrics as a dict)."""
        keys = ["job", "stage"] + list(fields)
        vals = [job, stage] + [json.dumps(v) if k == "metrics" and v is not None else v for k, v in fields.items()]
        self._do(f"INSERT INTO runs ({', '.join(keys)}) VALUES ({', '.join('?' * len(keys))}) "
                 f"ON CONFLICT(job, stage) DO UPDATE SET " + ", ".join(f"{k} = excluded.{k}" for k in fields), vals)
        if self.depth == 0:
            self._commit()

    def _do(self, sql: str, args=()):
        try:
            return self.db.execute(sql, args)
        except sqlite3.Error as e:
            raise BatchStopped(f"cannot use the results store: {e}", path=self.path) from None

    def _commit(self) -> None:
        try:
            self.db.commit()
        except sqlite3.Error as e:
            raise BatchStopped(f"cannot write the results store: {e}", path=self.path) from None

    def close(self) -> None:
        """Close the database (errors on closing are ignored)."""
        try:
            self.db.close()
        except sqlite3.Error:
            pass


class Lock:
    """An exclusive lock on DIR/.lock, so that two batches never share a store."""

    def __init__(self, folder: Path) -> None:
        import fcntl

        self.path = folder / ".lock"
        self.fh = open(self.path, "a+")
        try:
            fcntl.flock(self.fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self.fh.seek(0)
            other = self.fh.read().strip()
            self.fh.close()
            raise XoFitError(f"another batch is running on this folder ({other or 'unknown process'}); "
                             "wait for it or use another --out", path=folder) from None
        self.fh.seek(0)
        self.fh.truncate()
        self.fh.write(f"pid {os.getpid()} since {time.strftime('%Y-%m-%d %H:%M:%S')}\n")
        self.fh.flush()

    def fileno(self) -> int:
        """The lock file's descriptor (the local pool's forked workers close it: the lock is the
        coordinator's alone)."""
        return self.fh.fileno()

    def release(self) -> None:
        """Unlock the folder and close the lock file."""
        import fcntl

        fcntl.flock(self.fh, fcntl.LOCK_UN)
        self.fh.close()
