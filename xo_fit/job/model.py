"""Job files: TOML in, a frozen and validated :class:`Job` out; the dataclasses a job is made of.

The format, every key with its type, unit and default, is specified in ``docs/job-format.md``. Every default is
declared once, on the field of the dataclass that holds it (``CostSpec.phase = 0.5``); :data:`DEFAULTS`, the
defaults by table and key as the readers and the docs take them, is derived from those fields. One table has no
field of its own: ``[driver.NAME.position]``'s x and y (a driver's position is the tuple (x, y), a key left out
0 m) are declared in :data:`DEFAULTS` itself. Validation is strict: an unknown key, a value of the wrong kind or
unit, or a part that cannot exist is a :class:`~xo_fit.errors.JobError` that names the file, the line (found in
the file's text where it can be), the key and what was expected.

Values in the file are SI numbers or engineering-notation strings (:mod:`xo_fit.units`), inside a :class:`Job`
floats in SI units (ohm, H, F, Hz, V, m, s; levels in dB); relative paths are taken from the job file's folder.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any
from collections.abc import Mapping


from xo_fit.constants import PART_UNIT, SPEED_OF_SOUND
from xo_fit.grid import Grid
from xo_fit.job.settings import (CostSpec, FrozenMap, LimitsSpec, SearchSpec, SnapSpec, SpreadSpec, StressSpec,
                                 TargetSpec, WayTarget)
from xo_fit.job.ranges import (GRID_HZ, JOB_NAME_PATTERN, MAX_ANGLE_VALUES, MAX_PARTS, MAX_POINTS,  # noqa: F401
                               MAX_WEIGHT, NAME_PATTERN, NODE_PATTERN, OFFSET_M, OHMS, POWER_W, RATING, VOLTS,
                               is_name)


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
class BaffleSpec:
    """The cabinet's front (``[baffle]``): its edges from the reference point, m, and the box depth (m, or None;
    read but not used by the thin-baffle model, docs/baffle.md)."""

    x: tuple[float, float]  # left, right
    y: tuple[float, float]  # bottom, top
    depth: float | None = None


@dataclass(frozen=True)
class Resistive:
    """An ideal driver impedance: ``resistance`` ohm, zero phase."""

    resistance: float


@dataclass(frozen=True)
class ThieleSmall:
    """A driver impedance from its small-signal parameters (R. H. Small, JAES 20(5), 1972): ``re`` (ohm),
    ``le`` (H), ``fs`` (Hz), ``qms`` and ``qes`` (dimensionless); its curve is
    :func:`xo_fit.physics.thiele_small.small_signal_impedance`:

    Z = Re + Z_Le + Res / (1 + Qms (s/ws + ws/s)), Res = Re Qms / Qes, where the voice-coil inductance is
    Z_Le = le * (j w)^n * w_ref^(1-n) with w_ref = 2 pi 1 kHz and n = ``le_exponent`` (W. M. Leach, JAES 50(6),
    2002): n = 1 is an ideal inductor, n < 1 a lossy one whose |Z_Le| at 1 kHz is still w_ref * le. A second
    lossy-coil form adds an inductance ``l2`` (H) with ``r2`` (ohm) across it in series (Z_L2 = j w L2 R2 /
    (R2 + j w L2); W. M. Leach, JAES 2002; J. R. Wright, JAES 38(10), 1990); both zero leave it out.
    """

    re: float
    le: float = field(default=0.0, kw_only=True)  # H; keyword-only: re, le, fs, ... keep their order
    fs: float
    qms: float
    qes: float
    le_exponent: float = 1.0
    l2: float = 0.0
    r2: float = 0.0


@dataclass(frozen=True)
class ModelImpedance:
    """``impedance = "model"``: the driver's impedance is that of its ``[driver.NAME.ts]`` set in its
    ``[driver.NAME.box]`` (an infinite baffle without one), worked out by :mod:`xo_fit.physics.box`."""


#: Every key of a ``[driver.NAME.ts]`` table and its base unit ("" for a plain number).
TS_UNITS: Mapping[str, str] = MappingProxyType({
    "re": "ohm", "le": "H", "fs": "Hz", "qms": "", "qes": "", "qts": "", "vas": "m3", "sd": "m2", "bl": "T m",
    "mms": "kg", "cms": "m/N", "rms": "kg/s", "xmax": "m", "power": "W", "l2": "H", "r2": "ohm"})


@dataclass(frozen=True)
class BoxSpec:
    """A driver's box as the job gives it (SI): ``kind`` "closed" or "vented", the net ``volume`` (m^3), the
    vented box's ``tuning`` (Hz; None for a closed box) and leakage ``ql``."""

    kind: str
    volume: float
    tuning: float | None = None
    #: Leakage quality of a vented box when none is given: 7, common practice (Small 1973 reports QL of about
    #: 5 to 20 for real boxes; the range is recalled, not checked against the text).
    ql: float = 7.0


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

    def twins(self) -> list[tuple[tuple[str, int], Path, str]]:
        """The files listed for a position that :meth:`files` already takes from another file (-180 and 180, or
        the rear on both orbits): (position, file, its name as "h-180"/"v180"), to be checked against it."""
        used = self.files()
        out = []
        for orbit, pattern, angles in (("h", self.horizontal, self.horizontal_angles),
                                       ("v", self.vertical, self.vertical_angles)):
            for a in angles:
                pos = position(orbit, a)
                path = Path(pattern.replace("{angle}", str(a))) if pattern is not None else None
                if path is not None and pos in used and used[pos][0] != path:
                    out.append((pos, path, f"{orbit}{a}"))
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
    """One measured driver: where its response and impedance come from (measured at ``reference_voltage``, V),
    and how to place it (``offset``: its acoustic centre's depth behind the reference plane, m)."""

    name: str
    response: FileCurve | FlatResponse | SplicedResponse
    impedance: FileCurve | Resistive | ThieleSmall | ModelImpedance
    reference_voltage: float = 2.83
    offset: float = 0.0
    phase: str = "measured"
    impedance_phase: str = "measured"
    extend_low: str = "none"
    extend_high: str = "none"
    impedance_extend_low: str = "none"
    impedance_extend_high: str = "none"
    angles: AngleSpec | None = None
    position: tuple[float, float] | None = None  # (x, y) of the acoustic centre in the baffle plane, m; None: not given
    about: str | None = None  # what the files were measured about: "reference", "driver", None (not given)
    ts: Mapping[str, float] | None = None  # the [driver.NAME.ts] values given, SI (the rest is derived later)
    box: BoxSpec | None = None
    radius: float | None = None  # effective piston radius, m (the baffle's diffraction); None: a point source
    baffle: bool = False  # the response (a half-space curve or a near field) lacks the cabinet's edges


@dataclass(frozen=True)
class PartSpec:
    """One part of the netlist (a ``[[part]]`` table).

    ``value``, ``min`` and ``max`` are SI (ohm, H, F) or None. A part is free when it has a range and is not
    ``fixed``; otherwise it holds ``value``. ``dcr`` is a coil's series resistance: a float in ohm, or the bare
    wire diameter in m when ``dcr_wire`` is True (see :mod:`xo_fit.physics.coils`); ``esr`` a capacitor's, in
    ohm. ``tolerance`` is a fraction (0.05 for 5 %; None: the [spread] default of its kind).
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
        """The unit of the part's value: "ohm", "H" or "F" ("" for a driver)."""
        return PART_UNIT.get(self.type, "")


@dataclass(frozen=True)
class Job:
    """A validated job. Every value is SI; every path is absolute.

    ``path`` is the job file (None for one built from a mapping), ``folder`` the folder its relative paths were
    resolved against, ``document`` the resolved document (after [sweep] expansion) as JSON text, from which
    :func:`load_job` rebuilds the same job, ``part_lines`` each part's line in the file (for later messages).
    """

    name: str
    path: Path | None
    grid: Grid
    source_voltage: float = field(default=2.83, kw_only=True)  # V, [source] voltage
    source_resistance: float = field(default=0.0, kw_only=True)  # ohm, [source] resistance
    speed_of_sound: float = field(default=SPEED_OF_SOUND, kw_only=True)  # m/s, [acoustics] speed_of_sound
    drivers: tuple[DriverSpec, ...]
    parts: tuple[PartSpec, ...]
    target: TargetSpec
    cost: CostSpec
    search: SearchSpec
    snap: SnapSpec
    spread: SpreadSpec
    stress: StressSpec = StressSpec()
    limits: LimitsSpec = LimitsSpec()
    folder: Path = Path(".")
    document: str = "{}"
    part_lines: Mapping[str, int] = field(default_factory=lambda: FrozenMap())  # line of each part's nodes
    warnings: tuple[str, ...] = ()  # doubtful but legal values, one line each
    swept: Mapping[str, Any] = field(default_factory=lambda: FrozenMap())  # a [sweep] variant's values, by label
    distance: float = math.inf  # m from the reference point to every listening point; inf: the far field
    baffle: BaffleSpec | None = None  # the cabinet's front ([baffle]), or None

    @property
    def data(self) -> dict:
        """The resolved job document (a fresh dict with the TOML's structure)."""
        return json.loads(self.document)

    def driver(self, name: str) -> DriverSpec:
        """The driver named ``name``; a KeyError when the job has none."""
        for d in self.drivers:
            if d.name == name:
                return d
        raise KeyError(name)

    def part(self, name: str) -> PartSpec:
        """The part named ``name`` (a driver's part too); a KeyError when the job has none."""
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
        """The parts the search moves (:attr:`PartSpec.free`), in file order."""
        return tuple(p for p in self.parts if p.free)


def _defaults(cls: type, keys: str = "", **renamed: str) -> dict[str, Any]:
    """A job table's defaults read off the fields of the dataclass ``cls``: each of ``keys`` (space separated)
    names a field of its own name, ``renamed`` maps a key to a field of another name."""
    declared = {f.name: f for f in dataclasses.fields(cls)}
    out: dict[str, Any] = {}
    for key, name in [(k, k) for k in keys.split()] + list(renamed.items()):
        f = declared[name]
        if f.default is not dataclasses.MISSING:
            out[key] = f.default
        elif f.default_factory is not dataclasses.MISSING:
            out[key] = dict(f.default_factory())
        else:
            raise TypeError(f"{cls.__name__}.{name} declares no default")
    return out


#: Every default of the job format by table and key, derived from the fields (the module's docstring).
DEFAULTS: Mapping[str, Mapping[str, Any]] = MappingProxyType({
    "grid": _defaults(Grid, "f_min f_max points"),
    "source": _defaults(Job, voltage="source_voltage", resistance="source_resistance"),
    "acoustics": {**_defaults(Job, "speed_of_sound"),  # the far field (Job.distance inf) is written "far"
                  "distance": "far" if math.isinf(Job.distance) else Job.distance},
    "driver": _defaults(DriverSpec, "reference_voltage offset phase impedance_phase extend_low extend_high "
                                    "impedance_extend_low impedance_extend_high"),
    "position": {"x": 0.0, "y": 0.0},
    "splice": _defaults(DriverSpec, "baffle"),
    "thiele_small": _defaults(ThieleSmall, "le le_exponent l2 r2"),
    "box": _defaults(BoxSpec, "ql"),
    "angles": _defaults(AngleSpec, "mirror"),
    "part": _defaults(PartSpec, "fixed keep dcr esr"),
    "target": _defaults(TargetSpec, "level curve reference"),
    "way": _defaults(WayTarget, "order alignment polarity"),
    "cost": _defaults(CostSpec, "way sum phase impedance impedance_min stress early_reflections sound_power "
                                "preference protection"),
    "search": _defaults(SearchSpec, "optimizer budget seed time_limit polish"),
    "snap": _defaults(SnapSpec, "series inventory combine top_up"),
    "stress": _defaults(StressSpec, "power rated_impedance"),
    "limits": _defaults(LimitsSpec, "impedance_min ratings protection breakup_db"),
    "spread": _defaults(SpreadSpec, "samples seed distribution band_db qmc rms_limit_db tolerance"),
})


#: Every key each table takes (what "did you mean" chooses from).
KEYS: Mapping[str, frozenset[str]] = MappingProxyType({k: frozenset(v.split()) for k, v in {
    "top": "name grid source acoustics driver part target cost search snap spread stress limits sweep baffle",
    "grid": "f_min f_max points per_octave",
    "source": "voltage resistance",
    "acoustics": "speed_of_sound distance",
    "driver": "response impedance reference_voltage offset position about phase impedance_phase extend_low "
              "extend_high impedance_extend_low impedance_extend_high ts box radius",
    "position": "x y",
    "thiele_small": "re le fs qms qes le_exponent l2 r2",
    "ts": " ".join(TS_UNITS),
    "box": "type volume tuning ql",
    "angles": "horizontal vertical horizontal_angles vertical_angles mirror about",
    "splice": "near far splice_hz file baffle",
    "baffle": "x y depth",
    "part": "name type nodes driver value min max fixed dcr esr tolerance rating series keep",
    "target": "band level curve way reference",
    "way": "type alignment order fc fc_low fc_high polarity",
    "cost": "way sum phase impedance impedance_min stress early_reflections sound_power preference "
            "protection",
    "search": "optimizer budget seed time_limit polish robust",
    "robust": "samples",
    "snap": "series inventory combine top_up",
    "spread": "samples seed distribution band_db qmc rms_limit_db tolerance",
    "stress": "power rated_impedance",
    "limits": "impedance_min ratings protection breakup_db",
}.items()})
