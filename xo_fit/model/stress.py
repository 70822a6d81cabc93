"""Stresses on the parts and on the amplifier at a stated drive level, and the equivalent peak dissipation.

Drive: ``[stress] power`` watts into ``rated_impedance`` ohm, i.e. a source of
V = sqrt(P R) volts RMS (the way amplifier power is quoted). For each part
over the target band:

* resistors: the sine worst case of the power dissipated (a sine at V at the
  worst frequency), and a programme-weighted figure: the power when the same
  RMS voltage is spread as pink noise, equal power per octave over the band (a
  rough stand-in for music, not IEC 60268-1's programme simulation filter);
* capacitors: the peak voltage on the capacitor itself (ESR excluded) for the sine;
* coils: the peak current for the sine.

EPDR (equivalent peak dissipation resistance; K. Howard, 2006): the resistive
load that would make an amplifier's output devices dissipate the same peak
power as the speaker does: EPDR = |Z| 0.25 / ((1 - sin(30 deg - 2|phi|/3))
sin(30 deg + |phi|/3)), for |phi| up to 90 deg; EPDR = |Z| at phi = 0 and
0.354 |Z| at 45 deg.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from xo_fit.grid import band_mask
from xo_fit.solver.dense import branch_states


def epdr(z: np.ndarray) -> np.ndarray:
    """Equivalent peak dissipation resistance of impedances (K. Howard, 2006; see the module).

    Parameters
    ----------
    z : ndarray
        Impedances, complex, in ohm, any shape (..., F).

    Returns
    -------
    ndarray
        EPDR in ohm, the same shape (..., F).
    """
    phi = np.minimum(np.abs(np.angle(z)), np.pi / 2)
    den = (1 - np.sin(np.pi / 6 - 2 * phi / 3)) * np.sin(np.pi / 6 + phi / 3)
    return np.abs(z) * 0.25 / den


@dataclass(frozen=True)
class PartStress:
    """One part's stress at the drive level, over the target band.

    Attributes
    ----------
    name : str
        The part's name.
    kind : str
        ``"R"``, ``"C"`` or ``"L"``.
    figure : str
        What is judged: ``"power"`` (a resistor), ``"peak voltage"`` (a capacitor, on the capacitor itself, ESR
        excluded) or ``"peak current"`` (a coil).
    unit : str
        The figure's unit: ``"W"``, ``"V"`` or ``"A"``.
    sine_worst : float
        The figure for a sine at the drive voltage at the worst frequency in the band, in ``unit`` (W, V or A).
    at_hz : float
        That worst frequency, in Hz.
    programme : float or None
        Resistors only: the power in W when the same RMS voltage is spread as pink noise over the band.
    rating : float or None
        The part's own rating from the job, in ``unit`` (W, V or A), if it gives one.
    """
    name: str
    kind: str
    figure: str  # "power", "peak voltage", "peak current"
    unit: str  # W, V, A
    sine_worst: float
    at_hz: float
    programme: float | None  # resistors only
    rating: float | None  # the part's own rating, if the job gives one


@dataclass(frozen=True)
class StressReport:
    """The stresses of one design at ``[stress] power`` into ``rated_impedance``.

    Attributes
    ----------
    drive_w : float
        The drive power, in W.
    rated_ohm : float
        The rated impedance the power is quoted into, in ohm.
    source_v_rms : float
        The source voltage sqrt(P R), in V RMS.
    parts : tuple of PartStress
        Each valued part's stress, in network order.
    epdr_min_ohm : float
        The lowest equivalent peak dissipation resistance over the band, in ohm.
    epdr_min_hz : float
        Where it lies, in Hz.
    impedance_min_ohm : float
        The lowest |Z| of the input impedance over the band, in ohm.
    impedance_min_hz : float
        Where it lies, in Hz.
    """
    drive_w: float
    rated_ohm: float
    source_v_rms: float
    parts: tuple[PartStress, ...]
    epdr_min_ohm: float
    epdr_min_hz: float
    impedance_min_ohm: float
    impedance_min_hz: float


def stresses(system, values: np.ndarray, power_w: float, rated_ohm: float) -> StressReport:
    """The stresses of one design at a drive of ``power_w`` W into ``rated_ohm`` ohm, over the target band.

    Parameters
    ----------
    system : System
        The loaded system.
    values : ndarray
        The design's part values in SI units (ohm, H, F), shape (P,).
    power_w : float
        The drive power, in W.
    rated_ohm : float
        The rated impedance the power is quoted into, in ohm.

    Returns
    -------
    StressReport
        Each part's stress, the source voltage, and the lowest EPDR and |Z| over the band.
    """
    net = system.network
    f = system.frequencies
    band = band_mask(f, system.job.target.band)
    v_rms = math.sqrt(power_w * rated_ohm)
    scale = v_rms / net.source_voltage
    volts, amps = branch_states(net, values)
    volts, amps = volts * scale, amps * scale
    w = 2 * np.pi * f
    weights = np.where(band, 1.0, 0.0)
    weights = weights / weights.sum()  # pink: equal power per log-spaced point, i.e. per octave
    out = []
    col = 0
    parts = system.job.valued_parts
    for j, br in enumerate(net.branches):
        if br.kind == "D":
            continue
        x = float(values[col])
        spec = parts[col]
        col += 1
        i = amps[j]
        if br.kind == "R":
            p = np.abs(i) ** 2 * x
            k = int(np.argmax(np.where(band, p, -1)))
            out.append(PartStress(br.name, "R", "power", "W", float(p[k]), float(f[k]), float(np.sum(weights * p)),
                                  spec.rating))
        elif br.kind == "C":
            vc = math.sqrt(2) * np.abs(i) / (w * x)
            k = int(np.argmax(np.where(band, vc, -1)))
            out.append(PartStress(br.name, "C", "peak voltage", "V", float(vc[k]), float(f[k]), None, spec.rating))
        else:
            ip = math.sqrt(2) * np.abs(i)
            k = int(np.argmax(np.where(band, ip, -1)))
            out.append(PartStress(br.name, "L", "peak current", "A", float(ip[k]), float(f[k]), None, spec.rating))
    z = net.solve_reference(values).impedance[0]  # one reported design: the dense path, no kernel to load
    e = epdr(z)
    ke = int(np.argmin(np.where(band, e, np.inf)))
    kz = int(np.argmin(np.where(band, np.abs(z), np.inf)))
    return StressReport(drive_w=power_w, rated_ohm=rated_ohm, source_v_rms=v_rms, parts=tuple(out),
                        epdr_min_ohm=float(e[ke]), epdr_min_hz=float(f[ke]),
                        impedance_min_ohm=float(np.abs(z[kz])), impedance_min_hz=float(f[kz]))
