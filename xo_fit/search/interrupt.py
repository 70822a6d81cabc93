"""Stopping searches on Ctrl-C or SIGTERM and keeping the best design so far, here and in worker processes.

In the main process Ctrl-C raises KeyboardInterrupt, which a search catches between two batches of
evaluations (:func:`xo_fit.search.engines.search`); :func:`sigterm_interrupts` makes SIGTERM do the same while a
command runs. A worker process (:func:`stopping_pool`) instead notes either signal, or the parent setting the
pool's event, and its search stops at the next batch and returns its best so far; the parent then gathers what
the workers found.
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
from collections.abc import Iterator
from typing import TYPE_CHECKING, TypedDict

if TYPE_CHECKING:
    from multiprocessing.synchronize import Event


class _StopState(TypedDict):
    flag: bool  # a signal arrived in this worker
    event: Event | None  # the pool's event, set by the parent to stop every worker
    parent: int | None  # the parent's process id, in a worker


_STOP: _StopState = {"flag": False, "event": None, "parent": None}


def stop_requested() -> bool:
    """Whether this worker process was asked to stop (a signal, or its parent through the pool's event), or its
    parent has died (the worker then belongs to another process).

    Returns
    -------
    bool
        True once the search in this process should stop at its next batch; always False in a process that
        :func:`worker_init` has not set up (the main process, where Ctrl-C raises KeyboardInterrupt instead).
    """
    event = _STOP["event"]
    parent = _STOP["parent"]
    return bool(_STOP["flag"] or (event is not None and event.is_set())
                or (parent is not None and os.getppid() != parent))


def parent_gone() -> bool:
    """Whether this worker process's parent has died (it then belongs to another process); always False in a
    process that :func:`worker_init` has not set up.

    Returns
    -------
    bool
        True once the parent that started this worker is gone.
    """
    parent = _STOP["parent"]
    return parent is not None and os.getppid() != parent


def _note(signum, frame) -> None:
    _STOP["flag"] = True


def worker_init(event: Event | None) -> None:
    """Pool initializer: Ctrl-C or SIGTERM in a worker, ``event`` set by the parent, or the parent's death stops its
    search (which returns its best so far); the worker's numerical libraries use one thread each.

    Parameters
    ----------
    event : multiprocessing.Event or None
        The pool's event (:func:`stopping_pool`): the parent sets it to stop every worker; None: signals and the
        parent's death only.
    """
    _STOP["flag"] = False
    _STOP["event"] = event
    _STOP["parent"] = os.getppid()
    signal.signal(signal.SIGINT, _note)
    signal.signal(signal.SIGTERM, _note)
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")


def stopping_pool(workers: int, initializer=None, initargs: tuple = ()):
    """A ProcessPoolExecutor of ``workers`` processes whose searches stop when the returned event is set.

    Parameters
    ----------
    workers : int
        The number of worker processes (dimensionless).
    initializer : callable or None
        Run as ``initializer(*initargs)`` in each worker after :func:`worker_init`: what every task of the pool
        shares, handed over once per worker rather than once per task. None: :func:`worker_init` only.
    initargs : tuple
        Its arguments.

    Returns
    -------
    pool : concurrent.futures.ProcessPoolExecutor
        The pool (the caller shuts it down).
    event : multiprocessing.Event
        Set it to stop every worker's search at its next batch.
    """
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    ctx = multiprocessing.get_context()
    event = ctx.Event()
    if initializer is None:
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=worker_init, initargs=(event,))
    else:
        pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_with,
                                   initargs=(event, initializer, initargs))
    return pool, event


def _init_with(event: Event | None, initializer, initargs: tuple) -> None:
    """Pool initializer: :func:`worker_init`, then the caller's own."""
    worker_init(event)
    initializer(*initargs)


@contextlib.contextmanager
def sigterm_interrupts() -> Iterator[None]:
    """Inside, SIGTERM raises KeyboardInterrupt in the main thread as Ctrl-C does (a search then keeps its best
    design so far); the previous handler comes back afterwards. Elsewhere than the main thread: nothing changes.

    Yields
    ------
    None
        Nothing: a context manager (``with sigterm_interrupts(): ...``).
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def interrupt(signum, frame) -> None:
        raise KeyboardInterrupt

    old = signal.signal(signal.SIGTERM, interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, old)


@contextlib.contextmanager
def signals_set(event: Event) -> Iterator[list]:
    """Inside, Ctrl-C and SIGTERM set ``event`` instead of raising KeyboardInterrupt in the main thread, so that a
    parent gathering its workers' results is never cut off half-way. The previous handlers come back afterwards.
    Elsewhere than the main thread: nothing changes.

    Parameters
    ----------
    event : multiprocessing.Event
        A pool's event (:func:`stopping_pool`): once set, every worker stops at its next batch.

    Yields
    ------
    list of int
        Receives the number of each signal that arrives inside (empty: none did).
    """
    got: list = []
    if threading.current_thread() is not threading.main_thread():
        yield got
        return

    def note(signum, frame) -> None:
        got.append(signum)
        event.set()

    old = {s: signal.signal(s, note) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield got
    finally:
        for s, handler in old.items():
            signal.signal(s, handler)
