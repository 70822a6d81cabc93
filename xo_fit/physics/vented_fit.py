"""The vented-box model fitted to a measured twin-peak impedance.

The model is the driver in its vented box as :mod:`xo_fit.physics.box` works it out (R. H. Small,
"Vented-box loudspeaker systems, Part I", JAES 21(5), 1973; A. N. Thiele, JAES 19, 1971): Re, Le (and
optionally the lossy coil's L2 with R2 across it) in series with the motional Res || Lces || Cmes and, across
them, the box branch Lceb = Lces/alpha in series with the leakage Rel = wb Lceb/QL and the port Cmep =
1/(wb^2 Lceb). Eight parameters are fitted: re, le, fs, qms, qes, alpha = Vas/Vb, fb and QL (ten with the
lossy coil), as logarithms, by scipy.optimize.least_squares on the relative error of the complex impedance,
(Z_model - Z)/|Z| (log |Z| without phase), each point weighted by its share of log frequency so that
every octave weighs alike.

Start values from the magnitude: the two peaks fL < fH and the minimum between them, fb; Small 1973's
relations for a lossless box fs = fL fH / fb and alpha = (fH^2 - fb^2)(fb^2 - fL^2)/(fH^2 fL^2); Re from the
minimum above fH (or at fb, where lower); Res from the higher peak's height above Re; and Cmes from the width
of the upper peak, where the motional susceptance Cmes b(w), b(w) = w - ws^2/w - alpha ws^2 w/(w^2 - wb^2),
equals the conductance 1/Res (Cmes = 2/(Res |b'(wH)| dw)); then Qes = ws Cmes Re and Qms = ws Cmes Res.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from xo_fit.errors import DataError
from xo_fit.physics.box import Box, impedance
from xo_fit.physics.thiele_small import ThieleSmallSet

#: A file of more points than this is resampled to FIT_PER_OCTAVE points per octave before the fit.
MAX_POINTS = 2000
FIT_PER_OCTAVE = 24
#: An rms error above this (% of |Z|) is warned about; above RMS_FAIL_PCT it is no fit at all.
RMS_WARN_PCT = 10.0
RMS_FAIL_PCT = 35.0
#: A peak must rise this many times above its surroundings to count as a resonance.
MIN_PEAK_RATIO = 1.3

_NAMES = ("re", "le", "fs", "qms", "qes", "alpha", "fb", "ql")
_LOSSY = ("l2", "r2")
_BOUNDS = {"re": (1e-3, 1e4), "le": (1e-9, 1.0), "fs": (0.1, 1e6), "qms": (0.05, 500.0), "qes": (0.01, 500.0),
           "alpha": (1e-3, 1e3), "fb": (0.1, 1e6), "ql": (0.2, 1e4), "l2": (1e-9, 1.0), "r2": (1e-3, 1e5)}
#: Parameters that may not end on a bound (the others end there when the data say little of them).
_MUST_FIT = ("re", "fs", "qms", "qes", "alpha", "fb")


@dataclass(frozen=True)
class VentedFit:
    """A vented-box model fitted to a measured impedance.

    Attributes
    ----------
    re : float
        The voice coil's resistance, in ohm.
    le : float
        Its inductance, in H.
    fs : float
        The driver's free-air resonance, in Hz.
    qms, qes : float
        Its free-air mechanical and electrical Q (dimensionless).
    alpha : float
        The compliance ratio Vas / Vb (dimensionless).
    fb : float
        The box's tuning, in Hz.
    ql : float
        The box's leakage Q (dimensionless).
    l2, r2 : float
        The lossy coil's second inductance, in H, and the resistance across it, in ohm; 0 without it.
    volume : float or None
        The box's net volume if it was given, in m^3; else None.
    vas : float or None
        alpha * volume, in m^3, when the volume was given; else None.
    rms_error_pct : float
        The fit's rms error over log frequency, in % of |Z| (of |Z| alone without phase).
    max_error_pct : float
        Its largest error at any fitted point, in % of |Z|.
    max_error_hz : float
        Where that error lies, in Hz.
    f_range : tuple of float
        The fitted frequency range (low, high), in Hz.
    points : int
        The number of fitted points (dimensionless).
    used_phase : bool
        Whether the file's phase took part.
    warnings : tuple of str
        Remarks on the fit (more than two peaks, a parameter on its bound, a large error), each prefixed with
        the file where one was given.
    """

    re: float
    le: float
    fs: float
    qms: float
    qes: float
    alpha: float
    fb: float
    ql: float
    l2: float
    r2: float
    volume: float | None
    vas: float | None
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
        return self.qms * self.qes / (self.qms + self.qes)

    def model(self) -> tuple[ThieleSmallSet, Box]:
        """The fitted driver and box for :mod:`xo_fit.physics.box`. Without a given volume the box is 1 m^3 and
        vas is alpha m^3: the impedance depends on their ratio only."""
        volume = self.volume or 1.0
        ts = ThieleSmallSet(re=self.re, fs=self.fs, qms=self.qms, qes=self.qes, qts=self.qts, le=self.le,
                            vas=self.alpha * volume, l2=self.l2, r2=self.r2)
        return ts, Box("vented", volume, self.fb, self.ql)

    def toml(self, name: str = "NAME") -> str:
        """The ``[driver.NAME.ts]`` and ``[driver.NAME.box]`` tables of the fit, for a job file."""
        ts = [f"re = {self.re:.4g}", f'le = "{self.le * 1e3:.4g}mH"', f"fs = {self.fs:.4g}",
              f"qms = {self.qms:.4g}", f"qes = {self.qes:.4g}"]
        if self.l2 > 0:
            ts += [f'l2 = "{self.l2 * 1e3:.4g}mH"', f"r2 = {self.r2:.4g}"]
        box = ['type = "vented"']
        if self.vas is not None:
            assert self.volume is not None  # vas is alpha volume, known only with the volume
            ts.append(f'vas = "{self.vas * 1e3:.4g}L"')
            box.append(f'volume = "{self.volume * 1e3:.4g}L"')
        else:
            ts.append(f"# vas = {self.alpha:.4g} x the box's volume (alpha = Vas/Vb)")
            box.append("# volume = the box's net volume")
        box += [f'tuning = "{self.fb:.4g}Hz"', f"ql = {self.ql:.3g}"]
        return (f"[driver.{name}.ts]\n" + "\n".join(ts) + f"\n\n[driver.{name}.box]\n" + "\n".join(box) + "\n")


def _grid(f: np.ndarray, z: np.ndarray, phase: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The points to fit and their weights: the file's own points, each weighted by the square root of its
    share of log frequency (so every octave weighs alike); a file of more than MAX_POINTS is first resampled
    to FIT_PER_OCTAVE points per octave. Returns (f Hz (N,), Z complex or |Z| real (N,), weight (N,))."""
    if f.size > MAX_POINTS:
        n = int(min(max(math.ceil(math.log2(f[-1] / f[0]) * FIT_PER_OCTAVE) + 1, 16), MAX_POINTS))
        g = np.geomspace(f[0], f[-1], n)
        logf, logg = np.log(f), np.log(g)
        mag = np.exp(np.interp(logg, logf, np.log(np.abs(z))))
        z = mag * np.exp(1j * np.interp(logg, logf, np.unwrap(np.angle(z)))) if phase else mag
        f = g
    edges = np.log(f)
    share = np.gradient(edges)
    return f, z, np.sqrt(share / np.mean(share))


def _peaks(f: np.ndarray, mag: np.ndarray, path) -> tuple[int, int, str | None]:
    """Indices of the two resonance peaks (low, high) and a remark when there were more."""
    from scipy.signal import find_peaks

    peaks, props = find_peaks(np.log(mag), prominence=math.log(MIN_PEAK_RATIO))
    if peaks.size == 0:
        raise DataError(f"no resonance peak in {f[0]:g}-{f[-1]:g} Hz (|Z| never rises {MIN_PEAK_RATIO:g}x above "
                        "its surroundings); a vented box shows two: measure lower", path=path)
    if peaks.size == 1:
        raise DataError(f"one impedance peak ({f[peaks[0]]:.4g} Hz), not the two of a vented box: fit it with "
                        "--model ts (free air or a closed box), or measure lower if the lower peak is missing",
                        path=path)
    order = np.argsort(props["prominences"])[::-1]
    lo, hi = sorted(int(p) for p in peaks[order[:2]])
    remark = None
    if peaks.size > 2:
        other = ", ".join(f"{f[int(p)]:.4g} Hz" for p in peaks[order[2:]])
        remark = (f"more than two peaks: fitted {f[lo]:.4g} and {f[hi]:.4g} Hz, left out {other} (a port or "
                  "cabinet resonance, or the cone's breakup, is not in the model)")
    return lo, hi, remark


def _width(f: np.ndarray, mag: np.ndarray, k: int, level: float, lo: int) -> float | None:
    """Width (Hz) of the peak at index k where |Z| falls under ``level``, searching down to index lo."""
    left = np.nonzero(mag[lo:k] < level)[0]
    right = np.nonzero(mag[k:] < level)[0]
    if left.size == 0 or right.size == 0:
        return None
    return float(f[k + right[0]] - f[lo + left[-1]])


def _start(f: np.ndarray, mag: np.ndarray, path) -> tuple[dict, str | None]:
    """Start values from the two peaks and the minimum between them (see the module's docstring)."""
    lo, hi, remark = _peaks(f, mag, path)
    kb = lo + int(np.argmin(mag[lo:hi + 1]))
    fl, fh, fb = float(f[lo]), float(f[hi]), float(f[kb])
    fs = fl * fh / fb
    a = max((fh ** 2 - fb ** 2) * (fb ** 2 - fl ** 2) / (fh ** 2 * fl ** 2), 0.05)
    re = min(float(np.min(mag[hi:])), float(mag[kb]))
    res = max(float(max(mag[lo], mag[hi])) - re, 0.3 * re)
    ws, wb, wh = 2 * math.pi * fs, 2 * math.pi * fb, 2 * math.pi * fh
    slope = 1 + ws ** 2 / wh ** 2 + a * ws ** 2 * (wh ** 2 + wb ** 2) / (wh ** 2 - wb ** 2) ** 2
    dw = _width(f, mag, hi, math.hypot(re + res / 2, res / 2), kb)
    cmes = 2.0 / (res * slope * 2 * math.pi * dw) if dw else 5.0 / (ws * res)
    le = math.sqrt(max(mag[-1] ** 2 - re ** 2, (0.05 * re) ** 2)) / (2 * math.pi * f[-1])
    return {"re": re, "le": le, "fs": fs, "qms": ws * cmes * res, "qes": ws * cmes * re, "alpha": a, "fb": fb,
            "ql": 7.0}, remark


def _model(names: tuple[str, ...], x: np.ndarray, f: np.ndarray) -> np.ndarray:
    v = dict(zip(names, np.exp(x).tolist()))
    ts = ThieleSmallSet(re=v["re"], fs=v["fs"], qms=v["qms"], qes=v["qes"], qts=0.0, le=v["le"], vas=v["alpha"],
                        l2=v.get("l2", 0.0), r2=v.get("r2", 0.0))
    return impedance(ts, Box("vented", 1.0, v["fb"], v["ql"]), f)


def _inputs(frequency, impedance_ohm, path) -> tuple[np.ndarray, np.ndarray, bool]:
    f = np.asarray(frequency, dtype=float)
    z = np.asarray(impedance_ohm)
    phase = np.iscomplexobj(z)
    z = z.astype(complex if phase else float)
    if f.ndim != 1 or z.shape != f.shape:
        raise DataError(f"frequency and impedance must be 1-D arrays of one length, got {f.shape} and {z.shape}",
                        path=path)
    if f.size < 16:
        raise DataError(f"{f.size} points are too few to fit a vented box; 16 or more expected", path=path)
    if not (np.all(np.isfinite(f)) and np.all(np.isfinite(z))) or np.any(f <= 0) or np.any(np.diff(f) <= 0):
        raise DataError("frequencies must be finite, above 0 Hz and rising, impedances finite", path=path)
    if np.any(np.abs(z) <= 0):
        raise DataError("impedance must be above 0 ohm to fit a driver model", path=path)
    return f, z, phase


def fit_vented(frequency: np.ndarray, impedance_ohm: np.ndarray, *, lossy: bool = False,
               volume: float | None = None, path=None) -> VentedFit:
    """Fit the vented-box model to a measured twin-peak impedance.

    Parameters
    ----------
    frequency : ndarray
        The measured frequencies, in Hz, rising, shape (F,).
    impedance_ohm : ndarray
        The measured impedance, complex, in ohm, shape (F,); a real array is read as |Z| alone (no phase).
    lossy : bool
        Add the lossy coil's L2 with R2 across it (ten parameters instead of eight). Default False.
    volume : float, optional
        The box's net volume, in m^3, if known (gives ``vas`` = alpha * volume); default None.
    path : Path or str, optional
        The file the data came from, for messages.

    Returns
    -------
    VentedFit
        The fitted driver and box, the fit's errors and its warnings.

    Raises
    ------
    DataError
        Data that cannot be fitted (arrays of unlike shapes, under 16 points, frequencies not finite, positive
        and rising, |Z| not above 0, a volume not above 0); no peak or one peak (not a vented box); a fit that
        does not converge, ends with re, fs, qms, qes, alpha or fb on the limit of what a driver can have,
        puts fb outside the file, or misses by more than :data:`RMS_FAIL_PCT` % rms.
    """
    f0, z0, phase = _inputs(frequency, impedance_ohm, path)
    if volume is not None and not (isinstance(volume, (int, float)) and math.isfinite(volume) and volume > 0):
        raise DataError(f"the box volume must be above zero, got {volume!r}", path=path)
    f, z, weight = _grid(f0, z0, phase)
    start, remark = _start(f, np.abs(z), path)
    names = _NAMES + (_LOSSY if lossy else ())
    best = _solve(names, start, f, z, weight, phase, lossy, path)
    x = best.x
    v = dict(zip(names, np.exp(x).tolist()))
    err = _errors(names, x, f, z, phase)
    rms = 100.0 * float(np.sqrt(np.mean((weight * err) ** 2)))
    i = int(np.argmax(err))
    at_bound = _at_bound(names, x, v, f, rms, path)
    remarks = ([remark] if remark else []) + _remarks(at_bound, rms, lossy)
    where = f"{path}: " if path else ""
    return VentedFit(re=v["re"], le=v["le"], fs=v["fs"], qms=v["qms"], qes=v["qes"], alpha=v["alpha"],
                     fb=v["fb"], ql=v["ql"], l2=v.get("l2", 0.0), r2=v.get("r2", 0.0), volume=volume,
                     vas=None if volume is None else v["alpha"] * volume, rms_error_pct=rms,
                     max_error_pct=100.0 * float(err[i]), max_error_hz=float(f[i]),
                     f_range=(float(f[0]), float(f[-1])), points=int(f.size), used_phase=phase,
                     warnings=tuple(where + r for r in remarks))


def _log_bounds(names: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray]:
    """The fit's bounds on the log parameters ``names`` (lower, upper), each (N,)."""
    return np.log([_BOUNDS[n][0] for n in names]), np.log([_BOUNDS[n][1] for n in names])


def _solve(names: tuple[str, ...], start: dict, f: np.ndarray, z: np.ndarray, weight: np.ndarray, phase: bool,
           lossy: bool, path):
    """The least-squares fit of the log parameters ``names`` to ``z`` (F,) at ``f`` (F,) Hz, weighted by
    ``weight`` (F,): the best of three starts (QL 7, 30 and 3; with the lossy coil, three splits of the start's
    Le into Le and L2), as scipy's OptimizeResult. Raises DataError when none converges."""
    from scipy.optimize import least_squares

    mag = np.abs(z)
    lo, hi = _log_bounds(names)

    def residual(x: np.ndarray) -> np.ndarray:
        zm = _model(names, x, f)
        if phase:
            e = weight * (zm - z) / mag
            return np.concatenate([e.real, e.imag])
        return weight * np.log(np.abs(zm) / mag)

    best = None
    for ql, split in ((7.0, (1.0, 1.0)), (30.0, (0.5, 1.0)), (3.0, (0.2, 3.0))):
        s = dict(start, ql=ql)
        if lossy:
            s.update(le=start["le"] * split[0], l2=start["le"] * 2.0, r2=max(float(mag[-1]) * split[1], 0.1))
        x0 = np.clip(np.log([s[n] for n in names]), lo + 1e-9, hi - 1e-9)
        with np.errstate(all="ignore"):
            r = least_squares(residual, x0, bounds=(lo, hi), method="trf", max_nfev=3000, xtol=1e-10,
                              ftol=1e-10, gtol=1e-10)
        if np.all(np.isfinite(r.fun)) and (best is None or r.cost < best.cost):
            best = r
    if best is None or not best.success:
        why = "no finite result" if best is None else best.message
        raise DataError(f"the vented fit did not converge ({why}); is the file a driver's impedance in ohm, in a "
                        "vented box, with both peaks inside?", path=path)
    return best


def _errors(names: tuple[str, ...], x: np.ndarray, f: np.ndarray, z: np.ndarray, phase: bool) -> np.ndarray:
    """The fitted model's relative error at each point (F,): |Z_model - Z|/|Z| (| |Z_model| - |Z| |/|Z| without
    phase)."""
    mag = np.abs(z)
    zm = _model(names, x, f)
    return np.abs(zm - z) / mag if phase else np.abs(np.abs(zm) - mag) / mag


def _at_bound(names: tuple[str, ...], x: np.ndarray, v: dict, f: np.ndarray, rms: float, path) -> list[str]:
    """The parameters that ended on a bound; a DataError where one of them must fit (:data:`_MUST_FIT`), the
    tuning lies outside the file or the rms error (%) is above :data:`RMS_FAIL_PCT`."""
    lo, hi = _log_bounds(names)
    at_bound = [n for n, xn, a, b in zip(names, x, lo, hi) if xn - a < 1e-3 or b - xn < 1e-3]
    pinned = [n for n in at_bound if n in _MUST_FIT]
    if pinned or not f[0] <= v["fb"] <= f[-1]:
        why = (f"{', '.join(pinned)} ended on the limit of what a driver can have" if pinned
               else f"its tuning ({v['fb']:.3g} Hz) lies outside the file")
        raise DataError(f"no vented-box model fits this file: {why}", path=path)
    if rms > RMS_FAIL_PCT:
        raise DataError(f"no vented-box model fits this file (rms error {rms:.0f} % of |Z| at best)", path=path)
    return at_bound


def _remarks(at_bound: list[str], rms: float, lossy: bool) -> list[str]:
    """The warnings of a fit that holds: parameters on a bound, an rms error (%) above :data:`RMS_WARN_PCT`."""
    remarks = []
    if at_bound:
        remarks.append(f"the fit ended on the limit of {', '.join(at_bound)}; the data say little of it "
                       "(a nearly lossless box leaves ql undetermined)")
    if rms > RMS_WARN_PCT:
        remarks.append(f"the vented model fits with {rms:.1f} % rms error (above {RMS_WARN_PCT:g} %); it does "
                       "not describe this driver well" + ("" if lossy else "; try the lossy coil"))
    return remarks
