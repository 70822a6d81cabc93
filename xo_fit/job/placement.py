"""Where the drivers are: ``[driver.NAME] position``, ``about``, and ``[acoustics] distance``."""

from __future__ import annotations

import math
import re

from xo_fit.job.model import DEFAULTS, DriverSpec
from xo_fit.job.reading import Reader, short


#: What a driver's files were measured about (``about``): the job's reference point, or the driver's own centre.
ABOUTS = ("reference", "driver")


#: A position farther than this from the reference point (m) is legal but likely a slip of the unit.
POSITION_WARN_M = 3.0


def read_position(r: Reader) -> tuple[float, float]:
    """``[driver.NAME] position = { x, y }``: the acoustic centre in the baffle plane from the reference point, m
    (x to the right facing the front, y up; zero and negative allowed, a key left out is 0)."""
    d = DEFAULTS["position"]
    if not (r.has("x") or r.has("y")):
        raise r.error(None, "expected x and/or y: the acoustic centre from the reference point, such as "
                            "{ x = \"0mm\", y = \"-150mm\" }")
    x = r.value("x", "m", d["x"], positive=False)
    y = r.value("y", "m", d["y"], positive=False)
    r.done()
    for key, v in (("x", x), ("y", y)):
        if bare_milli(r.data.get(key)) and v != 0:
            r.ctx.warn(r.table, key, f"{r.label} {key} = {short(r.data[key])} reads as {v * 1e3:g} mm (a bare m is "
                                     "the milli prefix): write metres as a number, or in mm")
        elif abs(v) > POSITION_WARN_M:
            r.ctx.warn(r.table, key, f"{r.label} {key} = {v:g} m puts the driver more than {POSITION_WARN_M:g} m "
                                     "from the reference point: is the unit right (\"150mm\", not 150)?")
    return (x, y)


def read_about(r: Reader, name: str, from_file: bool) -> str | None:
    """``about`` of a driver, from ``[driver.NAME]`` (every file of the driver: an on-axis job's one file) or
    ``[driver.NAME.angles]`` (read there by :func:`read_angles`); given in both is an error, neither is None."""
    here = r.choice("about", ABOUTS, None)
    angles = r.data.get("angles")
    there = angles.get("about") if isinstance(angles, dict) else None
    if here is not None and there is not None:
        raise r.error("about", f"give about once: here or in [driver.{name}.angles], not both")
    if here is not None and not from_file:
        raise r.error("about", "only a response read from a file is measured about a point; a flat stand-in has "
                               "no delay and is placed by its position")
    return here if here is not None else there


def read_distance(r: Reader) -> float:
    """``[acoustics] distance``: "far" (the far field, stored as inf) or a length in m above zero."""
    raw = r.raw("distance", DEFAULTS["acoustics"]["distance"])
    if raw == "far":
        return math.inf
    if isinstance(raw, str) and raw.strip().lower() == "far":
        raise r.error("distance", f"write \"far\" (lower case) for the far field, got {short(raw)}")
    if bare_milli(raw):
        raise r.error("distance", f"{short(raw)} reads as milli (a bare m is the prefix in this format): write the "
                                  f"metres as a number ({raw.strip()[:-1].strip()}) or in mm, or \"far\"")
    return r.value("distance", "m", required=True)  # present: an absent key reads as "far" above


def bare_milli(raw: object) -> bool:
    """Whether a length is written as a number and a bare "m" ("2m"): the milli prefix here, seldom meant."""
    return isinstance(raw, str) and re.fullmatch(r"\s*[+-]?(\d+\.?\d*|\.\d+)\s*m\s*", raw) is not None


def check_distance(r: Reader, distance: float, drivers: list[DriverSpec]) -> None:
    """A finite listening distance must lie beyond every driver's acoustic centre (x, y, -offset)."""
    if math.isinf(distance):
        return
    reach, name = max((math.sqrt(sum(v * v for v in (d.position or (0.0, 0.0))) + d.offset ** 2), d.name)
                      for d in drivers)
    if not distance > reach:
        raise r.error("distance", f"{distance:g} m does not lie beyond driver {name}'s acoustic centre "
                                  f"({reach:g} m from the reference point): give a listening distance beyond "
                                  "every driver, or \"far\"")
