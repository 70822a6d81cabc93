"""Measurement files in, complex curves on the job's grid out; minimum phase from magnitude.

File format (``docs/job-format.md``): plain text, one point a line:
frequency in Hz, magnitude (dB SPL for a response, ohm for an impedance), and
optionally phase in degrees. Columns are separated by spaces, tabs, commas or
semicolons; a decimal comma is read where commas do not separate the columns.
Lines whose first field is not a number (headers, comments) are skipped.
Frequencies must rise strictly. Any breach is a :class:`~xo_fit.errors.DataError`
naming the file, the line and what was wrong.

On the grid, magnitude is interpolated in dB and unwrapped phase in radians,
both linearly over log-frequency. A grid reaching beyond a file's range is an
error, never an extrapolation.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from xo_fit.constants import P_REF
from xo_fit.errors import DataError, read_user_bytes

#: Plausible ranges of each column (frequency Hz, magnitude, phase deg): beyond them a number is a mistake
#: (a misplaced exponent, a column of another quantity), and beyond them the arithmetic overflows too.
_LIMITS = {
    "response": ((-np.inf, 1e7, "frequency (Hz)"), (-300.0, 300.0, "level (dB)"), (-1e7, 1e7, "phase (deg)")),
    "impedance": ((-np.inf, 1e7, "frequency (Hz)"), (-1e9, 1e9, "impedance (ohm)"), (-1e7, 1e7, "phase (deg)")),
}
#: Relative slack allowed when checking that the grid lies inside a file's range.
RANGE_SLACK = 1e-9
#: Width of the band at each end of a curve whose log-log slope extends it (octaves).
EDGE_OCTAVES = 1.0 / 3.0
#: Resolution at which magnitude is resampled for the minimum-phase integral (points per octave).
MINPHASE_PER_OCTAVE = 96
#: A step of measured phase between adjacent points above this (deg) is warned about.
PHASE_STEP_WARN_DEG = 120.0

_FIRST_NUMBER = re.compile(r"^\s*[+-]?(\d+([.,]\d*)?|[.,]\d+)([eE][+-]?\d+)?(?=$|[\s,;])")


@dataclass(frozen=True)
class Curve:
    """A curve as read from a file.

    Attributes
    ----------
    path: the file.
    frequency: Hz, shape (N,), strictly rising.
    magnitude: shape (N,), dB SPL (response) or ohm (impedance).
    phase_deg: shape (N,) or None when the file has no phase column.
    lines: the 1-based line number of each point, shape (N,).
    """

    path: Path
    frequency: np.ndarray
    magnitude: np.ndarray
    phase_deg: np.ndarray | None
    lines: np.ndarray

    @property
    def f_range(self) -> tuple[float, float]:
        return float(self.frequency[0]), float(self.frequency[-1])


def _decode(raw: bytes, path: Path, kind: str) -> str:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        try:
            return raw.decode("utf-16")
        except UnicodeDecodeError as e:
            raise DataError(f"the {kind} file starts as UTF-16 but is not valid UTF-16 ({e.reason} at byte "
                            f"{e.start})", path=path) from None
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return raw.decode("latin-1")


def _comma_separates(lines: list[str]) -> bool:
    """True when splitting every data line on commas gives 2+ numeric fields."""
    for text in lines:
        fields = [f.strip() for f in text.split(",")]
        if fields and fields[-1] == "":
            fields = fields[:-1]
        if len(fields) < 2:
            return False
        for f in fields:
            try:
                float(f)
            except ValueError:
                return False
    return True


def read_curve(path: str | Path, kind: str) -> Curve:
    """Read a measurement file.

    Parameters
    ----------
    path: the file (any name or extension).
    kind: ``"response"`` (magnitude in dB SPL) or ``"impedance"`` (magnitude in ohm).

    Raises
    ------
    DataError
        File missing or unreadable, a malformed line, frequencies not rising,
        a non-positive frequency or impedance, fewer than two points.
    """
    path = Path(path)
    text = _decode(read_user_bytes(path, f"{kind} file"), path, kind)

    data: list[tuple[int, str]] = []
    for number, line in enumerate(text.splitlines(), start=1):
        if _FIRST_NUMBER.match(line):
            data.append((number, line.strip()))
    if not data:
        raise DataError(f"no data lines: expected lines of frequency, {_mag_name(kind)} [, phase]", path=path)

    raw_lines = [t for _, t in data]
    if any(";" in t for t in raw_lines):
        def split(t: str) -> list[str]:
            return [f.strip().replace(",", ".") for f in t.split(";") if f.strip()]
    elif any("," in t for t in raw_lines) and _comma_separates(raw_lines):
        def split(t: str) -> list[str]:
            return [f.strip() for f in t.split(",") if f.strip()]
    else:
        def split(t: str) -> list[str]:
            return [f.replace(",", ".") for f in t.split()]

    rows = []
    ncol = None
    for number, t in data:
        fields = split(t)
        if len(fields) not in (2, 3):
            raise DataError(f"expected 2 or 3 columns (frequency, {_mag_name(kind)} [, phase deg]), "
                            f"found {len(fields)}: '{t}'", path=path, line=number)
        if ncol is None:
            ncol = len(fields)
        elif len(fields) != ncol:
            raise DataError(f"found {len(fields)} columns where the lines above have {ncol}",
                            path=path, line=number)
        try:
            vals = [float(x) for x in fields]
        except ValueError:
            bad = next(x for x in fields if not _is_float(x))
            raise DataError(f"'{bad}' is not a number", path=path, line=number) from None
        if not all(np.isfinite(vals)):
            raise DataError("not a finite number", path=path, line=number)
        for x, (lo, hi, what) in zip(vals, _LIMITS[kind]):
            if not lo <= x <= hi:
                raise DataError(f"{what} {x:g} is outside {lo:g} to {hi:g}: not a plausible measurement",
                                path=path, line=number)
        rows.append(vals)
    arr = np.asarray(rows, dtype=float)
    lines = np.asarray([n for n, _ in data])
    f = arr[:, 0]
    if f[0] <= 0:
        raise DataError(f"frequency must be above 0 Hz, got {f[0]:g}", path=path, line=int(lines[0]))
    step = np.diff(f)
    if np.any(step <= 0):
        i = int(np.argmax(step <= 0)) + 1
        raise DataError(f"frequencies must rise strictly: {f[i]:g} Hz follows {f[i - 1]:g} Hz",
                        path=path, line=int(lines[i]))
    if len(f) < 2:
        raise DataError("need at least two points", path=path, line=int(lines[0]))
    mag = arr[:, 1]
    if kind == "impedance" and np.any(mag <= 0):
        i = int(np.argmax(mag <= 0))
        raise DataError(f"impedance magnitude must be above 0 ohm, got {mag[i]:g}", path=path, line=int(lines[i]))
    phase = arr[:, 2] if ncol == 3 else None
    for a in (f, mag) + ((phase,) if phase is not None else ()):
        a.setflags(write=False)
    return Curve(path=path, frequency=f, magnitude=mag, phase_deg=phase, lines=lines)


def _is_float(x: str) -> bool:
    try:
        float(x)
        return True
    except ValueError:
        return False


def _mag_name(kind: str) -> str:
    return "dB SPL" if kind == "response" else "ohm"


def check_coverage(curve: Curve, grid: np.ndarray, kind: str) -> None:
    """Raise if ``grid`` (Hz) reaches beyond the file's frequency range."""
    lo, hi = curve.f_range
    if grid[0] < lo * (1 - RANGE_SLACK) or grid[-1] > hi * (1 + RANGE_SLACK):
        raise DataError(
            f"{kind} covers {lo:g}-{hi:g} Hz but the job's grid spans {grid[0]:g}-{grid[-1]:g} Hz; "
            "narrow [grid] f_min/f_max or measure wider", path=curve.path)


def magnitude_db(curve: Curve, kind: str) -> np.ndarray:
    """The curve's magnitude in dB: dB SPL for a response, 20 log10(|Z| / 1 ohm) for an impedance."""
    return curve.magnitude if kind == "response" else 20.0 * np.log10(curve.magnitude)


def on_grid(curve: Curve, grid: np.ndarray, kind: str, phase: str = "measured") -> tuple[np.ndarray, list[str]]:
    """Put a curve on the grid as a complex array.

    Parameters
    ----------
    curve: as read by :func:`read_curve`.
    grid: frequencies in Hz, shape (F,), inside the curve's range.
    kind: ``"response"`` or ``"impedance"``.
    phase: ``"measured"`` (the file's phase column) or ``"minimum"`` (derived from the magnitude).

    Returns
    -------
    values:
        complex (F,): sound pressure in Pa (response; |p| = 20 uPa 10^(dB/20)) or impedance in ohm.
    warnings:
        Human-readable remarks about the data (e.g. phase that steps too fast to interpolate).
    """
    check_coverage(curve, grid, kind)
    warnings: list[str] = []
    logf = np.log(curve.frequency)
    logg = np.log(grid)
    db = magnitude_db(curve, kind)
    grid_db = np.interp(logg, logf, db)
    if phase == "minimum":
        ph = minimum_phase(curve.frequency, db, grid)
    else:
        if curve.phase_deg is None:
            raise DataError(f"{kind} file has no phase column; add one, or set "
                            f"{'phase' if kind == 'response' else 'impedance_phase'} = \"minimum\" "
                            "to derive it from the magnitude", path=curve.path)
        unwrapped = np.unwrap(np.deg2rad(curve.phase_deg))
        steps = np.abs(np.diff(unwrapped))
        if steps.size and np.max(steps) > np.deg2rad(PHASE_STEP_WARN_DEG):
            i = int(np.argmax(steps))
            warnings.append(f"{curve.path}:{int(curve.lines[i + 1])}: phase steps {np.rad2deg(steps[i]):.0f} deg "
                            "between adjacent points, too fast to interpolate reliably; remove the time-of-flight "
                            "delay from the file (and set offset), or use phase = \"minimum\"")
        ph = np.interp(logg, logf, unwrapped)
    mag = 10.0 ** (grid_db / 20.0)
    if kind == "response":
        mag = mag * P_REF
    return mag * np.exp(1j * ph), warnings


#: The extensions a file's data can take beyond its ends.
EXTENSIONS = ("none", "slope", "order2", "order4")
#: Points per octave of an extension.
EXTEND_PER_OCTAVE = 48


def extend_curve(curve: Curve, grid: np.ndarray, kind: str, low: str = "none", high: str = "none") -> Curve:
    """The curve with its magnitude continued to cover ``grid`` (Hz): "slope" continues the dB-per-octave
    slope fitted over the data's last third of an octave; "order2"/"order4" (low end only) fit a second- or
    fourth-order Butterworth high-pass to the data's lowest octave, joined at the file's first point without a
    step. The phase column is dropped: an extended curve takes minimum phase from its whole magnitude."""
    if low == "none" and high == "none":
        return curve
    u = np.log(curve.frequency)
    db = magnitude_db(curve, kind)
    parts_u, parts_db = [], []
    lo_g, hi_g = float(np.log(grid[0])), float(np.log(grid[-1]))
    if low != "none" and lo_g < u[0]:
        n = int(np.ceil((u[0] - lo_g) / np.log(2) * EXTEND_PER_OCTAVE)) + 1
        ue = np.linspace(lo_g - 1e-9, u[0], n + 1)[:-1]
        if low == "slope":
            ext = db[0] + _edge_slope(u, db, True) * (ue - u[0])
        else:
            ext = _highpass_extension(u, db, ue, 2 if low == "order2" else 4)
        parts_u.append(ue)
        parts_db.append(ext)
    parts_u.append(u)
    parts_db.append(db)
    if high != "none" and hi_g > u[-1]:
        n = int(np.ceil((hi_g - u[-1]) / np.log(2) * EXTEND_PER_OCTAVE)) + 1
        ue = np.linspace(u[-1], hi_g + 1e-9, n + 1)[1:]
        parts_u.append(ue)
        parts_db.append(db[-1] + _edge_slope(u, db, False) * (ue - u[-1]))
    uu, dd = np.concatenate(parts_u), np.concatenate(parts_db)
    lines = np.concatenate([np.zeros(len(x), dtype=curve.lines.dtype) if x is not u else curve.lines
                            for x in parts_u])  # extension points have no line of the file (0)
    mag = dd if kind == "response" else 10.0 ** (dd / 20.0)
    return Curve(path=curve.path, frequency=np.exp(uu), magnitude=mag, phase_deg=None, lines=lines)


#: Width of the band around a splice over which the near field is level-matched and faded into the far field.
SPLICE_OCTAVES = 1.0 / 3.0
#: Points per octave of a spliced curve.
SPLICE_PER_OCTAVE = 48


@dataclass(frozen=True)
class Splice:
    """A near-field and a far-field response joined: ``curve`` (magnitude only, dB SPL), the ``gain_db``
    added to the near field to match the far field around ``splice_hz``."""

    curve: Curve
    gain_db: float
    splice_hz: float


def splice_curves(near: Curve, far: Curve, splice_hz: float) -> Splice:
    """Join a near-field response (below ``splice_hz``) to a far-field one (above), both dB SPL.

    The near field is shifted by the mean dB difference over the third of an octave centred on the splice
    (means over log frequency), then faded into the far field over that same third of an octave (weights
    linear in log frequency), so the join has neither a step nor a kink worse than the data's. The result
    covers the near file's start to the far file's end, at SPLICE_PER_OCTAVE points per octave; it has no
    phase (it takes minimum phase from its whole magnitude). Raises DataError when either file does not
    cover the splice's third of an octave.
    """
    half = SPLICE_OCTAVES / 2 * np.log(2.0)
    u0 = float(np.log(splice_hz))
    for c, name in ((near, "near"), (far, "far")):
        lo, hi = np.log(c.f_range[0]), np.log(c.f_range[1])
        if not (lo <= u0 - half and u0 + half <= hi):
            raise DataError(f"the {name}-field file covers {c.f_range[0]:g}-{c.f_range[1]:g} Hz; it must cover the "
                            f"third of an octave around splice_hz = {splice_hz:g} Hz "
                            f"({np.exp(u0 - half):.4g}-{np.exp(u0 + half):.4g} Hz)", path=c.path)
    un, uf = np.log(near.frequency), np.log(far.frequency)
    window = np.linspace(u0 - half, u0 + half, 33)
    gain = float(np.mean(np.interp(window, uf, far.magnitude) - np.interp(window, un, near.magnitude)))
    lo, hi = float(un[0]), float(uf[-1])
    n = max(int(np.ceil((hi - lo) / np.log(2.0) * SPLICE_PER_OCTAVE)) + 1, 2)
    u = np.linspace(lo, hi, n)
    a = np.interp(u, un, near.magnitude) + gain
    b = np.interp(u, uf, far.magnitude)
    w = np.clip((u - (u0 - half)) / (2 * half), 0.0, 1.0)  # 0: near field, 1: far field
    db = np.where(u < u0 - half, a, np.where(u > u0 + half, b, (1 - w) * a + w * b))
    curve = Curve(path=far.path, frequency=np.exp(u), magnitude=db, phase_deg=None,
                  lines=np.zeros(n, dtype=far.lines.dtype))
    return Splice(curve=curve, gain_db=gain, splice_hz=float(splice_hz))


def _highpass_extension(u: np.ndarray, db: np.ndarray, ue: np.ndarray, order: int) -> np.ndarray:
    """dB below the data's first point from an order-N Butterworth high-pass fitted over its lowest octave."""
    sel = u <= u[0] + np.log(2.0)
    if np.count_nonzero(sel) < 3:
        sel = slice(0, min(3, u.size))
    us, ds = u[sel], db[sel]

    def shape(x_u: np.ndarray, log_fc: float) -> np.ndarray:  # 20 log10 |H|, |H|^2 = x^2N / (1 + x^2N)
        x2 = np.exp(2 * order * (x_u - log_fc))
        return 10 * np.log10(x2 / (1 + x2))

    corners = np.linspace(us[0] - 3 * np.log(2), us[-1] + np.log(2), 400)  # corner from 3 octaves below on
    m = shape(us[None, :], corners[:, None])  # (400, n): every candidate corner at once
    r = ds[None, :] - m
    err = np.sum((r - r.mean(axis=1, keepdims=True)) ** 2, axis=1)
    log_fc = float(corners[int(np.argmin(err))])
    g = db[0] - float(shape(np.array([u[0]]), log_fc)[0])  # joined at the file's first point, no step
    return g + shape(ue, log_fc)


def _edge_slope(u: np.ndarray, a: np.ndarray, at_start: bool) -> float:
    """Least-squares slope of a(u) over the outer EDGE_OCTAVES of the data at one end."""
    width = EDGE_OCTAVES * np.log(2.0)
    sel = (u <= u[0] + width) if at_start else (u >= u[-1] - width)
    if np.count_nonzero(sel) < 2:
        sel = slice(0, 2) if at_start else slice(-2, None)
    us, as_ = u[sel], a[sel]
    du = us - us.mean()
    den = float(np.dot(du, du))
    return float(np.dot(du, as_ - as_.mean()) / den) if den > 0 else 0.0


def _bode_kernel(u: np.ndarray) -> np.ndarray:
    """K(u) = integral from 0 to u of ln coth(|t|/2) dt, an odd function with K(+-inf) = +-pi^2/4.

    K(u) = sign(u) (pi^2/4 - 2 chi_2(e^-|u|)) with Legendre's chi
    chi_2(x) = (Li2(x) - Li2(-x)) / 2, and Li2(z) = spence(1 - z) in scipy.
    """
    from scipy.special import spence  # imported here: 0.16 s, needed only for minimum phase

    x = np.exp(-np.abs(u))
    chi2 = 0.5 * (spence(1.0 - x) - spence(1.0 + x))
    return np.sign(u) * (np.pi**2 / 4.0 - 2.0 * chi2)


def minimum_phase(frequency: np.ndarray, magnitude_db_: np.ndarray, at: np.ndarray) -> np.ndarray:
    """Minimum phase in radians at frequencies ``at`` of a magnitude known at ``frequency``.

    Bode's gain-phase relation (H. W. Bode, Network Analysis and Feedback
    Amplifier Design, 1945, ch. 14): with A = ln|H| and u = ln(w / w0),

        phi(w0) = (1/pi) * integral of (dA/du) ln coth(|u|/2) du,

    i.e. minus the Hilbert transform of ln|H|. The magnitude is resampled at
    MINPHASE_PER_OCTAVE points per octave, taken as piecewise linear in u, and
    extended beyond both ends by its own edge slopes (fitted over the outer
    EDGE_OCTAVES); for that piecewise-linear A the integral is evaluated exactly
    through the antiderivative of the kernel, so the only error is the
    interpolation of the data and the slope extension.

    Parameters
    ----------
    frequency: Hz, shape (N,), strictly rising.
    magnitude_db_: dB, shape (N,).
    at: Hz, shape (M,).

    Returns
    -------
    phase: radians, shape (M,). A rising magnitude slope of 6.02 dB/octave
    everywhere gives +pi/2.
    """
    logf = np.log(np.asarray(frequency, dtype=float))
    n = max(int(np.ceil((logf[-1] - logf[0]) / np.log(2.0) * MINPHASE_PER_OCTAVE)) + 1, 2)
    u_nodes = np.linspace(logf[0], logf[-1], n)
    a = np.interp(u_nodes, logf, np.asarray(magnitude_db_, dtype=float)) * (np.log(10.0) / 20.0)  # nepers
    s_lo = _edge_slope(u_nodes, a, True)
    s_hi = _edge_slope(u_nodes, a, False)
    slopes = np.diff(a) / np.diff(u_nodes)
    # slope change at each node: s_{j-1} - s_j, with s_lo before the first and s_hi after the last
    before = np.concatenate(([s_lo], slopes))
    after = np.concatenate((slopes, [s_hi]))
    jump = before - after
    at = np.asarray(at, dtype=float)
    key = (float(u_nodes[0]), float(u_nodes[-1]), n, at.tobytes())
    kernel = _KERNELS.get(key)
    if kernel is None:  # the same for every file of one range on one grid (a driver's off-axis set): kept
        kernel = _bode_kernel(u_nodes[None, :] - np.log(at)[:, None])
        if len(_KERNELS) >= _KERNEL_CACHE:
            _KERNELS.pop(next(iter(_KERNELS)))
        _KERNELS[key] = kernel
    return ((s_lo + s_hi) * np.pi**2 / 4.0 + kernel @ jump) / np.pi


#: Bode kernels (M, n) by (first node, last node, n, grid): a few, for the files of one job.
_KERNELS: dict = {}
_KERNEL_CACHE = 8
