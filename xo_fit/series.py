"""Preferred-number series (IEC 60063:2015) and nearest values in log distance.

E3, E6, E12 and E24 are listed (two significant digits; E24 keeps the eight
historical values that differ from round(10^(i/24), 1): 2.7, 3.0, 3.3, 3.6,
3.9, 4.3, 4.7, 8.2). E48, E96 and E192 are the formula 10^(i/N) rounded to
three digits, except E192's 9.20 (the formula gives 9.19). Values repeat in
every decade.

Nearest means nearest in log distance: a value snaps to the series value
whose ratio to it is closest to 1, so the boundary between 1.0 and 1.2 is
their geometric mean 1.0954 (1.099 -> 1.2), not the arithmetic 1.1. (The
common PyPI package for these series snaps by linear distance, which is why
this small table module exists.)
"""

from __future__ import annotations

import math

import numpy as np

from xo_fit.errors import XoFitError

E12 = (1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2)
E24 = tuple(sorted(E12 + (1.1, 1.3, 1.6, 2.0, 2.4, 3.0, 3.6, 4.3, 5.1, 6.2, 7.5, 9.1)))


def _formula(n: int) -> tuple[float, ...]:
    return tuple(round(10 ** (i / n), 2) for i in range(n))


def _e192() -> tuple[float, ...]:
    values = list(_formula(192))
    values[values.index(9.19)] = 9.20  # IEC 60063's one exception in E192
    return tuple(values)


SERIES: dict[str, tuple[float, ...]] = {
    "E3": E12[::4],
    "E6": E12[::2],
    "E12": E12,
    "E24": E24,
    "E48": _formula(48),
    "E96": _formula(96),
    "E192": _e192(),
}
#: Names that leave a part continuous.
CONTINUOUS = ("none",)


def check_name(name: str) -> str:
    """A series name normalised (``"e12"`` -> ``"E12"``; ``"none"`` for a continuous part).

    Parameters
    ----------
    name : str
        A series name (E6 to E192, any case) or ``"none"``.

    Returns
    -------
    str
        The name as :data:`SERIES` spells it, or ``"none"``.

    Raises
    ------
    XoFitError
        For an unknown name.
    """
    if name.lower() in CONTINUOUS:
        return "none"
    up = name.upper()
    if up not in SERIES:
        raise XoFitError(f"unknown series {name!r}; expected one of {', '.join(SERIES)} or none")
    return up


def values_around(value: float, name: str, decades: int = 1) -> np.ndarray:
    """Every value of a series in the decades around ``value``, ascending.

    Parameters
    ----------
    value : float
        A value above 0, in its SI unit (ohm, H or F).
    name : str
        The series (a key of :data:`SERIES`).
    decades : int
        How many decades below and above the decade of ``value`` to cover (dimensionless).

    Returns
    -------
    ndarray
        The series values in the unit of ``value``, shape (N,) with N = (2 decades + 1) x the series' length.
    """
    d = math.floor(math.log10(value))
    mant = np.array(SERIES[name])
    return np.concatenate([mant * 10.0 ** k for k in range(d - decades, d + decades + 1)])


def nearest(value: float, name: str) -> float:
    """The series value nearest to ``value`` in log distance (ties go to the larger value).

    Parameters
    ----------
    value : float
        A value above 0, in its SI unit (ohm, H or F).
    name : str
        The series (a key of :data:`SERIES`).

    Returns
    -------
    float
        The nearest series value, in the unit of ``value``.
    """
    vals = values_around(value, name)
    dist = np.abs(np.log(vals / value))
    i = int(np.flatnonzero(dist <= dist.min() * (1 + 1e-12) + 1e-15)[-1])
    return float(vals[i])


def neighbours(value: float, name: str, k: int, lo: float | None = None, hi: float | None = None) -> list[float]:
    """The log-nearest series value and ``k`` values on each side of it, within [lo, hi] when given.

    When no series value lies inside [lo, hi], the nearest ones outside are taken.

    Parameters
    ----------
    value : float
        A value above 0, in its SI unit (ohm, H or F).
    name : str
        The series (a key of :data:`SERIES`).
    k : int
        Values on each side (dimensionless).
    lo, hi : float, optional
        The part's allowed range, in the unit of ``value``.

    Returns
    -------
    list of float
        Up to 2 k + 1 series values, ascending, in the unit of ``value``.
    """
    vals = values_around(value, name, decades=2)
    near = nearest(value, name)
    i = int(np.argmin(np.abs(vals - near)))
    out = list(vals[max(0, i - k): i + k + 1])
    if lo is not None and hi is not None:
        inside = [v for v in out if lo * (1 - 1e-9) <= v <= hi * (1 + 1e-9)]
        if inside:
            return [float(v) for v in inside]
    return [float(v) for v in out]
