"""Safety cautions printed by the commands where a design can hurt an amplifier, a part or a listener.

The figures and their sources are in ``docs/references.md``. These
notes inform; they do not replace the amplifier maker's ratings, local
electrical codes or licensed practice.
"""

from __future__ import annotations

#: IEC 60268-5: |Z| within the rated range should not fall below 80 % of the rated impedance.
RATED_FRACTION = 0.8
#: A load below this (80 % of a 4 ohm rating) is hard work for many amplifiers.
LOW_LOAD_OHM = RATED_FRACTION * 4.0

GENERAL = ("xo_fit's figures are simulations: check the built speaker by measurement, keep test levels "
           "moderate (NIOSH: 85 dB(A) for at most 8 h, halving the time per 3 dB more), and follow local "
           "electrical codes and licensed practice for anything mains-powered")


def load_cautions(impedance_min_ohm: float, floor_ohm: float = 0.0) -> list[str]:
    """Cautions about the amplifier load for a design whose lowest |Z| is ``impedance_min_ohm``."""
    out = []
    if floor_ohm > 0 and impedance_min_ohm < floor_ohm:
        out.append(f"the load dips to {impedance_min_ohm:.2f} ohm, below the job's floor of {floor_ohm:g} ohm")
    if impedance_min_ohm < LOW_LOAD_OHM:
        out.append(f"a load of {impedance_min_ohm:.2f} ohm is below 80 % of a 4 ohm rating (IEC 60268-5); "
                   "make sure the amplifier is specified for it")
    if out:
        out.append(GENERAL)
    return out


#: Resistor power rating margin of common practice: rate a resistor at twice what it dissipates.
RESISTOR_MARGIN = 2.0


def round_up(x: float) -> float:
    """``x`` rounded up to three significant digits: a rating to buy is never printed below the need
    (10.02 W once printed as "use at least 10 W" beside a 10 W part called too small)."""
    import math

    if x <= 0 or not math.isfinite(x):
        return x
    scale = 10.0 ** (2 - math.floor(math.log10(x)))
    return math.ceil(x * scale - 1e-9) / scale


def design_cautions(stress, rated_ohm: float | None) -> list[str]:
    """Cautions for a design's stress report (xo_fit.model.stress.StressReport) at the job's drive level."""
    out = []
    if rated_ohm:
        floor = RATED_FRACTION * rated_ohm
        if stress.impedance_min_ohm < floor:
            out.append(f"|Z| falls to {stress.impedance_min_ohm:.2f} ohm at {stress.impedance_min_hz:.0f} Hz, "
                       f"below 80 % of the {rated_ohm:g} ohm rating ({floor:.2f} ohm; IEC 60268-5): "
                       "rate the speaker lower or raise the impedance there")
    out.append(f"EPDR (equivalent peak dissipation resistance) falls to {stress.epdr_min_ohm:.2f} ohm at "
               f"{stress.epdr_min_hz:.0f} Hz: the amplifier's output stage heats as if it drove a "
               f"{stress.epdr_min_ohm:.2f} ohm resistor; make sure it is specified for that load")
    hot = False
    for p in stress.parts:
        if p.kind != "R":
            continue
        programme = p.programme if p.programme is not None else p.sine_worst
        need = round_up(RESISTOR_MARGIN * programme)
        figures = (f"{programme:.3g} W programme, {p.sine_worst:.3g} W sine worst case at {p.at_hz:.0f} Hz; "
                   f"a sustained sine at full drive would need {RESISTOR_MARGIN * p.sine_worst:.3g} W")
        if p.rating is not None and p.rating < need:
            out.append(f"{p.name} is rated {p.rating:g} W, less than 2x its programme power ({figures}): use at least "
                       f"{need:g} W (2x margin, common practice)")
            hot = True
        elif p.rating is None and p.sine_worst >= 1.0:
            out.append(f"{p.name}: rate it at {need:g} W or more, 2x its programme power (common practice; "
                       f"{figures})")
            hot = True
    for p in stress.parts:
        if p.kind == "C" and p.rating is not None and p.sine_worst > p.rating:
            out.append(f"{p.name} sees {p.sine_worst:.3g} V peak against its {p.rating:g} V rating")
        if p.kind == "L" and p.rating is not None and p.sine_worst > p.rating:
            out.append(f"{p.name} carries {p.sine_worst:.3g} A peak against its {p.rating:g} A rating")
    if hot:
        out.append("resistors that run hot belong away from damping material (wadding), wiring and capacitors, "
                   "with free air around them")
    out.append(GENERAL)
    return out


def _drive(stress) -> str:
    return f"{stress.power:g} W into {stress.rated_impedance:g} ohm"


def protection_findings(protection: dict | None, stress) -> list[dict]:
    """``over_excursion`` and ``over_power`` findings of a design's protection figures (result.json's
    ``protection``, :func:`xo_fit.model.protection.protection`) at the drive ``stress`` (a StressSpec)."""
    from xo_fit.model.protection import TOLERANCE

    out = []
    for name, p in (protection or {}).items():
        x, xmax = p["excursion_mm"], p["xmax_mm"]
        if x is not None and xmax is not None and x > xmax * (1 + TOLERANCE):
            out.append({"kind": "over_excursion", "part": None, "driver": name,
                        "text": f"{name} moves {x:.2f} mm one way (sine) at {p['at_hz']:.0f} Hz at {_drive(stress)}, "
                                f"over its xmax of {xmax:.2f} mm: cross it higher or steeper, or rate the speaker "
                                f"for less power"})
        if p["rating_w"] is not None and p["power_w"] > p["rating_w"] * (1 + TOLERANCE):
            out.append({"kind": "over_power", "part": None, "driver": name,
                        "text": f"{name} takes {p['power_w']:.3g} W programme (pink noise over the band) at "
                                f"{_drive(stress)}, over its {p['rating_w']:g} W rating: pad it down, cross it "
                                "higher, or rate the speaker for less power"})
    return out


def protection_cautions(protection: dict | None, stress) -> list[str]:
    """Cautions for the drivers a design drives past their xmax or rating at the drive ``stress``."""
    over = [f["text"] for f in protection_findings(protection, stress)]
    if over:
        over.append("a cone past xmax distorts and, further, bottoms out; a coil past its rating overheats: keep "
                    "test levels below the stated drive until the crossover protects every driver")
    return over
