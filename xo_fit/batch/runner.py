"""Unattended batches: many jobs, a results store, resume, a local process pool or a Dask cluster.

``run_batch`` takes job files (or globs); a job with a [sweep] stands for its
variants (at most :data:`xo_fit.job.sweep.MAX_VARIANTS` per file). For each
job it runs the asked stages (fit, snap, spread) in one worker, whole jobs at a
time (never single cost evaluations: shipping those costs more than computing
them). Its steps: collect the jobs (:mod:`~xo_fit.batch.collect`: each job
file and data file read once), take the folder (lock and store,
:mod:`~xo_fit.batch.store`), plan what is left to do (resume), run it on the
local pool (:mod:`~xo_fit.batch.local`) or a Dask cluster
(:mod:`~xo_fit.batch.cluster`), where each worker builds and loads its own jobs
(:mod:`~xo_fit.batch.worker`), record what comes back, write summary.csv
(:mod:`~xo_fit.batch.summary`).

The store is ``DIR/results.sqlite``: one row per job and stage. Each job has
its folder ``DIR/<job>/`` with one subfolder per stage. Only the coordinating
process writes the store and the folders; workers compute in private temporary
folders and send their files back, so workers need no shared disk.

Resume: running the same batch again skips every stage already done for an
unchanged job (same hash), reruns a job whose file or data changed, continues a
job from its last finished stage (redoing a finished stage whose result.json is
gone or damaged). A second batch on the same DIR at the same time is refused.

Stops: Ctrl-C or SIGTERM, a full disk, a lost cluster end the batch with one
:class:`~xo_fit.batch.store.BatchStopped`; its unfinished stages are marked
"interrupted" (never left "running"), to be run by the next batch.
"""

from __future__ import annotations

import errno
import json
import math
import os
import signal
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from collections.abc import Iterator

from xo_fit.batch.collect import Collection, Item, collect, folder_name
from xo_fit.batch.store import BatchStopped, Lock, Store
from xo_fit.batch.summary import write_summary
from xo_fit.errors import XoFitError
from xo_fit.io.results import atomic_path

STAGES = ("fit", "snap", "spread")
#: Write errors that no other job would escape: the batch stops instead of failing job after job.
DISK_ERRORS = (errno.ENOSPC, errno.EDQUOT, errno.EROFS)

__all__ = ["BatchReport", "BatchStopped", "run_batch", "write_summary"]


@dataclass
class BatchReport:
    """What a batch did: jobs in all, already done, run now, failed; the summary rows; the failures of this run
    as (job, stage, message)."""

    total: int
    skipped: int
    done: int
    failed: int
    summary: list[dict]
    failures: list[tuple[str, str, str]] = field(default_factory=list)


class Terminated(BaseException):
    """SIGTERM arrived (raised in the coordinator, like KeyboardInterrupt for Ctrl-C)."""


@contextmanager
def signals_stop() -> Iterator[None]:
    """SIGTERM raises :class:`Terminated` in the block (in the main thread; elsewhere nothing changes)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        raise Terminated()

    old = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old)


def stage_values(path: Path) -> dict[str, float] | None:
    """The part values of a finished stage's result.json, or None when it is missing or damaged."""
    try:
        parts = json.loads(path.read_text(encoding="utf-8"))["parts"]
        values = {str(n): float(e["value"]) for n, e in parts.items()}
    except (OSError, ValueError, TypeError, KeyError, AttributeError, RecursionError):
        return None
    return values if all(math.isfinite(v) for v in values.values()) else None


def plan_job(it: Item, rows: dict, out: Path, stages: list[str]) -> tuple[list[str], str | None, dict | None]:
    """The stages ``it`` still needs, the finished stage it continues from and that stage's part values. A
    finished stage counts when its row is done for this hash and its result.json is there; the one continued
    from must be readable, else it is redone (and so on back)."""
    folder = out / folder_name(it.name)
    finished: list[str] = []
    need: list[str] = []
    for st in stages:
        r = rows.get((it.name, st))
        if (not need and r is not None and r["status"] == "done" and r["hash"] == it.hash
                and (folder / st / "result.json").is_file()):
            finished.append(st)
        else:
            need.append(st)
    while need and finished:
        values = stage_values(folder / finished[-1] / "result.json")
        if values is not None:
            return need, finished[-1], values
        need.insert(0, finished.pop())
    return need, None, None


def plan(collection: Collection, store: Store, out: Path, stages: list[str], plots: bool):
    """The jobs to run now as (item, stages, payload), how many are done already; the jobs that cannot be read
    recorded failed (and those that now can, forgotten as such)."""
    rows = store.rows()
    jobs, skipped = [], 0
    with store.batch():
        for it in collection.items:
            if it.error is not None:
                store.failed(it.name, "load", it.hash, it.error, started=time.time(), folder=folder_name(it.name),
                             source=str(it.source))
                continue
            if (it.name, "load") in rows:
                store.forget_load_failures([it.name])
            need, previous, start = plan_job(it, rows, out, stages)
            if not need:
                skipped += 1
                continue
            payload = {"name": it.name, "source": str(it.source), "combo": it.combo, "data": it.data, "stages": need,
                       "start": start, "previous": previous, "plots": plots,
                       "home": str((out / folder_name(it.name)).resolve())}
            jobs.append((it, need, payload))
        store.started((it.name, st, it.hash, folder_name(it.name), str(it.source)) for it, need, _ in jobs
                      for st in need)
    return jobs, skipped


class Recorder:
    """What comes back from the workers, written into the folder and the store: each stage's files then its
    row; a job's end (done or failed); the counts and the progress."""

    def __init__(self, out: Path, store: Store, progress, total: int, workers: int) -> None:
        self.out, self.store, self.progress, self.total, self.workers = out, store, progress, total, workers
        self.done = self.failed = 0
        self.recorded: dict[str, set[str]] = {}
        self.write_failed: dict[str, tuple[str, str]] = {}
        self.failures: list[tuple[str, str, str]] = []
        self.t0 = time.time()

    def batch(self):
        """A block whose store changes are committed together, once, at its end (:meth:`Store.batch`)."""
        return self.store.batch()

    def stage(self, it: Item, res: dict) -> None:
        """One finished stage: its files written (atomically), then its row done with its own times."""
        seen = self.recorded.setdefault(it.name, set())
        if res["stage"] in seen or it.name in self.write_failed:
            return
        folder = self.out / folder_name(it.name)
        try:
            for rel, data in res["files"].items():
                with atomic_path(folder / rel) as tmp:
                    tmp.write_bytes(data)
        except OSError as e:
            if e.errno in DISK_ERRORS:
                raise BatchStopped(f"cannot write the results of {it.name}: {e.strerror or e}; the unfinished "
                                   "stages are marked interrupted: make room and run the batch again",
                                   path=folder) from None
            self.write_failed[it.name] = (res["stage"], f"cannot write the results of {it.name} into {folder}: "
                                                        f"{e.strerror or e}")
            return
        self.store.done(it.name, res["stage"], it.hash, started=res.get("started", time.time()),
                        finished=res.get("finished", time.time()), cost=res["cost"], metrics=res["metrics"])
        seen.add(res["stage"])

    def finish(self, it: Item, need: list[str], res: dict) -> None:
        """A job's end: stages not yet recorded recorded; a failure on its stage, the later stages "not run"."""
        for stage_res in res["stages"]:
            self.stage(it, stage_res)
        error = res["error"]
        if it.name in self.write_failed:
            stage, message = self.write_failed[it.name]
            error = {"stage": stage, "message": message}
        if error is None:
            self.done += 1
        else:
            self.failed += 1
            self.failures.append((it.name, error["stage"], error["message"]))
            self.store.failed(it.name, error["stage"], it.hash, error["message"])
            for st in need[need.index(error["stage"]) + 1:] if error["stage"] in need else need:
                self.store.failed(it.name, st, it.hash, f"not run: stage {error['stage']} failed")
        self.report()

    def report(self) -> None:
        """Call the progress callback, if any, with (done, failed, running, total, start time in s since the
        epoch)."""
        if self.progress:
            left = self.total - self.done - self.failed
            self.progress(self.done, self.failed, min(self.workers, left), self.total, self.t0)


def check_stages(stages: list[str]) -> None:
    """Raise XoFitError (key ``--stages``) for a stage name that is not one of fit, snap, spread."""
    for st in stages:
        if st not in STAGES:
            raise XoFitError(f"unknown stage '{st}'; expected fit, snap, spread", key="--stages")


def take_folder(out: Path) -> tuple[Lock, Store]:
    """The batch folder, locked, and its store; one line when either cannot be had."""
    try:
        out.mkdir(parents=True, exist_ok=True)
        lock = Lock(out)
    except OSError as e:
        raise XoFitError(f"cannot use this folder for a batch: {e.strerror or e}", path=out, key="--out") from None
    try:
        return lock, Store(out)
    except BaseException:
        lock.release()
        raise


def execute(jobs: list, recorder: Recorder, collection: Collection, workers: int, scheduler: str | None,
            lock: Lock) -> None:
    """The jobs run on the cluster or on the local pool."""
    from xo_fit.batch.cluster import run_dask
    from xo_fit.batch.local import run_local

    recorder.report()
    if scheduler:
        run_dask(scheduler, jobs, recorder, collection)
    else:
        run_local(jobs, workers, recorder, [lock.fileno()])


def interrupted(e: BaseException) -> BatchStopped:
    """The batch-stopping error for an interruption: exit 130 for Ctrl-C, 128 + SIGTERM for a
    :class:`Terminated`."""
    name, code = ("SIGTERM", 128 + signal.SIGTERM) if isinstance(e, Terminated) else ("Ctrl-C", 130)
    return BatchStopped(f"the batch was interrupted ({name}); the unfinished stages are marked interrupted: run "
                        "the batch again to finish them", code=code)


@contextmanager
def signals_ignored() -> Iterator[None]:
    """Ctrl-C and SIGTERM ignored in the block (the batch is already stopping: its rows get marked)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = {s: signal.signal(s, signal.SIG_IGN) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)


def run_steps(collection: Collection, out: Path, store: Store, lock: Lock, stages: list[str], workers: int,
              scheduler: str | None, plots: bool, progress) -> BatchReport:
    """Plan, run, record, summarise; however it ends, no row is left running."""
    try:
        jobs, skipped = plan(collection, store, out, stages, plots)
        recorder = Recorder(out, store, progress, len(jobs), workers)
        for it in collection.items:
            if it.error is not None:
                recorder.failed += 1
                recorder.total += 1
                recorder.failures.append((it.name, "load", it.error))
        execute(jobs, recorder, collection, workers, scheduler, lock)
        store.interrupt_running()  # none should be left; never one said to run still
    except BaseException:
        with signals_ignored():
            store.interrupt_running()
            try:
                write_summary(out, store)
            except (OSError, XoFitError):
                pass
        raise
    summary = write_summary(out, store)
    return BatchReport(total=len(collection.items), skipped=skipped, done=recorder.done, failed=recorder.failed,
                       summary=summary, failures=recorder.failures)


def run_batch(patterns: list[str], out: Path, stages: list[str], *, workers: int | None = None,
              scheduler: str | None = None, plots: bool = True, progress=None) -> BatchReport:
    """Run (or resume) a batch; returns counts, the summary rows (also written to summary.csv) and the failures.

    Parameters
    ----------
    patterns : list of str
        Job files or globs.
    out : Path
        The batch folder (results.sqlite, summary.csv, one folder per job).
    stages : list of str
        Some of fit, snap, spread, in order.
    workers : int, optional
        Local worker processes (dimensionless; default: the cores); ignored with ``scheduler``.
    scheduler : str, optional
        A running Dask scheduler's address (tcp://HOST:PORT) to run the jobs on instead.
    plots : bool
        Write the PNGs.
    progress : callable, optional
        Called as ``progress(done, failed, running, total, t0)`` as jobs end (t0 the start, in s since the
        epoch).

    Returns
    -------
    BatchReport
        The counts, the summary rows (also written to summary.csv) and the failures.

    Raises
    ------
    XoFitError
        Bad input (no job files, a [sweep] over :data:`~xo_fit.job.sweep.MAX_VARIANTS`, two jobs of one name, a
        locked or damaged folder, an unreachable scheduler).
    BatchStopped
        The batch stopped early (Ctrl-C, SIGTERM, a full disk, a lost scheduler); its unfinished stages are marked
        interrupted; ``code`` is the exit code.
    """
    check_stages(stages)
    if scheduler:
        from xo_fit.batch.cluster import check_address

        check_address(scheduler)
    workers = workers or os.cpu_count() or 1
    with signals_stop():
        try:
            collection = collect(patterns, keep_bytes=bool(scheduler))
            lock, store = take_folder(out)
        except (KeyboardInterrupt, Terminated) as e:
            raise interrupted(e) from None
        try:
            return run_steps(collection, out, store, lock, stages, workers, scheduler, plots, progress)
        except (KeyboardInterrupt, Terminated) as e:
            raise interrupted(e) from None
        finally:
            store.close()
            lock.release()
