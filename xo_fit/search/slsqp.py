"""Sequential least squares programming for the polish under hard limits: scipy's SLSQP routine, driven directly.

The polish under ``[limits]`` (:func:`xo_fit.search.feasibility.polish_limited`) minimises the cost subject to
each limit's signed excess staying below zero: a smooth objective with inequality constraints in a box, which
is what SLSQP solves (D. Kraft, "A software package for sequential quadratic programming", DFVLR-FB 88-28,
1988: a quasi-Newton SQP method whose quadratic subproblems are least-squares problems). Importing
``scipy.optimize`` costs a fit some 0.4-1 s (see :mod:`xo_fit.search.lbfgsb`); since scipy 1.16 the routine is
one small compiled module (``scipy/optimize/_slsqplib``, C, reverse communication through ``slsqp``).
:func:`minimize_slsqp` loads that module on its own and runs the same loop as scipy's ``_minimize_slsqp``, so
the iterates and the end point are scipy's, bit for bit (tests/test_slsqp.py holds it to
``scipy.optimize.minimize``). Where the module cannot be loaded that way (an older scipy, its Fortran
interface) it calls ``scipy.optimize.minimize`` instead.
"""

from __future__ import annotations

from collections.abc import Callable, Generator

import numpy as np

from xo_fit.search.lbfgsb import compiled_routine, drive, one_blas_thread

_MODE_VALUES, _MODE_GRADIENTS = 1, -1  # the routine asks for f and c, or for their gradients

def _slsqp():
    """scipy's compiled ``slsqp`` with the C interface of scipy >= 1.16, or None."""
    return compiled_routine("_slsqplib", "slsqp", (1, 16))


def load_routine() -> bool:
    """Load scipy's compiled SLSQP now, before a caller limits BLAS to one thread
    (:func:`xo_fit.search.lbfgsb.one_blas_thread`), so that the limit covers the library the routine brings.

    Returns
    -------
    bool
        Whether the routine can be driven (:func:`slsqp_steps` gives a generator).
    """
    return _slsqp() is not None


def minimize_slsqp(values: Callable[[np.ndarray], tuple[float, np.ndarray]],
                   gradients: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray]], x0: np.ndarray,
                   lower: np.ndarray, upper: np.ndarray, *, ftol: float, maxiter: int) -> tuple[np.ndarray, float]:
    """Minimise f(x) subject to c(x) >= 0 (each of m constraints) over the box ``lower <= x <= upper``.

    Parameters
    ----------
    values : callable
        ``values(x)``, x of shape (n,), returns f (a float) and c, shape (m,) (dimensionless in the polish: the
        scaled cost and the limits' relative excesses).
    gradients : callable
        ``gradients(x)``, called at the point ``values`` was called at last, returns the gradient of f, shape
        (n,), the Jacobian of c, shape (m, n), and c, shape (m,), again (which a caller may change there: the
        constraints hold from then on, as in a bundle of linearisations).
    x0 : ndarray
        The start point, shape (n,); clipped into the box.
    lower, upper : ndarray
        The box's bounds, shape (n,) each, in x's units.
    ftol : float
        The routine's accuracy goal for f (dimensionless, as f is in the polish; scipy's SLSQP option).
    maxiter : int
        Iterations at most (dimensionless).

    Returns
    -------
    x : ndarray
        The end point, shape (n,).
    f : float
        Its f, in f's units (dimensionless in the polish).
    """
    steps = slsqp_steps(x0, lower, upper, ftol=ftol, maxiter=maxiter)
    if steps is None:
        x = np.clip(np.asarray(x0, dtype=np.float64).ravel(), lower, upper)
        return _through_scipy(values, gradients, x, np.asarray(lower, dtype=np.float64),
                              np.asarray(upper, dtype=np.float64), ftol=ftol, maxiter=maxiter)
    with one_blas_thread():
        return drive(steps, lambda request: values(request[1]) if request[0] == "values" else gradients(request[1]))


def slsqp_steps(x0: np.ndarray, lower: np.ndarray, upper: np.ndarray, *, ftol: float,
                maxiter: int) -> Generator[tuple[str, np.ndarray], tuple, tuple[np.ndarray, float]] | None:
    """scipy's SLSQP loop as a generator, so that a caller may run several at once and evaluate their points
    together.

    Parameters
    ----------
    x0 : ndarray
        The start point, shape (n,); clipped into the box.
    lower, upper : ndarray
        The box's bounds, shape (n,) each, in x's units.
    ftol : float
        The routine's accuracy goal for f (dimensionless, as f is in the polish; scipy's SLSQP option).
    maxiter : int
        Iterations at most (dimensionless).

    Returns
    -------
    generator or None
        A generator that yields ``("values", x)``, x of shape (n,), and is sent back (f, c), or
        ``("gradients", x)`` (at the point of the last "values") and is sent back (gradient of f, Jacobian of c,
        c), as :func:`minimize_slsqp` describes; it returns (end point (n,), its f) in its StopIteration. None
        where scipy's compiled routine cannot be loaded (then use :func:`minimize_slsqp`).
    """
    routine = _slsqp()
    if routine is None:
        return None
    lower = np.asarray(lower, dtype=np.float64)
    upper = np.asarray(upper, dtype=np.float64)
    return _steps(routine, np.clip(np.asarray(x0, dtype=np.float64).ravel(), lower, upper), lower, upper,
                  ftol=ftol, maxiter=maxiter)


def _steps(routine, x, lower, upper, *, ftol: float, maxiter: int):
    """scipy's reverse-communication loop around ``slsqp`` (see :func:`slsqp_steps`)."""
    n = x.size
    f, c = yield "values", x.copy()
    grad, jac, c = yield "gradients", x.copy()
    m = np.atleast_1d(c).size
    # the routine's state and work space as scipy's _minimize_slsqp sets them (no equality constraints)
    state = {"acc": ftol, "alpha": 0.0, "f0": 0.0, "gs": 0.0, "h1": 0.0, "h2": 0.0, "h3": 0.0, "h4": 0.0,
             "t": 0.0, "t0": 0.0, "tol": 10.0 * ftol, "exact": 0, "inconsistent": 0, "reset": 0, "iter": 0,
             "itermax": int(maxiter), "line": 0, "m": m, "meq": 0, "mode": 0, "n": n}
    indices = np.zeros(max(m + 2 * n + 2, 1), dtype=np.int32)
    size = n * (n + 1) // 2 + 3 * m * n + 9 * m + 8 * n * n + 35 * n + 28  # scipy's worst case, meq = 0
    buffer = np.zeros(max(size + (2 * n * (n + 1) if m == 0 else 0), 1), dtype=np.float64)
    mult = np.zeros(max(1, m + 2 * n + 2), dtype=np.float64)
    cmat = np.zeros((max(1, m), n), dtype=np.float64, order="F")
    d = np.zeros(max(1, m), dtype=np.float64)
    cmat[:m] = np.atleast_2d(jac)
    d[:m] = c
    g = np.asarray(grad, dtype=np.float64)
    fx = float(f)
    last = x.copy()
    while True:
        routine(state, fx, g, cmat, d, x, mult, lower, upper, buffer, indices)
        if state["mode"] == _MODE_VALUES:
            xc = np.clip(x, lower, upper)  # the routine may step outside the box by an ulp (scipy gh-11403)
            f, c = yield "values", xc
            fx, d[:m] = float(f), c
            last = xc
        elif state["mode"] == _MODE_GRADIENTS:
            xc = np.clip(x, lower, upper)
            if not np.array_equal(xc, last):
                yield "values", xc
                last = xc
            grad, jac, c = yield "gradients", xc
            g = np.asarray(grad, dtype=np.float64)
            cmat[:m] = np.atleast_2d(jac)
            d[:m] = c
        else:
            return x, fx


def _through_scipy(values, gradients, x0, lower, upper, *, ftol, maxiter):
    from scipy.optimize import minimize

    def at(x):
        values(x)
        return gradients(x)[:2]

    res = minimize(lambda x: values(x)[0], x0, jac=lambda x: at(x)[0], method="SLSQP",
                   bounds=list(zip(lower, upper)),
                   constraints=[{"type": "ineq", "fun": lambda x: values(x)[1], "jac": lambda x: at(x)[1]}],
                   options={"maxiter": maxiter, "ftol": ftol})
    return res.x, float(res.fun)
