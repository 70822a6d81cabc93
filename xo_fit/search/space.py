"""The search space: a job's free part values as a unit cube, log-scaled between each part's min and max.

A point u of the cube (n,) in [0, 1] maps to a part's value exp(lo + u (hi - lo)) (SI: ohm, H, F); the
engines (:mod:`xo_fit.search.engines`) search the cube and never see units.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from xo_fit.errors import XoFitError


@dataclass(frozen=True)
class Space:
    """The free values of a job as a unit cube.

    names: free parts; columns: their columns in the values array (P);
    lo, hi: log of min and max (SI); base: every part's value (P,) with the
    free ones at their start; u0: the start point in the cube (n,), or None
    when no free part has a start value (then the search starts from random).
    """

    names: tuple[str, ...]
    columns: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    base: np.ndarray
    u0: np.ndarray | None

    @property
    def dims(self) -> int:
        """The number of free values n (dimensionless)."""
        return len(self.names)

    def values(self, u: np.ndarray) -> np.ndarray:
        """Part values (B, P) in SI for points u (B, n) of the cube."""
        if type(u) is not np.ndarray or u.ndim != 2:
            u = np.atleast_2d(u)
        x = np.maximum(u, 0.0)
        np.minimum(x, 1.0, out=x)  # np.clip's arithmetic without its Python wrapper
        once = self.__dict__.get("_once")
        if once is None:  # hi - lo, and whether every part is free in order, once (a search calls this a lot)
            once = (self.hi - self.lo, self.columns.size == self.base.size
                    and bool(np.array_equal(self.columns, np.arange(self.base.size))))
            object.__setattr__(self, "_once", once)
        span, every = once
        x *= span
        x += self.lo
        np.exp(x, out=x)
        if every:  # every part free: the values are x itself
            return x
        out = np.empty((u.shape[0], self.base.size))
        out[:] = self.base
        out[:, self.columns] = x
        return out


def make_space(job) -> Space:
    """The search space of a job: its free parts with their ranges and start values (XoFitError: none free)."""
    parts = job.valued_parts
    free = [i for i, p in enumerate(parts) if p.free]
    if not free:
        raise XoFitError("no free values to fit: give at least one part a min and max (and not fixed = true)",
                         path=job.path)
    lo = np.log([parts[i].min for i in free])
    hi = np.log([parts[i].max for i in free])
    base = np.array([p.value if p.value is not None else math.sqrt(p.min * p.max) for p in parts])
    starts = [parts[i].value for i in free]
    u0 = None
    if any(s is not None for s in starts):
        u0 = np.array([(math.log(s) - low) / (high - low) if s is not None else 0.5
                       for s, low, high in zip(starts, lo, hi)])
    return Space(names=tuple(parts[i].name for i in free), columns=np.array(free), lo=lo, hi=hi, base=base, u0=u0)
