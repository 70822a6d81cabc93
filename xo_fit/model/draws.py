"""Tolerance draws: the relative factors (n, P) by which built parts differ from their nominal values.

Shared by the robust fit (search) and the tolerance spread (stages).
"""

from __future__ import annotations

import math

import numpy as np


def part_tolerances(job) -> np.ndarray:
    """Tolerance of every valued part: its own, else the [spread] default for its kind.

    Parameters
    ----------
    job : Job
        The job.

    Returns
    -------
    ndarray
        Tolerances as fractions (dimensionless), shape (P,).
    """
    defaults = dict(job.spread.tolerance)
    return np.array([p.tolerance if p.tolerance is not None else defaults.get(p.type, 0.0) for p in job.valued_parts])


def draw_factors(n: int, tol: np.ndarray, distribution: str, rng: np.random.Generator, qmc: bool = False) -> np.ndarray:
    """Relative factors 1 + deviation by which built parts differ from their nominal values.

    Parameters
    ----------
    n : int
        The number of draws (dimensionless).
    tol : ndarray
        Each part's tolerance as a fraction (dimensionless), shape (P,).
    distribution : str
        ``"uniform"`` (within +-tol) or ``"normal"`` (sigma = tol / 2).
    rng : numpy.random.Generator
        The random source (it also seeds the scrambled Sobol sequence).
    qmc : bool
        Draw from a scrambled Sobol sequence (quasi-random) instead of pseudo-random numbers.

    Returns
    -------
    ndarray
        The factors (dimensionless), shape (n, P), at least 1e-3.
    """
    p = tol.size
    if qmc:
        from scipy.stats import norm, qmc as q

        m = max(1, math.ceil(math.log2(max(n, 2))))
        u = q.Sobol(d=p, scramble=True, seed=rng).random(2**m)[:n]
        u = np.clip(u, 1e-12, 1 - 1e-12)
        z = 2 * u - 1 if distribution == "uniform" else norm.ppf(u)
    else:
        z = rng.uniform(-1.0, 1.0, (n, p)) if distribution == "uniform" else rng.standard_normal((n, p))
    dev = z * tol[None, :] * (1.0 if distribution == "uniform" else 0.5)
    return np.maximum(1.0 + dev, 1e-3)
