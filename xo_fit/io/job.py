"""Job files: TOML in, a frozen and validated :class:`Job` out.

The format is specified in ``docs/job-format.md``. Every
default lives in :data:`DEFAULTS` below and nowhere else. Validation is strict:
an unknown key, a value of the wrong kind or unit, or a part that cannot exist
is a :class:`~xo_fit.errors.JobError` that names the file, the line (found in
the file's text where it can be), the key and what was expected.

Values in the file are SI numbers or engineering-notation strings
(:mod:`xo_fit.units`); inside the :class:`Job` they are floats in SI units.
Relative paths are taken from the job file's folder.
"""

from __future__ import annotations

import dataclasses
import json
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from ..constants import PART_TYPES, PART_UNIT, RATING_UNIT
from ..errors import JobError, XoFitError, read_user_text
from ..grid import Grid
from ..units import UnitsError, parse_percent, parse_value, parse_wire

#: Every default of the job format, by table and key.
DEFAULTS: Mapping[str, Mapping[str, Any]] = MappingProxyType({
    "grid": {"f_min": 20.0, "f_max": 20000.0, "points": 320},
    "source": {"voltage": 2.83, "resistance": 0.0},
    "acoustics": {"speed_of_sound": 343.0},
    "driver": {"reference_voltage": 2.83, "offset": 0.0, "phase": "measured",
               "impedance_phase": "measured", "extend_low": "none", "extend_high": "none",
               "impedance_extend_low": "none", "impedance_extend_high": "none"},
    "thiele_small": {"le": 0.0, "le_exponent": 1.0, "l2": 0.0, "r2": 0.0},
    "angles": {"mirror": False},
    "part": {"fixed": False, "keep": False, "dcr": 0.0, "esr": 0.0},
    "target": {"level": "auto", "curve": "flat", "reference": "on_axis"},
    "way": {"order": 4, "alignment": "LR", "polarity": "auto"},
    "cost": {"way": 1.0, "sum": 1.0, "phase": 0.5, "impedance": 1.0, "impedance_min": 0.0, "stress": 0.0,
             "early_reflections": 0.0, "sound_power": 0.0},
    "search": {"optimizer": "auto", "budget": 20000, "seed": 1, "time_limit": None, "polish": True},
    "snap": {"series": {"L": "E12", "C": "E12", "R": "E24"}, "inventory": None, "combine": 1, "top_up": None},
    "stress": {"power": None, "rated_impedance": None},
    "spread": {"samples": 2000, "seed": 1, "distribution": "uniform", "band_db": 1.0, "qmc": False, "rms_limit_db": 1.0,
               "tolerance": {"R": 0.05, "L": 0.05, "C": 0.05}},
})

#: The frequency range a grid may span, Hz (beyond it the arithmetic of a loudspeaker model loses meaning).
GRID_HZ = (0.1, 1e6)
#: The most grid points (memory: every curve, candidate and draw is this long).
MAX_POINTS = 100_000
#: The largest cost weight (larger ones overflow the cost).
MAX_WEIGHT = 1e6
#: Plausible ranges of a voltage (V) and of a flat driver's level (dB SPL).
VOLTS = (1e-6, 1e4)

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_\-]*$")
_NODE = re.compile(r"^[A-Za-z0-9_\-+.]+$")


# ----------------------------------------------------------------------------- the job object


class FrozenMap(dict):
    """A read-only dict that pickles (MappingProxyType does not), for the job's small tables."""

    def _readonly(self, *args, **kwargs):
        raise TypeError("a job's tables are read-only")

    __setitem__ = __delitem__ = clear = pop = popitem = setdefault = update = _readonly  # type: ignore[assignment]

    def __reduce__(self):
        return (FrozenMap, (dict(self),))

    def __hash__(self):  # frozen dataclasses holding it stay hashable
        return hash(tuple(sorted(self.items())))


@dataclass(frozen=True)
class FileCurve:
    """A curve read from a measurement file."""

    path: Path


@dataclass(frozen=True)
class FlatResponse:
    """An ideal driver response: ``level_db`` dB SPL at every frequency, zero phase."""

    level_db: float


@dataclass(frozen=True)
class SplicedResponse:
    """A response joined from a near-field file (below ``splice_hz``, Hz) and a far-field file (above)."""

    near: Path
    far: Path
    splice_hz: float

    @property
    def path(self) -> Path:
        """The far-field file (the one that names the curve in messages)."""
        return self.far


@dataclass(frozen=True)
class Resistive:
    """An ideal driver impedance: ``resistance`` ohm, zero phase."""

    resistance: float


@dataclass(frozen=True)
class ThieleSmall:
    """A driver impedance from its small-signal parameters (R. H. Small, JAES 20(5), 1972).

    Z = Re + Z_Le + Res / (1 + Qms (s/ws + ws/s)), Res = Re Qms / Qes, where
    the voice-coil inductance is Z_Le = le * (j w)^n * w_ref^(1-n) with
    w_ref = 2 pi 1 kHz (W. M. Leach, JAES 50(6), 2002): n = 1 is an ideal
    inductor, n < 1 a lossy one whose |Z_Le| at 1 kHz is still w_ref * le.
    A second lossy-coil form adds an inductance ``l2`` (H) with ``r2`` (ohm)
    across it in series (Z_L2 = j w L2 R2 / (R2 + j w L2); W. M. Leach, JAES
    2002; J. R. Wright, JAES 38(10), 1990); both zero leave it out.
    """

    re: float
    le: float
    fs: float
    qms: float
    qes: float
    le_exponent: float = 1.0
    l2: float = 0.0
    r2: float = 0.0

    def impedance(self, f: np.ndarray) -> np.ndarray:
        """Complex impedance in ohm at frequencies ``f`` (Hz), shape of ``f``."""
        w = 2 * np.pi * np.asarray(f, dtype=float)
        s = 1j * w
        ws = 2 * np.pi * self.fs
        w_ref = 2 * np.pi * 1000.0
        z_le = self.le * s**self.le_exponent * w_ref ** (1.0 - self.le_exponent)
        res = self.re * self.qms / self.qes
        z = self.re + z_le + res / (1 + self.qms * (s / ws + ws / s))
        if self.l2 > 0 and self.r2 > 0:
            z = z + s * self.l2 * self.r2 / (self.r2 + s * self.l2)
        return z


@dataclass(frozen=True)
class AngleSpec:
    """Where a driver's responses at other angles are: a file pattern per orbit with ``{angle}`` in it (the
    angle in degrees as an integer), the angles of each orbit, and whether a horizontal angle -a that is not
    listed uses +a's file (``mirror``). Angle 0 is the reference axis: the driver's ``response``."""

    horizontal: str | None
    vertical: str | None
    horizontal_angles: tuple[int, ...]
    vertical_angles: tuple[int, ...]
    mirror: bool = False

    def files(self) -> dict[tuple[str, int], tuple[Path, int]]:
        """Each measured position ("h" or "v", angle) but the axis -> (file, the angle whose file it is). The
        rear point is ("h", 180) whichever orbit gives it; a mirrored angle names +a's file."""
        out: dict[tuple[str, int], tuple[Path, int]] = {}
        for orbit, pattern, angles in (("h", self.horizontal, self.horizontal_angles),
                                       ("v", self.vertical, self.vertical_angles)):
            for a in angles:
                pos = position(orbit, a)
                if pos == ("h", 0) or pattern is None:
                    continue
                out.setdefault(pos, (Path(pattern.replace("{angle}", str(a))), a))
        if self.mirror and self.horizontal is not None:
            for a in self.horizontal_angles:
                pos = position("h", -a)
                if pos not in out and pos != ("h", 0):
                    out[pos] = (Path(self.horizontal.replace("{angle}", str(a))), a)
        return out


def position(orbit: str, angle: int) -> tuple[str, int]:
    """The canonical name of a measuring position: angles in (-180, 180]; the axis is ("h", 0) and the point
    behind is ("h", 180), whichever orbit reaches them."""
    a = ((int(angle) + 180) % 360) - 180
    a = 180 if a == -180 else a
    if a in (0, 180):
        return ("h", a)
    return (orbit, a)


@dataclass(frozen=True)
class DriverSpec:
    """One measured driver: where its response and impedance come from, and how to place it."""

    name: str
    response: FileCurve | FlatResponse | SplicedResponse
    impedance: FileCurve | Resistive | ThieleSmall
    reference_voltage: float
    offset: float
    phase: str
    impedance_phase: str
    extend_low: str = "none"
    extend_high: str = "none"
    impedance_extend_low: str = "none"
    impedance_extend_high: str = "none"
    angles: AngleSpec | None = None


@dataclass(frozen=True)
class PartSpec:
    """One part of the netlist.

    ``value``, ``min`` and ``max`` are SI (ohm, H, F) or None. A part is free
    when it has a range and is not ``fixed``; otherwise it holds ``value``.
    ``dcr`` is a coil's series resistance: a float in ohm, or the bare wire
    diameter in m when ``dcr_wire`` is True (see :mod:`xo_fit.coils`).
    """

    name: str
    type: str
    nodes: tuple[str, str]
    value: float | None = None
    min: float | None = None
    max: float | None = None
    fixed: bool = False
    dcr: float = 0.0
    dcr_wire: bool = False
    esr: float = 0.0
    tolerance: float | None = None
    driver: str | None = None
    series: str | None = None
    rating: float | None = None  # W for R, V for C, A for L (what the bought part is rated for)
    keep: bool = False  # protected from removal (xo-fit prune)

    @property
    def free(self) -> bool:
        """True when the search may move this part's value."""
        return self.type != "driver" and not self.fixed and self.min is not None

    @property
    def unit(self) -> str:
        return PART_UNIT.get(self.type, "")


@dataclass(frozen=True)
class WayTarget:
    """The acoustic target of one way (one driver)."""

    driver: str
    type: str
    alignment: str
    order: int
    fc: float | None = None
    fc_low: float | None = None
    fc_high: float | None = None
    polarity: str = "auto"


@dataclass(frozen=True)
class TargetSpec:
    band: tuple[float, float] | None = None
    level: float | str = DEFAULTS["target"]["level"]
    curve: str = DEFAULTS["target"]["curve"]
    ways: tuple[WayTarget, ...] = ()
    reference: str = DEFAULTS["target"]["reference"]


@dataclass(frozen=True)
class CostSpec:
    way: float = DEFAULTS["cost"]["way"]
    sum: float = DEFAULTS["cost"]["sum"]
    phase: float = DEFAULTS["cost"]["phase"]
    impedance: float = DEFAULTS["cost"]["impedance"]
    impedance_min: float = DEFAULTS["cost"]["impedance_min"]
    stress: float = DEFAULTS["cost"]["stress"]
    early_reflections: float = DEFAULTS["cost"]["early_reflections"]
    sound_power: float = DEFAULTS["cost"]["sound_power"]


@dataclass(frozen=True)
class SearchSpec:
    optimizer: str = DEFAULTS["search"]["optimizer"]
    budget: int = DEFAULTS["search"]["budget"]
    seed: int = DEFAULTS["search"]["seed"]
    time_limit: float | None = DEFAULTS["search"]["time_limit"]
    polish: bool = DEFAULTS["search"]["polish"]
    robust_samples: int = 0


@dataclass(frozen=True)
class SnapSpec:
    series: Mapping[str, str] = field(default_factory=lambda: FrozenMap(DEFAULTS["snap"]["series"]))
    inventory: Path | None = DEFAULTS["snap"]["inventory"]
    combine: int = DEFAULTS["snap"]["combine"]
    top_up: str | None = DEFAULTS["snap"]["top_up"]


@dataclass(frozen=True)
class SpreadSpec:
    samples: int = DEFAULTS["spread"]["samples"]
    seed: int = DEFAULTS["spread"]["seed"]
    distribution: str = DEFAULTS["spread"]["distribution"]
    band_db: float = DEFAULTS["spread"]["band_db"]
    qmc: bool = DEFAULTS["spread"]["qmc"]
    tolerance: Mapping[str, float] = field(default_factory=lambda: FrozenMap(DEFAULTS["spread"]["tolerance"]))
    rms_limit_db: float = DEFAULTS["spread"]["rms_limit_db"]


@dataclass(frozen=True)
class StressSpec:
    """Drive level for the stress figures: ``power`` W into ``rated_impedance`` ohm (both None: no stresses)."""

    power: float | None = DEFAULTS["stress"]["power"]
    rated_impedance: float | None = DEFAULTS["stress"]["rated_impedance"]


@dataclass(frozen=True)
class Job:
    """A validated job. Every value is SI; every path is absolute.

    ``path`` is the job file (None for a job built from a mapping), ``folder``
    the folder its relative paths were resolved against, ``document`` the
    resolved job document (after [sweep] expansion) as JSON text, from which
    :func:`load_job` rebuilds the same job, and ``part_lines`` the line of each
    part's table in the file (for error messages found later).
    """

    name: str
    path: Path | None
    grid: Grid
    source_voltage: float
    source_resistance: float
    speed_of_sound: float
    drivers: tuple[DriverSpec, ...]
    parts: tuple[PartSpec, ...]
    target: TargetSpec
    cost: CostSpec
    search: SearchSpec
    snap: SnapSpec
    spread: SpreadSpec
    stress: StressSpec = StressSpec()
    folder: Path = Path(".")
    document: str = "{}"
    part_lines: Mapping[str, int] = field(default_factory=lambda: FrozenMap())  # line of each part's nodes
    warnings: tuple[str, ...] = ()  # doubtful but legal values, one line each
    swept: Mapping[str, Any] = field(default_factory=lambda: FrozenMap())  # a [sweep] variant's values, by label

    @property
    def data(self) -> dict:
        """The resolved job document (a fresh dict with the TOML's structure)."""
        return json.loads(self.document)

    def driver(self, name: str) -> DriverSpec:
        for d in self.drivers:
            if d.name == name:
                return d
        raise KeyError(name)

    def part(self, name: str) -> PartSpec:
        for p in self.parts:
            if p.name == name:
                return p
        raise KeyError(name)

    @property
    def valued_parts(self) -> tuple[PartSpec, ...]:
        """The R, L and C parts, in file order: the columns of a values array (B, P)."""
        return tuple(p for p in self.parts if p.type != "driver")

    @property
    def free_parts(self) -> tuple[PartSpec, ...]:
        return tuple(p for p in self.parts if p.free)


# ----------------------------------------------------------------------------- reading


class _Lines:
    """Finds the line of a table or key in the TOML text, for error messages."""

    _HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?")
    _KEY = re.compile(r"^\s*([A-Za-z0-9_\-]+|\"[^\"]*\")\s*=")

    def __init__(self, text: str) -> None:
        self.index: dict[tuple, int] = {}
        table: tuple = ()
        counts: dict[str, int] = {}
        for number, raw in enumerate(text.splitlines(), start=1):
            m = self._HEADER.match(raw)
            if m:
                name = tuple(part.strip().strip('"') for part in m[2].split("."))
                if m[1] == "[[":
                    i = counts.get(m[2], 0)
                    counts[m[2]] = i + 1
                    name = name + (i,)
                table = name
                self.index.setdefault(table, number)
                continue
            k = self._KEY.match(raw)
            if k:
                key = k[1].strip('"')
                self.index.setdefault(table + (key,), number)
                # dotted keys at top level such as `grid.points = 3`
                if "." in key:
                    self.index.setdefault(table + tuple(key.split(".")), number)

    def find(self, table: tuple, key: str | None = None) -> int | None:
        if key is not None:
            for probe in (table + (key,), table[:-1] + (key,) if table else (key,)):
                if probe in self.index:
                    return self.index[probe]
        while table:
            if table in self.index:
                return self.index[table]
            table = table[:-1]
        return None


class _Reader:
    """Reads one table of the job: typed getters, then ``done()`` refuses unknown keys."""

    def __init__(self, data: Any, table: tuple, label: str, ctx: "_Context") -> None:
        self.ctx = ctx
        self.table = table
        self.label = label
        if not isinstance(data, dict):
            raise ctx.error(table, None, f"{label} must be a table, got {_kind(data)}")
        self.data = data
        self.used: set[str] = set()

    def error(self, key: str | None, message: str) -> JobError:
        where = f"{self.label} {key}" if key else self.label
        return self.ctx.error(self.table, key, message, where)

    def has(self, key: str) -> bool:
        return key in self.data

    def raw(self, key: str, default: Any = None) -> Any:
        self.used.add(key)
        return self.data.get(key, default)

    def value(self, key: str, unit: str, default: Any = None, *, required: bool = False,
              positive: bool = True, allow_zero: bool = False) -> float | None:
        self.used.add(key)
        if key not in self.data:
            if required:
                raise self.error(key, f"missing; expected {_unit_text(unit)}")
            return default
        try:
            return parse_value(self.data[key], unit, positive=positive, allow_zero=allow_zero)
        except UnitsError as e:
            raise self.error(key, e.message) from None

    def number(self, key: str, default: Any, *, integer: bool = False, minimum: float | None = None,
               maximum: float | None = None) -> Any:
        self.used.add(key)
        if key not in self.data:
            return default
        v = self.data[key]
        ok = isinstance(v, int) if integer else isinstance(v, (int, float))
        if isinstance(v, bool) or not ok:
            raise self.error(key, f"expected {'a whole number' if integer else 'a number'}, got {_short(v)}")
        if isinstance(v, float) and not math.isfinite(v):
            raise self.error(key, f"expected a finite number, got {v!r}")
        if isinstance(v, int) and abs(v) > 2**63:
            raise self.error(key, f"{v} is out of range")
        if minimum is not None and v < minimum:
            raise self.error(key, f"must be at least {minimum:g}, got {v!r}")
        if maximum is not None and v > maximum:
            raise self.error(key, f"must be at most {maximum:g}, got {v!r}")
        return int(v) if integer else float(v)

    def choice(self, key: str, options: tuple[str, ...], default: Any) -> Any:
        self.used.add(key)
        if key not in self.data:
            return default
        v = self.data[key]
        if not isinstance(v, str) or v not in options:
            raise self.error(key, f"expected one of {', '.join(repr(o) for o in options)}, got {v!r}")
        return v

    def text(self, key: str, default: Any = None, *, required: bool = False) -> Any:
        self.used.add(key)
        if key not in self.data:
            if required:
                raise self.error(key, "missing; expected a text")
            return default
        v = self.data[key]
        if not isinstance(v, str) or not v.strip():
            raise self.error(key, f"expected a non-empty text, got {v!r}")
        return v

    def boolean(self, key: str, default: bool) -> bool:
        self.used.add(key)
        v = self.data.get(key, default)
        if not isinstance(v, bool):
            raise self.error(key, f"expected true or false, got {v!r}")
        return v

    def path(self, key: str) -> Path:
        v = self.text(key, required=True)
        if re.search(r"[\x00-\x1f\x7f]", v):
            raise self.error(key, f"a file path cannot hold control characters (got {v!r})")
        p = Path(v)
        return p if p.is_absolute() else (self.ctx.folder / p)

    def sub(self, key: str, label: str | None = None) -> "_Reader":
        self.used.add(key)
        return _Reader(self.data.get(key, {}), self.table + (key,), label or f"[{'.'.join(map(str, self.table + (key,)))}]", self.ctx)

    def done(self, allowed_extra: tuple[str, ...] = ()) -> None:
        unknown = [k for k in self.data if k not in self.used and k not in allowed_extra]
        if unknown:
            key = unknown[0]
            known = sorted(self.used | set(allowed_extra) | KEYS.get(_table_kind(self.table), frozenset()))
            hint = _close_match(key, known)
            raise self.ctx.error(
                self.table, key,
                f"unknown key '{key}'" + (f" (did you mean '{hint}'?)" if hint else "")
                + f"; expected one of: {', '.join(known)}",
                self.label)


@dataclass
class _Context:
    path: Path | None
    folder: Path
    lines: _Lines
    stem: str = "job"
    warnings: list = field(default_factory=list)

    def warn(self, table: tuple, key: str | None, message: str) -> None:
        line = self.lines.find(table, key)
        where = f"{self.path}:{line}: " if self.path and line else (f"{self.path}: " if self.path else "")
        self.warnings.append(where + message)

    def error(self, table: tuple, key: str | None, message: str, where: str | None = None) -> JobError:
        return JobError(message, path=self.path, line=self.lines.find(table, key), key=where)


#: Every key each table takes (what "did you mean" chooses from).
KEYS: Mapping[str, frozenset[str]] = MappingProxyType({k: frozenset(v.split()) for k, v in {
    "top": "name grid source acoustics driver part target cost search snap spread stress sweep",
    "grid": "f_min f_max points per_octave",
    "source": "voltage resistance",
    "acoustics": "speed_of_sound",
    "driver": "response impedance reference_voltage offset phase impedance_phase extend_low extend_high "
              "impedance_extend_low impedance_extend_high",
    "thiele_small": "re le fs qms qes le_exponent l2 r2",
    "angles": "horizontal vertical horizontal_angles vertical_angles mirror",
    "splice": "near far splice_hz",
    "part": "name type nodes driver value min max fixed dcr esr tolerance rating series keep",
    "target": "band level curve way reference",
    "way": "type alignment order fc fc_low fc_high polarity",
    "cost": "way sum phase impedance impedance_min stress early_reflections sound_power",
    "search": "optimizer budget seed time_limit polish robust",
    "robust": "samples",
    "snap": "series inventory combine top_up",
    "spread": "samples seed distribution band_db qmc rms_limit_db tolerance",
    "stress": "power rated_impedance",
}.items()})


def _table_kind(table: tuple) -> str:
    """The kind of table a reader reads, from its path in the document."""
    if not table:
        return "top"
    if table[0] == "driver":
        return ({"angles": "angles", "response": "splice"}.get(table[2], "thiele_small") if len(table) == 3
                else "driver")
    if table[0] == "target" and len(table) == 3:
        return "way"
    if table[:2] == ("search", "robust"):
        return "robust"
    return str(table[0])


def _kind(v: Any) -> str:
    return {dict: "a table", list: "a list", str: "a text", bool: "a boolean",
            int: "a number", float: "a number"}.get(type(v), type(v).__name__)


def _short(v: Any) -> str:
    """A value for an error message: its repr, cut short."""
    text = repr(v)
    return text if len(text) <= 60 else text[:57] + "..."


def _unit_text(unit: str) -> str:
    from ..units import UNIT_SYMBOL
    return f"a value in {UNIT_SYMBOL.get(unit, unit)}" if unit else "a number"


def _close_match(key: str, known: list[str]) -> str | None:
    import difflib
    m = difflib.get_close_matches(key, known, n=1, cutoff=0.6)
    return m[0] if m else None


def load_job(source: str | Path | Mapping[str, Any], base: str | Path | None = None, *, copy: bool = True) -> Job:
    """Read and validate a job: a TOML file, or a mapping with the TOML's structure.

    ``base`` is the folder relative data paths are taken from: by default the
    job file's folder (for a mapping, the current folder). ``copy=False``: a
    mapping is the caller's to give away and is read without a deep copy.

    Raises
    ------
    JobError
        For anything wrong with the job, naming the file, line and key.
    """
    data, ctx = _read(source, base, copy=copy)
    if "sweep" in data:
        raise JobError("this job has a [sweep] of variants: run it with 'xo-fit batch' (the other commands take "
                       "one design)", path=ctx.path, line=ctx.lines.find(("sweep",)), key="[sweep]")
    return _build(data, ctx)


def has_sweep(path: str | Path) -> bool:
    """True when the job file has a [sweep] table; False also when it cannot be read (load_job then says why)."""
    try:
        data, _ = _read(path)
    except XoFitError:
        return False
    return "sweep" in data


def expand_job(path: str | Path) -> list[tuple["Job", dict]]:
    """A job file as the list of jobs it stands for: itself, or one per variant of its [sweep].

    [sweep] maps dotted paths to lists of values; every combination of the lists
    is a variant (a cartesian product). A path names a key in the job's tables
    (``"target.way.woofer.fc"``, ``"search.seed"``) or in a part by its name
    (``"part.L1.max"``); a key holding several comma-separated paths sets all of
    them to each value together (``"target.way.woofer.fc, target.way.tweeter.fc"``).
    Variants are named ``<name>-<key><value>-...`` after the last segment of
    each path. Returns (job, its resolved document) pairs; the document feeds
    the batch store's hash.
    """
    import copy
    import itertools

    data, ctx = _read(path)
    base_name = data.get("name") if isinstance(data.get("name"), str) else ctx.stem
    sweep = data.pop("sweep", None)
    if sweep is None:
        return [(_build(data, ctx), data)]
    if not isinstance(sweep, dict) or not sweep:
        raise ctx.error(("sweep",), None, "expected a table of dotted paths to lists of values", "[sweep]")
    axes = []
    for key, values in sweep.items():
        if not isinstance(values, list) or not values:
            raise ctx.error(("sweep",), key, f"expected a non-empty list of values, got {values!r}", f"[sweep] {key}")
        paths = [p.strip() for p in key.split(",") if p.strip()]
        axes.append((key, paths, values))
    out = []
    for combo in itertools.product(*[a[2] for a in axes]):
        variant = copy.deepcopy(data)
        label = []
        for (key, paths, _), value in zip(axes, combo):
            for p in paths:
                _assign(variant, p, value, ctx, key)
            label.append(f"{paths[0].split('.')[-1]}{_label(value)}")
        variant["name"] = f"{base_name}-" + "-".join(label)
        swept = FrozenMap({paths[0].split(".")[-1]: value for (key, paths, _), value in zip(axes, combo)})
        out.append((dataclasses.replace(_build(variant, ctx), swept=swept), variant))
    return out


def _label(value: Any) -> str:
    """A swept value as it appears in a variant's name: safe in a file name."""
    return re.sub(r"[^\w.=+-]+", "_", str(value))[:40]


def _assign(data: dict, path: str, value: Any, ctx: "_Context", key: str) -> None:
    segs = path.split(".")
    node: Any = data
    for i, seg in enumerate(segs[:-1]):
        if seg == "part" and isinstance(node, dict) and isinstance(node.get("part"), list) and i + 1 < len(segs) - 1:
            parts = node["part"]
            name = segs[i + 1]
            match = [p for p in parts if isinstance(p, dict) and p.get("name") == name]
            if not match:
                raise ctx.error(("sweep",), key, f"no part named '{name}' for the path '{path}'", f"[sweep] {key}")
            node = match[0]
            rest = segs[i + 2:]
            for r in rest[:-1]:
                node = node.setdefault(r, {})
            node[rest[-1]] = value
            return
        if not isinstance(node, dict):
            raise ctx.error(("sweep",), key, f"the path '{path}' runs into a value at '{seg}'", f"[sweep] {key}")
        node = node.setdefault(seg, {})
    if not isinstance(node, dict):
        raise ctx.error(("sweep",), key, f"the path '{path}' runs into a value", f"[sweep] {key}")
    node[segs[-1]] = value


def _read(source: str | Path | Mapping[str, Any], base: str | Path | None = None, *,
          copy: bool = True) -> tuple[dict, "_Context"]:
    if isinstance(source, Mapping):
        import copy as copying

        data = copying.deepcopy(dict(source)) if copy else dict(source)
        folder = Path(base if base is not None else ".").resolve()
        return data, _Context(path=None, folder=folder, lines=_Lines(""), stem="job")
    path = Path(source)
    text = read_user_text(path, "job file", JobError)
    try:
        data = tomllib.loads(text)
    except RecursionError:
        raise JobError("invalid TOML: nested too deeply", path=path) from None
    except tomllib.TOMLDecodeError as e:
        msg = str(e)
        m = re.search(r"\(at line (\d+), column \d+\)", msg)
        line = int(m[1]) if m else None
        msg = re.sub(r"\s*\(at line \d+, column \d+\)", "", msg)
        raise JobError(f"invalid TOML: {msg}", path=path, line=line) from None
    folder = Path(base).resolve() if base is not None else path.resolve().parent
    ctx = _Context(path=path.resolve(), folder=folder, lines=_Lines(text), stem=path.stem)
    return data, ctx


def _build(data: dict, ctx: _Context) -> Job:
    top = _Reader(data, (), "job", ctx)
    name = top.text("name", ctx.stem)
    if name in (".", "..") or re.search(r"[/\\\x00-\x1f\x7f\u2028\u2029\x85]", name):
        raise top.error("name", f"{name!r} cannot name files and folders: no '/', '\\', control characters "
                                "(a line break), and not '.' or '..'")

    grid = _grid(top.sub("grid", "[grid]"))
    src = top.sub("source", "[source]")
    voltage = src.value("voltage", "V", DEFAULTS["source"]["voltage"])
    if not VOLTS[0] <= voltage <= VOLTS[1]:
        raise src.error("voltage", f"{voltage:g} V is outside {VOLTS[0]:g} to {VOLTS[1]:g} V")
    resistance = src.value("resistance", "ohm", DEFAULTS["source"]["resistance"], allow_zero=True)
    src.done()
    ac = top.sub("acoustics", "[acoustics]")
    c = ac.value("speed_of_sound", "m/s", DEFAULTS["acoustics"]["speed_of_sound"])
    ac.done()

    drv_table = top.sub("driver", "[driver]")
    drivers = []
    for dname in drv_table.data:
        drv_table.used.add(dname)
        drivers.append(_driver(dname, drv_table.sub(dname, f"[driver.{dname}]"), voltage))
    if not drivers:
        raise ctx.error((), None, "no drivers: add at least one [driver.NAME] table", "job")
    with_angles = [d for d in drivers if d.angles is not None]
    if with_angles:
        first = with_angles[0]
        for d in drivers:
            if d.angles is None:
                raise ctx.error(("driver", d.name), None, f"driver '{d.name}' has no [driver.{d.name}.angles] but "
                                f"'{first.name}' has: every driver of an off-axis job needs the same angles",
                                f"[driver.{d.name}]")
            if set(d.angles.files()) != set(first.angles.files()):
                diff = sorted(set(d.angles.files()) ^ set(first.angles.files()))
                raise ctx.error(("driver", d.name, "angles"), None, f"covers other angles than driver "
                                f"'{first.name}' ({', '.join(f'{o}{a}' for o, a in diff[:6])} in one only); every "
                                "driver must cover the same angles", f"[driver.{d.name}.angles]")

    top.used.add("part")
    raw_parts = data.get("part", [])
    if not isinstance(raw_parts, list) or not raw_parts:
        raise ctx.error((), "part", "no parts: the network needs [[part]] tables", "job")
    driver_names = {d.name for d in drivers}
    parts = tuple(_part(_Reader(p, ("part", i), f"[[part]] #{i + 1}", ctx), driver_names)
                  for i, p in enumerate(raw_parts))
    for i, p in enumerate(parts):
        _plausible(p, ctx, ("part", i))
    _check_parts(parts, drivers, ctx)

    target = _target(top.sub("target", "[target]"), driver_names)
    if target.band is not None:
        f = grid.frequencies
        if not np.any((f >= target.band[0]) & (f <= target.band[1])):
            raise ctx.error(("target",), "band", f"the band {target.band[0]:g}-{target.band[1]:g} Hz holds no point "
                            f"of the grid ({f[0]:g}-{f[-1]:g} Hz, {f.size} points)", "[target] band")
    cost = _cost(top.sub("cost", "[cost]"))
    search = _search(top.sub("search", "[search]"))
    snap = _snap(top.sub("snap", "[snap]"))
    spread = _spread(top.sub("spread", "[spread]"))
    stress = _stress(top.sub("stress", "[stress]"))
    if cost.stress > 0 and not stress.power:
        raise ctx.error(("cost",), "stress", "a stress weight needs the drive: [stress] power and rated_impedance",
                        "[cost] stress")
    if cost.stress > 0 and not any(p.rating for p in parts):
        ctx.warn(("cost",), "stress", "[cost] stress is set but no part has a rating: the term is always 0")
    top.done()
    document = dict(data)
    document["name"] = name
    lines = {p.name: ctx.lines.find(("part", i), "nodes") for i, p in enumerate(parts)}
    return Job(name=name, path=ctx.path, grid=grid, source_voltage=voltage, source_resistance=resistance,
               speed_of_sound=c, drivers=tuple(drivers), parts=parts, target=target, cost=cost,
               search=search, snap=snap, spread=spread, stress=stress, folder=ctx.folder,
               document=json.dumps(document, default=str),
               part_lines=FrozenMap({k: v for k, v in lines.items() if v is not None}),
               warnings=tuple(ctx.warnings))


def _stress(r: _Reader) -> StressSpec:
    d = DEFAULTS["stress"]
    power = r.value("power", "W", d["power"])
    rated = r.value("rated_impedance", "ohm", d["rated_impedance"])
    if (power is None) != (rated is None):
        raise r.error("rated_impedance" if rated is None else "power",
                      "give both power (W) and rated_impedance (ohm): power is quoted into the rated impedance")
    r.done()
    return StressSpec(power=power, rated_impedance=rated)


def _grid(r: _Reader) -> Grid:
    d = DEFAULTS["grid"]
    f_min = r.value("f_min", "Hz", d["f_min"])
    f_max = r.value("f_max", "Hz", d["f_max"])
    if f_max <= f_min:
        raise r.error("f_max", f"must be above f_min ({f_min:g} Hz), got {f_max:g} Hz")
    if r.has("points") and r.has("per_octave"):
        raise r.error("per_octave", "give either points or per_octave, not both")
    for key, f in (("f_min", f_min), ("f_max", f_max)):
        if not GRID_HZ[0] <= f <= GRID_HZ[1]:
            raise r.error(key, f"{f:g} Hz is outside {GRID_HZ[0]:g} Hz to {GRID_HZ[1]:g} Hz")
    if r.has("per_octave"):
        per_octave = r.number("per_octave", None, integer=True, minimum=1, maximum=1000)
        points = int(np.ceil(np.log2(f_max / f_min) * per_octave - 1e-9)) + 1
        if points > MAX_POINTS:
            raise r.error("per_octave", f"{per_octave} per octave from {f_min:g} to {f_max:g} Hz makes {points} "
                                        f"points; at most {MAX_POINTS}")
    else:
        points = r.number("points", d["points"], integer=True, minimum=2, maximum=MAX_POINTS)
    r.done()
    return Grid(f_min=f_min, f_max=f_max, points=points)


def _phase_choice(r: _Reader, key: str) -> str:
    return r.choice(key, ("measured", "minimum"), DEFAULTS["driver"][key])


def _driver(name: str, r: _Reader, voltage: float) -> DriverSpec:
    if not _NAME.match(name):
        raise r.error(None, "a driver name must start with a letter and hold only letters, digits, _ and -")
    d = DEFAULTS["driver"]
    if not r.has("response"):
        raise r.error("response", "missing; expected a measurement file path, or a level in dB SPL for an ideal flat driver")
    if not r.has("impedance"):
        raise r.error("impedance", "missing; expected a measurement file path, a resistance in ohm, "
                      "or a Thiele-Small table {re, le, fs, qms, qes}")
    resp = r.raw("response")
    if isinstance(resp, (int, float)) and not isinstance(resp, bool):
        if not (math.isfinite(resp) and -300 <= resp <= 300):
            raise r.error("response", f"a flat driver's level must be -300 to 300 dB SPL, got {_short(resp)}")
        response: FileCurve | FlatResponse | SplicedResponse = FlatResponse(float(resp))
    elif isinstance(resp, dict):
        t = r.sub("response", f"[driver.{name}.response]")
        response = SplicedResponse(near=t.path("near"), far=t.path("far"), splice_hz=t.value("splice_hz", "Hz",
                                                                                               required=True))
        t.done()
        if _phase_choice(r, "phase") != "minimum":
            raise r.error("phase", "a spliced response must use phase = \"minimum\": the near and far fields' "
                                   "phases do not join, the spliced magnitude gives the phase")
    else:
        response = FileCurve(r.path("response"))
    imp = r.raw("impedance")
    impedance: FileCurve | Resistive | ThieleSmall
    if isinstance(imp, dict):
        t = r.sub("impedance", f"[driver.{name}.impedance]")
        impedance = ThieleSmall(
            re=t.value("re", "ohm", required=True),
            le=t.value("le", "H", DEFAULTS["thiele_small"]["le"], allow_zero=True),
            fs=t.value("fs", "Hz", required=True),
            qms=t.number("qms", None, minimum=1e-3) or _missing(t, "qms"),
            qes=t.number("qes", None, minimum=1e-3) or _missing(t, "qes"),
            le_exponent=t.number("le_exponent", DEFAULTS["thiele_small"]["le_exponent"], minimum=0.0, maximum=1.0),
            l2=t.value("l2", "H", DEFAULTS["thiele_small"]["l2"], allow_zero=True),
            r2=t.value("r2", "ohm", DEFAULTS["thiele_small"]["r2"], allow_zero=True),
        )
        if (impedance.l2 > 0) != (impedance.r2 > 0):
            raise t.error("l2" if impedance.r2 > 0 else "r2",
                          "the lossy-coil branch needs both l2 (H) and r2 (ohm) above zero, or neither")
        t.done()
    elif isinstance(imp, str) and _looks_numeric(imp):
        impedance = Resistive(r.value("impedance", "ohm"))
    elif isinstance(imp, (int, float)) and not isinstance(imp, bool):
        impedance = Resistive(r.value("impedance", "ohm"))
    else:
        impedance = FileCurve(r.path("impedance"))
    spec = DriverSpec(
        name=name,
        response=response,
        impedance=impedance,
        reference_voltage=_volts(r, "reference_voltage", d["reference_voltage"]),
        offset=r.value("offset", "m", d["offset"], positive=False),
        phase=_phase_choice(r, "phase"),
        impedance_phase=_phase_choice(r, "impedance_phase"),
        extend_low=r.choice("extend_low", ("none", "slope", "order2", "order4"), d["extend_low"]),
        extend_high=r.choice("extend_high", ("none", "slope"), d["extend_high"]),
        impedance_extend_low=r.choice("impedance_extend_low", ("none", "slope"), d["impedance_extend_low"]),
        impedance_extend_high=r.choice("impedance_extend_high", ("none", "slope"), d["impedance_extend_high"]),
        angles=_angles(r.sub("angles", f"[driver.{name}.angles]"), isinstance(response, (FileCurve, SplicedResponse)))
        if r.has("angles") else None,
    )
    for keys, what, phase_key in ((("extend_low", "extend_high"), "response", "phase"),
                                  (("impedance_extend_low", "impedance_extend_high"), "impedance", "impedance_phase")):
        for key in keys:
            if getattr(spec, key) != "none":
                if not isinstance(getattr(spec, what), (FileCurve, SplicedResponse)):
                    raise r.error(key, f"only a {what} read from a file can be extended")
                if getattr(spec, phase_key) != "minimum":
                    raise r.error(key, f"an extended {what} must use {phase_key} = \"minimum\": the measured phase "
                                       "stops at the file's end, the extended magnitude gives the phase")
    r.done()
    return spec


def _angles(r: _Reader, measured: bool) -> AngleSpec:
    """[driver.NAME.angles]: file patterns with {angle}, the angle lists, mirror."""
    if not measured:
        raise r.error(None, "a driver with off-axis files needs its on-axis response from a file too")
    patterns = {}
    for key in ("horizontal", "vertical"):
        if r.has(key):
            v = r.text(key)
            if v.count("{angle}") != 1 or re.search(r"[\x00-\x1f\x7f]", v):
                raise r.error(key, f"expected a file pattern holding {{angle}} once (e.g. \"polar/woofer-h{{angle}}.txt\"), "
                                   f"got {_short(v)}")
            p = Path(v)
            patterns[key] = str(p if p.is_absolute() else (r.ctx.folder / p))
        lists_key = f"{key}_angles"
        if r.has(key) != r.has(lists_key):
            raise r.error(lists_key if r.has(key) else key, f"give {key} and {lists_key} together")
    if not patterns:
        raise r.error(None, "expected horizontal (with horizontal_angles) or vertical (with vertical_angles)")
    lists = {}
    for key in ("horizontal_angles", "vertical_angles"):
        raw = r.raw(key, [])
        if not isinstance(raw, list) or not raw or not all(isinstance(a, int) and not isinstance(a, bool)
                                                            and -180 <= a <= 180 for a in raw):
            if key[:-7] in patterns:
                raise r.error(key, f"expected a list of whole degrees from -180 to 180, got {_short(raw)}")
            raw = []
        seen: dict = {}
        for a in raw:
            pos = position(key[0], a)
            if pos in seen:
                raise r.error(key, f"{a} and {seen[pos]} deg are the same position; list it once")
            seen[pos] = a
        lists[key] = tuple(raw)
    spec = AngleSpec(horizontal=patterns.get("horizontal"), vertical=patterns.get("vertical"),
                     horizontal_angles=lists["horizontal_angles"], vertical_angles=lists["vertical_angles"],
                     mirror=r.boolean("mirror", DEFAULTS["angles"]["mirror"]))
    r.done()
    return spec


def _volts(r: _Reader, key: str, default: float) -> float:
    v = r.value(key, "V", default)
    if not VOLTS[0] <= v <= VOLTS[1]:
        raise r.error(key, f"{v:g} V is outside {VOLTS[0]:g} to {VOLTS[1]:g} V")
    return v


def _missing(r: _Reader, key: str):
    raise r.error(key, "missing; expected a number")


def _looks_numeric(text: str) -> bool:
    try:
        parse_value(text, "ohm")
        return True
    except UnitsError:
        return False


def _part(r: _Reader, driver_names: set[str]) -> PartSpec:
    name = r.text("name", required=True)
    if not _NAME.match(name):
        raise r.error("name", f"'{name}' is not a valid part name: start with a letter, then letters, digits, _ or -")
    r.label = f"part {name}"
    ptype = r.choice("type", PART_TYPES, None)
    if ptype is None:
        raise r.error("type", f"missing; expected one of {', '.join(PART_TYPES)}")
    nodes = r.raw("nodes")
    if (not isinstance(nodes, list) or len(nodes) != 2
            or not all(isinstance(n, (str, int)) and not isinstance(n, bool) for n in nodes)):
        raise r.error("nodes", f"expected two node names such as [\"in\", \"w1\"], got {nodes!r}")
    nodes_t = (str(nodes[0]).strip(), str(nodes[1]).strip())
    for n in nodes_t:
        if not _NODE.match(n):
            raise r.error("nodes", f"'{n}' is not a valid node name (letters, digits, _ - + .)")
    if nodes_t[0] == nodes_t[1]:
        raise r.error("nodes", f"both ends on node '{nodes_t[0]}': the part is shorted onto one node")

    if ptype == "driver":
        drv = r.text("driver", required=True)
        if drv not in driver_names:
            raise r.error("driver", f"unknown driver '{drv}'; defined drivers: {', '.join(sorted(driver_names))}")
        for key in ("value", "min", "max", "dcr", "esr", "tolerance", "series", "fixed", "rating", "keep"):
            if r.has(key):
                raise r.error(key, "a driver part takes only name, type, nodes and driver")
        r.done()
        return PartSpec(name=name, type=ptype, nodes=nodes_t, driver=drv)

    unit = PART_UNIT[ptype]
    value, lo, hi = (_part_value(r, key, unit) for key in ("value", "min", "max"))
    fixed = r.boolean("fixed", DEFAULTS["part"]["fixed"])
    keep = r.boolean("keep", DEFAULTS["part"]["keep"])
    if (lo is None) != (hi is None):
        raise r.error("min" if lo is None else "max", "give both min and max for a search range, or neither")
    if lo is not None and hi is not None:
        if hi <= lo:
            raise r.error("max", "must be above min")
        if value is not None and not lo <= value <= hi:
            raise r.error("value", "the start value lies outside min..max")
    if value is None and (lo is None or fixed):
        raise r.error("value", "missing; a fixed part needs a value (or give min and max to let the search set it)")
    dcr, dcr_wire = 0.0, False
    if r.has("dcr"):
        if ptype != "L":
            raise r.error("dcr", "only a coil (type L) has dcr; a capacitor has esr")
        raw = r.raw("dcr")
        wire = parse_wire(raw) if isinstance(raw, str) else None
        if wire is not None:
            dcr, dcr_wire = wire, True
        elif isinstance(raw, str) and _is_length(raw):
            dcr, dcr_wire = r.value("dcr", "m"), True
        else:
            try:
                dcr = parse_value(raw, "ohm", allow_zero=True)
            except UnitsError as e:
                raise r.error("dcr", f"{e.message.rstrip('.')}; expected ohms or a wire such as \"18awg\" "
                              "(or a bare copper diameter such as \"1.2mm\")") from None
    esr = 0.0
    if r.has("esr"):
        if ptype != "C":
            raise r.error("esr", "only a capacitor (type C) has esr; a coil has dcr")
        esr = r.value("esr", "ohm", allow_zero=True)
    tol = None
    if r.has("tolerance"):
        try:
            tol = parse_percent(r.raw("tolerance"))
        except UnitsError as e:
            raise r.error("tolerance", e.message) from None
    rating = None
    if r.has("rating"):
        rating = r.value("rating", RATING_UNIT[ptype])
    series = r.text("series")
    if series is not None:
        from ..series import check_name

        try:
            series = check_name(series)
        except XoFitError as e:
            raise r.error("series", e.message) from None
    if r.has("driver"):
        raise r.error("driver", "only a part of type driver names a driver")
    r.done()
    return PartSpec(name=name, type=ptype, nodes=nodes_t, value=value, min=lo, max=hi, fixed=fixed,
                    dcr=dcr, dcr_wire=dcr_wire, esr=esr, tolerance=tol, series=series, rating=rating, keep=keep)


#: What the parts of a loudspeaker crossover take, by type (SI): resistors from a fraction of an ohm (a
#: coil's copper, a series pad) to some kilohms; coils from a few microhenry to tens of millihenry; capacitors
#: from a few nanofarad (a tweeter's bypass) to some millifarad (a woofer's bass-shelf network). A value
#: outside is legal but usually a slip of the unit ("10" for a capacitor is 10 F).
PLAUSIBLE = {"R": (0.01, 1e5), "L": (1e-6, 0.1), "C": (1e-9, 0.01)}


#: Part values the arithmetic can take (SI): far outside what any part is, and inside what float64 divides
#: without overflow (a denormal resistance would make an infinite admittance).
SOLVABLE = (1e-12, 1e12)


def _part_value(r: _Reader, key: str, unit: str) -> float | None:
    v = r.value(key, unit)
    if v is not None and not SOLVABLE[0] <= v <= SOLVABLE[1]:
        from ..units import format_value

        raise r.error(key, f"{format_value(v, unit)} is no part: values must lie within "
                           f"{SOLVABLE[0]:g} to {SOLVABLE[1]:g} {unit}")
    return v


def _plausible(p: PartSpec, ctx: _Context, table: tuple) -> None:
    from ..units import format_value

    if p.type not in PLAUSIBLE:
        return
    lo, hi = PLAUSIBLE[p.type]
    for key in ("value", "min", "max"):
        v = getattr(p, key)
        if v is not None and not lo <= v <= hi:
            ctx.warn(table, key, f"part {p.name}: {key} {format_value(v, p.unit)} lies outside what a crossover "
                                 f"uses ({format_value(lo, p.unit)} to {format_value(hi, p.unit)}); check the unit")


def _is_length(text: str) -> bool:
    try:
        parse_value(text, "m")
    except UnitsError:
        return False
    return text.strip().endswith("m") and not text.strip().endswith("ohm")


def _check_parts(parts: tuple[PartSpec, ...], drivers: list[DriverSpec], ctx: _Context) -> None:
    seen: dict[str, int] = {}
    used: dict[str, str] = {}
    for i, p in enumerate(parts):
        if p.name in seen:
            raise ctx.error(("part", i), "name", f"duplicate part name '{p.name}' (also part #{seen[p.name] + 1})",
                            f"part {p.name}")
        seen[p.name] = i
        if p.driver is not None:
            if p.driver in used:
                raise ctx.error(("part", i), "driver",
                                f"driver '{p.driver}' is already wired in by part {used[p.driver]}", f"part {p.name}")
            used[p.driver] = p.name
    for d in drivers:
        if d.name not in used:
            raise ctx.error(("driver", d.name), None,
                            f"driver '{d.name}' is defined but no [[part]] of type driver wires it in",
                            f"[driver.{d.name}]")


def _target(r: _Reader, driver_names: set[str]) -> TargetSpec:
    d = DEFAULTS["target"]
    band = None
    if r.has("band"):
        raw = r.raw("band")
        if not isinstance(raw, list) or len(raw) != 2:
            raise r.error("band", f"expected [low, high] in Hz, got {raw!r}")
        try:
            lo, hi = (parse_value(v, "Hz") for v in raw)
        except UnitsError as e:
            raise r.error("band", e.message) from None
        if hi <= lo:
            raise r.error("band", "the high end must be above the low end")
        band = (lo, hi)
    level: float | str = d["level"]
    if r.has("level"):
        raw = r.raw("level")
        if raw == "auto":
            level = "auto"
        elif isinstance(raw, (int, float)) and not isinstance(raw, bool) and math.isfinite(raw) and abs(raw) <= 300:
            level = float(raw)
        else:
            raise r.error("level", f"expected \"auto\" or a level in dB SPL (-300 to 300), got {_short(raw)}")
    curve = r.text("curve", d["curve"])
    reference = r.choice("reference", ("on_axis", "listening_window"), d["reference"])
    ways = []
    w_table = r.sub("way", "[target.way]")
    for wname in w_table.data:
        w_table.used.add(wname)
        if wname not in driver_names:
            raise w_table.error(wname, f"no driver named '{wname}'; defined drivers: {', '.join(sorted(driver_names))}")
        ways.append(_way(wname, w_table.sub(wname, f"[target.way.{wname}]")))
    r.done()
    return TargetSpec(band=band, level=level, curve=curve, ways=tuple(ways), reference=reference)


def _way(name: str, r: _Reader) -> WayTarget:
    d = DEFAULTS["way"]
    wtype = r.choice("type", ("lowpass", "highpass", "bandpass", "fullrange"), None)
    if wtype is None:
        raise r.error("type", "missing; expected lowpass, highpass or bandpass")
    alignment = r.choice("alignment", ("LR", "BW", "Bessel"), d["alignment"])
    order = r.number("order", d["order"], integer=True, minimum=1, maximum=8)
    if alignment == "LR" and order % 2:
        raise r.error("order", f"a Linkwitz-Riley alignment has an even order (2, 4, 6, 8), got {order}")
    fc = fc_low = fc_high = None
    if wtype == "bandpass":
        fc_low = r.value("fc_low", "Hz", required=True)
        fc_high = r.value("fc_high", "Hz", required=True)
        if fc_high <= fc_low:
            raise r.error("fc_high", "must be above fc_low")
        if r.has("fc"):
            raise r.error("fc", "a bandpass takes fc_low and fc_high, not fc")
    elif wtype != "fullrange":
        fc = r.value("fc", "Hz", required=True)
    polarity = r.choice("polarity", ("auto", "normal", "inverted"), d["polarity"])
    r.done()
    return WayTarget(driver=name, type=wtype, alignment=alignment, order=order, fc=fc, fc_low=fc_low,
                     fc_high=fc_high, polarity=polarity)


def _cost(r: _Reader) -> CostSpec:
    d = DEFAULTS["cost"]
    spec = CostSpec(
        way=r.number("way", d["way"], minimum=0.0, maximum=MAX_WEIGHT),
        sum=r.number("sum", d["sum"], minimum=0.0, maximum=MAX_WEIGHT),
        phase=r.number("phase", d["phase"], minimum=0.0, maximum=MAX_WEIGHT),
        impedance=r.number("impedance", d["impedance"], minimum=0.0, maximum=MAX_WEIGHT),
        impedance_min=r.value("impedance_min", "ohm", d["impedance_min"], allow_zero=True),
        stress=r.number("stress", d["stress"], minimum=0.0, maximum=MAX_WEIGHT),
        early_reflections=r.number("early_reflections", d["early_reflections"], minimum=0.0, maximum=MAX_WEIGHT),
        sound_power=r.number("sound_power", d["sound_power"], minimum=0.0, maximum=MAX_WEIGHT),
    )
    r.done()
    return spec


def _search(r: _Reader) -> SearchSpec:
    d = DEFAULTS["search"]
    robust = 0
    if r.has("robust"):
        rr = r.sub("robust", "[search.robust]")
        robust = rr.number("samples", 0, integer=True, minimum=1, maximum=100000)
        rr.done()
    spec = SearchSpec(
        optimizer=r.text("optimizer", d["optimizer"]),
        budget=r.number("budget", d["budget"], integer=True, minimum=1, maximum=10**9),
        seed=r.number("seed", d["seed"], integer=True, minimum=0),
        time_limit=r.value("time_limit", "s", d["time_limit"]),
        polish=r.boolean("polish", d["polish"]),
        robust_samples=robust,
    )
    r.done()
    return spec


def _snap(r: _Reader) -> SnapSpec:
    d = DEFAULTS["snap"]
    series = dict(d["series"])
    if r.has("series"):
        raw = r.raw("series")
        if isinstance(raw, str):
            series = {k: raw for k in series}
        elif isinstance(raw, dict):
            for k, v in raw.items():
                if k not in series:
                    raise r.error("series", f"unknown part kind '{k}'; expected L, C or R")
                if not isinstance(v, str):
                    raise r.error("series", f"expected a series name such as \"E12\" for {k}, got {v!r}")
                series[k] = v
        else:
            raise r.error("series", f"expected a series name or a table {{L = \"E12\", ...}}, got {raw!r}")
        from ..series import check_name

        for k, v in series.items():
            try:
                series[k] = check_name(v)
            except XoFitError as e:
                raise r.error("series", f"{k}: {e.message}") from None
    inventory = r.path("inventory") if r.has("inventory") else None
    combine = r.number("combine", d["combine"], integer=True, minimum=1, maximum=2)
    top_up = r.text("top_up", d["top_up"])
    if top_up is not None:
        from ..series import check_name

        try:
            top_up = check_name(top_up)
        except XoFitError as e:
            raise r.error("top_up", e.message) from None
    r.done()
    return SnapSpec(series=FrozenMap(series), inventory=inventory, combine=combine, top_up=top_up)


def _spread(r: _Reader) -> SpreadSpec:
    d = DEFAULTS["spread"]
    tol = dict(d["tolerance"])
    if r.has("tolerance"):
        raw = r.raw("tolerance")
        if not isinstance(raw, dict):
            raise r.error("tolerance", f"expected a table such as {{R = \"5%\", L = \"5%\", C = \"5%\"}}, got {raw!r}")
        for k, v in raw.items():
            if k not in tol:
                raise r.error("tolerance", f"unknown part kind '{k}'; expected R, L or C")
            try:
                tol[k] = parse_percent(v)
            except UnitsError as e:
                raise r.error("tolerance", f"{k}: {e.message}") from None
    spec = SpreadSpec(
        samples=r.number("samples", d["samples"], integer=True, minimum=1, maximum=10**8),
        seed=r.number("seed", d["seed"], integer=True, minimum=0),
        distribution=r.choice("distribution", ("uniform", "normal"), d["distribution"]),
        band_db=r.number("band_db", d["band_db"], minimum=0.0, maximum=100.0),
        qmc=r.boolean("qmc", d["qmc"]),
        rms_limit_db=r.number("rms_limit_db", d["rms_limit_db"], minimum=0.0, maximum=100.0),
        tolerance=FrozenMap(tol),
    )
    r.done()
    return spec
