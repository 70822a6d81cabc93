"""The settings of a job's stages, one frozen dataclass per table: ``[target]`` (with each way's target),
``[cost]``, ``[search]``, ``[snap]``, ``[spread]``, ``[stress]`` and ``[limits]``.

Each default is declared here once, on its field; :data:`xo_fit.job.model.DEFAULTS` is derived from these fields
(docs/job-format.md lists every key with its type, unit and default). Values are SI (ohm, Hz, s, W); levels and
bands in dB.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from collections.abc import Mapping


class FrozenMap(dict):
    """A read-only dict that pickles (MappingProxyType does not), for the job's small tables."""

    def _readonly(self, *args, **kwargs):
        raise TypeError("a job's tables are read-only")

    __setitem__ = __delitem__ = clear = pop = popitem = setdefault = update = _readonly

    def __reduce__(self):
        return (FrozenMap, (dict(self),))

    def __hash__(self):  # frozen dataclasses holding it stay hashable
        return hash(tuple(sorted(self.items())))



@dataclass(frozen=True)
class WayTarget:
    """The acoustic target of one way (one driver): its filter ``type``, ``alignment`` and ``order``, its
    crossover ``fc`` (a band-pass's ``fc_low`` and ``fc_high``) in Hz, and its ``polarity``."""

    driver: str
    type: str
    alignment: str = "LR"
    order: int = 4
    fc: float | None = None
    fc_low: float | None = None
    fc_high: float | None = None
    polarity: str = "auto"


@dataclass(frozen=True)
class TargetSpec:
    """The ``[target]`` table: ``band`` (low, high) in Hz (None: the grid's), ``level`` in dB SPL or "auto", the
    shaping ``curve``, the ``ways``' targets and the ``reference`` curve ("on_axis" or "listening_window")."""

    band: tuple[float, float] | None = None
    level: float | str = "auto"
    curve: str = "flat"
    ways: tuple[WayTarget, ...] = ()
    reference: str = "on_axis"


@dataclass(frozen=True)
class CostSpec:
    """The ``[cost]`` weights (dimensionless; 0 leaves a term out) and ``impedance_min``, the floor in ohm."""

    way: float = 1.0
    sum: float = 1.0
    phase: float = 0.5
    impedance: float = 1.0
    impedance_min: float = 0.0
    stress: float = 0.0
    early_reflections: float = 0.0
    sound_power: float = 0.0
    preference: float = 0.0
    protection: float = 0.0


@dataclass(frozen=True)
class SearchSpec:
    """The ``[search]`` table: ``budget`` in cost evaluations, ``time_limit`` in s (None: none), and
    ``robust_samples``, the tolerance draws each evaluation's cost is the mean over (0: a plain fit)."""

    optimizer: str = "auto"
    budget: int = 20000
    seed: int = 1
    time_limit: float | None = None
    polish: bool = True
    robust_samples: int = 0


@dataclass(frozen=True)
class SnapSpec:
    """The ``[snap]`` table: each kind's ``series``, the ``inventory`` file, ``combine`` and ``top_up``."""

    series: Mapping[str, str] = field(default_factory=lambda: FrozenMap({"L": "E12", "C": "E12", "R": "E24"}))
    inventory: Path | None = None
    combine: int = 1
    top_up: str | None = None


@dataclass(frozen=True)
class SpreadSpec:
    """The ``[spread]`` table; ``band_db`` and ``rms_limit_db`` in dB, each kind's ``tolerance`` a fraction."""

    samples: int = 2000
    seed: int = 1
    distribution: str = "uniform"
    band_db: float = 1.0
    qmc: bool = False
    tolerance: Mapping[str, float] = field(default_factory=lambda: FrozenMap({"R": 0.05, "L": 0.05, "C": 0.05}))
    rms_limit_db: float = 1.0


@dataclass(frozen=True)
class StressSpec:
    """Drive level for the stress figures: ``power`` W into ``rated_impedance`` ohm (both None: no stresses)."""

    power: float | None = None
    rated_impedance: float | None = None


@dataclass(frozen=True)
class LimitsSpec:
    """The ``[limits]`` table: constraints every design must meet before its cost counts (feasibility first).

    ``present``: the job has the table (without it nothing is constrained and ``breakup_db`` is not a limit);
    ``impedance_min``: ohm, 0 for none; ``ratings``/``protection``: every rated part / protected driver within
    its rating at the [stress] drive; ``breakup_db``: dB each way's stop-band output stays under the level, 0 for
    none."""

    present: bool = False
    impedance_min: float = 0.0
    ratings: bool = False
    protection: bool = False
    breakup_db: float = 20.0

    @property
    def active(self) -> bool:
        """Whether any limit constrains the search."""
        return self.present and (self.impedance_min > 0 or self.ratings or self.protection or self.breakup_db > 0)
