"""The Dask path: the same jobs sent to a running Dask distributed cluster.

Each job file's files (the job, its measurements, inventory, curves) go to the
cluster once, as one bundle per job file, whatever its number of variants; a
task carries the variant's name and values and a reference to its bundle, and
builds and loads the job on its worker. Results are recorded as they come, a
batch of them per store transaction. A Dask scheduler runs whatever it is sent:
keep a cluster on a trusted network, or behind Dask's TLS security settings.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import logging
import re
import time
import uuid
from contextlib import contextmanager
from collections.abc import Iterator

from xo_fit.batch.collect import Collection, folder_name
from xo_fit.batch.store import BatchStopped
from xo_fit.batch.worker import work
from xo_fit.errors import XoFitError

#: How long a batch waits for a Dask worker to connect to the scheduler, s.
DASK_WORKER_WAIT = 60.0
#: How long connecting to the scheduler may take, s.
CONNECT_TIMEOUT = "10s"
SCHEMES = ("tcp", "tls", "inproc", "ucx", "ws", "wss")
CANCELLED = (asyncio.CancelledError, concurrent.futures.CancelledError)


def check_address(address: str) -> None:
    """A scheduler address of a scheme Dask knows (tcp://HOST:PORT, tls://...), said in one line if not."""
    m = re.match(r"^([A-Za-z][A-Za-z0-9+.-]*)://", address)
    if m and m[1].lower() not in SCHEMES:
        raise XoFitError(f"'{address}' is not a Dask scheduler address: expected {', '.join(SCHEMES[:2])}://HOST:PORT "
                         f"(or {', '.join(SCHEMES[2:])})", key="--scheduler")


def connect(address: str):
    """A client of the scheduler, which has at least one worker; one line when it cannot be had."""
    check_address(address)
    try:
        from distributed import Client
    except ImportError:
        raise XoFitError("--scheduler needs Dask's distributed package: pip install 'xo_fit[cluster]'") from None
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError, TypeError) as e:
        raise XoFitError(f"cannot reach the Dask scheduler at {address}: {e}", key="--scheduler") from None
    waited = time.time()
    try:
        while not client.scheduler_info().get("workers"):
            if client.status not in ("running", "newly-created"):
                raise lost(address, ConnectionError("the connection closed"))
            if time.time() - waited > DASK_WORKER_WAIT:
                raise XoFitError(f"no Dask worker is connected to the scheduler at {address} (waited "
                                 f"{DASK_WORKER_WAIT:g} s); start workers with xo_fit installed", key="--scheduler")
            time.sleep(0.5)
    except BaseException:
        client.close()
        raise
    return client


def pass_on(files: dict) -> dict:
    """A task that holds a job file's bundle on the cluster (its value: the bundle itself)."""
    return files


def lost(address: str, e: BaseException) -> BatchStopped:
    """The batch-stopping error for a lost connection to the scheduler at ``address``, with the cause ``e``
    in a few words."""
    what = f"{type(e).__name__}: {str(e)[:120]}" if str(e) else type(e).__name__
    return BatchStopped(f"lost the Dask scheduler at {address} ({what}); the unfinished stages are marked "
                        "interrupted: run the batch again to finish them", key="--scheduler")


def submit(client, jobs: list, collection: Collection) -> dict:
    """Every job as a task; each job file's bundle sent once. Returns {future: (item, stages)}."""
    bundles: dict = {}
    futures = {}
    for it, need, payload in jobs:
        src = str(it.source)
        if src not in bundles:  # a task, not scattered data: a worker lost holding it is recomputed elsewhere
            bundles[src] = client.submit(pass_on, collection.bundle(src), pure=False,
                                         key=f"xo_fit-files-{uuid.uuid4().hex[:12]}")
        # pure=False: equal arguments must not be merged into one task; the key names the job, so the
        # cluster's dashboard and errors say which one
        fut = client.submit(work, payload, files=bundles[src], pure=False,
                            key=f"xo_fit-{folder_name(it.name)}-{uuid.uuid4().hex[:8]}")
        futures[fut] = (it, need)
    return futures


def outcome(client, address: str, fut, it, need: list[str]) -> dict:
    """A finished task's result; a task that failed as such (its worker lost again and again, say) as a job
    failure; a cancelled one (the scheduler closed or gone) stops the batch."""
    try:
        return fut.result()
    except CANCELLED as e:  # the batch cancels nothing: the cluster closed or lost its scheduler
        raise lost(address, e) from None
    except Exception as e:  # the cluster task itself died
        message = f"cluster task failed for job {it.name}: {type(e).__name__}: {e}"
    return {"stages": [], "error": {"stage": need[0], "message": message}}


def run_dask(address: str, jobs: list, recorder, collection: Collection) -> None:
    """Run ``jobs`` ((item, stages, payload) each) on the cluster at ``address``; results go to ``recorder``."""
    if not jobs:
        return
    check_address(address)
    try:
        import distributed  # noqa: F401  (imported before its loggers are quieted)
    except ImportError:
        raise XoFitError("--scheduler needs Dask's distributed package: pip install 'xo_fit[cluster]'") from None
    with quiet_dask():  # a lost connection is said in one line, below, not in Dask's logged tracebacks
        run_on(address, jobs, recorder, collection)


@contextmanager
def quiet_dask() -> Iterator[None]:
    """Dask's own loggers silenced in the block (levels restored after)."""
    names = ["distributed"] + [n for n in logging.root.manager.loggerDict if n.startswith("distributed.")]
    levels = {n: logging.getLogger(n).level for n in names}
    for n in names:
        logging.getLogger(n).setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        for n, level in levels.items():
            logging.getLogger(n).setLevel(level)


def run_on(address: str, jobs: list, recorder, collection: Collection) -> None:
    """Submit ``jobs`` to the scheduler at ``address`` and record each result as it finishes, those that
    finish together in one store transaction; a broken connection stops the batch with :func:`lost`."""
    from distributed import as_completed

    client = connect(address)
    try:
        futures = submit(client, jobs, collection)
        for finished in as_completed(list(futures), with_results=False).batches():
            with recorder.batch():
                for fut in finished:
                    it, need = futures[fut]
                    recorder.finish(it, need, outcome(client, address, fut, it, need))
    except (Exception, *CANCELLED) as e:  # the connection to the scheduler broke (anything else is raised on)
        if isinstance(e, XoFitError) or client.status == "running":
            raise
        raise lost(address, e) from None
    finally:
        client.close()
