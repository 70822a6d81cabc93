"""Air-core coil model: the DC resistance a coil of inductance L wound from a given wire has.

A fitted inductor must carry its own resistance: a larger coil of the same wire
has more turns and more copper. The model is a multilayer air-core coil of the
Brooks proportions (winding depth c, length c, inner diameter 2c, so mean radius
a = 1.5 c), the shape that gives the most inductance for a length of wire, as
crossover coils are commonly wound. Its inductance follows Wheeler's multilayer
formula (H. A. Wheeler, "Simple inductance formulas for radio coils", Proc. IRE
16(10), 1928), L[uH] = 0.8 a^2 N^2 / (6a + 9b + 10c) with lengths in inches,
which for b = c, a = 1.5 c gives L = k c N^2 with k = 2.531e-6 H/m.

The winding cross-section c^2 is filled with N = c^2 / d^2 turns (square
packing at the bare diameter d; enamel is neglected), so

    L = k c^5 / d^4,   wire length = 2 pi a N = 3 pi c N,
    DCR = rho * length / (pi d^2 / 4) = 12 rho (L/k)^0.6 d^-1.6,

with rho = 1.7241e-8 ohm m, annealed copper at 20 C (IACS). DCR grows as
L^0.6 for a fixed wire. At 1 mH this gives 0.45, 0.31, 0.22 and 0.15 ohm for
18, 16, 14 and 12 AWG. Catalogue coils run some 10-30 % higher (looser
winding, thicker enamel): give ``dcr`` in ohms where the real coil is known.
"""

from __future__ import annotations

import numpy as np

#: Resistivity of annealed copper at 20 C, ohm m (International Annealed Copper Standard).
RHO_COPPER = 1.7241e-8

#: Wheeler's multilayer formula on Brooks proportions: L = K_BROOKS * c * N^2, H/m.
K_BROOKS = 0.8 * 1.5**2 / (6 * 1.5 + 9 + 10) * 1e-6 / 0.0254

#: Exponent of L in the DCR law.
DCR_EXPONENT = 0.6


def dcr_coefficient(diameter: float) -> float:
    """Coefficient a of DCR = a * L**0.6 for bare copper wire.

    Parameters
    ----------
    diameter : float
        The bare wire diameter, in m.

    Returns
    -------
    float
        a, in ohm / H^0.6.
    """
    return 12.0 * RHO_COPPER * K_BROOKS ** (-DCR_EXPONENT) * diameter ** (-1.6)


def coil_dcr(inductance: np.ndarray | float, diameter: float) -> np.ndarray | float:
    """The DC resistance of an air-core coil of Brooks proportions.

    Parameters
    ----------
    inductance : float or ndarray
        The inductance, in H, any shape (...,).
    diameter : float
        The bare wire diameter, in m.

    Returns
    -------
    float or ndarray
        The DC resistance, in ohm, the shape of ``inductance``.
    """
    return dcr_coefficient(diameter) * np.asarray(inductance, dtype=float) ** DCR_EXPONENT
