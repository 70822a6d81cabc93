"""Measurement files in, :class:`Curve` out (frequency, magnitude, phase as the file gives them).

File format (``docs/job-format.md``): plain text, one point a line:
frequency in Hz, magnitude (dB SPL for a response, ohm for an impedance), and
optionally phase in degrees. Columns are separated by spaces, tabs, commas or
semicolons; a decimal comma is read where commas do not separate the columns.
Lines whose first field is not a number (headers, comments) are skipped.
Frequencies must rise strictly. Any breach is a :class:`~xo_fit.errors.DataError`
naming the file, the line and what was wrong.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from xo_fit.errors import DataError, read_user_bytes

#: Plausible ranges of each column (frequency Hz, magnitude, phase deg): beyond them a number is a mistake
#: (a misplaced exponent, a column of another quantity), and beyond them the arithmetic overflows too.
_LIMITS = {
    "response": ((-np.inf, 1e7, "frequency (Hz)"), (-300.0, 300.0, "level (dB)"), (-1e7, 1e7, "phase (deg)")),
    "impedance": ((-np.inf, 1e7, "frequency (Hz)"), (-1e9, 1e9, "impedance (ohm)"), (-1e7, 1e7, "phase (deg)")),
}


#: Relative slack allowed when checking that the grid lies inside a file's range.
RANGE_SLACK = 1e-9


_FIRST_NUMBER = re.compile(r"^\s*[+-]?(\d+([.,]\d*)?|[.,]\d+)([eE][+-]?\d+)?(?=$|[\s,;])")


@dataclass(frozen=True)
class Curve:
    """A curve as read from a file.

    Attributes
    ----------
    path : Path
        The file.
    frequency : ndarray
        Frequencies in Hz, shape (N,), strictly rising.
    magnitude : ndarray
        Magnitudes, shape (N,): in dB SPL (a response) or in ohm (an impedance).
    phase_deg : ndarray or None
        Phases in degrees, shape (N,); None when the file has no phase column.
    lines : ndarray
        The 1-based line number of each point in the file, shape (N,).
    """

    path: Path
    frequency: np.ndarray
    magnitude: np.ndarray
    phase_deg: np.ndarray | None
    lines: np.ndarray

    @property
    def f_range(self) -> tuple[float, float]:
        """The first and last frequencies of the curve, in Hz."""
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
    path : str or Path
        The file (any name or extension).
    kind : str
        ``"response"`` (magnitude in dB SPL) or ``"impedance"`` (magnitude in ohm).

    Returns
    -------
    Curve
        The points: frequency in Hz, magnitude (dB SPL or ohm), phase in degrees where the file has it.

    Raises
    ------
    DataError
        File missing or unreadable, a malformed line, frequencies not rising,
        a non-positive frequency or impedance, fewer than two points.
    """
    path = Path(path)
    raw = read_user_bytes(path, f"{kind} file")
    if _KEPT is None:
        return _parse_curve(raw, path, kind)
    key = (str(path), kind, hashlib.sha256(raw).digest())
    curve = _KEPT.get(key)
    if curve is None:
        curve = _parse_curve(raw, path, kind)
        if len(_KEPT) >= KEPT_CURVES:
            _KEPT.clear()
        _KEPT[key] = curve
    return curve


def keep_curves(on: bool = True) -> None:
    """Keep parsed curves in this process (by path, kind and the file's bytes), so that reading an unchanged
    file again costs a read and a hash, not a parse: a batch worker turns this on, as it loads many variants of
    the same files. A curve's arrays are read-only, so sharing them is safe."""
    global _KEPT
    _KEPT = {} if on else None


#: At most this many parsed curves are kept (:func:`keep_curves`); beyond, the memory starts afresh.
KEPT_CURVES = 4096
_KEPT: dict | None = None


def _parse_curve(raw: bytes, path: Path, kind: str) -> Curve:
    text = _decode(raw, path, kind)

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
        hint = ""
        second = arr[:, 1]
        if arr.shape[0] >= 5 and np.all(np.diff(second) > 0) and second[0] > 0 and second[-1] >= 10 * second[0]:
            hint = " (the second column rises throughout: are the frequency and magnitude columns swapped?)"
        raise DataError(f"frequencies must rise strictly: {f[i]:g} Hz follows {f[i - 1]:g} Hz{hint}",
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
