"""A complete Thiele-Small parameter set from any subset that determines it.

The relations are those of R. H. Small, "Direct-radiator loudspeaker system analysis", JAES 20(5), 1972
(written here from the equations, SI units throughout):

* ws = 2 pi fs = 1 / sqrt(Mms Cms)                       (resonance of moving mass and suspension)
* Cms = Vas / (rho c^2 Sd^2)                             (Vas: the air volume of the suspension's compliance)
* Qes = ws Mms Re / Bl^2,  Qms = ws Mms / Rms            (electrical and mechanical Q)
* 1 / Qts = 1 / Qms + 1 / Qes
* Res = Bl^2 / Rms = Re Qms / Qes                        (the motional peak above Re)
* eta0 = (4 pi^2 / c^3) fs^3 Vas / Qes                   (reference efficiency, half space)

Le, Xmax, the power rating and the lossy coil's L2 with R2 across it (as in ``ts-lossy``) stand alone: they
are given or absent, never derived. The free-air impedance needs Re, fs, Qms and Qes (or what determines
them); a box needs Vas too, and the cone's excursion the mechanical set (Sd and one of Vas, Cms, Mms, Bl,
Rms). :func:`complete` derives everything the given keys determine and checks every relation whose terms
are all known (given, or derived another way) to within :data:`CONSISTENCY`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from xo_fit.constants import SPEED_OF_SOUND
from xo_fit.errors import XoFitError

if TYPE_CHECKING:
    from xo_fit.job.model import ThieleSmall

#: Density of dry air at 20 C and 101.325 kPa, kg/m^3: the ideal-gas law rho = p / (R T) with the specific gas
#: constant of dry air R = 287.05 J/(kg K) (the ISO 2533 standard atmosphere's value) and T = 293.15 K.
RHO_AIR = 1.204
#: Speed of sound in air, m/s: the package's one value (:data:`xo_fit.constants.SPEED_OF_SOUND`, the job's
#: [acoustics] default); c = sqrt(gamma R T) with gamma = 1.40 and R as for RHO_AIR gives 343.0 at 19.6 C and
#: 343.2 at 20 C, a difference of 0.06 % (0.1 % in Cms from Vas).
C_AIR = SPEED_OF_SOUND

#: Relations among given (or derived) values must hold to within this fraction.
CONSISTENCY = 0.01

#: Every key a set may give, with its SI unit (for printing).
UNITS = {"re": "ohm", "le": "H", "fs": "Hz", "qms": "", "qes": "", "qts": "", "vas": "m^3", "sd": "m^2",
         "bl": "T m", "mms": "kg", "cms": "m/N", "rms": "kg/s", "xmax": "m", "power": "W", "l2": "H",
         "r2": "ohm"}
#: Values derived for printing that are never given.
DERIVED_UNITS = {"res": "ohm", "kms": "N/m", "vd": "m^3", "eta0": "", "spl_1w1m": "dB SPL"}
#: The keys :func:`complete` relates to one another; the others (le, xmax, power, l2, r2) stand alone.
_RELATED = ("re", "fs", "qms", "qes", "qts", "vas", "sd", "bl", "mms", "cms", "rms")
#: The keys the impedance needs.
ELECTRICAL = ("re", "fs", "qms", "qes")
#: The keys the cone's motion needs.
MECHANICAL = ("sd", "bl", "mms", "cms", "rms")
#: How each electrical key can be given, for the error that finds it missing.
_HINTS = {"re": "re", "fs": "fs, or mms with cms (or with vas and sd)", "qms": "qms, or qts with qes, or rms "
          "with mms", "qes": "qes, or qts with qms, or bl with mms"}


def _monomials(rho: float, c: float) -> list[tuple[str, dict[str, float], float, str]]:
    """Small's power-law relations as (subject, {key: exponent}, ln K, text): sum exponent ln x = ln K, with the
    subject's exponent 1, so that exp(residual) - 1 is the subject's relative mismatch."""
    two_pi = math.log(2 * math.pi)
    return [
        ("fs", {"fs": 1.0, "mms": 0.5, "cms": 0.5}, -two_pi, "fs = 1/(2 pi sqrt(mms cms))"),
        ("vas", {"vas": 1.0, "sd": -2.0, "cms": -1.0}, math.log(rho * c * c), "vas = rho c^2 sd^2 cms"),
        ("bl", {"bl": 1.0, "fs": -0.5, "mms": -0.5, "re": -0.5, "qes": 0.5}, 0.5 * two_pi,
         "bl = sqrt(2 pi fs mms re / qes)"),
        ("rms", {"rms": 1.0, "fs": -1.0, "mms": -1.0, "qms": 1.0}, two_pi, "rms = 2 pi fs mms / qms"),
    ]


@dataclass(frozen=True)
class ThieleSmallSet:
    """A driver's Thiele-Small parameters, completed from what was given (SI units).

    Attributes
    ----------
    re, le, fs, qms, qes, qts : float
        Voice-coil resistance (ohm), inductance (H; 0 when not given), resonance (Hz) and the Q factors.
    vas, sd, bl, mms, cms, rms : float or None
        Equivalent volume (m^3), piston area (m^2), force factor (T m), moving mass (kg), suspension compliance
        (m/N) and mechanical resistance (kg/s); None where the given keys do not determine them.
    xmax, power : float or None
        Linear one-way excursion (m) and thermal (programme) power rating (W); None when not given.
    l2, r2 : float
        The lossy coil's second inductance (H) and the resistance across it (ohm); both 0 without it.
    given : frozenset of str
        The keys that were given.
    rho, c : float
        The air density (kg/m^3) and speed of sound (m/s) used for Vas.
    """

    re: float
    fs: float
    qms: float
    qes: float
    qts: float
    le: float = 0.0
    vas: float | None = None
    sd: float | None = None
    bl: float | None = None
    mms: float | None = None
    cms: float | None = None
    rms: float | None = None
    xmax: float | None = None
    power: float | None = None
    l2: float = 0.0
    r2: float = 0.0
    given: frozenset = field(default_factory=frozenset)
    rho: float = RHO_AIR
    c: float = C_AIR

    @property
    def res(self) -> float:
        """The motional resistance at resonance, Re Qms / Qes (ohm)."""
        return self.re * self.qms / self.qes

    def coil_impedance(self, f: np.ndarray) -> np.ndarray:
        """The voice coil's impedance above Re, j w Le plus the lossy section j w L2 R2 / (R2 + j w L2).

        Parameters
        ----------
        f : ndarray
            Frequencies, in Hz, shape (F,).

        Returns
        -------
        ndarray
            The complex impedance, in ohm, shape (F,).
        """
        s = 2j * np.pi * np.asarray(f, dtype=float)
        z = s * self.le
        if self.l2 > 0 and self.r2 > 0:
            z = z + s * self.l2 * self.r2 / (self.r2 + s * self.l2)
        return z

    def need(self, keys: tuple[str, ...], purpose: str, key: str | None = None) -> None:
        """Raise XoFitError naming what ``purpose`` needs of ``keys`` that the set lacks.

        Parameters
        ----------
        keys : tuple of str
            The parameter names needed (from :data:`UNITS`).
        purpose : str
            What needs them, for the message ("a vented box", "the cone excursion").
        key : str, optional
            The job table the set came from, for the message (``"[driver.woofer.ts]"``).
        """
        missing = [k for k in keys if getattr(self, k) is None]
        if not missing:
            return
        if self.sd is None and any(k in MECHANICAL for k in missing):
            how = "give sd (the piston area)" + ("" if self.vas is not None else " and one of vas, cms, mms, bl, rms")
        elif any(k in MECHANICAL or k == "vas" for k in missing):
            how = "give vas, or one of cms, mms, bl, rms" + ("" if self.sd is not None else " with sd")
        else:
            how = f"give {', '.join(missing)}"
        raise XoFitError(f"{purpose} needs {', '.join(missing)}, which the given keys do not determine: {how}",
                         key=key)

    def derived(self) -> dict[str, float]:
        """The values that were not given, SI units (see :data:`UNITS` and :data:`DERIVED_UNITS`), for
        ``check`` to print; keys the set does not determine are left out."""
        out = {k: getattr(self, k) for k in _RELATED if k not in self.given and getattr(self, k) is not None}
        out["res"] = self.res
        if self.cms is not None:
            out["kms"] = 1.0 / self.cms
        if self.sd is not None and self.xmax is not None:
            out["vd"] = self.sd * self.xmax
        if self.vas is not None:
            eta0 = 4 * math.pi ** 2 / self.c ** 3 * self.fs ** 3 * self.vas / self.qes
            out["eta0"] = eta0
            # SPL at 1 W into Re, 1 m, half space: 10 log10(eta0 rho c / (2 pi (1 m)^2) / P_REF^2)
            out["spl_1w1m"] = 10 * math.log10(eta0 * self.rho * self.c / (2 * math.pi) / (20e-6) ** 2)
        return out


def _read(given: Mapping[str, float], key: str | None) -> dict[str, float]:
    unknown = sorted(set(given) - set(UNITS))
    if unknown:
        raise XoFitError(f"unknown Thiele-Small key{'s' if len(unknown) > 1 else ''} {', '.join(unknown)}; "
                         f"expected some of {', '.join(UNITS)}", key=key)
    values = {}
    for k, v in given.items():
        zero_ok = k == "le"  # an ideal coil of no inductance is a fair model, zero of anything else is not
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0 or (
                v == 0 and not zero_ok):
            raise XoFitError(f"{k} must be a number {'of zero or more' if zero_ok else 'above zero'}, got {v!r}",
                             key=key)
        values[k] = float(v)
    if ("l2" in values) != ("r2" in values):
        raise XoFitError("the lossy coil needs both l2 and r2 (the resistance across l2)", key=key)
    return values


def _solve_qts(known: dict[str, float], source: dict[str, frozenset], key: str | None) -> bool:
    """1/qts = 1/qms + 1/qes with one term unknown: derive it. Returns whether one was derived."""
    have = [k for k in ("qts", "qms", "qes") if k in known]
    if len(have) != 2:
        return False
    if "qts" not in known:
        q = 1.0 / (1.0 / known["qms"] + 1.0 / known["qes"])
        known["qts"], source["qts"] = q, source["qms"] | source["qes"]
        return True
    other = "qes" if "qms" in known else "qms"
    q = known[have[0] if have[0] != "qts" else have[1]]
    if known["qts"] >= q:
        raise XoFitError(f"qts ({known['qts']:.4g}) must be below {'qms' if other == 'qes' else 'qes'} "
                         f"({q:.4g}), since 1/qts = 1/qms + 1/qes", key=key)
    known[other] = 1.0 / (1.0 / known["qts"] - 1.0 / q)
    source[other] = source["qts"] | source[have[0] if have[0] != "qts" else have[1]]
    return True


def _propagate(known: dict[str, float], source: dict[str, frozenset], eqs, key: str | None) -> bool:
    """Derive every value one relation alone gives; then what the power-law relations give together (a
    linear system in the logarithms). Returns whether anything was derived."""
    derived = False
    for _, expo, lnk, _ in eqs:
        unknown = [k for k in expo if k not in known]
        if len(unknown) == 1:
            u = unknown[0]
            rest = sum(a * math.log(known[k]) for k, a in expo.items() if k != u)
            known[u] = math.exp((lnk - rest) / expo[u])
            source[u] = frozenset().union(*(source[k] for k in expo if k != u))
            derived = True
    derived |= _solve_qts(known, source, key)
    if derived:
        return True
    # several relations that share two or more unknowns: solve them together where they determine them
    rows = [(expo, lnk) for _, expo, lnk, _ in eqs if any(k not in known for k in expo)]
    unknowns = sorted({k for expo, _ in rows for k in expo if k not in known})
    if not rows or not unknowns:
        return False
    a = np.array([[expo.get(u, 0.0) for u in unknowns] for expo, _ in rows])
    b = np.array([lnk - sum(x * math.log(known[k]) for k, x in expo.items() if k in known) for expo, lnk in rows])
    sol, *_ = np.linalg.lstsq(a, b, rcond=None)
    _, sv, vt = np.linalg.svd(a)
    null = vt[int(np.sum(sv > 1e-9)):]
    for i, u in enumerate(unknowns):
        if null.size == 0 or np.all(np.abs(null[:, i]) < 1e-9):
            known[u] = math.exp(sol[i])
            source[u] = frozenset().union(*(source[k] for expo, _ in rows if u in expo for k in expo if k in source))
            derived = True
    return derived


def _describe(keys, source: dict[str, frozenset], given: set) -> str:
    parts = []
    for k in keys:
        if k in given:
            parts.append(k)
        else:
            parts.append(f"{k} (from {', '.join(sorted(source[k]))})")
    return ", ".join(parts)


def _check(known: dict[str, float], source: dict[str, frozenset], eqs, given: set, key: str | None) -> None:
    """Every relation whose terms are all known must hold within CONSISTENCY; else name the keys on each side."""
    checks = [(subject, expo, lnk, text) for subject, expo, lnk, text in eqs]
    for subject, expo, lnk, text in checks:
        if not all(k in known for k in expo):
            continue
        other = {k: a for k, a in expo.items() if k != subject}
        value = math.exp(lnk - sum(a * math.log(known[k]) for k, a in other.items()))
        _compare(subject, known[subject], value, list(other), text, source, given, key)
    if all(k in known for k in ("qts", "qms", "qes")):
        value = 1.0 / (1.0 / known["qms"] + 1.0 / known["qes"])
        _compare("qts", known["qts"], value, ["qms", "qes"], "1/qts = 1/qms + 1/qes", source, given, key)


def _compare(subject, have, value, others, text, source, given, key) -> None:
    off = have / value - 1.0
    if abs(off) <= CONSISTENCY:
        return
    left = _describe([subject], source, given)
    right = _describe(others, source, given)
    raise XoFitError(f"inconsistent parameters: {left} is {have:.4g} but {text} from {right} gives {value:.4g} "
                     f"({100 * off:+.1f} %, over {100 * CONSISTENCY:g} %); give a determining subset or correct "
                     "one of them", key=key)


def complete(given: Mapping[str, float], *, key: str | None = None, rho: float = RHO_AIR,
             c: float = C_AIR) -> ThieleSmallSet:
    """Complete a Thiele-Small set from any subset that determines its impedance (Small 1972).

    Parameters
    ----------
    given : Mapping
        Key -> value in SI units (ohm, H, Hz, m^3, m^2, T m, kg, m/N, kg/s, m, W): any of :data:`UNITS`.
    key : str, optional
        The job table it came from (``"[driver.woofer.ts]"``), for error messages.
    rho, c : float
        Air density (kg/m^3) and speed of sound (m/s) relating Vas to Cms.

    Returns
    -------
    ThieleSmallSet
        Every value the given keys determine; the mechanical ones None where Sd or a scale is missing.

    Raises
    ------
    XoFitError
        An unknown key, a value not above zero, l2 without r2, re/fs/qms/qes not determined (naming what
        would determine them), or a relation among determined values off by more than :data:`CONSISTENCY`
        (naming the keys on both sides).
    """
    values = _read(given, key)
    known = {k: v for k, v in values.items() if k in _RELATED}
    source = {k: frozenset([k]) for k in known}
    eqs = _monomials(rho, c)
    for _ in range(20):
        if not _propagate(known, source, eqs, key):
            break
    _check(known, source, eqs, set(known) & set(values), key)
    missing = [k for k in ELECTRICAL if k not in known]
    if missing:
        have = ", ".join(sorted(values)) or "none"
        raise XoFitError(f"{', '.join(missing)} not determined by the given keys ({have}); "
                         + "; ".join(f"{k}: give {_HINTS[k]}" for k in missing), key=key)
    # with re, fs, qms and qes known, the propagation has derived qts = 1/(1/qms + 1/qes)
    return ThieleSmallSet(re=known["re"], fs=known["fs"], qms=known["qms"], qes=known["qes"], qts=known["qts"],
                          vas=known.get("vas"), sd=known.get("sd"), bl=known.get("bl"), mms=known.get("mms"),
                          cms=known.get("cms"), rms=known.get("rms"), le=values.get("le", 0.0),
                          xmax=values.get("xmax"), power=values.get("power"), l2=values.get("l2", 0.0),
                          r2=values.get("r2", 0.0), given=frozenset(values), rho=rho, c=c)


def small_signal_impedance(ts: ThieleSmall, f: np.ndarray) -> np.ndarray:
    """A driver's impedance from its small-signal parameters (a job's ``impedance = { re, le, fs, qms, qes }``).

    Z = Re + Z_Le + Res / (1 + Qms (s/ws + ws/s)), Res = Re Qms / Qes (Small 1972), with the voice coil
    Z_Le = le (j w)^n w_ref^(1-n), w_ref = 2 pi 1 kHz, n = ``le_exponent``, and the optional L2 || R2 in series
    (Leach 2002; Wright 1990), as :class:`~xo_fit.job.model.ThieleSmall` describes.

    Parameters
    ----------
    ts : ThieleSmall
        The parameters: re (ohm), le (H), fs (Hz), qms and qes (dimensionless), le_exponent (dimensionless),
        l2 (H) and r2 (ohm).
    f : ndarray
        Frequencies, in Hz, any shape.

    Returns
    -------
    ndarray
        The complex impedance, in ohm, shape of ``f``.
    """
    w = 2 * np.pi * np.asarray(f, dtype=float)
    s = 1j * w
    ws = 2 * np.pi * ts.fs
    w_ref = 2 * np.pi * 1000.0
    z_le = ts.le * s**ts.le_exponent * w_ref ** (1.0 - ts.le_exponent)
    res = ts.re * ts.qms / ts.qes
    z = ts.re + z_le + res / (1 + ts.qms * (s / ws + ws / s))
    if ts.l2 > 0 and ts.r2 > 0:
        z = z + s * ts.l2 * ts.r2 / (ts.r2 + s * ts.l2)
    return z
