"""A driver in an infinite baffle, a closed box or a vented box: impedance, output and cone excursion.

Closed box (R. H. Small, "Closed-box loudspeaker systems, Part I: analysis", JAES 20(10), 1972): the box's
air adds its stiffness to the suspension's; with alpha = Vas / Vb, fc = fs sqrt(1 + alpha) and
Qtc = Qts sqrt(1 + alpha). Vented box (R. H. Small, "Vented-box loudspeaker systems, Part I: small-signal
analysis", JAES 21(5), 1973; A. N. Thiele, "Loudspeakers in vented boxes", JAES 19, 1971): the box
compliance, the port's air mass tuned with it to fb, and the leakage loss of quality QL = wb Cab RaL.

Every model is worked on the electrical side of the driver (Small 1972's analogue): Re and the coil in
series with the motional admittance

    Ym = 1/Res + 1/(s Lces) + s Cmes + Yb,   Res = Re Qms/Qes, Cmes = Qes/(ws Re), Lces = 1/(ws^2 Cmes),

with Yb = 0 (infinite baffle), alpha/(s Lces) (closed: the box compliance Lceb = Lces/alpha) or
1/(s Lceb + Rel + 1/(s Cmep)) (vented: Cmep = 1/(wb^2 Lceb) the port mass, Rel = wb Lceb/QL the leakage).
The motional voltage Vm is Bl times the cone velocity, so the radiated volume velocity's derivative gives
the normalised pressure H = s Cmes Re (Vm/V) B(s), with B = 1 for the baffle and the closed box and
B = s^2/(s^2 + s wb/QL + wb^2) for the vented box (the cone's flow less what the port and the leak return;
H -> 1 in the pass band with Le = 0). The cone excursion per volt is the mechanical circuit's
x = Bl i / (K - w^2 Mms + j w Rms), i = V/Z, with the box's stiffness K = (1 + alpha B(s)) / Cms.

Assumptions: the moving mass is that of the free-air measurement (the box's air load on the cone is left
out); the closed box is lossless; a vented box loses only by leakage (QL), not by absorption or in the port.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from xo_fit.errors import XoFitError
from xo_fit.job.model import BoxSpec
from xo_fit.physics.thiele_small import ThieleSmallSet

#: Box kinds.
KINDS = ("none", "closed", "vented")
#: Leakage quality of a vented box when none is given: the job's ``[driver.NAME.box] ql`` default
#: (:class:`xo_fit.job.model.BoxSpec`, where it is declared and sourced).
DEFAULT_QL: float = BoxSpec.ql


@dataclass(frozen=True)
class Box:
    """A box for a driver.

    Attributes
    ----------
    kind : str
        ``"none"`` (infinite baffle), ``"closed"`` or ``"vented"``.
    volume : float or None
        The net internal volume Vb, in m^3 (None for ``"none"``).
    tuning : float or None
        The vented box's resonance fb, in Hz (None otherwise).
    ql : float
        The vented box's leakage quality QL (dimensionless).
    """

    kind: str = "none"
    volume: float | None = None
    tuning: float | None = None
    ql: float = DEFAULT_QL


def make_box(kind: str, volume: float | None = None, tuning: float | None = None, ql: float | None = None,
             *, key: str | None = None) -> Box:
    """A checked :class:`Box` from the ``[driver.NAME.box]`` values (SI units).

    Raises
    ------
    XoFitError
        An unknown kind; a closed or vented box without a volume; a vented box without a tuning; a tuning or
        QL given to a box that has none; a value not above zero.
    """
    if kind not in KINDS:
        raise XoFitError(f"box type {kind!r} is not one of {', '.join(repr(k) for k in KINDS[1:])}", key=key)
    for name, v in (("volume", volume), ("tuning", tuning), ("ql", ql)):
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0
                              or not math.isfinite(v)):
            raise XoFitError(f"box {name} must be a number above zero, got {v!r}", key=key)
    if kind == "none":
        if volume is not None or tuning is not None or ql is not None:
            raise XoFitError("an infinite baffle (no box) takes no volume, tuning or ql", key=key)
        return Box()
    if volume is None:
        raise XoFitError(f"a {kind} box needs its volume", key=key)
    if kind == "closed":
        if tuning is not None or ql is not None:
            raise XoFitError(f"a closed box takes no {'tuning' if tuning is not None else 'ql'} (those are a "
                             "vented box's); give type = \"vented\" or leave it out", key=key)
        return Box("closed", float(volume))
    if tuning is None:
        raise XoFitError("a vented box needs its tuning (the port resonance fb)", key=key)
    return Box("vented", float(volume), float(tuning), DEFAULT_QL if ql is None else float(ql))


def alpha(ts: ThieleSmallSet, box: Box, key: str | None = None) -> float:
    """The compliance ratio Vas / Vb (0 without a box); raises XoFitError when the set lacks Vas."""
    if box.kind == "none":
        return 0.0
    ts.need(("vas",), f"a {box.kind} box", key=key)
    assert ts.vas is not None and box.volume is not None  # need() has raised; a closed or vented box has a volume
    return ts.vas / box.volume


def _elements(ts: ThieleSmallSet, box: Box, f: np.ndarray, key: str | None):
    """(s, Zmot, B(s)) on the grid: the Laplace variable (rad/s), the motional impedance (ohm) and the box's
    share of the cone's flow that radiates; all (F,)."""
    f = np.asarray(f, dtype=float)
    if f.ndim != 1 or f.size == 0 or np.any(f <= 0) or not np.all(np.isfinite(f)):
        raise XoFitError("the frequency grid must be a non-empty 1-D array of frequencies above 0 Hz", key=key)
    s = 2j * np.pi * f
    ws = 2 * math.pi * ts.fs
    cmes = ts.qes / (ws * ts.re)
    lces = 1.0 / (ws * ws * cmes)
    a = alpha(ts, box, key)
    y = 1.0 / ts.res + 1.0 / (s * lces) + s * cmes
    shape = np.ones_like(s)
    if box.kind == "closed":
        y = y + a / (s * lces)
    elif box.kind == "vented":
        assert box.tuning is not None  # a vented box has its tuning
        wb = 2 * math.pi * box.tuning
        lceb = lces / a
        y = y + 1.0 / (s * lceb + wb * lceb / box.ql + wb * wb * lceb / s)
        shape = s * s / (s * s + s * wb / box.ql + wb * wb)
    return s, 1.0 / y, shape


def circuit(ts: ThieleSmallSet, box: Box, *, key: str | None = None) -> dict[str, float]:
    """The element values of the electrical analogue :func:`impedance` works out (SI), for a circuit simulator.

    Re, Le (and L2 with R2 across it) in series with the motional branch: ``res``, ``lces`` and ``cmes`` in
    parallel, and across them the box: ``lceb`` alone (closed) or ``lceb`` in series with ``rel`` and ``cmep``
    (vented). Returns re, le, l2, r2, res, lces, cmes (ohm, H, F), plus lceb (closed), or lceb, rel, cmep
    (vented); an infinite baffle has no box elements.
    """
    ws = 2 * math.pi * ts.fs
    cmes = ts.qes / (ws * ts.re)
    lces = 1.0 / (ws * ws * cmes)
    out = {"re": ts.re, "le": ts.le, "l2": ts.l2, "r2": ts.r2, "res": ts.res, "lces": lces, "cmes": cmes}
    if box.kind != "none":
        lceb = lces / alpha(ts, box, key)
        out["lceb"] = lceb
        if box.kind == "vented":
            assert box.tuning is not None  # a vented box has its tuning
            wb = 2 * math.pi * box.tuning
            out.update(rel=wb * lceb / box.ql, cmep=1.0 / (wb * wb * lceb))
    return out


def impedance(ts: ThieleSmallSet, box: Box, f: np.ndarray, *, key: str | None = None) -> np.ndarray:
    """The driver's input impedance in its box, Z = Re + Zcoil + Zmot.

    Parameters
    ----------
    ts : ThieleSmallSet
        The driver (Re, fs, Qms, Qes, Le or the lossy coil; Vas for a box), SI units.
    box : Box
        The box (``Box()`` for an infinite baffle).
    f : ndarray
        Frequencies, in Hz, shape (F,).
    key : str, optional
        The job table, for error messages.

    Returns
    -------
    ndarray
        The complex impedance, in ohm, shape (F,).
    """
    _, zmot, _ = _elements(ts, box, f, key)
    return ts.re + ts.coil_impedance(f) + zmot


def pressure(ts: ThieleSmallSet, box: Box, f: np.ndarray, *, key: str | None = None) -> np.ndarray:
    """The normalised acoustic output: far-field pressure per volt at the terminals over its pass-band value
    Bl / (Re Mms) (1 in the pass band when Le = 0; the closed box gives Small's s^2/(s^2 + s wc/Qtc + wc^2)).

    Parameters
    ----------
    ts : ThieleSmallSet
        The driver (Re, fs, Qms, Qes, Le or the lossy coil; Vas for a box), SI units.
    box : Box
        The box (``Box()`` for an infinite baffle).
    f : ndarray
        Frequencies, in Hz, shape (F,).
    key : str, optional
        The job table, for error messages.

    Returns
    -------
    ndarray
        The complex transfer function (dimensionless), shape (F,).
    """
    s, zmot, shape = _elements(ts, box, f, key)
    z = ts.re + ts.coil_impedance(f) + zmot
    cmes = ts.qes / (2 * math.pi * ts.fs * ts.re)
    return s * cmes * ts.re * (zmot / z) * shape


def excursion(ts: ThieleSmallSet, box: Box, f: np.ndarray, *, key: str | None = None) -> np.ndarray:
    """The cone's excursion per volt at the terminals, x/V = Bl (1/Z) / (K - w^2 Mms + j w Rms), with the
    box's stiffness in K (closed: (1 + alpha)/Cms; vented: (1 + alpha B(s))/Cms, B the port's share).

    Parameters
    ----------
    ts : ThieleSmallSet
        The driver; needs the mechanical set (Sd and a scale: Bl, Mms, Cms, Rms follow), SI units.
    box : Box
        The box (``Box()`` for an infinite baffle).
    f : ndarray
        Frequencies, in Hz, shape (F,).
    key : str, optional
        The job table, for error messages.

    Returns
    -------
    ndarray
        The complex excursion per volt, in m/V (peak metres per peak volt), shape (F,).
    """
    ts.need(("bl", "mms", "cms", "rms"), "the cone excursion", key=key)
    s, zmot, shape = _elements(ts, box, f, key)
    z = ts.re + ts.coil_impedance(f) + zmot
    a = alpha(ts, box, key)
    stiffness = (1.0 + a * shape) / ts.cms
    return ts.bl / z / (s * s * ts.mms + s * ts.rms + stiffness)


def peak_excursion(f: np.ndarray, x_per_volt: np.ndarray, volts_rms: float | np.ndarray) -> tuple[float, float]:
    """The largest one-way excursion of a sine of ``volts_rms`` at the driver's terminals over the grid.

    Parameters
    ----------
    f : ndarray
        Frequencies, in Hz, shape (F,).
    x_per_volt : ndarray
        The excursion per volt at the terminals, complex, in m/V, shape (F,) (:func:`excursion`, times the
        crossover's voltage transfer to the driver where there is one).
    volts_rms : float or ndarray
        The RMS voltage at the input, in V: a number, or shape (F,).

    Returns
    -------
    peak : float
        The peak excursion, in m.
    at_hz : float
        The frequency where it lies, in Hz.
    """
    x = math.sqrt(2.0) * np.abs(np.asarray(x_per_volt)) * np.asarray(volts_rms, dtype=float)
    i = int(np.argmax(x))
    return float(x[i]), float(np.asarray(f, dtype=float)[i])


def closed_box(ts: ThieleSmallSet, volume: float) -> tuple[float, float]:
    """The closed box's resonance and total Q by Small 1972's closed forms: fc = fs sqrt(1 + alpha),
    Qtc = Qts sqrt(1 + alpha), alpha = Vas/Vb (Hz, dimensionless)."""
    r = math.sqrt(1.0 + alpha(ts, Box("closed", volume)))
    return ts.fs * r, ts.qts * r


def f3(ts: ThieleSmallSet, box: Box, *, key: str | None = None) -> float:
    """The -3 dB frequency of the normalised pressure (Le left out): the highest frequency below the pass band
    at which |H| falls through 1/sqrt 2, Hz."""
    from scipy.optimize import brentq

    bare = ThieleSmallSet(re=ts.re, fs=ts.fs, qms=ts.qms, qes=ts.qes, qts=ts.qts, vas=ts.vas)
    f = np.geomspace(ts.fs / 100.0, ts.fs * 100.0, 4001)
    h = np.abs(pressure(bare, box, f, key=key))
    below = np.nonzero(h < 1.0 / math.sqrt(2.0))[0]
    if below.size == 0 or below[-1] + 1 >= f.size:
        raise XoFitError("the response does not cross -3 dB within fs/100..100 fs", key=key)
    i = int(below[-1])

    def g(x: float) -> float:
        return float(np.abs(pressure(bare, box, np.array([x]), key=key))[0]) - 1.0 / math.sqrt(2.0)

    return float(brentq(g, f[i], f[i + 1], xtol=1e-9 * f[i]))


def summary(ts: ThieleSmallSet, box: Box, *, key: str | None = None) -> dict[str, float]:
    """Figures of the driver in its box for ``check`` to print: alpha, f3 (Hz), and fc with Qtc (closed) or
    fb with h = fb/fs and QL (vented)."""
    out = {"alpha": alpha(ts, box, key)}
    if box.kind == "closed":
        assert box.volume is not None  # a closed box has its volume
        out["fc"], out["qtc"] = closed_box(ts, box.volume)
    elif box.kind == "vented":
        assert box.tuning is not None  # a vented box has its tuning
        out.update(fb=box.tuning, h=box.tuning / ts.fs, ql=box.ql)
    out["f3"] = f3(ts, box, key=key)
    return out
