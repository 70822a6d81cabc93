"""Unattended batches: many jobs, a results store, resume, a local process pool or a Dask cluster.

``run_batch`` takes job files (or globs); a job with a [sweep] stands for
its variants (:func:`xo_fit.job.expand_job`). For each job it runs the asked
stages (fit, snap, spread) in one worker, whole jobs at a time (never single
cost evaluations: shipping those costs more than computing them).

The store is ``DIR/results.sqlite`` (stdlib sqlite3): one row per job and
stage with the job's name, a hash of the job and of every data file it reads,
the status, start and finish times, cost, metrics and the error of a failure,
each change committed as it happens. Each job has its folder ``DIR/<job>/``
with one subfolder per stage. Only the coordinating process writes the store
and the folders; workers compute in private temporary folders and send their
files back, so workers need no shared disk.

Resume: running the same batch again skips every stage already done for an
unchanged job (same hash), reruns a job whose file or data changed, and
continues a job from its last finished stage. A second batch on the same DIR
at the same time is refused (an exclusive lock on ``DIR/.lock``).

Execution: a local pool of single-threaded worker processes by default; with
``scheduler`` (tcp://HOST:PORT) the same jobs go to a running Dask
distributed cluster, whose workers need xo_fit installed. A Dask scheduler
runs whatever it is sent: keep a cluster on a trusted network, or behind
Dask's TLS security settings.
"""

from __future__ import annotations

import glob
import hashlib
import json
import os
import re
import shutil
import sqlite3
import tempfile
import time
import traceback
import uuid
from dataclasses import dataclass
from pathlib import Path

from xo_fit.errors import XoFitError
from xo_fit.io.results import atomic_path, write_rows

SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    job TEXT NOT NULL,
    stage TEXT NOT NULL,
    hash TEXT NOT NULL,
    status TEXT NOT NULL,          -- running, done, failed
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
#: How long a batch waits for a Dask worker to connect to the scheduler, s.
DASK_WORKER_WAIT = 60.0
THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS")


@dataclass
class Item:
    """One job of a batch: its name and folder, its source file, the job, its hash; or the error loading it."""

    name: str
    source: Path
    job: object | None
    hash: str
    error: str | None = None


def _folder_name(name: str) -> str:
    """The job's folder in the batch: its name where that is a plain file name, else a cleaned name with a
    short hash of the real one, so that two names never share a folder ("a b" and "a_b")."""
    safe = re.sub(r"[^A-Za-z0-9_.=-]+", "_", name)[:120]
    if safe == name and name not in (".", ".."):
        return name
    return f"{safe.strip('.') or 'job'}-{hashlib.sha256(name.encode()).hexdigest()[:8]}"


def _data_files(job) -> list[Path]:
    files = []
    from xo_fit.job.model import FileCurve, SplicedResponse

    for d in job.drivers:
        for src in (d.response, d.impedance):
            if isinstance(src, FileCurve):
                files.append(src.path)
            elif isinstance(src, SplicedResponse):
                files += [src.near, src.far]
        if d.angles is not None:
            files += sorted({path for path, _ in d.angles.files().values()})
    if job.snap.inventory is not None:
        files.append(job.snap.inventory)
    curve = job.target.curve
    if curve and ("/" in curve or "." in curve):
        p = Path(curve)
        files.append(p if p.is_absolute() else job.folder / p)
    return files


def job_hash(job, document: dict) -> str:
    """sha256 of the job's resolved document and the bytes of every file it reads."""
    h = hashlib.sha256(json.dumps(document, sort_keys=True, default=str).encode())
    for f in _data_files(job):
        h.update(str(f).encode())
        try:
            h.update(Path(f).read_bytes())
        except OSError:
            h.update(b"<missing>")
    return h.hexdigest()


def collect(patterns: list[str]) -> list[Item]:
    """The jobs of a batch: files or globs, each expanded into its [sweep] variants; names must be unique."""
    from xo_fit.job.sweep import expand_job

    paths: list[Path] = []
    for pat in patterns:
        matches = sorted(glob.glob(pat)) if any(ch in pat for ch in "*?[") else [pat]
        if not matches:
            raise XoFitError(f"no job files match '{pat}'")
        paths += [Path(m) for m in matches]
    items: list[Item] = []
    for p in paths:
        try:
            for job, doc in expand_job(p):
                items.append(Item(job.name, p, job, job_hash(job, doc)))
        except XoFitError as e:
            if not p.exists():
                raise
            h = hashlib.sha256(p.read_bytes()).hexdigest()
            items.append(Item(p.stem, p, None, h, error=str(e)))
    seen: dict[str, Path] = {}
    for it in items:
        if it.name in seen:
            raise XoFitError(f"two jobs are named '{it.name}' ({seen[it.name]} and {it.source}); give them distinct "
                             "names", path=it.source)
        seen[it.name] = it.source
    return items


class Store:
    """The batch's sqlite store; every change is committed at once."""

    def __init__(self, folder: Path) -> None:
        self.path = folder / "results.sqlite"
        try:
            self.db = sqlite3.connect(self.path, timeout=30)
            self.db.execute(SCHEMA)
            self.db.commit()
            self.db.execute("SELECT job, stage, hash, status, started, finished, cost, metrics, error, folder, "
                            "source FROM runs LIMIT 1").fetchall()
        except sqlite3.DatabaseError as e:
            raise XoFitError(f"the results store is damaged or not one ({e}); move it away to start the batch "
                             "afresh (the job folders are kept)", path=self.path) from None

    def rows(self) -> dict[tuple[str, str], dict]:
        cur = self.db.execute("SELECT job, stage, hash, status, started, finished, cost, metrics, error, folder, "
                              "source FROM runs")
        cols = [c[0] for c in cur.description]
        return {(r[0], r[1]): dict(zip(cols, r)) for r in cur.fetchall()}

    def set(self, job: str, stage: str, **fields) -> None:
        keys = ["job", "stage"] + list(fields)
        vals = [job, stage] + [json.dumps(v) if k == "metrics" and v is not None else v for k, v in fields.items()]
        self.db.execute(f"INSERT INTO runs ({', '.join(keys)}) VALUES ({', '.join('?' * len(keys))}) "
                        f"ON CONFLICT(job, stage) DO UPDATE SET " + ", ".join(f"{k} = excluded.{k}" for k in fields),
                        vals)
        self.db.commit()

    def close(self) -> None:
        self.db.close()


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

    def release(self) -> None:
        import fcntl

        fcntl.flock(self.fh, fcntl.LOCK_UN)
        self.fh.close()


# ----------------------------------------------------------------------------- the worker


def _single_threaded() -> None:
    for var in THREAD_VARS:
        os.environ[var] = "1"
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except Exception:  # pragma: no cover - threadpoolctl missing: the environment variables still apply
        pass


def work(payload: dict, emit=None) -> dict:
    """Run one job's stages (in a worker): payload has system, stages, start (values or None), inventory, plots.

    Returns {"stages": [{"stage", "cost", "metrics", "started", "finished", "files": {relative path: bytes}}],
    "error": None or {"stage", "message"}, "seconds"}. ``emit``, when given, receives each stage's entry as
    soon as the stage ends (so that a worker that dies later loses no finished stage). Nothing here touches the
    batch's folder.
    """
    import numpy as np

    from xo_fit.errors import XoFitError as UserError
    from xo_fit.batch.tasks import fit_stage, snap_stage, spread_stage

    _single_threaded()
    t0 = time.time()
    system = payload["system"]
    values = payload.get("start")
    info: dict = {}
    tmp = Path(tempfile.mkdtemp(prefix="xo_fit-job-"))
    done = []
    error = None
    try:
        for st in payload["stages"]:
            folder = tmp / st
            home = Path(payload["home"]) / st if payload.get("home") else None
            started = time.time()
            try:
                if st == "fit":
                    o = fit_stage(system, folder, plots=payload.get("plots", True), home=home)
                elif st == "snap":
                    start = values if values is not None else system.values()
                    o = snap_stage(system, folder, np.asarray(start), inventory=payload.get("inventory"),
                                   plots=payload.get("plots", True), home=home)
                else:
                    start = values if values is not None else system.values()
                    o = spread_stage(system, folder, np.asarray(start), plots=payload.get("plots", True), home=home,
                                     part_info=info)
            except UserError as e:
                error = {"stage": st, "message": str(e)}
                break
            except Exception as e:  # a bug: keep the traceback in the store
                error = {"stage": st, "message": f"{type(e).__name__}: {e}\n{traceback.format_exc(limit=6)}"}
                break
            values = [o.document["parts"][n]["value"] for n in system.part_names]
            info = {n: {k: v for k, v in e.items() if k not in ("value", "unit", "text", "limit")}
                    for n, e in o.document["parts"].items()}
            files = {f"{st}/{p.name}": p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}
            metrics = dict(o.metrics)
            if system.job.swept:
                metrics["swept"] = dict(system.job.swept)
            if st == "spread":
                y = o.document.get("spread", {}).get("yield", {})
                metrics["yield_band"], metrics["yield_limits"] = y.get("within_band"), y.get("meeting_limits")
            done.append({"stage": st, "cost": o.cost, "metrics": metrics, "files": files, "started": started,
                         "finished": time.time()})
            if emit is not None:
                emit({"stage_done": done[-1]})
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return {"stages": done, "error": error, "seconds": time.time() - t0}


# ----------------------------------------------------------------------------- the coordinator


@dataclass
class BatchReport:
    total: int
    skipped: int
    done: int
    failed: int
    summary: list[dict]


def _start_values(out: Path, item: Item, previous: str | None, part_names) -> list[float] | None:
    if previous is None:
        return None
    doc = json.loads((out / _folder_name(item.name) / previous / "result.json").read_text())
    return [doc["parts"][n]["value"] for n in part_names]


def run_batch(patterns: list[str], out: Path, stages: list[str], *, workers: int | None = None,
              scheduler: str | None = None, plots: bool = True, progress=None) -> BatchReport:
    """Run (or resume) a batch; returns counts and the summary rows (also written to summary.csv)."""
    from xo_fit.io.inventory import read_inventory
    from xo_fit.model.system import load_system

    for st in stages:
        if st not in ("fit", "snap", "spread"):
            raise XoFitError(f"unknown stage '{st}'; expected fit, snap, spread", key="--stages")
    items = collect(patterns)
    try:
        out.mkdir(parents=True, exist_ok=True)
        lock = Lock(out)
    except OSError as e:
        raise XoFitError(f"cannot use this folder for a batch: {e.strerror or e}", path=out, key="--out") from None
    try:
        store = Store(out)
    except BaseException:
        lock.release()
        raise
    try:
        rows = store.rows()
        todo = []
        skipped = 0
        for it in items:
            if it.error is not None:
                store.set(it.name, "load", hash=it.hash, status="failed", started=time.time(), finished=time.time(),
                          error=it.error, folder=_folder_name(it.name), source=str(it.source))
                continue
            store.db.execute("DELETE FROM runs WHERE job = ? AND stage = 'load'", (it.name,))
            store.db.commit()
            need, previous = [], None
            for st in stages:
                r = rows.get((it.name, st))
                kept = (out / _folder_name(it.name) / st / "result.json").is_file()  # its folder may be gone
                if not need and r is not None and r["status"] == "done" and r["hash"] == it.hash and kept:
                    previous = st
                    continue
                need.append(st)
            if not need:
                skipped += 1
                continue
            todo.append((it, need, previous))
        done = failed = 0
        failed += sum(1 for it in items if it.error is not None)
        payloads = []
        for it, need, previous in todo:
            try:
                system = load_system(it.job)
                inv = read_inventory(it.job.snap.inventory) if "snap" in need and it.job.snap.inventory else None
                start = _start_values(out, it, previous, system.part_names)
            except XoFitError as e:
                store.set(it.name, need[0], hash=it.hash, status="failed", started=time.time(), finished=time.time(),
                          error=str(e), folder=_folder_name(it.name), source=str(it.source))
                failed += 1
                continue
            payloads.append((it, need, {"system": system, "stages": need, "start": start, "inventory": inv,
                                        "plots": plots, "home": str((out / _folder_name(it.name)).resolve())}))
        for it, need, _ in payloads:
            for st in need:
                store.set(it.name, st, hash=it.hash, status="running", started=time.time(), finished=None,
                          cost=None, metrics=None, error=None, folder=_folder_name(it.name), source=str(it.source))

        def record(it: Item, stage_res: dict) -> None:
            """One finished stage: its files written, its row done (with the stage's own start and end)."""
            folder = out / _folder_name(it.name)
            try:
                for rel, data in stage_res["files"].items():
                    with atomic_path(folder / rel) as tmp:
                        tmp.write_bytes(data)
            except OSError as e:
                raise _WriteFailed(f"cannot write the results of {it.name} into {folder}: {e.strerror or e}") from e
            store.set(it.name, stage_res["stage"], hash=it.hash, status="done",
                      started=stage_res.get("started", time.time()), finished=stage_res.get("finished", time.time()),
                      cost=stage_res["cost"], metrics=stage_res["metrics"], error=None)

        def finish(it: Item, need: list[str], res: dict) -> bool:
            try:
                for stage_res in res["stages"]:
                    if not stage_res.get("recorded"):
                        record(it, stage_res)
            except _WriteFailed as e:
                res = {"stages": [], "error": {"stage": need[0], "message": str(e)}}
            if res["error"] is not None:
                store.set(it.name, res["error"]["stage"], hash=it.hash, status="failed", finished=time.time(),
                          error=res["error"]["message"])
                rest = need[need.index(res["error"]["stage"]) + 1:]
                for st in rest:
                    store.set(it.name, st, hash=it.hash, status="failed", finished=time.time(),
                              error=f"not run: stage {res['error']['stage']} failed")
                return False
            return True

        t0 = time.time()
        n = len(payloads)
        if progress:
            progress(0, failed, 0, n, t0)
        try:
            if scheduler:
                done, failed = _run_dask(scheduler, payloads, finish, progress, done, failed, n, t0)
            else:
                done, failed = _run_local(workers or os.cpu_count() or 1, payloads, finish, record, progress, done,
                                          failed, n, t0, lock)
        finally:
            _no_running_rows(store)
        summary = write_summary(out, store)
        return BatchReport(total=len(items), skipped=skipped, done=done, failed=failed, summary=summary)
    finally:
        store.close()
        lock.release()


class _WriteFailed(Exception):
    """A job's results could not be written into the batch folder (disk full, read-only)."""


def _no_running_rows(store: "Store") -> None:
    """Rows still "running" when the coordinator stops (interrupted, failing) become failed, to be rerun."""
    try:
        store.db.execute("UPDATE runs SET status = 'failed', error = COALESCE(error, 'interrupted: the batch "
                         "stopped before this stage ended; run the batch again') WHERE status = 'running'")
        store.db.commit()
    except sqlite3.Error:
        pass


def _die_with_parent() -> None:
    """In a worker: end when the coordinator ends (kill -9 included), never linger holding its files."""
    parent = os.getppid()
    try:  # Linux: the kernel sends SIGKILL when the parent dies
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, 9)  # PR_SET_PDEATHSIG, SIGKILL
    except Exception:  # pragma: no cover - elsewhere a watcher thread does it
        pass
    import threading

    def watch() -> None:
        while True:
            time.sleep(1.0)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, daemon=True).start()


def _child(conn, payload: dict, close_fds: list[int]) -> None:
    """A worker process: one job, its stages reported through ``conn`` as they end, then the whole result."""
    for fd in close_fds:  # the coordinator's lock and store are not the worker's to hold
        try:
            os.close(fd)
        except OSError:
            pass
    _die_with_parent()
    _single_threaded()
    try:
        res = work(payload, emit=conn.send)
        conn.send({"final": res})
    finally:
        conn.close()


def _run_local(workers, payloads, finish, record, progress, done, failed, n, t0, lock):
    """One process per job, at most ``workers`` at a time. A job whose process dies (a crash, kill -9) is run once
    more from its last finished stage, then recorded failed with the cause; the other jobs are not touched."""
    import multiprocessing as mp
    from collections import deque
    from multiprocessing.connection import wait

    if not payloads:
        return done, failed
    for var in THREAD_VARS:  # before the workers start, so that every worker inherits them
        os.environ.setdefault(var, "1")
    ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else mp.get_context()
    close_fds = [lock.fh.fileno()]
    queue = deque((it, need, p, 0) for it, need, p in payloads)
    running: dict = {}  # connection -> [process, item, need, payload, attempt, stages recorded]
    try:
        while queue or running:
            while queue and len(running) < workers:
                it, need, p, attempt = queue.popleft()
                here, there = ctx.Pipe(duplex=False)
                proc = ctx.Process(target=_child, args=(there, p, close_fds), daemon=True)
                proc.start()
                there.close()
                running[here] = [proc, it, need, p, attempt, []]
            for conn in wait(list(running), timeout=5.0):
                proc, it, need, p, attempt, recorded = running[conn]
                try:
                    msg = conn.recv()
                except (EOFError, OSError):
                    msg = None
                if msg is not None and "stage_done" in msg:
                    stage_res = msg["stage_done"]
                    try:
                        record(it, stage_res)
                        stage_res["recorded"] = True
                    except _WriteFailed:
                        pass  # finish() reports it with the job's final result
                    recorded.append(stage_res)
                    continue
                del running[conn]
                conn.close()
                proc.join()
                if msg is not None:
                    res = msg["final"]
                    for r in res["stages"]:
                        r["recorded"] = any(x["stage"] == r["stage"] and x.get("recorded") for x in recorded)
                else:  # the process died: retry once from the last recorded stage, else record the cause
                    left = need[len(recorded):]
                    cause = (f"the worker process died (signal {-proc.exitcode})" if proc.exitcode and proc.exitcode < 0
                             else f"the worker process died (exit code {proc.exitcode})")
                    if attempt == 0 and left:
                        retry = dict(p, stages=left)
                        if recorded:
                            doc = json.loads(recorded[-1]["files"][f"{recorded[-1]['stage']}/result.json"])
                            retry["start"] = [doc["parts"][n_]["value"] for n_ in p["system"].part_names]
                        queue.append((it, left, retry, 1))
                        continue
                    res = {"stages": [], "error": {"stage": left[0] if left else need[-1],
                                                   "message": f"{cause}, twice; not retried again"}}
                    need = left or need
                ok = finish(it, need, res)
                done += ok
                failed += not ok
                if progress:
                    progress(done, failed, len(running), n, t0)
    finally:
        for proc, *_ in running.values():
            proc.kill()
    return done, failed


def _drain(futures: dict, completed, failure: str, finish, progress, done, failed, n, t0):
    """Take finished jobs as they come (local or Dask futures), record them, report progress."""
    running = len(futures)
    for fut in completed:
        it, need = futures[fut]
        running -= 1
        try:
            res = fut.result()
        except Exception as e:  # the cluster task itself died
            res = {"stages": [], "error": {"stage": need[0], "message": f"{failure} for job {it.name}: "
                                                                       f"{type(e).__name__}: {e}"}}
        ok = finish(it, need, res)
        done += ok
        failed += not ok
        if progress:
            progress(done, failed, running, n, t0)
    return done, failed


def _run_dask(address, payloads, finish, progress, done, failed, n, t0):
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise XoFitError("--scheduler needs Dask's distributed package: pip install 'xo_fit[cluster]'") from None
    try:
        client = Client(address, timeout="10s")
    except (OSError, TimeoutError) as e:
        raise XoFitError(f"cannot reach the Dask scheduler at {address}: {e}", key="--scheduler") from None
    try:
        waited = time.time()
        while not client.scheduler_info().get("workers"):
            if time.time() - waited > DASK_WORKER_WAIT:
                raise XoFitError(f"no Dask worker is connected to the scheduler at {address} (waited "
                                 f"{DASK_WORKER_WAIT:g} s); start workers with xo_fit installed", key="--scheduler")
            time.sleep(0.5)
        futures = {}
        for it, need, p in payloads:
            # pure=False: equal arguments must not be merged into one task; the payload is one positional argument;
            # the key names the job, so the cluster's dashboard and errors say which one
            fut = client.submit(work, p, pure=False, key=f"xo_fit-{_folder_name(it.name)}-{uuid.uuid4().hex[:8]}")
            futures[fut] = (it, need)
        done, failed = _drain(futures, as_completed(list(futures)), "cluster task failed", finish, progress, done,
                              failed, n, t0)
    finally:
        client.close()
    return done, failed


def write_summary(out: Path, store: Store | None = None) -> list[dict]:
    """The jobs sorted by cost (of their last stage done) with the key metrics; written to summary.csv."""
    own = store is None
    store = store or Store(out)
    try:
        rows = store.rows()
    finally:
        if own:
            store.close()
    jobs: dict[str, dict] = {}
    order = {"load": -1, "fit": 0, "snap": 1, "spread": 2}
    for (job, stage), r in rows.items():
        j = jobs.setdefault(job, {"job": job, "status": "done", "stage": None, "cost": None, "rms_error_db": None,
                                  "max_error_db": None, "phase_mismatch_deg": None, "impedance_min_ohm": None,
                                  "yield_band": None, "yield_limits": None, "swept": {}, "error": "",
                                  "folder": r["folder"]})
        m = json.loads(r["metrics"]) if r["metrics"] else {}
        j["swept"].update(m.get("swept") or {})
        if stage == "spread" and r["status"] == "done":
            j["yield_band"], j["yield_limits"] = m.get("yield_band"), m.get("yield_limits")
        if r["status"] != "done":
            j["status"] = r["status"]
            if r["error"] and not j["error"]:
                j["error"] = r["error"].splitlines()[0][:200]
            continue
        if j["stage"] is None or order[stage] > order[j["stage"]]:
            j.update(stage=stage, cost=r["cost"], **{k: m.get(k) for k in ("rms_error_db", "max_error_db",
                                                                          "phase_mismatch_deg", "impedance_min_ohm")})
    summary = sorted(jobs.values(), key=lambda j: (j["status"] != "done", j["cost"] if j["cost"] is not None
                                                   else float("inf"), j["job"]))
    swept = sorted({k for j in summary for k in j["swept"]})
    for j in summary:
        for k in swept:
            j[f"sweep_{k}"] = j["swept"].get(k)
    columns = (["job"] + [f"sweep_{k}" for k in swept] +
               ["status", "stage", "cost", "rms_error_db", "max_error_db", "phase_mismatch_deg", "impedance_min_ohm",
                "yield_band", "yield_limits", "folder", "error"])
    write_rows(out / "summary.csv", [{c: "" if j[c] is None else j[c] for c in columns} for j in summary],
               columns=columns)
    return summary


