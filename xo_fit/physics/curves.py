"""A measured curve on the job's grid: magnitude interpolated in dB and unwrapped phase in radians, both
linearly over log-frequency, or minimum phase derived from the magnitude. A grid reaching beyond a file's
range is an error, never an extrapolation."""

from __future__ import annotations


import numpy as np

from xo_fit.constants import P_REF
from xo_fit.errors import DataError
from xo_fit.io.measure import RANGE_SLACK, Curve
from xo_fit.physics.minimum_phase import minimum_phase

#: A step of measured phase between adjacent points above this (deg) is warned about.
PHASE_STEP_WARN_DEG = 120.0


def check_coverage(curve: Curve, grid: np.ndarray, kind: str) -> None:
    """Raise if ``grid`` (Hz) reaches beyond the file's frequency range."""
    lo, hi = curve.f_range
    if grid[0] < lo * (1 - RANGE_SLACK) or grid[-1] > hi * (1 + RANGE_SLACK):
        if hi <= 200.0 and hi * 1000.0 >= grid[-1] * (1 - RANGE_SLACK):
            advice = (f"its frequencies look like kHz ({lo:g}-{hi:g}): write them in Hz "
                      f"({lo * 1000:g}-{hi * 1000:g})")
        else:
            advice = "narrow [grid] f_min/f_max, extend the data (extend_low/extend_high) or measure wider"
        raise DataError(
            f"{kind} covers {lo:g}-{hi:g} Hz but the job's grid spans {grid[0]:g}-{grid[-1]:g} Hz; {advice}",
            path=curve.path)


def magnitude_db(curve: Curve, kind: str) -> np.ndarray:
    """The curve's magnitude in dB: dB SPL for a response, 20 log10(|Z| / 1 ohm) for an impedance."""
    return curve.magnitude if kind == "response" else 20.0 * np.log10(curve.magnitude)


def on_grid(curve: Curve, grid: np.ndarray, kind: str, phase: str = "measured") -> tuple[np.ndarray, list[str]]:
    """Put a curve on the grid as a complex array.

    Parameters
    ----------
    curve : Curve
        As read by :func:`~xo_fit.io.measure.read_curve`.
    grid : ndarray
        Frequencies in Hz, shape (F,), inside the curve's range.
    kind : str
        ``"response"`` or ``"impedance"``.
    phase : str
        ``"measured"`` (the file's phase column) or ``"minimum"`` (derived from the magnitude).

    Returns
    -------
    values : ndarray
        Complex, shape (F,): sound pressure in Pa (response; |p| = 20 uPa 10^(dB/20)) or impedance in ohm.
    warnings : list of str
        Human-readable remarks about the data (e.g. phase that steps too fast to interpolate).
    """
    check_coverage(curve, grid, kind)
    warnings: list[str] = []
    logf = np.log(curve.frequency)
    logg = np.log(grid)
    db = magnitude_db(curve, kind)
    grid_db = np.interp(logg, logf, db)
    if phase == "minimum":
        ph = minimum_phase(curve.frequency, db, grid)
    else:
        if curve.phase_deg is None:
            raise DataError(f"{kind} file has no phase column; add one, or set "
                            f"{'phase' if kind == 'response' else 'impedance_phase'} = \"minimum\" "
                            "to derive it from the magnitude", path=curve.path)
        unwrapped = np.unwrap(np.deg2rad(curve.phase_deg))
        steps = np.where(_judged_steps(curve.frequency, db, grid), np.abs(np.diff(unwrapped)), 0.0)
        if steps.size and np.max(steps) > np.deg2rad(PHASE_STEP_WARN_DEG):
            i = int(np.argmax(steps))
            warnings.append(f"{curve.path}:{int(curve.lines[i + 1])}: phase steps {np.rad2deg(steps[i]):.0f} deg "
                            "between adjacent points, too fast to interpolate reliably; remove the time-of-flight "
                            "delay from the file (and set offset), or use phase = \"minimum\"")
        ph = np.interp(logg, logf, unwrapped)
    mag = 10.0 ** (grid_db / 20.0)
    if kind == "response":
        mag = mag * P_REF
    return mag * np.exp(1j * ph), warnings


#: A point this far (dB) under the highest level within three points either side is a null: phase may turn
#: by up to 180 degrees across it (a piston's or a baffle's null), which is no sign of a time-of-flight delay.
NULL_DEPTH_DB = 15.0


def _judged_steps(frequency: np.ndarray, db: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Which steps between adjacent points (F - 1,) a phase-step warning may judge: those that touch the
    grid's span, away from nulls of the magnitude."""
    inside = (frequency[1:] >= grid[0]) & (frequency[:-1] <= grid[-1])
    n = db.size
    peak = np.array([db[max(0, k - 3):k + 4].max() for k in range(n)])
    null = (peak - db) >= NULL_DEPTH_DB
    return inside & ~(null[1:] | null[:-1])
