"""The baffle's diffraction applied to a job's drivers (``[baffle]`` and ``baffle = true``; docs/baffle.md).

:func:`~xo_fit.physics.baffle.diffraction` gives ``D = p_with_edges / p_halfspace`` of a driver on a flat
baffle; here it is built once per driver for the job's positions (the axis, then an off-axis job's angles),
from the driver's ``position`` and ``radius``, the job's ``[baffle]``, ``[acoustics] distance`` and speed of
sound. What it multiplies (:func:`~xo_fit.model.system.load_system` applies it):

- a half-space curve or a near field used alone (``response = { file = ..., baffle = true }``): the on-axis
  curve times ``D`` on the axis; in an off-axis job each angle file (a half-space curve at that position, which
  holds the driver's own directivity) times ``D`` at its position, computed for a point source so that the
  directivity is not counted twice (the driver's ``radius`` is then not used);
- a splice with ``baffle = true``: the near field (omnidirectional below the splice) times ``D`` at each
  position, the piston's directivity included, before it is spliced with that position's far-field file; the
  splice joins magnitudes, so ``|D|`` enters and the joined curve takes minimum phase as every splice does;
- far-field files are left as measured (they hold the cabinet already).

``D`` carries no time of flight from the driver (the geometry's placement factors stay as they are).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from xo_fit.io.measure import Curve
from xo_fit.job.model import DriverSpec, FileCurve, Job
from xo_fit.physics.baffle import diffraction, rectangle
from xo_fit.physics.geometry import directions

#: The positions of a job without angles: the axis alone.
AXIS = (("h", 0),)


@dataclass(frozen=True, eq=False)
class Baffled:
    """The diffraction response applied to one driver's data: ``response`` complex (A, N) at ``frequencies``
    (N,) Hz, one row per position of the system (the axis first); ``point_source`` when the driver's radius was
    left out because its angle files hold its directivity."""

    frequencies: np.ndarray
    response: np.ndarray
    point_source: bool = False


def job_positions(job: Job) -> tuple:
    """The measuring positions of an off-axis job, the axis first (then horizontal, vertical, by angle); ()
    for an on-axis job. (The order of :attr:`~xo_fit.model.system.System.positions`.)"""
    angles = next((d.angles for d in job.drivers if d.angles is not None), None)
    if angles is None:
        return ()
    rest = sorted(angles.files(), key=lambda p: (p[0] != "h", p[1]))
    return (("h", 0), *rest)


def uses_point_source(spec: DriverSpec) -> bool:
    """Whether a driver's ``D`` is computed for a point source although it has a radius: a baffle = true file
    with angle files of its own, each of which holds the driver's directivity at its position."""
    return isinstance(spec.response, FileCurve) and spec.angles is not None


def driver_diffraction(job: Job, spec: DriverSpec, frequencies: np.ndarray, positions: tuple = AXIS) -> np.ndarray:
    """A driver's diffraction response on the job's baffle, complex (A, F).

    Parameters
    ----------
    job : Job
        The job; its ``[baffle]`` must be given.
    spec : DriverSpec
        The driver: its ``position`` ((0, 0) when not given) and ``radius`` (a point source when not given, or
        when :func:`uses_point_source`).
    frequencies : ndarray
        Frequencies, in Hz, shape (F,).
    positions : tuple
        (A,) ("h"|"v", degrees) pairs, the axis as ("h", 0).

    Returns
    -------
    ndarray
        Complex (dimensionless), shape (A, F): ``p_with_edges / p_halfspace`` (1/2 far below the baffle
        step, about 1 far above it in front).
    """
    assert job.baffle is not None
    x, y = spec.position if spec.position is not None else (0.0, 0.0)
    radius = 0.0 if uses_point_source(spec) or spec.radius is None else spec.radius
    f = np.ascontiguousarray(frequencies, dtype=float)
    return _cached(f.tobytes(), (x, y), tuple(positions), (job.baffle.x, job.baffle.y), radius, job.distance,
                   job.speed_of_sound).copy()


@lru_cache(maxsize=8)
def _cached(f: bytes, position: tuple, positions: tuple, edges: tuple, radius: float, distance: float,
            c: float) -> np.ndarray:
    """:func:`diffraction` remembered: every command of a process (the demo runs several) loads the job anew,
    and 70 positions cost a few tenths of a second."""
    return diffraction(np.frombuffer(f), position, directions(positions), rectangle(*edges), radius=radius,
                       distance=distance, speed_of_sound=c)


def baffled(job: Job, spec: DriverSpec, near: Curve | None, grid: np.ndarray, positions: tuple) -> Baffled | None:
    """What a ``baffle = true`` driver's data are multiplied by: ``D`` at the near field's frequencies for a
    splice (``near``), on the grid for one file; None for a driver without ``baffle = true``."""
    if not spec.baffle:
        return None
    f = near.frequency if near is not None else grid
    d = driver_diffraction(job, spec, f, positions or AXIS)
    d.setflags(write=False)
    return Baffled(frequencies=f, response=d, point_source=uses_point_source(spec) and spec.radius is not None)


def times(curve: Curve, d: np.ndarray) -> Curve:
    """A measured curve (dB SPL) times a complex factor ``d`` at its own frequencies (N,): its level plus
    20 log10 |d|, its phase column (if any) plus the angle of ``d``."""
    phase = None if curve.phase_deg is None else curve.phase_deg + np.degrees(np.unwrap(np.angle(d)))
    level = curve.magnitude + 20 * np.log10(np.maximum(np.abs(d), 1e-10))
    return Curve(path=curve.path, frequency=curve.frequency, magnitude=level, phase_deg=phase, lines=curve.lines)
