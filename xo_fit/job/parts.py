"""The [[part]] tables: values, ranges, ratings, and the checks across parts."""

from __future__ import annotations



from xo_fit.constants import PART_TYPES, PART_UNIT, RATING_UNIT
from xo_fit.errors import XoFitError
from xo_fit.units import UnitsError, parse_percent, parse_value, parse_wire
from xo_fit.job.model import (DEFAULTS, is_name, NAME_PATTERN, NODE_PATTERN, DriverSpec, PartSpec, RATING, OHMS)
from xo_fit.job.ranges import PLAUSIBLE, SOLVABLE
from xo_fit.job.reading import (Reader, Context, is_length)

def format_ohms(v: float) -> str:
    """A resistance ``v`` in ohm as engineering text with its unit (``"2.2 Ω"``)."""
    from xo_fit.units import format_value

    return format_value(v, "ohm")


def read_part(r: Reader, driver_names: set[str]) -> PartSpec:
    """A `[[part]]` table: name, type, nodes; a driver part names its driver, an R, L or C its value or range,
    coil DCR or wire, capacitor ESR, tolerance, rating, series and flags."""
    name = r.text("name", required=True)
    if not is_name(name, NAME_PATTERN):
        raise r.error("name", f"{name!r} is not a valid part name: start with a letter, then letters, digits, _ or -")
    r.label = f"part {name}"
    ptype = r.choice("type", PART_TYPES, None)
    if ptype is None:
        raise r.error("type", f"missing; expected one of {', '.join(PART_TYPES)}")
    nodes_t = read_nodes(r)

    if ptype == "driver":
        drv = r.text("driver", required=True)
        if drv not in driver_names:
            raise r.error("driver", f"unknown driver '{drv}'; defined drivers: {', '.join(sorted(driver_names))}")
        for key in ("value", "min", "max", "dcr", "esr", "tolerance", "series", "fixed", "rating", "keep"):
            if r.has(key):
                raise r.error(key, "a driver part takes only name, type, nodes and driver")
        r.done()
        return PartSpec(name=name, type=ptype, nodes=nodes_t, driver=drv)

    unit = PART_UNIT[ptype]
    value, lo, hi = (part_value(r, key, unit) for key in ("value", "min", "max"))
    fixed = r.boolean("fixed", DEFAULTS["part"]["fixed"])
    keep = r.boolean("keep", DEFAULTS["part"]["keep"])
    if (lo is None) != (hi is None):
        raise r.error("min" if lo is None else "max", "give both min and max for a search range, or neither")
    if lo is not None and hi is not None:
        if hi <= lo:
            raise r.error("max", "must be above min")
        if value is not None and not lo <= value <= hi:
            raise r.error("value", "the start value lies outside min..max")
    if value is None and (lo is None or fixed):
        raise r.error("value", "missing; a fixed part needs a value (or give min and max to let the search set it)")
    dcr, dcr_wire = read_dcr(r, ptype)
    esr = 0.0
    if r.has("esr"):
        if ptype != "C":
            raise r.error("esr", "only a capacitor (type C) has esr; a coil has dcr")
        esr = r.value("esr", "ohm", required=True, allow_zero=True, limits=OHMS)
    tol = None
    if r.has("tolerance"):
        try:
            tol = parse_percent(r.raw("tolerance"), below=1.0)
        except UnitsError as e:
            raise r.error("tolerance", e.message) from None
    rating = None
    if r.has("rating"):
        rating = r.value("rating", RATING_UNIT[ptype], limits=RATING)
    series = r.text("series")
    if series is not None:
        from xo_fit.series import check_name

        try:
            series = check_name(series)
        except XoFitError as e:
            raise r.error("series", e.message) from None
    if r.has("driver"):
        raise r.error("driver", "only a part of type driver names a driver")
    r.done()
    return PartSpec(name=name, type=ptype, nodes=nodes_t, value=value, min=lo, max=hi, fixed=fixed,
                    dcr=dcr, dcr_wire=dcr_wire, esr=esr, tolerance=tol, series=series, rating=rating, keep=keep)


def read_nodes(r: Reader) -> tuple[str, str]:
    """A part's ``nodes``: two node names, different, each by the node rule."""
    nodes = r.raw("nodes")
    if (not isinstance(nodes, list) or len(nodes) != 2
            or not all(isinstance(n, (str, int)) and not isinstance(n, bool) for n in nodes)):
        raise r.error("nodes", f"expected two node names such as [\"in\", \"w1\"], got {nodes!r}")
    nodes_t = (str(nodes[0]).strip(), str(nodes[1]).strip())
    for n in nodes_t:
        if not is_name(n, NODE_PATTERN):
            raise r.error("nodes", f"{n!r} is not a valid node name (letters, digits, _ - + .)")
    if nodes_t[0] == nodes_t[1]:
        raise r.error("nodes", f"both ends on node '{nodes_t[0]}': the part is shorted onto one node")
    return nodes_t


def read_dcr(r: Reader, ptype: str) -> tuple[float, bool]:
    """A coil's ``dcr``: ohm, or a wire (a gauge such as "18awg", or a bare copper diameter); (value, is_wire)."""
    dcr, dcr_wire = 0.0, False
    if r.has("dcr"):
        if ptype != "L":
            raise r.error("dcr", "only a coil (type L) has dcr; a capacitor has esr")
        raw = r.raw("dcr")
        try:
            wire = parse_wire(raw) if isinstance(raw, str) else None
        except UnitsError as e:
            raise r.error("dcr", e.message) from None
        if wire is not None:
            dcr, dcr_wire = wire, True
        elif isinstance(raw, str) and is_length(raw):
            dcr, dcr_wire = r.value("dcr", "m", required=True), True
        else:
            try:
                dcr = parse_value(raw, "ohm", allow_zero=True)
                if dcr > OHMS[1]:
                    raise UnitsError(f"{format_ohms(dcr)} is out of range: expected at most {format_ohms(OHMS[1])}")
            except UnitsError as e:
                raise r.error("dcr", f"{e.message.rstrip('.')}; expected ohms or a wire such as \"18awg\" "
                              "(or a bare copper diameter such as \"1.2mm\")") from None
    return dcr, dcr_wire


def part_value(r: Reader, key: str, unit: str) -> float | None:
    """A part's value under ``key`` in ``unit`` (SI), None where absent; a value outside the range the
    solver handles raises JobError."""
    v = r.value(key, unit)
    if v is not None and not SOLVABLE[0] <= v <= SOLVABLE[1]:
        from xo_fit.units import format_value

        raise r.error(key, f"{format_value(v, unit)} is no part: values must lie within "
                           f"{SOLVABLE[0]:g} to {SOLVABLE[1]:g} {unit}")
    return v


def check_plausible(p: PartSpec, ctx: Context, table: tuple) -> None:
    """Warn (one line) for a value, min or max of part ``p`` outside what crossovers use for its type
    (often a wrong unit)."""
    from xo_fit.units import format_value

    if p.type not in PLAUSIBLE:
        return
    lo, hi = PLAUSIBLE[p.type]
    for key in ("value", "min", "max"):
        v = getattr(p, key)
        if v is not None and not lo <= v <= hi:
            ctx.warn(table, key, f"part {p.name}: {key} {format_value(v, p.unit)} lies outside what a crossover "
                                 f"uses ({format_value(lo, p.unit)} to {format_value(hi, p.unit)}); check the unit")


def check_parts(parts: tuple[PartSpec, ...], drivers: list[DriverSpec], ctx: Context) -> None:
    """Refuse (JobError) duplicate part names, a driver wired in by two parts, and a driver defined but
    wired in by no part."""
    seen: dict[str, int] = {}
    used: dict[str, str] = {}
    for i, p in enumerate(parts):
        if p.name in seen:
            raise ctx.error(("part", i), "name", f"duplicate part name '{p.name}' (also part #{seen[p.name] + 1})",
                            f"part {p.name}")
        seen[p.name] = i
        if p.driver is not None:
            if p.driver in used:
                raise ctx.error(("part", i), "driver",
                                f"driver '{p.driver}' is already wired in by part {used[p.driver]}", f"part {p.name}")
            used[p.driver] = p.name
    for d in drivers:
        if d.name not in used:
            raise ctx.error(("driver", d.name), None,
                            f"driver '{d.name}' is defined but no [[part]] of type driver wires it in",
                            f"[driver.{d.name}]")
