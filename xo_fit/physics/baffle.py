"""Edge diffraction of a thin flat baffle: the baffle step and the edge ripple of a driver on a cabinet's front.

The model (docs/baffle.md gives the derivation): a thin rigid baffle in the plane z = 0, the driver a point source
(or a small piston) on its front face. The field splits exactly into a part even in z, which does not see a thin
baffle at all (the free-field pressure G of the source), and an odd part; the odd part is taken in the Kirchhoff
(physical-optics) approximation, the baffle's front-to-back pressure jump being the one an infinite baffle would
have (2 G). The Kirchhoff double-layer integral over the baffle then turns, ray by ray from the driver, into an
integral along the edges alone (the boundary-diffraction-wave form of Maggi and Rubinowicz): each edge element
radiates as a dipole normal to the baffle (cos theta) with a strength set by the pressure arriving at the edge,
the structure of the distributed edge dipole model (M. Urban, C. Heil, P. Bauman et al., JAES 52(10), 2004; the
weights here are derived, not copied). On the axis of a circular baffle with the source at its centre it reduces
to an edge wave of -1/2 of the incident one (J. Vanderkooy, "A simple theory of cabinet edge diffraction", JAES
39(12), 1991). Against a boundary-element solution of closed boxes it is within 0.9 dB on the axis at 50-900 Hz,
its step 10-20 % low in frequency (the Kirchhoff approximation overstates the pressure difference near edges).

The result is the complex ratio ``D = p_with_edges / p_halfspace``, where ``p_halfspace`` is the direct pressure an
infinite baffle would give for a point source at the driver's position (2 G, defined in every direction, behind
the baffle too). It is computed as complex pressure, not as a magnitude with a minimum phase. A curve measured
without this cabinet's edges (a near field or a half-space curve) times ``D`` is the in-cabinet response.

Coordinates: x to the right facing the front, y up, z toward the listener, the job's reference point at the
origin in the baffle plane; SI units (m, Hz); frequency axis last.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from xo_fit.errors import XoFitError

#: Speed of sound, m/s (the job's default ``[acoustics] speed_of_sound``).
SPEED_OF_SOUND = 343.0
#: Largest angle an edge element subtends at the driver (rad). The error falls as its square; at 1 degree |D|
#: stays within 1e-3 of a 32-fold finer division on 20 Hz - 20 kHz at the 70 CTA-2034-A directions (measured
#: on three baffles, far and at 2 m; tests/test_baffle.py holds it to 2e-3).
ELEMENT_ANGLE = math.radians(1.0)
#: Largest error of the phase's linear interpolation across one element (rad), which sets the longest element
#: at the highest frequency when the listener is at a finite distance.
PHASE_CURVATURE = 0.05


def rectangle(x: Sequence[float], y: Sequence[float]) -> np.ndarray:
    """The outline of a rectangular baffle, (4, 2) corners counter-clockwise (m).

    Parameters
    ----------
    x, y : sequence of float
        (left, right) and (bottom, top) edges, in m from the reference point (the job's ``[baffle] x`` and
        ``y``), shape (2,) each.

    Returns
    -------
    ndarray
        The corners, in m, shape (4, 2).

    Raises
    ------
    XoFitError
        Unless x and y are two edges each, left < right and bottom < top.
    """
    if len(x) != 2 or len(y) != 2:
        raise XoFitError(f"a baffle's x and y are two edges each, not {list(x)}, {list(y)}")
    (x0, x1), (y0, y1) = (float(v) for v in x), (float(v) for v in y)
    if not (x1 > x0 and y1 > y0):
        raise XoFitError(f"a baffle's edges must run left < right and bottom < top, not x {x}, y {y}")
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])


def regular_polygon(radius: float, sides: int, centre: Sequence[float] = (0.0, 0.0)) -> np.ndarray:
    """The outline of a regular polygon with its corners on a circle, (sides, 2) counter-clockwise (m).

    Parameters
    ----------
    radius : float
        The circumscribed circle's radius, in m; many sides stand for a circular baffle.
    sides : int
        Number of sides, 3 or more (dimensionless).
    centre : sequence of float
        (x, y) of the centre, in m, shape (2,).

    Returns
    -------
    ndarray
        The corners, in m, shape (sides, 2).
    """
    t = 2 * np.pi * np.arange(sides) / sides
    return np.column_stack([centre[0] + radius * np.cos(t), centre[1] + radius * np.sin(t)])


def diffraction(frequencies: np.ndarray, position: Sequence[float], directions: np.ndarray, outline: np.ndarray,
                *, radius: float = 0.0, distance: float = math.inf, speed_of_sound: float = SPEED_OF_SOUND,
                element_angle: float = ELEMENT_ANGLE) -> np.ndarray:
    """The baffle's diffraction response of a driver: ``p_with_edges / p_halfspace``, complex, (A, F).

    Parameters
    ----------
    frequencies : ndarray
        Frequencies, in Hz, shape (F,).
    position : sequence of float
        (x, y) of the driver's acoustic centre in the baffle plane, in m from the reference point, shape (2,);
        strictly inside ``outline``.
    directions : ndarray
        Unit vectors (dimensionless), shape (A, 3), from the reference point toward the listening points
        (:func:`xo_fit.physics.geometry.directions`).
    outline : ndarray
        Corners of the baffle, in m, shape (V, 2), in order around it (either sense); any simple polygon with the driver
        inside (:func:`rectangle`, :func:`regular_polygon`).
    radius : float
        Effective piston radius a, in m; 0 for a point source. The piston's far-field directivity 2 J1(x)/x,
        x = ka sin(theta), scales the direct wave toward each listening point and, at grazing incidence
        (x = ka), the wave arriving at the edges.
    distance : float
        Distance of the listening points from the reference point, in m, or ``math.inf`` (far field). A finite one
        must lie beyond every corner of the baffle.
    speed_of_sound : float
        The speed of sound, in m/s.
    element_angle : float
        Largest angle an edge element subtends at the driver, in rad.

    Returns
    -------
    ndarray
        Complex (dimensionless), shape (A, F): 1/2 (times the piston's directivity) at 0 Hz in the far
        field, 1 (the half-space) plus decaying edge waves far above the baffle step in front, the diffracted
        sound alone behind. It is complex pressure, so its phase is the physical one (no minimum-phase step).
    """
    f = np.asarray(frequencies, dtype=float)
    u = np.asarray(directions, dtype=float).reshape(-1, 3)
    if not (np.all(np.isfinite(f)) and np.all(f >= 0) and radius >= 0 and distance > 0):
        raise XoFitError("frequencies, the piston radius and the distance must be finite and not negative")
    u = u / np.linalg.norm(u, axis=1, keepdims=True)
    src = np.array([float(position[0]), float(position[1])])
    verts = _checked_outline(np.asarray(outline, dtype=float), src)
    k = 2 * np.pi * f / speed_of_sound
    far = math.isinf(distance)
    if not far:
        if not distance > np.max(np.hypot(verts[:, 0], verts[:, 1])):
            raise XoFitError(f"the listening distance {distance:g} m lies within the baffle's extent")
        receiver = distance * u - np.array([src[0], src[1], 0.0])  # from the driver, (A, 3)
    else:
        receiver = u
    k_max = float(np.max(k)) if k.size else 0.0
    ds_max = math.sqrt(8 * PHASE_CURVATURE * distance / k_max) if (not far and k_max > 0) else math.inf
    edge = _edge_sum(k, receiver, _elements(verts - src, element_angle, ds_max), far)
    z = receiver[:, 2]
    sin_t = np.hypot(receiver[:, 0], receiver[:, 1]) / np.linalg.norm(receiver, axis=1)
    direct = _piston(k[None, :] * radius * sin_t[:, None])  # (A, F)
    grazing = _piston(k * radius)[None, :]
    return 0.5 * direct + grazing * edge + 0.5 * np.sign(z)[:, None] * (direct - grazing)


def _edge_sum(k: np.ndarray, receiver: np.ndarray, elements: tuple, far: bool) -> np.ndarray:
    """The point source's edge term E (A, F): the sum over edge elements of weight * (exp(-jk Delta) - 1) plus
    the frequency-independent rest; each element's phase taken as linear across it (the sinc factor)."""
    terms = _far_terms if far else _near_terms
    edge = np.zeros((len(receiver), len(k)), dtype=complex)
    for lo in range(0, len(receiver), 8):  # a few directions at a time: the (A, F, E) arrays stay small
        sl = slice(lo, lo + 8)
        weight, zero_k, delta, d_delta = terms(receiver[sl], *elements)
        phase = k[None, :, None] * delta[:, None, :]
        smear = np.sinc(k[None, :, None] * d_delta[:, None, :] / (2 * np.pi))
        re, im = np.cos(phase), np.sin(phase)  # real arithmetic: exp(-j phase) smear - 1, summed with weights
        re *= smear
        re -= 1.0
        im *= smear
        w = weight[:, :, None]
        edge[sl] = (re @ w)[..., 0] - 1j * (im @ w)[..., 0] + zero_k[:, None]
    return edge


def _piston(x: np.ndarray) -> np.ndarray:
    """2 J1(x)/x, 1 at x = 0 (a rigid piston's far-field directivity, Kinsler et al., ch. 7)."""
    x = np.asarray(x, dtype=float)
    if not np.any(x > 0):
        return np.ones_like(x)
    from scipy.special import j1

    safe = np.where(x < 1e-8, 1.0, x)
    return np.where(x < 1e-8, 1.0, 2 * j1(safe) / safe)


def _checked_outline(verts: np.ndarray, src: np.ndarray) -> np.ndarray:
    """The outline counter-clockwise, after checking it is a polygon with the driver inside."""
    if verts.ndim != 2 or verts.shape[1] != 2 or len(verts) < 3 or not np.all(np.isfinite(verts)):
        raise XoFitError("a baffle outline must be three or more finite (x, y) corners")
    x, y = verts[:, 0], verts[:, 1]
    area = 0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)
    if area == 0:
        raise XoFitError("a baffle outline must enclose an area")
    if area < 0:
        verts = verts[::-1]
    rel = verts - src
    ang = np.arctan2(*_cross_dot(rel, np.roll(rel, -1, axis=0)))
    dist = _segment_distance(rel, np.roll(rel, -1, axis=0))
    if not (abs(np.sum(ang) - 2 * np.pi) < 1e-6 and np.min(dist) > 1e-6):
        raise XoFitError(f"the driver at ({src[0]:g}, {src[1]:g}) m must lie inside the baffle, off its edges")
    return verts


def _cross_dot(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(a x b, a . b) of rows of 2-vectors."""
    return a[..., 0] * b[..., 1] - a[..., 1] * b[..., 0], np.sum(a * b, axis=-1)


def _segment_distance(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Distance from the origin to each segment a-b, (N,)."""
    ab = b - a
    t = np.clip(-np.sum(a * ab, axis=1) / np.maximum(np.sum(ab * ab, axis=1), 1e-300), 0.0, 1.0)
    return np.linalg.norm(a + t[:, None] * ab, axis=1)


def _elements(rel: np.ndarray, element_angle: float, ds_max: float):
    """The edge cut into elements: starts and ends (E, 2) relative to the driver, signed angles (E,) they subtend.

    Each edge is first cut into equal angles seen from the driver (at most ``element_angle``), then any piece
    longer than ``ds_max`` into equal lengths; an edge in line with the driver subtends nothing and is left out.
    """
    starts, ends = [], []
    for a, b in zip(rel, np.roll(rel, -1, axis=0)):
        span = math.atan2(*_cross_dot(a, b))
        if abs(span) < 1e-12:
            continue
        n = max(1, math.ceil(abs(span) / element_angle))
        phi = math.atan2(a[1], a[0]) + span * np.arange(n + 1) / n
        e = np.column_stack([np.cos(phi), np.sin(phi)])
        t = -(a[0] * e[:, 1] - a[1] * e[:, 0]) / ((b - a)[0] * e[:, 1] - (b - a)[1] * e[:, 0])  # ray meets edge
        t[0], t[-1] = 0.0, 1.0
        if math.isfinite(ds_max):
            m = np.maximum(1, np.ceil(np.diff(t) * np.linalg.norm(b - a) / ds_max)).astype(int)
            t = np.append(np.repeat(t[:-1], m) + np.repeat(np.diff(t) / m, m) * _ramp(m), 1.0)
        pts = a + t[:, None] * (b - a)
        starts.append(pts[:-1])
        ends.append(pts[1:])
    p0, p1 = np.concatenate(starts), np.concatenate(ends)
    return p0, p1, np.arctan2(*_cross_dot(p0, p1))


def _ramp(m: np.ndarray) -> np.ndarray:
    """0, 1, ..., m_i - 1 for each i, concatenated."""
    return np.arange(int(np.sum(m))) - np.repeat(np.cumsum(m) - m, m)


def _far_terms(u: np.ndarray, p0: np.ndarray, p1: np.ndarray, dphi: np.ndarray):
    """Far field: per direction and element (A, E) the weight, the path difference at the element's middle and
    its change across the element (m); and the part of the edge term that does not oscillate, (A,) (zero here).

    The edge term is -(cos theta / 4 pi) * integral over the angle phi seen from the driver of
    (exp(-j k R (1 - w)) - 1) / (1 - w), with R the driver-to-edge distance along phi and w = u . e_phi.
    """
    ut, c = u[:, :2], u[:, 2]
    pm = 0.5 * (p0 + p1)
    rm = np.linalg.norm(pm, axis=1)
    w = ut @ (pm / rm[:, None]).T  # (A, E)
    cross = ut[:, :1] * (pm[:, 1] / rm)[None, :] - ut[:, 1:] * (pm[:, 0] / rm)[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):  # 1 - w without cancellation near grazing
        one_w = np.where(w > 0, (c[:, None] ** 2 + cross**2) / (1 + w), 1 - w)
        weight = np.where(one_w > 0, -(c[:, None] / (4 * np.pi)) * dphi[None, :] / one_w, 0.0)
    delta = rm[None, :] * one_w
    path = [np.linalg.norm(p, axis=1)[None, :] - ut @ p.T for p in (p0, p1)]
    return weight, np.zeros(len(u)), delta, path[1] - path[0]


def _near_terms(d: np.ndarray, p0: np.ndarray, p1: np.ndarray, dphi: np.ndarray):
    """At a finite distance: as :func:`_far_terms`, for listening points ``d`` (A, 3) relative to the driver.

    The edge term is -(z L0 / 4 pi) * integral over phi of exp(-j k Delta) / (L (L + R - q)) - 1 / (L0 (L0 - q)),
    with L0 the driver-to-listener distance, L the edge-to-listener one, q the listener's projection on the ray
    along phi, Delta = R + L - L0. The differences are written without cancellation (h^2 = L0^2 - q^2 factored).
    """
    dt, z = d[:, :2], d[:, 2]
    l0 = np.linalg.norm(d, axis=1)[:, None]

    def geometry(p):
        r = np.linalg.norm(p, axis=1)[None, :]
        e = p / r[0][:, None]
        q = dt @ e.T
        h2 = z[:, None] ** 2 + (dt[:, :1] * e[:, 1] - dt[:, 1:] * e[:, 0]) ** 2
        ll = np.sqrt(np.sum((dt[:, None, :] - p[None, :, :]) ** 2, axis=2) + z[:, None] ** 2)
        ahead = q - r  # beyond the edge along the ray
        a = np.where(ahead > 0, h2 / np.maximum(ll + ahead, 1e-300), ll - ahead)  # L + R - q
        b = np.where(q > 0, h2 / np.maximum(l0 + q, 1e-300), l0 - q)  # L0 - q
        return r, q, ll, a, b, ahead

    _, q, ll, a, b, ahead = geometry(0.5 * (p0 + p1))
    with np.errstate(divide="ignore", invalid="ignore"):
        lead = -(z[:, None] * l0 / (4 * np.pi))
        inv = np.where(ahead > 0, 1 / (l0 * (l0 + q)) - 1 / (ll * (ll + ahead)), 1 / (ll * a) - 1 / (l0 * b))
        static = np.where(np.isfinite(inv), lead * inv * dphi[None, :], 0.0)
        weight = np.where(a > 0, lead * dphi[None, :] / (ll * a), 0.0)
    ends = [geometry(p) for p in (p0, p1)]
    d_delta = (ends[1][0] + ends[1][2]) - (ends[0][0] + ends[0][2])
    return weight, np.sum(static, axis=1), a - b, d_delta
