"""Safety cautions printed by the commands where a design can hurt an amplifier, a part or a listener.

The figures and their sources are in ``shared/design/references.md``. These
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
