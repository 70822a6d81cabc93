"""Acoustic target curves: per-way slopes (Linkwitz-Riley, Butterworth, Bessel) and the system target.

Every way target is a complex transfer function of unit passband gain: the
analog prototypes of scipy.signal, evaluated here in closed form (and tested
against scipy.signal):

* ``BW`` order N: ``scipy.signal.butter(N, wc, analog=True)`` (-3.01 dB at fc);
* ``LR`` order N (even): a Butterworth of order N/2 squared (S. Linkwitz,
  JAES 24(1), 1976; -6.02 dB at fc);
* ``Bessel`` order N: ``scipy.signal.bessel(N, wc, analog=True, norm="phase")``,
  the normalisation whose phase response reaches half its asymptote at fc for
  low orders (the one the handbook Bessel-2 crossover uses); for orders 3 and
  up scipy's phase at fc differs slightly from the midpoint (docs/references.md).

Types: ``lowpass`` and ``highpass`` at ``fc``; ``bandpass`` is the high-pass
at ``fc_low`` times the low-pass at ``fc_high``; ``fullrange`` is 1.

Polarity: a way target carries the sign that makes adjacent ways sum as the
textbook intends. For Butterworth and Linkwitz-Riley pairs the high-pass leads
the low-pass by N x 90 deg, so the upper way is inverted when N x 90 deg is an
odd multiple of 180 deg (orders 2, 6): an LR2 or BW2 tweeter is inverted, an
LR4 one is not; orders 1 and 3 (quadrature) stay normal. The rule is applied
up the chain of ways sorted by frequency, so in a three-way LR2 the midrange is
inverted and the tweeter normal. A way's ``polarity = "normal"`` or
``"inverted"`` overrides the rule.

The system target is the complex sum of the way targets, shaped by a curve
(frequency, dB: a file in ``targets/`` named by its stem, or a path) and
placed at the job's level.
"""

from __future__ import annotations

import importlib.resources
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from xo_fit.errors import DataError, JobError
from xo_fit.job.model import Job
from xo_fit.job.settings import WayTarget
from xo_fit.io.measure import read_curve



def shipped_curves() -> dict[str, importlib.resources.abc.Traversable]:
    """The ready-made system target curves (frequency, dB) shipped as package data, by stem."""
    folder = importlib.resources.files("xo_fit").joinpath("data", "targets")
    return {Path(x.name).stem: x for x in folder.iterdir() if x.name.endswith(".txt")}


def _butterworth_lowpass(order: int, x: np.ndarray) -> np.ndarray:
    """Butterworth low-pass at normalised complex frequency x = s / wc: 1 / prod(x - p_k).

    Poles p_k = exp(j pi (2k + N - 1) / (2N)), k = 1..N, on the unit circle's left half.
    """
    k = np.arange(1, order + 1)
    poles = np.exp(1j * np.pi * (2 * k + order - 1) / (2 * order))
    out = np.ones_like(x)
    for p in poles:
        out = out * (-p) / (x - p)  # prod(-p) = 1: unit gain at DC
    return out


def _bessel_lowpass(order: int, x: np.ndarray) -> np.ndarray:
    """Bessel low-pass at x = s / wc, normalised as scipy's norm="phase".

    theta_N(s) = sum_k (2N - k)! / (2^(N-k) k! (N-k)!) s^k is the reverse Bessel
    polynomial; a0 / theta_N(s) has unit group delay at DC. Scaling s by
    a0^(1/N) gives the same high-frequency asymptote as a Butterworth of cutoff
    wc, scipy's "phase" normalisation.
    """
    from math import factorial

    coef = [factorial(2 * order - k) / (2 ** (order - k) * factorial(k) * factorial(order - k))
            for k in range(order + 1)]
    a0 = coef[0]
    y = x * a0 ** (1.0 / order)
    den = np.zeros_like(y)
    for c in reversed(coef):  # Horner
        den = den * y + c
    return a0 / den


def slope(alignment: str, order: int, btype: str, fc: float, f: np.ndarray) -> np.ndarray:
    """Complex response of one filter slope on a frequency grid.

    The analog prototypes are evaluated in closed form (Butterworth poles, the
    Bessel polynomial); tests/test_targets.py holds them to
    ``scipy.signal.butter`` / ``bessel(norm="phase")`` (importing scipy.signal
    would cost 0.6 s of every command's start-up). A high-pass is the low-pass
    at wc / s.

    Parameters
    ----------
    alignment : str
        ``"BW"`` (Butterworth), ``"LR"`` (Linkwitz-Riley: a Butterworth of half the order, squared) or
        ``"Bessel"`` (phase-normalised).
    order : int
        The filter order (dimensionless); even for ``"LR"``.
    btype : str
        ``"low"`` or ``"high"``.
    fc : float
        The corner frequency, in Hz.
    f : ndarray
        Frequencies, in Hz, shape (F,).

    Returns
    -------
    ndarray
        The complex response (dimensionless, unit passband), shape (F,).

    Raises
    ------
    ValueError
        For an odd Linkwitz-Riley order or an unknown alignment (the job reader refuses both first).
    """
    s = 1j * np.asarray(f, dtype=float) / fc
    x = s if btype == "low" else 1.0 / s
    if alignment == "BW":
        return _butterworth_lowpass(order, x)
    if alignment == "LR":
        if order % 2:
            raise ValueError("a Linkwitz-Riley alignment has an even order")
        return _butterworth_lowpass(order // 2, x) ** 2
    if alignment == "Bessel":
        return _bessel_lowpass(order, x)
    raise ValueError(f"unknown alignment {alignment!r}")


def way_shape(way: WayTarget, f: np.ndarray) -> np.ndarray:
    """The way's complex target: unit passband, no polarity.

    Parameters
    ----------
    way : WayTarget
        The way's target (type, alignment, order, crossover frequencies).
    f : ndarray
        Frequencies, in Hz, shape (F,).

    Returns
    -------
    ndarray
        The complex target (dimensionless), shape (F,): ones for a full-range way, a bandpass the product of its
        high-pass at fc_low and low-pass at fc_high.
    """
    if way.type == "fullrange":
        return np.ones(np.shape(f), dtype=complex)
    if way.type in ("lowpass", "highpass"):
        assert way.fc is not None  # the job reader requires fc of a low- or highpass
        return slope(way.alignment, way.order, "low" if way.type == "lowpass" else "high", way.fc, f)
    assert way.fc_low is not None and way.fc_high is not None  # the reader requires both of a bandpass
    return (slope(way.alignment, way.order, "high", way.fc_low, f)
            * slope(way.alignment, way.order, "low", way.fc_high, f))


def _low_edge(way: WayTarget) -> float:
    return {"lowpass": 0.0, "fullrange": 0.0, "highpass": way.fc or 0.0, "bandpass": way.fc_low or 0.0}[way.type]


def polarities(ways: tuple[WayTarget, ...]) -> dict[str, float]:
    """+1 or -1 per way (by driver name): the textbook polarity, or the way's own override."""
    order = sorted(ways, key=_low_edge)
    out: dict[str, float] = {}
    sign = 1.0
    for i, w in enumerate(order):
        if i > 0 and w.type in ("highpass", "bandpass"):
            n = w.order
            if n % 4 == 2:  # N x 90 deg is an odd multiple of 180 deg
                sign = -sign
        auto = sign
        out[w.driver] = {"normal": 1.0, "inverted": -1.0}.get(w.polarity, auto)
        sign = out[w.driver]
    return out


#: The shipped shaping curves as formulas, dB per decade of fall, 0 dB at 1 kHz (data/targets/ lists them as
#: files too, 10 Hz to 40 kHz, for reading and as examples of the file form).
TILTS = {"flat": 0.0, "tilt-1db-decade": 1.0, "tilt-2db-decade": 2.0}


def load_curve(name: str, job: Job, f: np.ndarray) -> np.ndarray:
    """A shaping curve in dB on the grid.

    Parameters
    ----------
    name : str
        A shipped curve's stem (``"flat"``, ``"tilt-1db-decade"``, ...) or a file path (relative to the job's
        folder).
    job : Job
        The job (its folder, and its file for messages).
    f : ndarray
        The grid, in Hz, shape (F,).

    Returns
    -------
    ndarray
        The curve in dB (relative), shape (F,), interpolated linearly in log frequency.

    Raises
    ------
    JobError
        For a missing file or an unknown name.
    DataError
        For a curve file that does not cover the grid.
    """
    p = Path(name)
    shipped = shipped_curves()
    if p.suffix or os.sep in name or "/" in name:
        path = p if p.is_absolute() else job.folder / p
        if not path.exists():
            raise JobError(f"target curve file {path} not found", path=job.path, key="[target] curve")
        return _curve_on_grid(path, f)
    if name in TILTS:  # the shipped curves are straight lines in log frequency: defined on any grid
        return -TILTS[name] * np.log10(np.asarray(f, dtype=float) / 1000.0)
    if name in shipped:
        with importlib.resources.as_file(shipped[name]) as path:
            return _curve_on_grid(path, f)
    names = ", ".join(sorted(shipped)) or "(none shipped)"
    raise JobError(f"no target curve '{name}': give a file path or one of {names}", path=job.path, key="[target] curve")


def _curve_on_grid(path: Path, f: np.ndarray) -> np.ndarray:
    curve = read_curve(path, "response")
    lo, hi = curve.f_range
    if f[0] < lo * (1 - 1e-9) or f[-1] > hi * (1 + 1e-9):
        raise DataError(f"target curve covers {lo:g}-{hi:g} Hz but the job's grid spans {f[0]:g}-{f[-1]:g} Hz",
                        path=path)
    return np.interp(np.log(f), np.log(curve.frequency), curve.magnitude)


@dataclass(frozen=True, eq=False)
class Targets:
    """All targets of a job on its grid.

    Attributes
    ----------
    ways : ndarray
        Way targets, polarity and the shaping curve included, unit passband, complex (dimensionless), shape (D, F):
        one row per driver
        in job order (a row of NaN for a driver without a way target).
    has_way : ndarray
        Whether each driver has a way target, bool, shape (D,).
    system : ndarray
        The system target at unit level (the sum of the ways times the curve), complex (dimensionless), shape (F,).
    curve_db : ndarray
        The shaping curve in dB, shape (F,).
    band : ndarray
        The grid points inside the target band, bool, shape (F,).
    level_db : float or None
        The fixed level in dB SPL, or None for ``"auto"``.
    polarity : dict
        Driver name -> +1.0 or -1.0 (dimensionless).
    """

    ways: np.ndarray
    has_way: np.ndarray
    system: np.ndarray
    curve_db: np.ndarray
    band: np.ndarray
    level_db: float | None
    polarity: dict


def build_targets(job: Job, f: np.ndarray) -> Targets:
    """The targets of ``job`` on grid ``f``.

    Parameters
    ----------
    job : Job
        The job.
    f : ndarray
        The grid, in Hz, shape (F,).

    Returns
    -------
    Targets
        The way targets, the system target, the curve, the band and the level.

    Raises
    ------
    JobError
        When the job has no way targets.
    """
    spec = job.target
    if not spec.ways:
        raise JobError("no way targets: add a [target.way.NAME] table for each driver", path=job.path,
                       key="[target]")
    pol = polarities(spec.ways)
    by_name = {w.driver: w for w in spec.ways}
    ways = np.full((len(job.drivers), f.size), np.nan + 0j)
    has = np.zeros(len(job.drivers), dtype=bool)
    for i, d in enumerate(job.drivers):
        if d.name in by_name:
            ways[i] = pol[d.name] * way_shape(by_name[d.name], f)
            has[i] = True
    curve_db = load_curve(spec.curve, job, f)
    shape = 10 ** (curve_db / 20.0)
    system = np.nansum(np.where(has[:, None], ways, 0), axis=0) * shape
    ways = np.where(has[:, None], ways * shape, ways)
    from xo_fit.grid import band_mask

    band = band_mask(f, spec.band)
    level = None if spec.level == "auto" else float(spec.level)
    for a in (ways, system, curve_db, band):
        a.setflags(write=False)
    return Targets(ways=ways, has_way=has, system=system, curve_db=curve_db, band=band, level_db=level,
                   polarity=pol)
