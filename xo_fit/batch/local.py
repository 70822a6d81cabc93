"""The local pool: single-threaded worker processes that each run job after job.

A worker is forked once and kept: it builds and loads each job it is sent
(keeping parsed measurement files between jobs) and reports each stage as it
ends. The coordinator keeps each worker one job ahead (while enough jobs wait),
so that a worker goes on at once while the coordinator records, and records
whatever its workers have sent in one store transaction. A job whose worker dies (a
crash, kill -9) is run once more, on a fresh worker, from its last finished
stage, then recorded failed with the cause; the other jobs are not touched.
Workers end with the coordinator, however it ends.
"""

from __future__ import annotations

import os
import signal
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from multiprocessing.connection import Connection, wait
from multiprocessing.process import BaseProcess

from xo_fit.batch.worker import THREAD_VARS, single_threaded, work

#: How long the coordinator waits for a message before looking at its workers again, s.
POLL = 5.0
#: Jobs sent to a worker ahead of the one it runs (while more jobs wait than there are workers).
AHEAD = 1


def die_with_parent() -> None:
    """In a worker: end when the coordinator ends (kill -9 included), never linger holding its files."""
    parent = os.getppid()
    try:  # Linux: the kernel sends SIGKILL when the parent dies
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, 9)  # PR_SET_PDEATHSIG, SIGKILL
    except Exception:  # pragma: no cover - elsewhere the watcher below does it
        pass

    def watch() -> None:
        while True:
            time.sleep(1.0)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, daemon=True).start()


def serve(conn, close_fds: list[int]) -> None:
    """A worker process: take a job, report its stages as they end and then its end; again. (The stages' files
    travel once, as they end: the job's end carries no files.)"""
    for fd in close_fds:  # the coordinator's lock and store are not the worker's to hold
        try:
            os.close(fd)
        except OSError:
            pass
    die_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the coordinator's to handle
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # not the coordinator's handler, inherited by the fork
    single_threaded()
    try:
        while True:
            payload = conn.recv()
            if payload is None:
                return
            res = work(payload, emit=conn.send)
            conn.send({"final": dict(res, stages=[])})
    except (EOFError, OSError):
        return
    finally:
        conn.close()


@dataclass
class Slot:
    """A worker process and the jobs sent to it, (item, stages, payload, attempt) each: the one it runs, and the
    one it will run next (sent ahead, so that the worker never waits for the coordinator)."""

    proc: BaseProcess
    conn: Connection
    jobs: deque = field(default_factory=deque)
    recorded: list[str] = field(default_factory=list)  # the running job's stages recorded so far
    last_values: dict | None = None


class Pool:
    """At most ``size`` worker processes, started as jobs need them."""

    def __init__(self, size: int, close_fds: list[int]) -> None:
        import multiprocessing as mp

        for var in THREAD_VARS:  # before the workers start, so that every worker inherits them
            os.environ.setdefault(var, "1")
        self.ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else mp.get_context()
        self.size, self.close_fds = size, close_fds
        self.slots: dict[Connection, Slot] = {}

    def free(self, queued: int) -> Slot | None:
        """A worker for the next job: an idle one, a new one, or (while more jobs wait than there are workers)
        one whose next job is not yet sent."""
        slot = next((s for s in self.slots.values() if not s.jobs), None)
        if slot is None and len(self.slots) < self.size:
            here, there = self.ctx.Pipe(duplex=True)
            proc = self.ctx.Process(target=serve, args=(there, self.close_fds), daemon=True)
            proc.start()
            there.close()
            slot = self.slots[here] = Slot(proc, here)
        if slot is None and queued >= len(self.slots):
            slot = next((s for s in self.slots.values() if len(s.jobs) < AHEAD + 1), None)
        return slot

    def busy(self) -> list:
        """The pipes of the workers that hold a job (sent and not yet finished)."""
        return [c for c, s in self.slots.items() if s.jobs]

    def drop(self, slot: Slot) -> None:
        """Forget a worker: its pipe closed, its process joined (up to 5 s)."""
        del self.slots[slot.conn]
        slot.conn.close()
        slot.proc.join(timeout=5)

    def close(self) -> None:
        """Stop every worker: idle ones are told to end, busy ones killed; then all are joined (killed after
        5 s) and their pipes closed."""
        for slot in list(self.slots.values()):
            if not slot.jobs:
                try:
                    slot.conn.send(None)
                except OSError:
                    pass
            else:
                slot.proc.kill()
        for slot in list(self.slots.values()):
            slot.proc.join(timeout=5)
            if slot.proc.is_alive():
                slot.proc.kill()
            slot.conn.close()
        self.slots.clear()


def read_ready(pool: Pool, ready) -> list[tuple[Slot, dict | None]]:
    """Every message the ready workers have sent, in order; None where a worker's pipe ended (it died)."""
    out = []
    for conn in ready:
        slot = pool.slots[conn]
        try:
            while True:
                out.append((slot, conn.recv()))
                if not conn.poll():
                    break
        except (EOFError, OSError):
            out.append((slot, None))
    return out


def died(pool: Pool, slot: Slot, queue: deque):
    """The worker of ``slot`` died: the job it ran goes back in the queue once (from its last recorded stage),
    else it is returned as failed with the cause; the job sent ahead goes back as it was."""
    (it, need, payload, attempt), ahead = slot.jobs[0], list(slot.jobs)[1:]
    pool.drop(slot)
    queue.extendleft(reversed(ahead))
    code = slot.proc.exitcode
    cause = (f"the worker process died (signal {-code})" if code is not None and code < 0
             else f"the worker process died (exit code {code})")
    left = [st for st in need if st not in slot.recorded]
    if attempt == 0 and left:
        retry = dict(payload, stages=left)
        if slot.recorded:
            retry["start"], retry["previous"] = slot.last_values, slot.recorded[-1]
        queue.append((it, left, retry, 1))
        return None
    return it, left or need, {"stages": [], "error": {"stage": left[0] if left else need[-1],
                                                      "message": f"{cause}, twice; not retried again"}}


def send(pool: Pool, slot: Slot, job: tuple, queue: deque, recorder) -> None:
    """Send ``job`` ((item, stages, payload, attempt)) to the worker of ``slot``; a worker already gone is
    handled as dead (its job requeued once, or recorded failed)."""
    slot.jobs.append(job)
    try:
        slot.conn.send(job[2])
    except OSError:  # the worker is gone already
        with recorder.batch():
            handle(pool, slot, None, queue, recorder)


def run_local(jobs: list, workers: int, recorder, close_fds: list[int]) -> None:
    """Run ``jobs`` ((item, stages, payload) each) on at most ``workers`` processes; every stage and result
    goes to ``recorder`` (its ``stage``, ``finish`` and ``batch``), all that arrived together in one batch."""
    if not jobs:
        return
    queue = deque((it, need, p, 0) for it, need, p in jobs)
    pool = Pool(min(workers, len(jobs)), close_fds)
    try:
        while queue or pool.busy():
            while queue and (slot := pool.free(len(queue))) is not None:
                send(pool, slot, queue.popleft(), queue, recorder)
            messages = read_ready(pool, wait(pool.busy(), timeout=POLL))
            with recorder.batch():
                for slot, msg in messages:
                    handle(pool, slot, msg, queue, recorder)
    finally:
        pool.close()


def handle(pool: Pool, slot: Slot, msg: dict | None, queue: deque, recorder) -> None:
    """One message of a worker: a stage done, the job's end, or (None) the worker's death."""
    if not slot.jobs or slot.conn not in pool.slots:
        return
    it, need = slot.jobs[0][0], slot.jobs[0][1]
    if msg is None:
        failed = died(pool, slot, queue)
        if failed is not None:
            recorder.finish(*failed)
        return
    if "stage_done" in msg:
        entry = msg["stage_done"]
        recorder.stage(it, entry)
        slot.recorded.append(entry["stage"])
        slot.last_values = entry.get("values")
        return
    recorder.finish(it, need, msg["final"])
    slot.jobs.popleft()
    slot.recorded, slot.last_values = [], None
