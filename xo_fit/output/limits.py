"""A design against its job's hard limits (``[limits]``) and the breakup rule, as result.json, findings and text.

:func:`limit_figures` is result.json's ``limits``: for each limit the job sets, ``limit`` (what it asks),
``worst`` (the design's worst figure), ``at_hz`` (where, or None), ``met``, with the part, driver or way
concerned and ``excess`` (the search's signed relative excess, > 0 when broken). Each is judged as the rest of
result.json judges it: the ratings as ``stress``'s ``within_rating``, the protection as ``protection``'s
``within``, the impedance against the lowest |Z| of the metrics, the breakup rule on the way levels of
response.csv against the design's level. :func:`limit_findings` says which limit a design misses, by how
much and what usually frees it (``limit_unmet``); :func:`breakup_findings` runs the breakup rule on every
design with way targets (``breakup``; 20 dB when the job sets no other).
"""

from __future__ import annotations

import math

#: The breakup rule of common practice: breakup more than this far under the average level is inaudible (dB).
BREAKUP_RULE_DB = 20.0
#: A figure this close to its limit (relative) still meets it: the search stops at the limit itself, and the
#: reported design is re-solved on the dense path (the ratings and protection keep their own 0.5 %).
MET_TOLERANCE = 1e-6
#: The breakup rule's slack, dB.
MET_TOLERANCE_DB = 1e-4


def breakup_points_of(design, rule_db: float) -> list[tuple[str, float, float]]:
    """(way, Hz, dB under the level) of each way's loudest stop-band point under the rule ``rule_db`` (dB), for a
    :class:`~xo_fit.output.design.Design`; empty without way targets. The design keeps its own under the job's
    rule as :attr:`~xo_fit.output.design.Design.breakup`."""
    from xo_fit.model.acoustics import spl_db
    from xo_fit.model.limits import breakup_points
    from xo_fit.search.fitting import cost_model

    model = cost_model(design.system) if design.scored.level_db is not None else None
    if model is None:
        return []
    cm = model[0]
    p_db = spl_db(design.scored.sim.pressure[0][:, cm.band])
    names = [d.name for d in design.job.drivers]
    return [(names[k], f, under) for k, f, under in
            breakup_points(cm.t_way_db, cm.has_way, p_db, design.scored.level_db,
                           design.system.frequencies[cm.band], rule_db)]


def rule_db(job) -> float:
    """The breakup rule's dB: the job's [limits] breakup_db where it sets one, else 20 dB."""
    lim = job.limits
    return lim.breakup_db if lim.present and lim.breakup_db > 0 else BREAKUP_RULE_DB


def limit_figures(design) -> dict | None:
    """result.json's ``limits`` of a design (see the module's docstring), or None without [limits]."""
    lim = design.job.limits
    if not lim.present:
        return None
    out: dict = {}
    m = design.scored.metrics
    if lim.impedance_min > 0:
        z = m["impedance_min_ohm"]
        out["impedance_min"] = {"limit": lim.impedance_min, "worst": z, "at_hz": m["impedance_min_hz"],
                                "met": bool(z >= lim.impedance_min * (1 - MET_TOLERANCE)), "unit": "ohm",
                                "excess": lim.impedance_min / z - 1 if z > 0 else math.inf}
    if lim.ratings:
        out["ratings"] = _ratings(design)
    if lim.protection:
        out["protection"] = _protection(design)
    if lim.breakup_db > 0:  # the job's rule (:func:`rule_db`), the one the design keeps its breakup points for
        ways = design.breakup
        e = {"limit": lim.breakup_db, "worst": None, "at_hz": None, "met": True, "unit": "dB under the level"}
        if ways:
            way, f, under = min(ways, key=lambda w: w[2])
            e.update(worst=under, at_hz=f, way=way, met=bool(under >= lim.breakup_db - MET_TOLERANCE_DB),
                     excess=(lim.breakup_db - under) * math.log(10) / 20)
        out["breakup_db"] = e
    return out


def _ratings(design) -> dict:
    """The ratings limit: the worst rated part's share of what its rating allows (1: at the limit)."""
    e = {"limit": 1.0, "worst": None, "at_hz": None, "met": True, "unit": "share of what the rating allows"}
    stress = design.stress or {}
    rated = {n: s for n, s in stress.items() if "rating" in s}
    if not rated:
        e["note"] = "no part has a rating"
        return e
    shares: dict[str, float] = {}
    for name, s in rated.items():
        judged = s["programme_w"] if "programme_w" in s else s["figure"]
        allowed = s["rating"] / 2 if "programme_w" in s else s["rating"]
        shares[name] = judged / allowed
    name = max(shares, key=shares.__getitem__)
    at = None if "programme_w" in rated[name] else rated[name]["at_hz"]  # a resistor's programme: a band mean
    e.update(worst=shares[name], at_hz=at, part=name,
             met=all(s["within_rating"] for s in rated.values()), excess=shares[name] - 1)
    return e


def _protection(design) -> dict:
    """The protection limit: the worst driver figure's share of its limit (excursion / xmax, power / rating)."""
    e = {"limit": 1.0, "worst": None, "at_hz": None, "met": True, "unit": "share of xmax or of the power rating"}
    prot = design.protection or {}
    shares = []
    for name, p in prot.items():
        if p["excursion_mm"] is not None and p["xmax_mm"] is not None:
            shares.append((p["excursion_mm"] / p["xmax_mm"], name, "excursion", p["at_hz"]))
        if p["rating_w"] is not None:
            shares.append((p["power_w"] / p["rating_w"], name, "power", None))
    if not shares:
        e["note"] = "no driver's [driver.NAME.ts] gives xmax (with sd) or power"
        return e
    share, name, figure, at = max(shares)
    e.update(worst=share, at_hz=at, driver=name, figure=figure,
             met=all(p["within"] for p in prot.values()), excess=share - 1)
    return e


def limit_findings(figures: dict | None, job) -> list[dict]:
    """``limit_unmet``: each limit of ``figures`` (see :func:`limit_figures`) the design misses, by how much and
    what usually frees it."""
    out = []
    for name, e in (figures or {}).items():
        if e["met"]:
            continue
        pct = 100 * e.get("excess", 0.0)
        if name == "impedance_min":
            under = 100 * (1 - e["worst"] / e["limit"])
            text = (f"the load dips to {e['worst']:.2f} ohm at {e['at_hz']:.0f} Hz, {under:.1f} % "
                    f"under the [limits] floor of {e['limit']:g} ohm: widen the range of a part that rests on its "
                    "limit, add a Zobel (R + C across the driver whose impedance dips) or a larger series "
                    "resistance there, or lower the floor")
        elif name == "ratings":
            text = (f"{e['part']} runs at {e['worst']:.3g}x what its rating allows ({pct:.1f} % over) at "
                    f"{job.stress.power:g} W: a part with a higher rating, a wider range for it, or a lower "
                    "[stress] power usually frees it")
        elif name == "protection":
            where = f" at {e['at_hz']:.0f} Hz" if e["at_hz"] is not None else ""
            text = (f"{e['driver']}'s {e['figure']} is {pct:.1f} % over its limit{where} at {job.stress.power:g} W: "
                    "lower the [stress] power, cross it higher or steeper, or widen the ranges")
        else:
            text = (f"{e['way']}'s output at {e['at_hz']:.0f} Hz is only {e['worst']:.1f} dB under the level, "
                    f"{e['limit'] - e['worst']:.1f} dB short of the {e['limit']:g} dB the limit asks: a steeper "
                    "filter, a notch at the breakup, or a wider range usually frees it")
        out.append({"kind": "limit_unmet", "part": e.get("part"), "limit": name, "by": e.get("excess"),
                    "text": f"limit {name} not met: {text}"})
    return out


def breakup_findings(design) -> list[dict]:
    """``breakup``: each way whose output outside its pass band (where its way target lies more than the rule's
    dB + 10 under the level) comes within the rule's dB (:func:`rule_db`) of the level: the way, the frequency
    and the margin (common practice: breakup more than 20 dB under the average level is inaudible)."""
    rule = rule_db(design.job)
    out = []
    for way, f, under in design.breakup:  # under the rule ``rule``
        if under < rule - MET_TOLERANCE_DB:
            out.append({"kind": "breakup", "part": None, "way": way, "at_hz": f, "margin_db": under - rule,
                        "text": f"{way}'s output outside its pass band comes within {under:.1f} dB of the level at "
                                f"{f:.0f} Hz, {rule - under:.1f} dB inside the {rule:g} dB rule (breakup more than "
                                f"{rule:g} dB under the level is inaudible, common practice)"})
    return out


def limit_lines(figures: dict | None) -> list[str]:
    """One line per limit for the console and the report: what it asks, the worst figure, met or not."""
    lines = []
    for name, e in (figures or {}).items():
        state = "met" if e["met"] else "NOT MET"
        if e["worst"] is None:
            lines.append(f"{name}: {state} ({e.get('note', 'nothing to judge')})")
            continue
        at = f" at {e['at_hz']:.0f} Hz" if e["at_hz"] is not None else ""
        who = next((f" ({e[k]}{', ' + e['figure'] if k == 'driver' else ''})" for k in ("part", "driver", "way")
                    if k in e), "")
        if name == "impedance_min":
            lines.append(f"{name} {e['limit']:g} ohm: {state}, lowest {e['worst']:.3f} ohm{at}")
        elif name == "breakup_db":
            lines.append(f"{name} {e['limit']:g} dB: {state}, closest {e['worst']:.2f} dB under the level{at}{who}")
        else:
            lines.append(f"{name}: {state}, worst {100 * e['worst']:.1f} % of the limit{at}{who}")
    return lines


def limits_html(figures: dict | None, esc) -> str:
    """The report's limits section (first on the page), or "" without [limits]."""
    if not figures:
        return ""
    rows = "".join(f"<li>{esc(t)}</li>" for t in limit_lines(figures))
    return f"<h2>Limits</h2><ul>{rows}</ul>"
