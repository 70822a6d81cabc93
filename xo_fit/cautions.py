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


def design_cautions(stress, rated_ohm: float | None) -> list[str]:
    """Cautions for a design's stress report (xo_fit.stress.StressReport) at the job's drive level."""
    out = []
    if rated_ohm:
        floor = RATED_FRACTION * rated_ohm
        if stress.impedance_min_ohm < floor:
            out.append(f"|Z| falls to {stress.impedance_min_ohm:.2f} ohm at {stress.impedance_min_hz:.0f} Hz, below 80 % "
                       f"of the {rated_ohm:g} ohm rating ({floor:.2f} ohm; IEC 60268-5): rate the speaker lower or "
                       "raise the impedance there")
    out.append(f"EPDR (equivalent peak dissipation resistance) falls to {stress.epdr_min_ohm:.2f} ohm at "
               f"{stress.epdr_min_hz:.0f} Hz: the amplifier's output stage heats as if it drove a {stress.epdr_min_ohm:.2f} "
               "ohm resistor; make sure it is specified for that load")
    hot = False
    for p in stress.parts:
        if p.kind != "R":
            continue
        need = RESISTOR_MARGIN * p.sine_worst
        if p.rating is not None and p.rating < need:
            out.append(f"{p.name} dissipates up to {p.sine_worst:.2f} W (sine worst case at {p.at_hz:.0f} Hz) against its "
                       f"{p.rating:g} W rating: less than the 2x margin of common practice; use at least {need:.1f} W")
            hot = True
        elif p.rating is None and p.sine_worst >= 1.0:
            out.append(f"{p.name} dissipates up to {p.sine_worst:.2f} W (sine worst case at {p.at_hz:.0f} Hz): rate it at "
                       f"{need:.1f} W or more (2x margin, common practice)")
            hot = True
    for p in stress.parts:
        if p.kind == "C" and p.rating is not None and p.sine_worst > p.rating:
            out.append(f"{p.name} sees {p.sine_worst:.1f} V peak against its {p.rating:g} V rating")
    if hot:
        out.append("resistors that run hot belong away from damping material (wadding), wiring and capacitors, "
                   "with free air around them")
    out.append(GENERAL)
    return out
