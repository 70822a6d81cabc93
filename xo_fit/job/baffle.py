"""The job's cabinet front: ``[baffle]``, a driver's ``radius``, and their checks against the drivers' positions.

The diffraction itself is :mod:`xo_fit.physics.baffle` (docs/baffle.md); here only the keys are read and the
geometry is checked, so that a driver outside the baffle or a listening point inside its extent is an error
naming the table and key before any data are read.
"""

from __future__ import annotations

import math

from xo_fit.job.model import BaffleSpec, DriverSpec
from xo_fit.job.reading import Context, Reader, short
from xo_fit.units import UnitsError, parse_value

#: A piston radius outside this range (m) is legal but likely a slip of the unit (a 10 mm dome to a 21-inch cone).
RADIUS_WARN_M = (0.004, 0.3)


def read_baffle(r: Reader) -> BaffleSpec:
    """``[baffle]``: ``x = [left, right]``, ``y = [bottom, top]`` (lengths from the reference point, m; negative
    allowed), optional ``depth`` (m, read and kept, not used by the thin-baffle model)."""
    edges = {}
    for key, what in (("x", "[left, right]"), ("y", "[bottom, top]")):
        raw = r.raw(key)
        if raw is None:
            raise r.error(key, f"missing; expected the edges {what} from the reference point, such as "
                               "[\"-120mm\", \"120mm\"]")
        if not isinstance(raw, list) or len(raw) != 2:
            raise r.error(key, f"expected two edges {what}, got {short(raw)}")
        try:
            lo, hi = (parse_value(v, "m", positive=False) for v in raw)
        except UnitsError as e:
            raise r.error(key, e.message) from None
        if not hi > lo:
            raise r.error(key, f"expected {what} with the first below the second, got {short(raw)}")
        edges[key] = (lo, hi)
    depth = r.value("depth", "m", None)
    r.done()
    return BaffleSpec(x=edges["x"], y=edges["y"], depth=depth)


def read_radius(r: Reader) -> float | None:
    """A driver's ``radius``: its effective piston radius (m, above zero), or None (a point source)."""
    radius = r.value("radius", "m", None)
    if radius is not None and not RADIUS_WARN_M[0] <= radius <= RADIUS_WARN_M[1]:
        r.ctx.warn(r.table, "radius", f"{r.label} radius = {short(r.data['radius'])} is {radius * 1e3:g} mm: is the "
                                      "unit right (\"66mm\" for a 6.5-inch cone)?")
    return radius


def check_baffle(ctx: Context, baffle: BaffleSpec | None, drivers: list[DriverSpec], distance: float) -> None:
    """``baffle = true`` needs a ``[baffle]``; with one, every driver lies strictly inside it, its piston within
    it (a warning), and a finite listening distance beyond its corners."""
    if baffle is None:
        for d in drivers:
            if d.baffle:
                raise ctx.error(("driver", d.name, "response"), "baffle", "baffle = true needs the cabinet's front: "
                                "a [baffle] table with x = [left, right] and y = [bottom, top]",
                                f"[driver.{d.name}.response] baffle")
            if d.radius is not None:
                ctx.warn(("driver", d.name), "radius", f"[driver.{d.name}] radius is used only with a [baffle] table "
                                                       "(the baffle's diffraction): here it changes nothing")
        return
    (x0, x1), (y0, y1) = baffle.x, baffle.y
    for d in drivers:
        x, y = d.position if d.position is not None else (0.0, 0.0)
        if not (x0 < x < x1 and y0 < y < y1):
            where = (f"at ({x * 1e3:g}, {y * 1e3:g}) mm" if d.position is not None
                     else "without a position, at the reference point (0, 0)")
            raise ctx.error(("driver", d.name, "position") if d.position is not None else ("baffle",), None,
                            f"driver '{d.name}' {where} lies outside the baffle (x {x0 * 1e3:g} to {x1 * 1e3:g} mm, "
                            f"y {y0 * 1e3:g} to {y1 * 1e3:g} mm): every driver sits inside its edges",
                            f"[driver.{d.name}] position" if d.position is not None else "[baffle]")
        gap = min(x - x0, x1 - x, y - y0, y1 - y)
        if d.radius is not None and d.radius > gap:
            ctx.warn(("driver", d.name), "radius", f"[driver.{d.name}] radius {d.radius * 1e3:g} mm reaches past the "
                                                   f"baffle's nearest edge ({gap * 1e3:g} mm away)")
    reach = max(math.hypot(x, y) for x in baffle.x for y in baffle.y)
    if not math.isinf(distance) and not distance > reach:
        raise ctx.error(("acoustics",), "distance", f"{distance:g} m does not lie beyond the baffle's farthest "
                        f"corner ({reach:g} m from the reference point): give a listening distance beyond it, "
                        "or \"far\"", "[acoustics] distance")
