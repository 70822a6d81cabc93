"""Tolerance draws: the relative factors (n, P) by which built parts differ from their nominal values.

Shared by the robust fit (search) and the tolerance spread (stages).
"""

from __future__ import annotations

import math

import numpy as np


def part_tolerances(job) -> np.ndarray:
    """Tolerance of every valued part as a fraction, (P,): its own, else the [spread] default for its kind."""
    defaults = dict(job.spread.tolerance)
    return np.array([p.tolerance if p.tolerance is not None else defaults.get(p.type, 0.0) for p in job.valued_parts])


def draw_factors(n: int, tol: np.ndarray, distribution: str, rng: np.random.Generator, qmc: bool = False) -> np.ndarray:
    """Relative factors (n, P) = 1 + deviation; uniform within +-tol, or normal with sigma = tol / 2."""
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
