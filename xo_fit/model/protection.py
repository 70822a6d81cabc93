"""Protection of the drivers at the job's drive level: cone excursion against Xmax, programme power against the
rating.

Drive: ``[stress] power`` watts into ``rated_impedance`` ohm, a source of V = sqrt(P R) volts RMS (as
:mod:`xo_fit.model.stress`). Each driver whose ``[driver.NAME.ts]`` gives ``xmax`` or ``power`` is judged over
the target band:

* excursion: a sine of V at the input moves the cone sqrt(2) |x/V| |Vd| one way, with x/V the excursion per
  volt at the terminals of the driver's model in its box (:func:`xo_fit.physics.box.excursion`: the mechanical
  circuit x = Bl i / (K - w^2 Mms + j w Rms)) and Vd the network's voltage at the driver for V at the input;
  the peak over the band and where it lies, against ``xmax`` (the linear one-way excursion);
* power: the programme power into the driver, |Vd|^2 Re(1/Zd) with Zd the impedance the network sees, spread
  as pink noise over the band (the mean over the log-spaced grid: equal power per octave; the same stand-in
  for music as the resistors' programme power), against ``power`` (the thermal programme rating).

A figure within 0.5 % of its limit still counts as within it (the fit's quadratic term approaches a limit
from outside; no rating is that exact). The cost term ``[cost] protection`` is the mean, over every judged
figure, of the squared excess in dB: 20 log10(x / xmax) and 10 log10(P / rating) where above 1, else 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from xo_fit.grid import band_mask
from xo_fit.model.drivers import driver_models
from xo_fit.physics.box import excursion

#: A figure this far over its limit (0.5 %) still counts as within it.
TOLERANCE = 0.005


@dataclass(frozen=True, eq=False)
class Protection:
    """The protected drivers of a system and what judging them needs.

    names: the drivers judged, N of them; index: each one's place among the job's drivers (N,).
    x_per_volt: excursion per volt at the terminals, complex m/V (N, F); a row of NaN where the driver's set
    does not determine its cone's motion. conductance: Re(1/Zd), S (N, F). xmax, rating: m and W (N,), NaN
    where not given. scale: RMS volts at the input per volt of the job's source. band: the target band (F,).
    frequencies: Hz (F,). drive_w, rated_ohm: the drive level.
    """

    names: tuple[str, ...]
    index: np.ndarray
    x_per_volt: np.ndarray
    conductance: np.ndarray
    xmax: np.ndarray
    rating: np.ndarray
    scale: float
    band: np.ndarray
    frequencies: np.ndarray
    drive_w: float
    rated_ohm: float

    def excursion(self, voltages: np.ndarray) -> np.ndarray:
        """Peak one-way excursion (m) of a sine at the drive level, (B, N, F), from the driver voltages
        (B, D, F) of the network at the job's source voltage; NaN where the motion is undetermined."""
        vd = np.abs(voltages[:, self.index]) * self.scale
        return math.sqrt(2.0) * vd * np.abs(self.x_per_volt)[None]

    def power(self, voltages: np.ndarray) -> np.ndarray:
        """Programme power (W) into each judged driver, (B, N): |Vd|^2 Re(1/Zd) at the drive level, averaged
        over the band's log-spaced points (pink noise)."""
        vd = voltages[:, self.index][..., self.band] * self.scale
        return np.mean(np.abs(vd) ** 2 * self.conductance[None][..., self.band], axis=-1)

    def peaks(self, voltages: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The largest excursion over the band (m, (B, N); NaN where undetermined) and its frequency (Hz)."""
        x = self.excursion(voltages)[..., self.band]
        f = self.frequencies[self.band]
        safe = np.where(np.isnan(x), -1.0, x)
        k = np.argmax(safe, axis=-1)
        return np.take_along_axis(x, k[..., None], axis=-1)[..., 0], f[k]

    def penalty(self, voltages: np.ndarray) -> np.ndarray:
        """The cost term (dB^2, (B,)): the mean over judged figures of the squared excess over the limit in dB."""
        x, _ = self.peaks(voltages)
        p = self.power(voltages)
        with np.errstate(divide="ignore", invalid="ignore"):
            ex = 20 * np.log10(np.maximum(x / self.xmax, 1.0))
            ep = 10 * np.log10(np.maximum(p / self.rating, 1.0))
        e = np.concatenate([ex[:, np.isfinite(self.xmax) & np.all(np.isfinite(self.x_per_volt), axis=-1)],
                            ep[:, np.isfinite(self.rating)]], axis=1)
        if e.shape[1] == 0:
            return np.zeros(voltages.shape[0])
        return np.mean(e ** 2, axis=1)

    def figures(self, voltages: np.ndarray) -> dict[str, dict]:
        """result.json's ``protection`` of one design (voltages (D, F) or (1, D, F)): per driver
        ``excursion_mm`` (None where undetermined), ``at_hz``, ``xmax_mm``, ``power_w``, ``rating_w`` (None
        where not given) and ``within`` (every given limit met)."""
        v = np.asarray(voltages).reshape(-1, *np.shape(voltages)[-2:])[:1]
        x, at = self.peaks(v)
        p = self.power(v)
        out = {}
        for i, name in enumerate(self.names):
            xi, xm, pi, pr = float(x[0, i]), float(self.xmax[i]), float(p[0, i]), float(self.rating[i])
            ok_x = not (math.isfinite(xm) and math.isfinite(xi)) or xi <= xm * (1 + TOLERANCE)
            ok_p = not math.isfinite(pr) or pi <= pr * (1 + TOLERANCE)
            out[name] = {"excursion_mm": xi * 1e3 if math.isfinite(xi) else None,
                         "at_hz": float(at[0, i]) if math.isfinite(xi) else None,
                         "xmax_mm": xm * 1e3 if math.isfinite(xm) else None, "power_w": pi,
                         "rating_w": pr if math.isfinite(pr) else None, "within": bool(ok_x and ok_p)}
        return out


def protection_model(system) -> Protection | None:
    """The :class:`Protection` of a loaded system at its [stress] drive, or None without a drive level or a
    driver whose ``[driver.NAME.ts]`` gives ``xmax`` or ``power``."""
    job = system.job
    if not job.stress.power:
        return None
    models = driver_models(job)
    names = [d.name for d in job.drivers if d.name in models
             and (models[d.name].ts.xmax is not None or models[d.name].ts.power is not None)]
    if not names:
        return None
    f = system.frequencies
    order = [d.name for d in job.drivers]
    index = np.array([order.index(n) for n in names])
    xpv = np.full((len(names), f.size), np.nan, dtype=complex)
    for i, n in enumerate(names):
        if models[n].moves:
            xpv[i] = excursion(models[n].ts, models[n].box, f, key=f"[driver.{n}.ts]")
    zd = np.stack([system.drivers[k].impedance for k in index])
    nan = float("nan")
    xmax = np.array([models[n].ts.xmax if models[n].ts.xmax is not None else nan for n in names])
    rating = np.array([models[n].ts.power if models[n].ts.power is not None else nan for n in names])
    scale = math.sqrt(job.stress.power * job.stress.rated_impedance) / system.network.source_voltage
    return Protection(names=tuple(names), index=index, x_per_volt=xpv, conductance=(1.0 / zd).real, xmax=xmax,
                      rating=rating, scale=scale, band=band_mask(f, job.target.band), frequencies=f,
                      drive_w=job.stress.power, rated_ohm=job.stress.rated_impedance)


def protection(system, voltages: np.ndarray) -> dict[str, dict] | None:
    """result.json's ``protection`` of one design at the job's ``[stress]`` drive (:meth:`Protection.figures`).

    Parameters
    ----------
    system : System
        The loaded system.
    voltages : ndarray
        The design's driver voltages at the network's source voltage, complex, in V, shape (D, F) or (1, D, F).

    Returns
    -------
    dict or None
        Driver name -> its figures (excursion in mm and where, xmax in mm, programme power and rating in W,
        within); None where nothing is judged (no drive, or no driver with xmax or power).
    """
    model = protection_model(system)
    return None if model is None else model.figures(voltages)
