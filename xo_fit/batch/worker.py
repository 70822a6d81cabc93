"""What a batch worker does for one job: build its variant, load its data, run its stages.

The payload is small (names, not data): the job file and the variant's swept
values, the stages to run, the values to start from, and, for a cluster
worker, the bytes of the files the job reads (its own disk need not hold them).
Nothing here touches the batch's folder or store: each stage's files come back
as bytes, for the coordinator to write.
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import tempfile
import threading
import time
import traceback
from collections import OrderedDict
from pathlib import Path

from xo_fit.errors import XoFitError

THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS")
#: Sections of a job that :func:`~xo_fit.model.system.load_system` does not read: variants that differ only in
#: them (seeds, budgets, series, samples) share their loaded system in a worker.
NOT_LOADED = ("name", "search", "snap", "spread")
#: How many loaded systems a worker keeps.
KEPT_SYSTEMS = 8
_READY = False
_SYSTEMS: OrderedDict = OrderedDict()
_SYSTEMS_LOCK = threading.Lock()  # a Dask worker may run several jobs at once, on threads


def single_threaded() -> None:
    """This process computes on one thread (BLAS and OpenMP too), and keeps parsed curves between jobs."""
    global _READY
    if _READY:
        return
    for var in THREAD_VARS:
        os.environ[var] = "1"
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except Exception:  # pragma: no cover - threadpoolctl missing: the environment variables still apply
        pass
    from xo_fit.io.measure import keep_curves

    keep_curves(True)
    _READY = True


def failure(stage: str, e: BaseException) -> dict:
    """A stage's error: a user error's one line; a bug's message and the traceback (kept in the store)."""
    if isinstance(e, XoFitError):
        return {"stage": stage, "message": str(e)}
    return {"stage": stage, "message": f"{type(e).__name__}: {e}\n{traceback.format_exc(limit=6)}"}


def load(payload: dict):
    """The job's system and inventory, built and read here (from the supplied files, if any)."""
    from xo_fit.errors import supplied_files
    from xo_fit.io.inventory import read_inventory
    from xo_fit.job.sweep import read_sweep
    from xo_fit.model.system import load_system

    with supplied_files(payload.get("files")):
        job, doc = read_sweep(payload["source"]).variant(tuple(payload.get("combo", ())))
        if job.name != payload["name"]:
            raise XoFitError(f"the job file now names this job '{job.name}', not '{payload['name']}' (changed "
                             "during the batch?); run the batch again", path=payload["source"])
        system = kept_system(job, doc, payload, load_system)
        inventory = (read_inventory(job.snap.inventory) if "snap" in payload["stages"] and job.snap.inventory
                     else None)
    return system, inventory


def kept_system(job, doc: dict, payload: dict, load_system):
    """The job's system: loaded, or a system this worker loaded for another variant of the same file and data
    that differs only in sections not loaded (:data:`NOT_LOADED`), given this job (and its own warnings)."""
    if not payload.get("data"):
        return load_system(job)
    key = (payload["source"], payload["data"],
           json.dumps({k: v for k, v in doc.items() if k not in NOT_LOADED}, sort_keys=True, default=str))
    with _SYSTEMS_LOCK:
        kept = _SYSTEMS.get(key)
        if kept is not None:
            _SYSTEMS.move_to_end(key)
    if kept is None:
        system = load_system(job)
        with _SYSTEMS_LOCK:
            _SYSTEMS[key] = system
            while len(_SYSTEMS) > KEPT_SYSTEMS:
                _SYSTEMS.popitem(last=False)
        return system
    data_warnings = kept.warnings[len(kept.job.warnings):]
    return dataclasses.replace(kept, job=job, warnings=tuple(job.warnings) + tuple(data_warnings))


def start_values(system, payload: dict) -> tuple[list[float] | None, list[str]]:
    """The values to start from and the stages to run: those asked, with the stage before them again when its
    result (read by the coordinator) lacks a part's value."""
    start, stages = payload.get("start"), list(payload["stages"])
    if start is None:
        return None, stages
    try:
        return [float(start[n]) for n in system.part_names], stages
    except (KeyError, TypeError, ValueError):
        return None, [payload["previous"], *stages] if payload.get("previous") else stages


def run_stage(st: str, system, folder: Path, values, info: dict, payload: dict, inventory):
    """Run stage ``st`` (fit, snap or spread) of a job in a worker, into ``folder``.

    Snap and spread start from ``values`` (the previous stage's part values, SI) or the job's own; ``info`` is
    the part information handed on to the spread, ``inventory`` the drawer for the snap. Returns the stage's
    :class:`~xo_fit.batch.tasks.StageOutput`.
    """
    import numpy as np

    from xo_fit.batch import tasks

    home = Path(payload["home"]) / st if payload.get("home") else None
    plots = payload.get("plots", True)
    if st == "fit":
        return tasks.fit_stage(system, folder, plots=plots, home=home)
    start = np.asarray(values if values is not None else system.values())
    if st == "snap":
        return tasks.snap_stage(system, folder, start, inventory=inventory, plots=plots, home=home)
    return tasks.spread_stage(system, folder, start, plots=plots, home=home, part_info=info)


def stage_entry(st: str, o, system, folder: Path, started: float) -> dict:
    """What the coordinator records of a finished stage: cost, metrics, times, files as bytes, part values."""
    files = {f"{st}/{p.name}": p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}
    metrics = dict(o.metrics)
    if system.job.swept:
        metrics["swept"] = dict(system.job.swept)
    if st == "spread":
        y = o.document.get("spread", {}).get("yield", {})
        metrics["yield_band"], metrics["yield_limits"] = y.get("within_band"), y.get("meeting_limits")
    values = {n: o.document["parts"][n]["value"] for n in system.part_names}
    return {"stage": st, "cost": o.cost, "metrics": metrics, "files": files, "started": started,
            "finished": time.time(), "values": values}


def work(payload: dict, emit=None, files: dict | None = None) -> dict:
    """Run one job's stages: payload has name, source, combo, stages, start ({part: value} or None), previous,
    plots, home (and files, the job's files as bytes, or give them as ``files``).

    Returns {"stages": [{"stage", "cost", "metrics", "started", "finished", "files": {relative path: bytes},
    "values"}], "error": None or {"stage", "message"}, "seconds"}. ``emit``, when given, receives each stage's
    entry as soon as the stage ends (so that a worker that dies later loses no finished stage).
    """
    from xo_fit.output.loading import part_extras

    single_threaded()
    t0 = time.time()
    if files is not None:
        payload = dict(payload, files=files)
    try:
        system, inventory = load(payload)
    except Exception as e:
        return {"stages": [], "error": failure(payload["stages"][0], e), "seconds": time.time() - t0}
    values, stages = start_values(system, payload)
    tmp = Path(tempfile.mkdtemp(prefix="xo_fit-job-"))
    done: list[dict] = []
    error = None
    info: dict = {}
    try:
        for st in stages:
            started = time.time()
            try:
                o = run_stage(st, system, tmp / st, values, info, payload, inventory)
            except Exception as e:
                error = failure(st, e)
                break
            done.append(stage_entry(st, o, system, tmp / st, started))
            values = [done[-1]["values"][n] for n in system.part_names]
            info = part_extras(o.document["parts"])
            if emit is not None:
                emit({"stage_done": done[-1]})
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return {"stages": done, "error": error, "seconds": time.time() - t0}
