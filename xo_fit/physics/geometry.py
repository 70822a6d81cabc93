"""Where the drivers are: directions of the measuring positions and propagation from each acoustic centre.

Coordinates (m), from the job's reference point: x to the right as a listener facing the speaker's front
sees it, y up, z out of the front towards the listener. A driver's acoustic centre is p = (x, y, -offset)
(``offset`` is its depth behind the reference plane). A listening point lies at distance D from the
reference point in direction u:

- horizontal orbit, angle a (positive towards the listener's right): the axis rotated about the vertical
  axis through the reference point, u = (sin a, 0, cos a);
- vertical orbit, angle a (positive upwards): rotated about the horizontal axis, u = (0, sin a, cos a);

so h0 = v0 is the axis (0, 0, 1) and h180 = v180 = v-180 the point behind, (0, 0, -1), as the position
names of the job have it.

A point source's pressure falls as 1/r and lags by its travel time r/c (the spherical wave
p = (A/r) exp(j(wt - kr)); Kinsler, Frey, Coppens, Sanders, *Fundamentals of Acoustics*, 4th ed., ch. 7).
Relative to a source at the reference point, a driver at p reaches the listening point D u with

- at a finite distance: r = |D u - p|, delay (r - D)/c, level D/r (20 log10(D/r) dB);
- in the far field (D -> infinity): r - D -> -u.p, so delay -u.p/c and no level change.

The factor is exp(-j w delay) times the level, w = 2 pi f (the package's convention: a delay tau is
exp(-j w tau), as the offset delay of the on-axis sum has always been). On the axis in the far field the
delay is offset/c: the offset delay the package applied before, so a driver that takes this factor must not
take the offset delay as well (:func:`placement_factors` gives each driver one or the other).

Which drivers take it: data that carry the geometry (phase measured about the job's reference point with one
timing reference, ``about = "reference"``) already hold each driver's path to every microphone position;
data that do not (derived phase: minimum phase, extended or spliced responses, a flat stand-in; or files
measured about the driver's own centre, ``about = "driver"``) get it added (:func:`carries_geometry`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from xo_fit.errors import XoFitError
from xo_fit.units import format_value

#: The orbits of a measuring position: "h" horizontal, "v" vertical (the names of the job's positions).
ORBITS = ("h", "v")
#: (sin, cos) of the whole quarter turns, exact.
_QUARTERS = {0.0: (0.0, 1.0), 90.0: (1.0, 0.0), 180.0: (0.0, -1.0), 270.0: (-1.0, 0.0)}
#: Where a driver's response phase came from (the loaded data's own words): measured, derived from the
#: magnitude ("minimum"), or a stand-in without delay ("ideal": a flat level).
PHASES = ("measured", "minimum", "ideal")
#: What a driver's files were measured about: the job's reference point, or the driver's own centre.
ABOUTS = ("reference", "driver")


def direction(orbit: str, angle_deg: float) -> np.ndarray:
    """Unit vector from the reference point towards a measuring position, shape (3,) (x right, y up, z front).

    Parameters
    ----------
    orbit : str
        "h" (rotation about the vertical axis, positive towards the listener's right) or "v" (about the
        horizontal axis, positive upwards).
    angle_deg : float
        The angle in degrees; any real number (180 and -180 on either orbit are the point behind).

    Returns
    -------
    numpy.ndarray
        (3,) float, unit length.
    """
    if orbit not in ORBITS:
        raise XoFitError(f"orbit must be 'h' or 'v', not {orbit!r}")
    a = float(angle_deg) % 360.0
    # whole multiples of 90 degrees exactly (cos 90 deg is 0, not 6e-17): the axis, the sides, the point behind
    s, c = _QUARTERS.get(a, (math.sin(math.radians(a)), math.cos(math.radians(a))))
    return np.array([s, 0.0, c]) if orbit == "h" else np.array([0.0, s, c])


def directions(positions: Sequence[tuple[str, float]]) -> np.ndarray:
    """Unit vectors from the reference point towards measuring positions, in the order given.

    Parameters
    ----------
    positions : sequence of tuple
        ``("h" | "v", angle in degrees)`` pairs, A of them.

    Returns
    -------
    ndarray
        Unit vectors (dimensionless; x right, y up, z forward), shape (A, 3).
    """
    if len(positions) == 0:
        return np.zeros((0, 3))
    return np.stack([direction(o, a) for o, a in positions])


def acoustic_centres(x: Sequence[float], y: Sequence[float], offset: Sequence[float]) -> np.ndarray:
    """Acoustic centres p = (x, y, -offset) of Dr drivers.

    Parameters
    ----------
    x, y : sequence of float
        Position in the baffle plane from the reference point, in m (x to the right facing the front, y up),
        shape (Dr,) each.
    offset : sequence of float
        Depth behind the reference plane, in m (negative: in front), shape (Dr,).

    Returns
    -------
    ndarray
        The centres, in m, shape (Dr, 3).

    Raises
    ------
    ValueError
        Unless x, y and offset hold one value per driver.
    """
    xs, ys, depth = (np.asarray(v, dtype=float).reshape(-1) for v in (x, y, offset))
    if not xs.size == ys.size == depth.size:
        raise ValueError("x, y and offset need one value per driver")
    return np.stack([xs, ys, -depth], axis=1)


def _paths(u: np.ndarray, p: np.ndarray, distance: float) -> tuple[np.ndarray, np.ndarray]:
    """Extra path (m) and level (ratio) of each driver at each listening point, (A, Dr) each."""
    up = np.sum(u[:, None, :] * p[None, :, :], axis=2)  # u.p, (A, Dr); exact for the axis (0, 0, 1)
    if math.isinf(distance):
        return -up, np.ones_like(up)
    reach = float(np.max(np.linalg.norm(p, axis=1))) if p.size else 0.0
    if not distance > reach:
        raise XoFitError(f"the listening distance {format_value(distance, 'm')} must lie beyond every driver's "
                         f"acoustic centre (the farthest is {format_value(reach, 'm')} from the reference point)")
    r = np.linalg.norm(distance * u[:, None, :] - p[None, :, :], axis=2)  # (A, Dr)
    # r - D written as (r^2 - D^2) / (r + D) = (|p|^2 - 2 D u.p) / (r + D): no cancellation at a long distance
    return (np.sum(p * p, axis=1)[None, :] - 2 * distance * up) / (r + distance), distance / r


def delays_and_levels(directions_: np.ndarray, centres: np.ndarray, *, speed_of_sound: float,
                      distance: float = math.inf) -> tuple[np.ndarray, np.ndarray]:
    """Each driver's delay (s) and level (ratio) at each listening point, relative to a source at the reference.

    Parameters
    ----------
    directions_ : numpy.ndarray
        (A, 3) unit vectors of the listening points (:func:`directions`).
    centres : numpy.ndarray
        (Dr, 3) acoustic centres, m (:func:`acoustic_centres`).
    speed_of_sound : float
        c, m/s.
    distance : float
        D, m, from the reference point to every listening point; ``math.inf`` (the default) for the far field.

    Returns
    -------
    delay : numpy.ndarray
        (A, Dr) s: (r - D)/c with r = |D u - p|, or -u.p/c in the far field.
    level : numpy.ndarray
        (A, Dr) pressure ratio D/r, or ones in the far field.

    Raises
    ------
    XoFitError
        When the distance is not beyond every acoustic centre (a listening point among the drivers).
    """
    if not speed_of_sound > 0:
        raise ValueError("speed_of_sound must be positive")
    path, level = _paths(np.asarray(directions_, dtype=float), np.asarray(centres, dtype=float), distance)
    return path / speed_of_sound, level


def propagation(directions_: np.ndarray, centres: np.ndarray, frequencies: np.ndarray, *,
                speed_of_sound: float, distance: float = math.inf) -> np.ndarray:
    """Complex propagation factor of each driver at each listening point, shape (A, Dr, F).

    ``level * exp(-j 2 pi f delay)`` from :func:`delays_and_levels`: the pressure of a unit point source at
    the driver's acoustic centre relative to the same source at the reference point. Written as the offset
    delay always was (exp(-j w path / c)), so that a driver at x = y = 0 in the far field gets on the axis
    exactly, bit for bit, the offset delay it got before.

    Parameters
    ----------
    directions_ : numpy.ndarray
        (A, 3) unit vectors.
    centres : numpy.ndarray
        (Dr, 3) acoustic centres, m.
    frequencies : numpy.ndarray
        (F,) Hz.
    speed_of_sound : float
        m/s.
    distance : float
        m; ``math.inf`` for the far field.

    Returns
    -------
    numpy.ndarray
        (A, Dr, F) complex, dimensionless.
    """
    if not speed_of_sound > 0:
        raise ValueError("speed_of_sound must be positive")
    path, level = _paths(np.asarray(directions_, dtype=float), np.asarray(centres, dtype=float), distance)
    w = 2 * np.pi * np.asarray(frequencies, dtype=float)
    out = np.exp(-1j * w[None, None, :] * path[:, :, None] / speed_of_sound)
    if not math.isinf(distance):
        out *= level[:, :, None]
    return out


def placement_factors(positions: Sequence[tuple[str, float]], centres: np.ndarray, adds: Sequence[bool],
                      frequencies: np.ndarray, *, speed_of_sound: float,
                      distance: float = math.inf) -> np.ndarray:
    """What multiplies each driver's response at each position: geometry or the offset delay, (A, Dr, F).

    A driver whose data do not carry the geometry (``adds`` True) gets :func:`propagation` from its acoustic
    centre (its depth included: on the axis in the far field that is the offset delay). A driver whose data
    carry it (``adds`` False) gets the offset delay exp(-j w offset / c) at every position, as before
    (the files hold each path; the offset is the time of flight removed from all of them alike). So each
    driver's depth enters once: multiply by this instead of the offset delay, never as well.

    Parameters
    ----------
    positions : sequence of (str, float)
        A positions, ("h"|"v", degrees); the on-axis sum is ("h", 0).
    centres : numpy.ndarray
        (Dr, 3) acoustic centres (x, y, -offset), m.
    adds : sequence of bool
        (Dr,) whether the propagation is added (``not carries_geometry(...)``).
    frequencies : numpy.ndarray
        (F,) Hz.
    speed_of_sound : float
        m/s.
    distance : float
        m; ``math.inf`` for the far field. Raises XoFitError when not beyond every centre that is added.

    Returns
    -------
    numpy.ndarray
        (A, Dr, F) complex.
    """
    p = np.asarray(centres, dtype=float)
    added = np.asarray(adds, dtype=bool).reshape(-1)
    if added.size != p.shape[0]:
        raise ValueError("adds needs one flag per driver")
    f = np.asarray(frequencies, dtype=float)
    w = 2 * np.pi * f
    out = np.empty((len(positions), p.shape[0], f.size), dtype=complex)
    offset = -p[:, 2]
    offset_delay = np.exp(-1j * w[None, :] * offset[:, None] / speed_of_sound)  # (Dr, F): as before, bit for bit
    out[:] = offset_delay[None]
    if added.any():
        out[:, added] = propagation(directions(positions), p[added], f, speed_of_sound=speed_of_sound,
                                   distance=distance)
    return out


# ----------------------------------------------------------------------------- which drivers, and what check says


def carries_geometry(phase: str, about: str | None = None) -> bool:
    """Whether a driver's data hold its path to every microphone position (True), or need it added (False).

    Parameters
    ----------
    phase : str
        Where the response phase came from: "measured", "minimum" (derived: also every extended or spliced
        response) or "ideal" (a flat stand-in).
    about : str or None
        ``[driver.NAME.angles] about``: "reference", "driver", or None when not given (measured phase is then
        taken about the reference).

    Returns
    -------
    bool
        True only for measured phase about the reference point. Derived phase never carries the geometry,
        whatever ``about`` says.
    """
    if phase not in PHASES:
        raise ValueError(f"phase must be one of {PHASES}, got {phase!r}")
    if about is not None and about not in ABOUTS:
        raise ValueError(f"about must be one of {ABOUTS} or None, got {about!r}")
    return phase == "measured" and about != "driver"


@dataclass(frozen=True)
class Placement:
    """One driver as ``check`` and the warnings see it (plain values, no job needed).

    name: the driver; x, y, offset: m (x, y 0 when not given); positioned: whether ``position`` was given;
    phase: "measured" | "minimum" | "ideal"; about: "reference" | "driver" | None (not given);
    phase_in_files: whether the response or angle files hold a phase column (None: unknown or no file).
    """

    name: str
    x: float
    y: float
    offset: float
    positioned: bool
    phase: str
    about: str | None = None
    phase_in_files: bool | None = None

    @property
    def carries(self) -> bool:
        """:func:`carries_geometry` of this driver."""
        return carries_geometry(self.phase, self.about)


def placement_line(p: Placement, distance: float = math.inf) -> str:
    """One line for ``check``: where the driver is and how its geometry enters the sums."""
    where = (f"x {format_value(p.x, 'm')}, y {format_value(p.y, 'm')}" if p.positioned
             else "no position (taken at x 0, y 0)")
    where += f", offset {format_value(p.offset, 'm')}"
    field = "far field" if math.isinf(distance) else f"at {format_value(distance, 'm')}, levels 1/r"
    if p.carries:
        how = ("measured phase about the reference point: its files carry the geometry; the offset adds the "
               "same delay at every position" + ("; the position is for information only" if p.positioned else ""))
    else:
        why = {"minimum": "derived (minimum) phase", "ideal": "a flat stand-in without delay",
               "measured": 'measured phase about the driver (about = "driver")'}[p.phase]
        how = f"{why}: the path from its acoustic centre is added to every sum ({field})"
    return f"driver {p.name}: {where}; {how}"


def placement_warnings(placements: Sequence[Placement], *, off_axis: bool,
                       distance: float = math.inf) -> list[str]:
    """One-line warnings about how the drivers' geometry enters the sums.

    - measured phase in a driver's files dropped (``phase = "minimum"``) in an off-axis job: the files'
      geometry is lost, the position model stands in;
    - ``about = "reference"`` with derived phase (it cannot hold: the driver is taken about itself);
    - a driver that needs its geometry added has no position where others have one;
    - no driver has a position although two or more need their geometry added and the sums depend on it
      (an off-axis job, or a finite distance).

    Parameters
    ----------
    placements : sequence of Placement
        Every driver of the job.
    off_axis : bool
        Whether the job sums at positions other than the axis.
    distance : float
        m; ``math.inf`` for the far field.
    """
    out = []
    for p in placements:
        if off_axis and p.phase == "minimum" and p.phase_in_files:
            out.append(f'driver {p.name}: phase = "minimum" drops the measured phase of its files, and with it the '
                       "geometry they hold; the off-axis sums place it by its position and offset")
        if p.about == "reference" and p.phase != "measured":
            out.append(f'driver {p.name}: about = "reference" cannot hold with {p.phase} phase; it is taken as '
                       "measured about itself and placed by its position")
    adds = [p for p in placements if not p.carries]
    placed = [p.name for p in placements if p.positioned]
    for p in adds:
        if not p.positioned and placed:
            out.append(f"driver {p.name} needs its geometry added but has no position while {placed[0]} has one: "
                       "it is taken at the reference point (x 0, y 0); give [driver." + p.name + "] position")
    sums_see_it = off_axis or not math.isinf(distance)
    if sums_see_it and len(adds) >= 2 and not placed:
        names = ", ".join(p.name for p in adds)
        out.append(f"no driver has a position, and {names} need their geometry added: every sum takes them at the "
                   "reference point (depth from offset only); give each [driver.NAME] position")
    return out
