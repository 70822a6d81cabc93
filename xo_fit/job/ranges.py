"""What a job's values may be: the ranges of numbers that mean something for a loudspeaker, the sizes xo_fit
holds, and the name rule (docs/job-format.md gives each)."""

from __future__ import annotations

import re
from collections.abc import Mapping
from types import MappingProxyType


#: The frequency range a grid may span, Hz (beyond it the arithmetic of a loudspeaker model loses meaning).
GRID_HZ = (0.1, 1e6)


#: The most grid points (memory: every curve, candidate and draw is this long).
MAX_POINTS = 100_000


#: The most off-axis data held: positions x drivers x grid points (complex, twice: 1 GiB); the demo's 70 positions
#: of 2 drivers at 100,000 points are 14 M (measured: simulate 18 s and 1 GB, spread 21 s and 1.9 GB).
MAX_ANGLE_VALUES = 2**25


#: The most [[part]] tables, drivers included (measured: a fit of a 1,000-part network compiles its kernel in about
#: 80 s and 1.9 GB; at 3,000 parts the generated kernel's expressions nest too deeply for the compiler).
MAX_PARTS = 1000


#: The largest cost weight (larger ones overflow the cost).
MAX_WEIGHT = 1e6


#: Ranges of values whose extremes mean nothing for a loudspeaker and overflow the arithmetic (docs/job-format.md):
#: an impedance (a floor, a rated impedance, the source's resistance), ohm; an acoustic offset, m; a drive power, W;
#: a part's rating (W, V or A).
OHMS = (0.0, 1e4)
OFFSET_M = (-10.0, 10.0)
POWER_W = (1e-6, 1e6)
RATING = (1e-6, 1e6)


#: Plausible ranges of a voltage (V) and of a flat driver's level (dB SPL).
VOLTS = (1e-6, 1e4)


#: What drivers and boxes have, SI (common practice, from a tweeter's dome to a large woofer's cone): a value
#: outside is legal but earns a warning, since it is usually a slip of the unit (``vas = 60`` is 60 m^3).
TS_PLAUSIBLE: Mapping[str, tuple[float, float]] = MappingProxyType({
    "re": (0.5, 100.0), "le": (0.0, 0.05), "fs": (5.0, 20000.0), "qms": (0.3, 100.0), "qes": (0.05, 20.0),
    "qts": (0.05, 5.0), "vas": (1e-6, 3.0), "sd": (1e-5, 0.5), "bl": (0.5, 50.0), "mms": (1e-5, 1.0),
    "cms": (1e-6, 0.01), "rms": (0.01, 100.0), "xmax": (1e-5, 0.05), "power": (0.1, 1e4), "l2": (0.0, 0.05),
    "r2": (0.01, 1e4), "volume": (1e-4, 3.0), "tuning": (5.0, 1000.0), "ql": (1.0, 100.0)})


#: What the parts of a loudspeaker crossover take, by type (SI): resistors from a fraction of an ohm (a
#: coil's copper, a series pad) to some kilohms; coils from a few microhenry to tens of millihenry; capacitors
#: from a few nanofarad (a tweeter's bypass) to some millifarad (a woofer's bass-shelf network). A value
#: outside is legal but usually a slip of the unit ("10" for a capacitor is 10 F).
PLAUSIBLE = {"R": (0.01, 1e5), "L": (1e-6, 0.1), "C": (1e-9, 0.01)}


#: Part values the arithmetic can take (SI): far outside what any part is, and inside what float64 divides
#: without overflow (a denormal resistance would make an infinite admittance).
SOLVABLE = (1e-12, 1e12)


#: The name rule, one for each kind of name. The patterns are anchored with \A and \Z (``$`` would match before a
#: trailing line break) and are used through :func:`is_name` (``fullmatch``). Parts and drivers: a letter or _,
#: then letters, digits, _ or -. Nodes: letters, digits, _ - + and a dot. Jobs (they name folders): any text
#: without / or \, control characters (C0, DEL, C1) or line and paragraph separators, and not "." or "..".
NAME_PATTERN = re.compile(r"\A[A-Za-z_][A-Za-z0-9_\-]*\Z")
NODE_PATTERN = re.compile(r"\A[A-Za-z0-9_\-+.]+\Z")
JOB_NAME_PATTERN = re.compile(r"\A(?!\.\.?\Z)[^/\\\x00-\x1f\x7f-\x9f\u2028\u2029]+\Z")


def is_name(text: object, pattern: re.Pattern = NAME_PATTERN) -> bool:
    """Whether ``text`` is a whole name under ``pattern`` (NAME_PATTERN, NODE_PATTERN or JOB_NAME_PATTERN)."""
    return isinstance(text, str) and pattern.fullmatch(text) is not None
