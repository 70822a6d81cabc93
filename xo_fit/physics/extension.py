"""A curve continued beyond its file's ends (slopes, fitted high-passes) and near-field + far-field splicing."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from xo_fit.errors import DataError
from xo_fit.io.measure import Curve
from xo_fit.physics.minimum_phase import edge_slope
from xo_fit.physics.curves import magnitude_db

#: The extensions a file's data can take beyond its ends.
EXTENSIONS = ("none", "slope", "order2", "order4")


#: Points per octave of an extension.
EXTEND_PER_OCTAVE = 48


def extend_curve(curve: Curve, grid: np.ndarray, kind: str, low: str = "none", high: str = "none") -> Curve:
    """The curve with its magnitude continued to cover the grid.

    ``"slope"`` continues the dB-per-octave slope fitted over the data's outer third of an octave;
    ``"order2"``/``"order4"`` (low end only) fit a second- or fourth-order Butterworth high-pass to the data's
    lowest octave, joined at the file's first point without a step. The phase column is dropped: an extended
    curve takes minimum phase from its whole magnitude.

    Parameters
    ----------
    curve : Curve
        The curve as read (frequency in Hz, magnitude in dB SPL or ohm).
    grid : ndarray
        The grid to cover, in Hz, shape (F,).
    kind : str
        ``"response"`` (magnitude in dB SPL) or ``"impedance"`` (in ohm).
    low, high : str
        How to extend each end: ``"none"``, ``"slope"``, and at the low end also ``"order2"`` or ``"order4"``.

    Returns
    -------
    Curve
        The extended curve (``curve`` itself when both ends are ``"none"``), EXTEND_PER_OCTAVE points per
        octave in the extensions, whose points have line 0; no phase.
    """
    if low == "none" and high == "none":
        return curve
    u = np.log(curve.frequency)
    db = magnitude_db(curve, kind)
    parts_u, parts_db = [], []
    lo_g, hi_g = float(np.log(grid[0])), float(np.log(grid[-1]))
    if low != "none" and lo_g < u[0]:
        n = int(np.ceil((u[0] - lo_g) / np.log(2) * EXTEND_PER_OCTAVE)) + 1
        ue = np.linspace(lo_g - 1e-9, u[0], n + 1)[:-1]
        if low == "slope":
            ext = db[0] + edge_slope(u, db, True) * (ue - u[0])
        else:
            ext = _highpass_extension(u, db, ue, 2 if low == "order2" else 4)
        parts_u.append(ue)
        parts_db.append(ext)
    parts_u.append(u)
    parts_db.append(db)
    if high != "none" and hi_g > u[-1]:
        n = int(np.ceil((hi_g - u[-1]) / np.log(2) * EXTEND_PER_OCTAVE)) + 1
        ue = np.linspace(u[-1], hi_g + 1e-9, n + 1)[1:]
        parts_u.append(ue)
        parts_db.append(db[-1] + edge_slope(u, db, False) * (ue - u[-1]))
    uu, dd = np.concatenate(parts_u), np.concatenate(parts_db)
    lines = np.concatenate([np.zeros(len(x), dtype=curve.lines.dtype) if x is not u else curve.lines
                            for x in parts_u])  # extension points have no line of the file (0)
    mag = dd if kind == "response" else 10.0 ** (dd / 20.0)
    return Curve(path=curve.path, frequency=np.exp(uu), magnitude=mag, phase_deg=None, lines=lines)


#: Width of the band around a splice over which the near field is level-matched and faded into the far field.
SPLICE_OCTAVES = 1.0 / 3.0


#: Points per octave of a spliced curve.
SPLICE_PER_OCTAVE = 48


@dataclass(frozen=True)
class Splice:
    """A near-field and a far-field response joined.

    Attributes
    ----------
    curve : Curve
        The joined response (magnitude only, in dB SPL).
    gain_db : float
        The shift added to the near field, in dB, to match the far field around ``splice_hz``.
    splice_hz : float
        The splice frequency, in Hz.
    """

    curve: Curve
    gain_db: float
    splice_hz: float


def splice_curves(near: Curve, far: Curve, splice_hz: float, gain_db: float | None = None) -> Splice:
    """Join a near-field response (below ``splice_hz``) to a far-field one (above).

    The near field is shifted by the mean dB difference over the third of an octave centred on the splice
    (means over log frequency), then faded into the far field over that same third of an octave (weights
    linear in log frequency), so the join has neither a step nor a kink worse than the data's. The result
    covers the near file's start to the far file's end, at SPLICE_PER_OCTAVE points per octave; it has no
    phase (it takes minimum phase from its whole magnitude).

    Parameters
    ----------
    near, far : Curve
        The near-field and far-field responses, magnitudes in dB SPL.
    splice_hz : float
        The splice frequency, in Hz.
    gain_db : float, optional
        The near field's shift in dB instead of the one matched here: an off-axis far field spliced with the
        on-axis splice's shift, so that the near field is the same at every angle (omnidirectional below the
        splice).

    Returns
    -------
    Splice
        The joined curve and the shift used.

    Raises
    ------
    DataError
        When either file does not cover the splice's third of an octave.
    """
    half = SPLICE_OCTAVES / 2 * np.log(2.0)
    u0 = float(np.log(splice_hz))
    for c, name in ((near, "near"), (far, "far")):
        lo, hi = np.log(c.f_range[0]), np.log(c.f_range[1])
        if not (lo <= u0 - half and u0 + half <= hi):
            raise DataError(f"the {name}-field file covers {c.f_range[0]:g}-{c.f_range[1]:g} Hz; it must cover the "
                            f"third of an octave around splice_hz = {splice_hz:g} Hz "
                            f"({np.exp(u0 - half):.4g}-{np.exp(u0 + half):.4g} Hz)", path=c.path)
    un, uf = np.log(near.frequency), np.log(far.frequency)
    window = np.linspace(u0 - half, u0 + half, 33)
    gain = (float(np.mean(np.interp(window, uf, far.magnitude) - np.interp(window, un, near.magnitude)))
            if gain_db is None else float(gain_db))
    lo, hi = float(un[0]), float(uf[-1])
    n = max(int(np.ceil((hi - lo) / np.log(2.0) * SPLICE_PER_OCTAVE)) + 1, 2)
    u = np.linspace(lo, hi, n)
    a = np.interp(u, un, near.magnitude) + gain
    b = np.interp(u, uf, far.magnitude)
    w = np.clip((u - (u0 - half)) / (2 * half), 0.0, 1.0)  # 0: near field, 1: far field
    db = np.where(u < u0 - half, a, np.where(u > u0 + half, b, (1 - w) * a + w * b))
    curve = Curve(path=far.path, frequency=np.exp(u), magnitude=db, phase_deg=None,
                  lines=np.zeros(n, dtype=far.lines.dtype))
    return Splice(curve=curve, gain_db=gain, splice_hz=float(splice_hz))


def _highpass_extension(u: np.ndarray, db: np.ndarray, ue: np.ndarray, order: int) -> np.ndarray:
    """dB below the data's first point from an order-N Butterworth high-pass fitted over its lowest octave."""
    sel = u <= u[0] + np.log(2.0)
    if np.count_nonzero(sel) < 3:
        sel = slice(0, min(3, u.size))
    us, ds = u[sel], db[sel]

    def shape(x_u: np.ndarray, log_fc: np.ndarray | float) -> np.ndarray:  # 20 log10 |H|, |H|^2 = x^2N / (1 + x^2N)
        x2 = np.exp(2 * order * (x_u - log_fc))
        return 10 * np.log10(x2 / (1 + x2))

    corners = np.linspace(us[0] - 3 * np.log(2), us[-1] + np.log(2), 400)  # corner from 3 octaves below on
    m = shape(us[None, :], corners[:, None])  # (400, n): every candidate corner at once
    r = ds[None, :] - m
    err = np.sum((r - r.mean(axis=1, keepdims=True)) ** 2, axis=1)
    log_fc = float(corners[int(np.argmin(err))])
    g = db[0] - float(shape(np.array([u[0]]), log_fc)[0])  # joined at the file's first point, no step
    return g + shape(ue, log_fc)
