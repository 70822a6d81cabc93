"""Driver models fitted to a measured impedance: Small's model, and Small's model with a lossy voice coil.

``ts`` fits Re, Le, fs, Qms, Qes of Z = Re + j w Le + Res / (1 + Qms (s/ws + ws/s)), Res = Re Qms/Qes
(R. H. Small, "Direct-radiator loudspeaker system analysis", JAES 20(5), 1972). ``ts-lossy`` adds a
second inductance L2 with R2 across it in series with Le, the lumped form of the eddy-current losses of
a voice coil (W. M. Leach, JAES 50(6), 2002; J. R. Wright, JAES 38(10), 1990).

The fit is a least-squares fit (scipy.optimize.least_squares, trust-region reflective) of the relative
error of the complex impedance, (Z_model - Z) / |Z|, on points spaced evenly in log frequency over the
file's range (so every octave weighs alike); a file without phase is fitted on log |Z|. The start comes
from the classic reading of the magnitude curve: fs at the motional peak, r0 = |Z|max / Re, the two
frequencies where |Z| = sqrt(r0) Re give Qms = fs sqrt(r0) / (f2 - f1) and Qes = Qms / (r0 - 1)
(Small 1972; the same construction as IEC 60268-5's impedance method).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from xo_fit.errors import DataError
from xo_fit.job.model import ThieleSmall
from xo_fit.io.measure import Curve
from xo_fit.physics.thiele_small import small_signal_impedance

#: The models ``xo-fit driver`` fits.
MODELS = ("ts", "ts-lossy")
#: Points per octave at which the file is resampled for the fit.
FIT_PER_OCTAVE = 24
#: A fit whose rms error exceeds this (% of |Z|) is warned about: the model does not describe the driver well
#: (a rule of thumb of this project: a lossy coil's power law fitted by one L2 || R2 section over 10 Hz-40 kHz
#: leaves about 8 %).
RMS_WARN_PCT = 10.0
#: A fit whose rms error exceeds this (% of |Z|) is no model of the file at all: an error, not a result.
RMS_FAIL_PCT = 35.0
#: A resonance peak must rise at least this many times above the impedance minimum to be read as one.
MIN_PEAK_RATIO = 1.3

#: Names of the fitted parameters in order, per model (all fitted as logarithms, so every one stays positive).
_NAMES = {"ts": ("re", "le", "fs", "qms", "qes"), "ts-lossy": ("re", "le", "fs", "qms", "qes", "l2", "r2")}
#: Bounds of each parameter (SI units; Q dimensionless).
_BOUNDS = {"re": (1e-3, 1e4), "le": (1e-9, 1.0), "fs": (0.1, 1e6), "qms": (0.05, 500.0), "qes": (0.01, 500.0),
           "l2": (1e-9, 1.0), "r2": (1e-3, 1e5)}


@dataclass(frozen=True)
class ImpedanceFit:
    """A model fitted to a measured impedance.

    Attributes
    ----------
    model : str
        ``"ts"`` or ``"ts-lossy"``.
    params : ThieleSmall
        The fitted model in SI units (``le_exponent`` 1; ``l2``/``r2`` zero for ``ts``).
    rms_error_pct : float
        The rms of |Z_model - Z| / |Z| over the fitted points, in % (of |Z| alone without phase).
    max_error_pct : float
        The largest such error, in %.
    max_error_hz : float
        Where it lies, in Hz.
    f_range : tuple of float
        The fitted frequency range (low, high), in Hz.
    points : int
        The number of fitted points (dimensionless).
    used_phase : bool
        Whether the file's phase took part.
    warnings : tuple of str
        Remarks on the fit (a second peak, a large error).
    """

    model: str
    params: ThieleSmall
    rms_error_pct: float
    max_error_pct: float
    max_error_hz: float
    f_range: tuple[float, float]
    points: int
    used_phase: bool
    warnings: tuple[str, ...] = ()

    @property
    def qts(self) -> float:
        """The total Q, Qms Qes / (Qms + Qes)."""
        return self.params.qms * self.params.qes / (self.params.qms + self.params.qes)

    def toml(self, name: str = "NAME") -> str:
        """The ``[driver.NAME.impedance]`` table of the fit, for a job file (ohm, Hz and Q as plain numbers,
        inductances in mH)."""
        p = self.params
        lines = [f"re = {p.re:.4g}", f'le = "{p.le * 1e3:.4g}mH"', f"fs = {p.fs:.4g}", f"qms = {p.qms:.4g}",
                 f"qes = {p.qes:.4g}"]
        if p.l2 > 0:
            lines += [f'l2 = "{p.l2 * 1e3:.4g}mH"', f"r2 = {p.r2:.4g}"]
        return f"[driver.{name}.impedance]\n" + "\n".join(lines) + "\n"


def _params(model: str, x: np.ndarray) -> ThieleSmall:
    v = dict(zip(_NAMES[model], np.exp(np.asarray(x, dtype=float)).tolist()))
    return ThieleSmall(re=v["re"], le=v["le"], fs=v["fs"], qms=v["qms"], qes=v["qes"],
                       l2=v.get("l2", 0.0), r2=v.get("r2", 0.0))


def _resampled(curve: Curve) -> tuple[np.ndarray, np.ndarray, bool]:
    """The curve on points evenly spaced in log frequency: (f Hz (N,), Z ohm complex or |Z| real (N,), phase?)."""
    lo, hi = curve.f_range
    n = int(min(max(math.ceil(math.log2(hi / lo) * FIT_PER_OCTAVE) + 1, 16), 2000))
    if curve.frequency.size >= 16:  # no finer than the file itself
        n = min(n, curve.frequency.size)
    f = np.geomspace(lo, hi, n)
    logf, logg = np.log(curve.frequency), np.log(f)
    mag = np.exp(np.interp(logg, logf, np.log(curve.magnitude)))
    if curve.phase_deg is None:
        return f, mag, False
    ph = np.interp(logg, logf, np.unwrap(np.deg2rad(curve.phase_deg)))
    return f, mag * np.exp(1j * ph), True


def _start(f: np.ndarray, mag: np.ndarray, path) -> tuple[dict, str | None]:
    """Start values from the magnitude (Small 1972's construction), and what is wrong with a file of more
    peaks than one (None for one)."""
    from scipy.signal import find_peaks

    second = None
    zmin = float(np.min(mag))
    peaks, props = find_peaks(np.log(mag), prominence=math.log(MIN_PEAK_RATIO))
    if peaks.size == 0:
        raise DataError(f"no resonance peak in {f[0]:g}-{f[-1]:g} Hz (|Z| never rises {MIN_PEAK_RATIO:g}x above "
                        f"its minimum of {zmin:.3g} ohm and falls again); a driver model needs the motional peak "
                        "inside the file: measure lower, or give the driver as a resistance", path=path)
    order = np.argsort(props["prominences"])[::-1]
    k = int(peaks[order[0]])
    if peaks.size > 1:
        other = [f"{f[int(p)]:.4g} Hz" for p in peaks[order[1:]]]
        second = (f"more peaks than one ({f[k]:.4g} Hz fitted; also {', '.join(other)}): a vented "
                  "or passive-radiator box has two, which Small's closed-box model does not describe; "
                  "fit a vented box with --model vented, or measure the driver in free air or a closed box")
    fs, zmax = float(f[k]), float(mag[k])
    after = mag[k:]
    re = float(np.min(after)) if after.size > 1 else zmin
    re = min(re, zmin * 1.05) if zmin < re else re
    r0 = max(zmax / re, 1.05)
    zref = math.sqrt(r0) * re
    below = np.nonzero(mag[:k] < zref)[0]
    above = np.nonzero(mag[k:] < zref)[0]
    f1 = float(f[below[-1]]) if below.size else fs / 1.5
    f2 = float(f[k + above[0]]) if above.size else fs * 1.5
    qms = fs * math.sqrt(r0) / max(f2 - f1, 1e-6 * fs)
    qes = qms / (r0 - 1)
    w_top = 2 * math.pi * f[-1]
    le = math.sqrt(max(mag[-1] ** 2 - re ** 2, (0.05 * re) ** 2)) / w_top
    return {"re": re, "le": le, "fs": fs, "qms": qms, "qes": qes}, second


def _check_fittable(curve: Curve, model: str) -> None:
    """Refuse an unknown model, too few points or a non-positive impedance, naming the file (and line)."""
    if model not in MODELS:
        raise DataError(f"unknown model {model!r}; expected one of {', '.join(MODELS)}", path=curve.path)
    if curve.frequency.size < 8:
        raise DataError(f"{curve.frequency.size} points are too few to fit a driver model; 8 or more expected",
                        path=curve.path)
    if np.any(curve.magnitude <= 0):
        i = int(np.argmax(curve.magnitude <= 0))
        raise DataError("impedance must be above 0 ohm to fit a driver model", path=curve.path,
                        line=int(curve.lines[i]))


def fit_impedance(curve: Curve, model: str = "ts") -> ImpedanceFit:
    """Fit ``model`` (one of :data:`MODELS`) to a measured impedance ``curve`` (as read by
    :func:`xo_fit.io.measure.read_curve` with kind "impedance").

    Raises DataError (one line naming the file) when the file holds no resonance peak or the fit does not
    converge.
    """
    from scipy.optimize import least_squares

    _check_fittable(curve, model)
    f, z, phase = _resampled(curve)
    mag = np.abs(z)
    start, second = _start(f, mag, curve.path)
    remarks = [f"{curve.path}: {second}"] if second else []
    names = _NAMES[model]
    lo = np.log([_BOUNDS[n][0] for n in names])
    hi = np.log([_BOUNDS[n][1] for n in names])

    def residual(x: np.ndarray) -> np.ndarray:
        zm = small_signal_impedance(_params(model, x), f)
        if phase:
            e = (zm - z) / mag
            return np.concatenate([e.real, e.imag])
        return np.log(np.abs(zm) / mag)

    starts = []
    for split in ((1.0, None),) if model == "ts" else ((0.5, 1.0), (0.2, 3.0), (0.8, 0.3)):
        s = dict(start)
        if model == "ts-lossy":
            assert split[1] is not None  # the lossy model's splits all scale r2
            s["le"] = start["le"] * split[0]
            s["l2"] = start["le"] * 2.0
            s["r2"] = max(float(mag[-1]) * split[1], 0.1)
        starts.append(np.clip(np.log([s[n] for n in names]), lo + 1e-9, hi - 1e-9))
    best = None
    for x0 in starts:
        with np.errstate(all="ignore"):
            r = least_squares(residual, x0, bounds=(lo, hi), method="trf", x_scale=1.0, max_nfev=4000,
                              xtol=1e-12, ftol=1e-12, gtol=1e-12)
        if np.all(np.isfinite(r.fun)) and (best is None or r.cost < best.cost):
            best = r
    if best is None or not best.success:
        why = "no finite result" if best is None else best.message
        raise DataError(f"the {model} fit did not converge ({why}); check that the file is an impedance in ohm "
                        "with the motional peak inside it", path=curve.path)
    params = _params(model, best.x)
    zm = small_signal_impedance(params, f)
    err = np.abs(zm - z) / mag if phase else np.abs(np.abs(zm) - mag) / mag
    rms = 100.0 * float(np.sqrt(np.mean(err ** 2)))
    i = int(np.argmax(err))
    at_bound = [n for n, x, a, b in zip(names, best.x, lo, hi) if x - a < 1e-3 or b - x < 1e-3]
    pinned = [n for n in at_bound if n in ("re", "fs", "qms", "qes")]
    if pinned or not f[0] <= params.fs <= f[-1]:
        why = (f"{', '.join(pinned)} ended on the limit of what a driver can have" if pinned
               else f"its resonance ({params.fs:.3g} Hz) lies outside the file")
        raise DataError(f"no {model} model fits this file: {why}; is it a driver's impedance in ohm, with its "
                        "motional peak inside?", path=curve.path)
    if rms > RMS_FAIL_PCT:
        raise DataError(f"no {model} model fits this file (rms error {rms:.0f} % of |Z| at best); "
                        + (second or "is it a driver's impedance in ohm, with its motional peak inside?"),
                        path=curve.path)
    if at_bound and not pinned:
        remarks.append(f"{curve.path}: the fit ended on the limit of {', '.join(at_bound)}; the data may not "
                       "determine it (a file that stops below the voice coil's rise, for one, says little of le)")
    if rms > RMS_WARN_PCT:
        remarks.append(f"{curve.path}: the {model} model fits with {rms:.1f} % rms error (above "
                       f"{RMS_WARN_PCT:g} %); it does not describe this driver well"
                       + ("; fit the twin peaks with --model vented" if second
                          else "; try --model ts-lossy" if model == "ts" else ""))
    if model == "ts":
        params = replace(params, l2=0.0, r2=0.0)
    return ImpedanceFit(model=model, params=params, rms_error_pct=rms, max_error_pct=100.0 * float(err[i]),
                        max_error_hz=float(f[i]), f_range=(float(f[0]), float(f[-1])), points=int(f.size),
                        used_phase=phase, warnings=tuple(remarks))


def fit_on_grid(frequency: np.ndarray, impedance: np.ndarray, model: str = "ts-lossy", path=None) -> ImpedanceFit:
    """Fit ``model`` to a complex impedance (ohm, (F,)) on frequencies (Hz, (F,)) already in memory, such as a
    measured driver on the job's grid (SPICE export)."""
    from pathlib import Path

    f = np.asarray(frequency, dtype=float)
    z = np.asarray(impedance, dtype=complex)
    curve = Curve(path=Path(path or "<impedance>"), frequency=f, magnitude=np.abs(z),
                  phase_deg=np.rad2deg(np.unwrap(np.angle(z))), lines=np.arange(1, f.size + 1))
    return fit_impedance(curve, model)
