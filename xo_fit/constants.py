"""Constants shared across the package: one home, so no two modules can disagree.

Node names of the netlist, the pressure reference of dB SPL, the floors that
stand in for the logarithm of zero, the solver's pivot tolerance, the SI
unit of each valued part type, and the speed of sound.
"""

from __future__ import annotations

import math

#: The source's positive terminal.
SOURCE_NODE = "in"
#: The source's return (ground).
GROUND_NODE = "0"

#: 10 / ln(10): 10 log10(x) = DB10 * ln(x) (the compiled kernels take dB through a natural logarithm).
DB10 = 10.0 / math.log(10.0)

#: Reference sound pressure of dB SPL, Pa (20 uPa, ISO 1683).
P_REF = 20e-6
#: Levels below this read as this floor in dB SPL: silence, far under any measurement's noise, and deep enough
#: that the rounding of two solve paths (a short's residue at -160 dB SPL here, -165 there) reads the same.
SPL_FLOOR_DB = -100.0
#: Loads below this many ohm are a dead short whatever their exact value (the cost's shortfall stops growing).
Z_SHORT_OHM = 1e-6

#: A pivot smaller than this fraction of the summed |admittance| at its node sends the point to the dense solve.
PIVOT_TOLERANCE = 1e-3

#: Part types of a netlist.
PART_TYPES = ("R", "L", "C", "driver")
#: Base unit of the value of each valued part type.
PART_UNIT = {"R": "ohm", "L": "H", "C": "F"}
#: Unit of a part's rating, by type: W for a resistor, V for a capacitor, A for a coil.
RATING_UNIT = {"R": "W", "C": "V", "L": "A"}

#: Speed of sound in air, m/s: the job's [acoustics] default (offsets into delays) and the air of the
#: Thiele-Small relations (Vas = rho c^2 Sd^2 Cms); c = sqrt(gamma R T) with gamma = 1.40 and R = 287.05 J/(kg K)
#: gives 343.0 m/s at 19.6 C (343.2 at 20 C), one value for both so that they cannot disagree.
SPEED_OF_SOUND = 343.0

#: Version of the result.json layout written by this package.
RESULT_FORMAT = 2
