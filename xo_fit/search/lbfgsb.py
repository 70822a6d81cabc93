"""Bounded quasi-Newton minimisation for the polish: scipy's L-BFGS-B routine, driven directly.

``scipy.optimize.minimize(method="L-BFGS-B")`` costs a whole fit about 0.4 s before its first step: importing
``scipy.optimize`` pulls in linear programming, ``scipy.linalg``, ``scipy.sparse`` and more. The routine itself
is one small compiled module (``scipy/optimize/_lbfgsb``, C since scipy 1.15, reverse communication through
``setulb``). :func:`minimize_box` loads that module on its own (a few ms) and runs the same loop as scipy's
``_minimize_lbfgsb``, so the iterates, the evaluations and the end point are scipy's, bit for bit
(tests/test_lbfgsb.py holds it to ``scipy.optimize.minimize``). Where the module cannot be loaded that way
(another scipy layout, an older Fortran interface) it calls ``scipy.optimize.minimize`` instead.
"""

from __future__ import annotations

import contextlib
import importlib.util
import sys
from pathlib import Path
from collections.abc import Callable, Iterator

import numpy as np

MAXCOR = 10  # scipy's default number of stored corrections
MAXLS = 20  # scipy's default line-search steps per iteration
MAXFUN = 15000  # scipy's default evaluation limit

_TASK_FG, _TASK_NEW_X = 3, 1  # setulb's task codes (scipy/optimize/__lbfgsb.c)
_TASK_STOP, _STOP_MAXITER, _STOP_MAXFUN = 5, 504, 502

_routines: dict[str, object] = {}  # scipy's compiled routines by name, loaded once (False: not loadable)


def compiled_routine(module: str, attr: str, since: tuple[int, int]) -> Callable | None:
    """scipy's compiled routine ``scipy.optimize.<module>.<attr>``, loaded without importing scipy.optimize
    (whose import costs a command ~0.3 s), or None where scipy is older than ``since`` (its C interface then
    differs) or the extension module cannot be found or loaded (callers then use scipy.optimize.minimize).

    Parameters
    ----------
    module, attr : str
        The extension module's name in scipy.optimize (``"_lbfgsb"``) and the routine's (``"setulb"``).
    since : tuple of int
        The first scipy (major, minor) with the routine's present interface.

    Returns
    -------
    callable or None
        The routine, the same object on every call.
    """
    key = f"{module}.{attr}"
    if key not in _routines:
        _routines[key] = False
        try:
            import scipy

            major, minor = (int(p) for p in scipy.__version__.split(".")[:2])
            if (major, minor) < since:
                return None
            name = f"scipy.optimize.{module}"
            mod = sys.modules.get(name)
            if mod is None:
                found = sorted(Path(scipy.__path__[0], "optimize").glob(f"{module}.*"))
                found = [p for p in found if p.suffix in (".so", ".pyd")]
                if not found:
                    return None
                spec = importlib.util.spec_from_file_location(name, found[0])
                if spec is None or spec.loader is None:
                    return None
                mod = importlib.util.module_from_spec(spec)
                spec.loader.exec_module(mod)
            _routines[key] = getattr(mod, attr)
        except Exception:  # noqa: BLE001 - any failure means: use scipy.optimize.minimize
            _routines[key] = False
    return _routines[key] or None  # type: ignore[return-value]


def _setulb():
    """scipy's compiled ``setulb`` with the C interface of scipy >= 1.15, or None."""
    return compiled_routine("_lbfgsb", "setulb", (1, 15))


def minimize_box(fun: Callable[[np.ndarray], tuple[float, np.ndarray]], x0: np.ndarray, lower: np.ndarray,
                 upper: np.ndarray, *, ftol: float, gtol: float, maxiter: int) -> tuple[np.ndarray, float]:
    """Minimise ``fun`` over the box ``lower <= x <= upper`` by L-BFGS-B (scipy's routine and loop).

    Parameters
    ----------
    fun : callable
        ``fun(x)`` with x of shape (n,) returns the value (a float) and its gradient, shape (n,); the polish
        passes the cost (dimensionless) of a point in the unit cube.
    x0 : ndarray
        The start point, shape (n,); clipped into the box.
    lower, upper : ndarray
        The box's bounds, shape (n,) each, in x's units.
    ftol : float
        Stop when the relative reduction of the value in a step is at most ftol (dimensionless; scipy's option).
    gtol : float
        Stop when the largest projected gradient component is at most gtol (in fun's units per unit of x:
        dimensionless in the polish).
    maxiter : int
        Iterations at most (dimensionless); evaluations stop at MAXFUN too.

    Returns
    -------
    x : ndarray
        The end point, shape (n,).
    f : float
        Its value, in fun's units (dimensionless in the polish).
    """
    setulb = _setulb()
    lower = np.asarray(lower, dtype=np.float64)
    upper = np.asarray(upper, dtype=np.float64)
    if setulb is None:
        return _through_scipy(fun, x0, lower, upper, ftol=ftol, gtol=gtol, maxiter=maxiter)
    with one_blas_thread():
        return _run(setulb, fun, x0, lower, upper, ftol=ftol, gtol=gtol, maxiter=maxiter)


_controller: list = []  # [(what was loaded, threadpoolctl's view of the loaded libraries)] (a search of the maps)
_inherited: list = []  # [True] in a process forked with one BLAS thread (inherit_one_blas_thread)
_forking: list = []  # inside one_blas_thread_for_forks: [whether BLAS runs on one thread]


def one_blas_thread():
    """A context with one BLAS thread: the routine's products are of size n x MAXCOR, and waking OpenBLAS's
    threads for each of them cost a whole fit of the hard three-way 40 % of its time on two cores (0.19 s against
    0.11 s, measured); a no-op without threadpoolctl, and in a process that inherited one thread
    (:func:`inherit_one_blas_thread`). The libraries are looked up once per process (about 1 ms each time, which
    a prune's hundreds of short polishes would pay again and again).

    Returns
    -------
    contextlib.AbstractContextManager
        threadpoolctl's limit (``with one_blas_thread(): ...``), or a null context.
    """
    if _inherited:
        return contextlib.nullcontext()
    try:
        # looked up again where a module or a compiled routine was loaded since (its BLAS would be missed: scipy's
        # SLSQP loaded after the look-up ran on two threads, and its results changed with them)
        loaded = (len(sys.modules), len(_routines))
        if not _controller or _controller[0][0] != loaded:
            from threadpoolctl import ThreadpoolController

            _controller[:] = [(loaded, ThreadpoolController())]
        return _controller[0][1].limit(limits=1, user_api="blas")
    except Exception:  # noqa: BLE001 - threadpoolctl missing or failing: run as it is
        return contextlib.nullcontext()


def lbfgsb_steps(x0: np.ndarray, lower: np.ndarray, upper: np.ndarray, *, ftol: float, gtol: float,
                 maxiter: int):
    """:func:`minimize_box`'s loop as a generator, for callers that evaluate many minimisations' points in one
    batch (:mod:`xo_fit.search.polish_batch`): the same iterates and end point, bit for bit.

    Parameters
    ----------
    x0, lower, upper : ndarray
        The start point and the box's bounds, shape (n,) each, as :func:`minimize_box`'s.
    ftol, gtol : float
        The stopping tolerances, as :func:`minimize_box`'s (dimensionless in the polish).
    maxiter : int
        Iterations at most (dimensionless).

    Returns
    -------
    generator or None
        It yields each point x (n,) whose value and gradient it needs and is sent back (f, g) (a float, shape
        (n,)); its ``StopIteration.value`` is (x, f), as :func:`minimize_box` returns. None where scipy's routine
        cannot be loaded (then :func:`minimize_box` alone serves, through ``scipy.optimize.minimize``).
    """
    setulb = _setulb()
    if setulb is None:
        return None
    return _steps(setulb, x0, np.asarray(lower, dtype=np.float64), np.asarray(upper, dtype=np.float64), ftol=ftol,
                  gtol=gtol, maxiter=maxiter)


@contextlib.contextmanager
def one_blas_thread_for_forks(ctx=None) -> Iterator[bool]:
    """:func:`one_blas_thread` around processes forked inside (the islands of ``fit --workers``), which keep it
    (:func:`inherit_one_blas_thread`).

    A fork stops OpenBLAS's threads (in the parent as in the child), and setting their number afterwards, to 1 as
    well, starts them again, each spinning about 0.1 s of CPU beside the work: an island whose polish entered and
    left :func:`one_blas_thread` spent 26 ms of CPU on it against 8 without (the hard three-way,
    benchmarks/workers.py). Forked inside this context, a process has one BLAS thread without setting it. The
    parent's number comes back on leaving (its threads then start again, after the work).

    Inside another (its caller's, which then restores later: after the work that follows the forks), a no-op.

    Parameters
    ----------
    ctx : multiprocessing context, optional
        The context the processes start in: where it does not fork, nothing is limited (a spawned process
        starts its own BLAS) and the context yields False.

    Yields
    ------
    bool
        Whether BLAS runs on one thread inside (threadpoolctl found the libraries).
    """
    if ctx is not None and ctx.get_start_method() != "fork":
        yield False
        return
    if _forking:
        yield _forking[-1]
        return
    limit = one_blas_thread()
    _forking.append(not isinstance(limit, contextlib.nullcontext) or bool(_inherited))
    try:
        with limit:
            yield _forking[-1]
    finally:
        _forking.pop()


def inherit_one_blas_thread() -> None:
    """Note that this process was forked inside :func:`one_blas_thread_for_forks`: its BLAS keeps one thread, and
    :func:`one_blas_thread` leaves it alone here."""
    _inherited[:] = [True]


def drive(steps, answer: Callable):
    """Run a reverse-communication generator to its end: each request it yields is sent back ``answer(request)``.

    Parameters
    ----------
    steps : generator
        The minimisation as a generator (:func:`lbfgsb_steps`, :func:`xo_fit.search.slsqp.slsqp_steps`,
        :func:`xo_fit.search.feasibility.polish_limited_steps`).
    answer : callable
        Its requests' answers (what it expects sent back); whatever it raises stops the run.

    Returns
    -------
    object
        What the generator returns (its ``StopIteration.value``).
    """
    try:
        request = next(steps)
        while True:
            request = steps.send(answer(request))
    except StopIteration as end:
        return end.value


def _run(setulb, fun, x0, lower, upper, *, ftol: float, gtol: float, maxiter: int) -> tuple[np.ndarray, float]:
    """:func:`_steps` driven by ``fun`` (see :func:`minimize_box`)."""
    return drive(_steps(setulb, x0, lower, upper, ftol=ftol, gtol=gtol, maxiter=maxiter), fun)


def _steps(setulb, x0, lower, upper, *, ftol: float, gtol: float, maxiter: int):
    """scipy's reverse-communication loop around ``setulb`` as a generator (see :func:`lbfgsb_steps`)."""
    x = np.clip(np.asarray(x0, dtype=np.float64).ravel(), lower, upper)
    n = x.size
    m = MAXCOR
    factr = ftol / np.finfo(float).eps
    nbd = np.full(n, 2, dtype=np.int32)  # both bounds on every variable
    wa = np.zeros(2 * m * n + 5 * n + 11 * m * m + 8 * m, np.float64)
    iwa = np.zeros(3 * n, dtype=np.int32)
    task = np.zeros(2, dtype=np.int32)
    ln_task = np.zeros(2, dtype=np.int32)
    lsave = np.zeros(4, dtype=np.int32)
    isave = np.zeros(44, dtype=np.int32)
    dsave = np.zeros(29, dtype=np.float64)
    # scipy's ScalarFunction evaluates at the start and then again only at a new point; the same here
    last_x = x.copy()
    f_last, g_last = yield last_x.copy()
    nfev = 1
    f: float | np.ndarray = np.array(0.0, dtype=np.float64)  # a float once evaluated, as scipy does
    g = np.zeros(n, dtype=np.float64)
    iterations = 0
    while True:
        g = g.astype(np.float64)
        setulb(m, x, lower, upper, nbd, f, g, factr, gtol, wa, iwa, task, lsave, isave, dsave, MAXLS, ln_task)
        if task[0] == _TASK_FG:
            if not (x == last_x).all():  # np.array_equal's test without its wrapper
                last_x = x.copy()
                f_last, g_last = yield last_x.copy()
                nfev += 1
            f, g = float(f_last), np.atleast_1d(np.asarray(g_last, dtype=np.float64))
        elif task[0] == _TASK_NEW_X:
            iterations += 1
            if iterations >= maxiter:
                task[0], task[1] = _TASK_STOP, _STOP_MAXITER
            elif nfev > MAXFUN:
                task[0], task[1] = _TASK_STOP, _STOP_MAXFUN
        else:
            break
    return x, float(f)


def _through_scipy(fun, x0, lower, upper, *, ftol, gtol, maxiter):
    from scipy.optimize import minimize

    res = minimize(fun, np.array(x0, dtype=float), jac=True, method="L-BFGS-B", bounds=list(zip(lower, upper)),
                   options={"maxiter": maxiter, "ftol": ftol, "gtol": gtol})
    return res.x, float(res.fun)
