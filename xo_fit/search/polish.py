"""The local polish without limits: L-BFGS-B in the unit cube with forward-difference gradients.

:func:`polish_box` runs it through an objective (the search's, or a polish's own); :func:`polish_steps` is the
same as a generator, so that several polishes' points can share one batch (:mod:`xo_fit.search.polish_batch`).
"""

from __future__ import annotations

import numpy as np

from xo_fit.config import POLISH_FTOL, POLISH_GTOL, POLISH_STEP
from xo_fit.search.lbfgsb import lbfgsb_steps, minimize_box


def polish_box(obj, n: int, start: np.ndarray | None = None) -> None:
    """L-BFGS-B from ``start`` (n,) in the unit cube (default: ``obj``'s best point), forward-difference gradients
    as one batch of n + 1 points per step through ``obj`` (an :class:`xo_fit.search.engines.Objective`, which counts
    them, keeps the best and stops the polish at its budget)."""
    start = obj.best_u if start is None else start
    if start is None:
        return
    cache: dict[bytes, tuple[float, np.ndarray]] = {}

    def fun(u: np.ndarray):
        key = u.tobytes()
        if key not in cache:
            pts, h = stencil(u)
            cache.clear()
            cache[key] = gradient(obj(pts), h)
        return cache[key]

    minimize_box(fun, np.array(start, dtype=float), np.zeros(n), np.ones(n), maxiter=10_000, ftol=POLISH_FTOL,
                 gtol=POLISH_GTOL)


def stencil(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The polish's forward-difference points around ``u`` (n,) in the unit cube: (u and u + h_i e_i, shape
    (n + 1, n); the steps h (n,), POLISH_STEP, negative at the cube's upper edge)."""
    n = u.size
    h = np.where(u + POLISH_STEP <= 1.0, POLISH_STEP, -POLISH_STEP)
    pts = np.empty((n + 1, n))
    pts[:] = u
    pts.ravel()[n::n + 1] += h  # row i + 1: u + h_i e_i
    return pts, h


def gradient(c: np.ndarray, h: np.ndarray) -> tuple[float, np.ndarray]:
    """The value and the forward-difference gradient (n,) from the costs ``c`` (n + 1,) of :func:`stencil`'s
    points with steps ``h`` (n,) (components that are not finite: 0)."""
    if not np.isfinite(c[0]):  # a singular design has no slope (every component would be non-finite: 0)
        return float(c[0]), np.zeros(h.size)
    grad = (c[1:] - c[0]) / h
    return float(c[0]), np.where(np.isfinite(grad), grad, 0.0)


def polish_steps(n: int, start: np.ndarray):
    """:func:`polish_box` from ``start`` (n,) as a generator (L-BFGS-B driven step by step, :func:`xo_fit.search.
    lbfgsb.lbfgsb_steps`): it yields each batch of points (n + 1, n) and is sent back their costs (n + 1,) (inf
    for any the budget did not let in), so that several polishes can share one batch; the iterates are
    :func:`polish_box`'s bit for bit. None where scipy's routine cannot be driven."""
    steps = lbfgsb_steps(np.array(start, dtype=float), np.zeros(n), np.ones(n), maxiter=10_000, ftol=POLISH_FTOL,
                         gtol=POLISH_GTOL)
    return None if steps is None else _differences(steps)


def _differences(steps):
    """Drives L-BFGS-B's ``steps`` with forward-difference gradients of batches yielded (see :func:`polish_steps`)."""
    try:
        u = next(steps)
        while True:
            pts, h = stencil(u)
            u = steps.send(gradient((yield pts), h))
    except StopIteration:
        return
