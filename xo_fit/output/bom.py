"""The bill of materials: what to buy for N speakers, with the rating each part needs at the job's drive level.

One row per valued part of a design (bom.csv; docs/outputs.md lists the columns). The rating a part needs
comes from the part stresses at ``[stress] power`` into ``rated_impedance`` (:mod:`xo_fit.model.stress`):
resistors at twice their programme power (common practice, :data:`~xo_fit.output.cautions.RESISTOR_MARGIN`),
capacitors at their sine worst-case peak voltage, coils at their peak current. A continuous value (a fit
that was never snapped) is listed with source ``continuous`` and a note that it cannot be bought as it is.
"""

from __future__ import annotations

from xo_fit.constants import PART_UNIT, RATING_UNIT
from xo_fit.output.cautions import RESISTOR_MARGIN, round_up
from xo_fit.units import format_value

#: bom.csv's columns, in order.
BOM_COLUMNS = ["name", "kind", "value", "text", "quantity", "source", "tolerance", "combination", "rating_needed",
               "rating", "dcr_ohm", "wire", "notes"]
#: Speakers a bill of materials is for by default (a stereo pair).
DEFAULT_SPEAKERS = 2


def _needs(design) -> dict[str, tuple[float, str]]:
    """Rating each part needs (value, unit) at the job's drive level; empty without [stress] power."""
    st = design.stress_report  # computed once and kept by the design
    if st is None:  # no [stress] power
        return {}
    out = {}
    for p in st.parts:
        if p.kind == "R":
            programme = p.programme if p.programme is not None else p.sine_worst
            out[p.name] = (round_up(RESISTOR_MARGIN * programme), "W")
        else:
            out[p.name] = (round_up(p.sine_worst), p.unit)
    return out


def _coil(p, value: float) -> tuple[str, str]:
    """A coil's DC resistance (ohm, as text) and wire (as text), from the job's dcr or wire."""
    if p.type != "L":
        return "", ""
    if p.dcr_wire:
        from xo_fit.physics.coils import coil_dcr

        from xo_fit.units import awg_diameter

        gauge = next((g for g in range(41) if abs(awg_diameter(g) / p.dcr - 1) < 1e-3), None)
        wire = f"{p.dcr * 1e3:.3g} mm copper" + (f" ({gauge} AWG)" if gauge is not None else "")
        return f"{float(coil_dcr(value, p.dcr)):.4g}", wire
    return (f"{p.dcr:.4g}" if p.dcr else ""), ""


def bom_rows(design, speakers: int = DEFAULT_SPEAKERS) -> list[dict]:
    """Rows of bom.csv for ``design`` (:class:`~xo_fit.output.design.Design`) and ``speakers`` speakers."""
    job = design.job
    needs = _needs(design)
    tol_defaults = dict(job.spread.tolerance)
    rows = []
    for p, value in zip(job.valued_parts, design.array):
        value = float(value)
        unit = PART_UNIT[p.type]
        info = design.part_info.get(p.name, {})
        source = info.get("source") or ("fixed" if not p.free else "continuous")
        if source == "fixed" and p.series:
            source = p.series
        comb = info.get("combination")
        pieces = len(comb["parts"]) if isinstance(comb, dict) and isinstance(comb.get("parts"), list) else 1
        comb_text = (f"{comb.get('connection')}: " + " + ".join(str(x.get("text", "")) for x in comb["parts"])
                     if pieces > 1 else "")
        tol = p.tolerance if p.tolerance is not None else tol_defaults.get(p.type)
        need = needs.get(p.name)
        dcr, wire = _coil(p, value)
        notes = []
        if source == "continuous":
            notes.append("continuous value: not buyable as it is (snap the design first)")
        if need is not None and p.rating is not None and p.rating < need[0]:
            notes.append(f"its rating {p.rating:g} {need[1]} is under the {need[0]:g} {need[1]} needed")
        rows.append({"name": p.name, "kind": p.type, "value": value, "text": format_value(value, unit),
                     "quantity": speakers * pieces, "source": source,
                     "tolerance": f"{tol * 100:g}%" if tol is not None else "", "combination": comb_text,
                     "rating_needed": f"{need[0]:g} {need[1]}" if need else "",
                     "rating": f"{p.rating:g} {RATING_UNIT[p.type]}" if p.rating is not None else "",
                     "dcr_ohm": dcr, "wire": wire, "notes": "; ".join(notes)})
    return rows
