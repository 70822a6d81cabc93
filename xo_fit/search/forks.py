"""Starting the processes of ``fit --workers N`` (:mod:`xo_fit.search.islands`) and ending them.

Where processes are forked (Linux), each island is forked from a process that already holds the loaded cost,
as a tree: a process responsible for islands [lo, hi) forks the upper half [lo + ceil((hi - lo) / 2), hi) of
them to a child responsible for it, then the upper half of the rest, and so on (a binomial tree); the parent,
which searches nothing, forks [lo, hi) = [0, N) that way down to [0, 1), and every other process is, once it
has forked its own, island lo. A fork costs the forking process 1-3 ms of CPU (its page tables copied and its
pages copied again as it writes them; benchmarks/workers.py), so started one after another by the parent the
last of N islands would wait N forks; in the tree none waits more than ceil(log2 N) + 1 (4 of 8, 5 of 16), and
the parent forks that many times. A process that forked others waits for them before it ends, so that none
loses its parent early (an island whose parent has gone stops: :func:`~xo_fit.search.interrupt.
stop_requested`); one that finds its own parent gone sets the stop event, so that the islands below it stop
too. Every pipe is made by the parent before the first fork; each process closes at once the ends that are
not its own, so that a pipe ends with the parent.

Elsewhere (processes spawned: macOS, Windows) the parent starts one ``multiprocessing.Process`` per island,
each of which rebuilds the cost.
"""

from __future__ import annotations

import os
import signal
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from xo_fit.search.interrupt import parent_gone, worker_init


@dataclass
class Started:
    """The processes the parent started: ``pids`` of the ones it forked itself (a fork tree), or ``procs``
    (multiprocessing.Process, one per island); ``forked``: {island: the parent's CPU time in s
    (time.process_time) when the fork of the process responsible for it returned} (a fork tree only)."""

    pids: list = field(default_factory=list)
    procs: list = field(default_factory=list)
    forked: dict = field(default_factory=dict)


def upper_half(lo: int, hi: int) -> int:
    """Where the upper half of the islands [lo, hi) begins (the part a process forks first), dimensionless:
    lo + ceil((hi - lo) / 2) (hi itself where hi - lo is 1: nothing to fork)."""
    return lo + (hi - lo + 1) // 2


def start(ctx, body: Callable, conns: list, event) -> Started:
    """Start one process per island, each calling ``body(index, conn, began, forked)`` (its pipe end, the
    time.monotonic in s when its process began, and {island: its CPU time in s when it forked the process
    responsible for that one}).

    Parameters
    ----------
    ctx : multiprocessing context
        Its start method decides: ``fork``, a fork tree (see the module); else one Process per island.
    body : callable
        An island's work in its process (its exceptions are its own: one escaping here ends the process).
    conns : list of (Connection, Connection)
        Per island, the parent's end and the island's end of its pipe; the parent's ends stay open here, the
        islands' ends are closed.
    event : multiprocessing.Event
        The islands' stop event (:func:`~xo_fit.search.interrupt.worker_init`).

    Returns
    -------
    Started
        What to pass to :func:`reap`. A KeyboardInterrupt meanwhile (outside the main thread) sets the event
        and returns the processes started so far.
    """
    out = Started()
    try:
        if ctx.get_start_method() != "fork":
            for i, (_, child) in enumerate(conns):
                p = ctx.Process(target=_spawned, args=(body, i, child, event), daemon=True)
                p.start()
                child.close()
                out.procs.append(p)
            return out
        for stream in (sys.stdout, sys.stderr):  # what the parent printed is not printed again by a child
            try:
                stream.flush()
            except (AttributeError, OSError, ValueError):
                pass
        lo, hi = 0, len(conns)
        while lo < hi:
            mid = upper_half(lo, hi) if hi - lo > 1 else lo
            out.pids.append(_fork(body, mid, hi, conns, event))
            out.forked[mid] = time.process_time()
            for _, child in conns[mid:hi]:
                child.close()
            hi = mid
    except KeyboardInterrupt:  # (outside the main thread) the islands started so far stop
        event.set()
    return out


def _spawned(body: Callable, index: int, conn, event) -> None:
    """A spawned (or single) island's process: set up as a worker, then its body."""
    began = time.monotonic()
    worker_init(event)
    body(index, conn, began, {})


def _fork(body: Callable, lo: int, hi: int, conns: list, event) -> int:
    """Fork the process responsible for islands [lo, hi) (see the module); its process id, here."""
    pid = os.fork()
    if pid:
        return pid
    code = 1
    kids: list[int] = []
    try:
        began = time.monotonic()
        forked = {}
        while hi - lo > 1:  # the islands below first (each closes what is not its own): they wait for nothing else
            mid = upper_half(lo, hi)
            kids.append(_fork(body, mid, hi, conns, event))
            forked[mid] = time.process_time()
            hi = mid
        worker_init(event)
        for i, (parent, child) in enumerate(conns):
            parent.close()
            if i != lo:
                child.close()
        body(lo, conns[lo][1], began, forked)
        code = 0
    finally:  # never back into the caller's code: this process ends here, after the islands it started
        try:
            _wait_below(kids, event)
            for stream in (sys.stdout, sys.stderr):
                stream.flush()
        finally:
            os._exit(code)


def _wait_below(kids: list[int], event) -> None:
    """Wait for the processes this island forked; where its own parent has gone, stop them first (they stop at
    their next batch: no polish, as on a signal)."""
    for pid in kids:
        while True:
            if parent_gone():
                event.set()
            try:
                done, _ = os.waitpid(pid, os.WNOHANG)
            except ChildProcessError:
                break
            if done:
                break
            time.sleep(0.0005)


def reap(started: Started, event, failed: bool, timeout: float = 5.0) -> None:
    """Wait for the processes the parent started to end (each island has sent its run); where the parent failed,
    stop them first. After ``timeout`` s a process still running is killed (the islands below a killed one
    find their parent gone and stop at their next batch). None of the parent's own outlives the call, also
    when a signal comes meanwhile."""
    if failed:
        event.set()
    for p in started.procs:
        try:
            p.join(timeout=timeout)
        except KeyboardInterrupt:
            event.set()
        if p.is_alive():
            p.kill()
            p.join(timeout=1)
    deadline = time.monotonic() + timeout
    for pid in started.pids:
        pause = 0.0002  # each island has sent its run: its process ends within a few ms, so look often at first
        while True:
            try:
                done, _ = os.waitpid(pid, os.WNOHANG)
            except ChildProcessError:
                break
            except KeyboardInterrupt:
                event.set()
                continue
            if done:
                break
            if time.monotonic() > deadline:
                os.kill(pid, signal.SIGKILL)
                os.waitpid(pid, 0)
                break
            time.sleep(pause)
            pause = min(1.2 * pause, 0.01)
