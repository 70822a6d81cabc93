"""The ``[limits]`` table: the constraints a design must meet before its cost counts."""

from __future__ import annotations

from xo_fit.job.model import DEFAULTS, DriverSpec, PartSpec
from xo_fit.job.settings import LimitsSpec, StressSpec
from xo_fit.job.reading import Reader


def read_limits(r: Reader, present: bool) -> LimitsSpec:
    """The [limits] table (``present``: the job has one; else the defaults, constraining nothing)."""
    d = DEFAULTS["limits"]
    spec = LimitsSpec(
        present=present,
        impedance_min=r.value("impedance_min", "ohm", d["impedance_min"], allow_zero=True),
        ratings=r.boolean("ratings", d["ratings"]),
        protection=r.boolean("protection", d["protection"]),
        breakup_db=r.number("breakup_db", d["breakup_db"], minimum=0.0, maximum=200.0),
    )
    r.done()
    return spec


def check_limits(limits: LimitsSpec, stress: StressSpec, parts: tuple[PartSpec, ...], drivers: list[DriverSpec],
                 has_ways: bool, ctx) -> None:
    """``ratings`` and ``protection`` need the drive ([stress] power); a limit with nothing to judge warns."""
    for key, on in (("ratings", limits.ratings), ("protection", limits.protection)):
        if on and not stress.power:
            raise ctx.error(("limits",), key, f"the {key} limit needs the drive: [stress] power and rated_impedance",
                            f"[limits] {key}")
    if limits.ratings and not any(p.rating for p in parts):
        ctx.warn(("limits",), "ratings", "[limits] ratings is set but no part has a rating: nothing to judge")
    if limits.protection and not any(d.ts and ("xmax" in d.ts or "power" in d.ts) for d in drivers):
        ctx.warn(("limits",), "protection", "[limits] protection is set but no driver's [driver.NAME.ts] gives "
                 "xmax or power (the driver ratings it needs): nothing to judge")
    if limits.present and not has_ways:
        ctx.warn(("limits",), None, "[limits] constrains a fit, a snap and a prune, which need [target.way.NAME] "
                 "tables: without them the limits are only reported")
