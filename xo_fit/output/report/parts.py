"""The report's sections about the design to build: what to buy (first in the page), the part list with its
stresses, the drivers' protection, the network, a prune's steps, findings and cautions.

The design to build is the result the parts are bought from (``--buy``, by default the last snap given); with
none, the last result, whose values the page then says are continuous. Each section takes the
:class:`~xo_fit.output.report.page.Report` and returns its HTML.
"""

from __future__ import annotations

from xo_fit.config import COST_FLOOR
from xo_fit.output.report.markup import Markup, bullets, code, image, join, num, para, section, table, tag

#: The "What to buy" table's columns: (head, bom.csv column).
BUY_COLUMNS = (("part", "name"), ("kind", "kind"), ("value", "text"), ("quantity", "quantity"),
               ("rating needed", "rating_needed"), ("rating given", "rating"), ("DCR (Ω)", "dcr_ohm"),
               ("wire", "wire"), ("source", "source"), ("tolerance", "tolerance"), ("combination", "combination"),
               ("notes", "notes"))


def caution(*parts) -> Markup:
    """A caution box: ``<div class="caution">`` of the parts (each escaped unless it is Markup)."""
    return tag("div", *parts, attrs='class="caution"')


def buy_section(rep) -> Markup:
    """What to buy: the bill of materials of the result to buy from, or why there is none."""
    if rep.buy is None:
        return section("What to buy", caution(
            "None of the results is snapped: their values are continuous (as a fit or the job leaves them), not "
            "buyable as they are, so no parts are listed to buy and no bom.csv is written. Move them to "
            "purchasable values with ", code("xo-fit snap JOB --from RESULT --out DIR"),
            " and report that result, or name the result to buy from with ", code("--buy RESULT"), "."))
    rows = rep.bom
    continuous = [r["name"] for r in rows if r["source"] == "continuous"]
    parts = [para(f"The parts of {rep.buy.label} ({rep.buy_reason}) for {rep.speakers} speaker"
                  f"{'s' if rep.speakers != 1 else ''}, also in bom.csv beside this page. A rating needed is the "
                  "part's stress at the job's [stress] drive (resistors with twice their programme power); a "
                  "combination is two parts bought to make one value.")]
    if continuous:
        parts.append(caution(
            f"{rep.buy.label} has continuous values ({', '.join(continuous)}): as a fit left them, not buyable "
            "as they are. ", code("xo-fit snap"), " moves them to purchasable values (a series or a drawer)."))
    parts.append(table([h for h, _ in BUY_COLUMNS], [[r[k] for _, k in BUY_COLUMNS] for r in rows], cls="buy"))
    return section("What to buy", *parts)


def _combination(entry: dict) -> str:
    """A snap's two-part combination as text ("parallel: 4.7 µF || 1 µF"), "" for none or a malformed one."""
    from xo_fit.stages.choices import combination_text

    comb = entry.get("combination")
    if not isinstance(comb, dict) or not isinstance(comb.get("parts"), list):
        return ""
    texts = [str(x.get("text", "")) if isinstance(x, dict) else str(x) for x in comb["parts"]]
    connection = str(comb.get("connection", ""))
    return f"{connection}: " + combination_text(connection, texts) if texts else ""


def part_list_section(rep) -> Markup:
    """The design to build, part by part: value, source, tolerance, combination and stress."""
    from xo_fit.units import format_value

    d = rep.build.design
    st = rep.stress
    stress_by = {p.name: p for p in st.parts} if st else {}
    limits = d.limits
    rows = []
    for p, v in zip(d.job.valued_parts, d.array):
        entry = d.part_info.get(p.name, {})
        source = entry.get("series") or entry.get("source") or ("fixed" if not p.free else "continuous")
        tol = p.tolerance if p.tolerance is not None else dict(d.job.spread.tolerance).get(p.type)
        value = format_value(float(v), p.unit) + (f" (at its {limits[p.name]})" if p.name in limits else "")
        rows.append([p.name, p.type, value, source, "" if tol is None else f"{tol * 100:g} %", _combination(entry),
                     _stress_text(stress_by.get(p.name))])
    drive = (f"Stresses at {st.drive_w:g} W into {st.rated_ohm:g} Ω ({st.source_v_rms:.2f} V RMS); programme figures "
             "assume pink noise over the band." if st else "No [stress] drive level in the job: no stress figures.")
    return section(f"Part list ({rep.build.label})", para(drive),
                   table(["part", "kind", "value", "source", "tolerance", "made of", "stress"], rows))


def _stress_text(sp) -> str:
    if sp is None:
        return ""
    out = f"{sp.sine_worst:.3g} {sp.unit} {sp.figure} at {sp.at_hz:.0f} Hz"
    if sp.programme is not None:
        out += f"; programme {sp.programme:.3g} W"
    if sp.rating is not None:
        out += f"; rated {sp.rating:g} {sp.unit}"
    return out


def protection_section(rep) -> Markup:
    """The drivers' excursion and power at the [stress] drive against their xmax and rating ("" without)."""
    d = rep.build.design
    prot = d.protection
    if not prot:
        return Markup("")
    st = d.job.stress
    rows = [[n, num(p["excursion_mm"], ".3g"), num(p["at_hz"], ".0f"), num(p["xmax_mm"], ".3g"),
             num(p["power_w"], ".3g"), num(p["rating_w"], "g"), "yes" if p["within"] else "NO"]
            for n, p in prot.items()]
    return section("Driver protection", para(
        f"At {st.power:g} W into {st.rated_impedance:g} Ω: each driver's largest one-way cone excursion over the "
        "band for a sine (from its Thiele-Small model in its box and the network's voltage at it) against its xmax, "
        "and its programme power (pink noise over the band) against its rating."),
        table(["driver", "peak excursion (mm)", "at (Hz)", "xmax (mm)", "programme power (W)", "rating (W)",
               "within"], rows))


def network_section(rep) -> Markup:
    """The network drawn as ladders (the design to build's values), or as a netlist where it has no ladder
    layout."""
    if rep.drawing is not None:
        return section("Network", para(f"Each way as a ladder from \"in\"; values of the {rep.build.label} design."),
                       image("network", rep.drawing))
    rows = [[p.name, p.type if p.type != "driver" else f"driver {p.driver}", p.nodes[0], p.nodes[1]]
            for p in rep.build.job.parts]
    return section("Network", para("Node \"in\" is the amplifier's output, \"0\" its return; a driver's first node "
                                   "is its positive terminal."),
                   table(["part", "kind", "from node", "to node"], rows))


def prune_section(rep) -> Markup:
    """The first prune's steps: what each removed, how, and what it cost; the chosen step marked."""
    pruned = [it.design for it in rep.items if "prune" in it.design.sections]
    if not pruned:
        return Markup("")
    sec = pruned[0].sections["prune"]
    rows = [[r.get("step"), r.get("parts"), r.get("removed"), r.get("how"), num(r.get("cost"), ".4g"),
             num(r.get("rms_error_db"), ".2f"), num(r.get("max_error_db"), ".2f"),
             "chosen" if r.get("step") == sec.get("chosen_step") else ""]
            for r in sec.get("steps") or [] if isinstance(r, dict)]
    share = sec.get("max_increase")
    share = num(share * 100 if isinstance(share, (int, float)) else share, "g")
    steps = [r for r in sec.get("steps") or [] if isinstance(r, dict)]
    base = steps[0].get("cost") if steps else None
    of = (f"of {COST_FLOOR:g} (step 0 on target)" if isinstance(base, (int, float)) and base < COST_FLOOR
          else "of step 0's cost")
    return section("Pruning", para(
        "Each step removes the part whose removal costs least (the rest refitted); the chosen design has the fewest "
        f"parts within {share} % {of}."),
        table(["step", "parts", "removed", "how", "cost", "rms error (dB)", "worst error (dB)", ""], rows))


def findings_section(rep) -> Markup:
    """The findings of the result to build, as a bulleted list ("none" where it has none)."""
    return section(f"Findings ({rep.build.label})", bullets([x["text"] for x in rep.build.design.findings], "none"))


def cautions_section(rep) -> Markup:
    """The amplifier load, the parts' and drivers' ratings at the drive level, and the general caution."""
    from xo_fit.output.cautions import GENERAL, design_cautions, load_cautions, protection_cautions

    d = rep.build.design
    cautions = load_cautions(d.scored.metrics["impedance_min_ohm"], d.job.cost.impedance_min)
    if rep.stress is not None:
        cautions = (protection_cautions(d.protection, d.job.stress)
                    + design_cautions(rep.stress, d.job.stress.rated_impedance))
    elif not cautions:
        cautions = [GENERAL]
    return section("Cautions", join(*(caution(c) for c in cautions)))

