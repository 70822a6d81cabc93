"""A job's drivers as Thiele-Small models in their boxes: the ``[driver.NAME.ts]`` and ``.box`` tables completed.

The job reader checks each value's unit and range; here the given set is completed by Small's relations
(:func:`xo_fit.physics.thiele_small.complete`, with the job's speed of sound), the box is checked against it
(a box needs Vas) and, for a job with a drive level ([stress] power), a driver whose ``xmax`` is given must
determine its cone's motion (Sd and a scale of the moving system). Errors name the file, the line of the
table and the table.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from xo_fit.errors import JobError, XoFitError
from xo_fit.physics.box import Box, alpha, impedance, make_box
from xo_fit.physics.thiele_small import ThieleSmallSet, complete


@dataclass(frozen=True)
class DriverModel:
    """A driver's completed parameter set and its box (``Box()``, an infinite baffle, without a box table)."""

    ts: ThieleSmallSet
    box: Box

    @property
    def moves(self) -> bool:
        """Whether the set determines the cone's motion (Sd and a scale: Bl, Mms, Cms, Rms known)."""
        return all(getattr(self.ts, k) is not None for k in ("bl", "mms", "cms", "rms"))


def _line(job, table: tuple) -> int | None:
    """The line of ``table`` in the job file, for an error found after reading (None without a file)."""
    from xo_fit.job.reading import job_line

    return job_line(job, table)


def driver_model(job, spec) -> DriverModel | None:
    """The model of driver ``spec`` (a :class:`~xo_fit.job.model.DriverSpec` of ``job``), or None without a
    ``[driver.NAME.ts]`` table.

    Raises
    ------
    JobError
        The given keys do not determine Re, fs, Qms and Qes, or contradict one another (over 1 %); a box
        without Vas; with [stress] power, an xmax whose set does not determine the cone's motion.
    """
    if spec.ts is None:
        return None
    table = ("driver", spec.name, "ts")
    label = f"[driver.{spec.name}.ts]"
    try:
        ts = complete(dict(spec.ts), key=label, c=job.speed_of_sound)
        box = Box()
        if spec.box is not None:
            table, label = ("driver", spec.name, "box"), f"[driver.{spec.name}.box]"
            b = spec.box
            box = make_box(b.kind, b.volume, b.tuning, b.ql if b.kind == "vented" else None, key=label)
            alpha(ts, box, key=label)
        if ts.xmax is not None and job.stress.power:
            table, label = ("driver", spec.name, "ts"), f"[driver.{spec.name}.ts]"
            ts.need(("bl", "mms", "cms", "rms"), "the cone excursion against xmax", key=label)
    except JobError:
        raise
    except XoFitError as e:
        raise JobError(e.message, path=job.path, line=_line(job, table), key=label) from None
    return DriverModel(ts, box)


def driver_models(job) -> dict[str, DriverModel]:
    """Every driver of ``job`` with a ``[driver.NAME.ts]`` table, by name, completed and checked."""
    out = {}
    for spec in job.drivers:
        m = driver_model(job, spec)
        if m is not None:
            out[spec.name] = m
    return out


def model_impedance(job, spec, f: np.ndarray) -> np.ndarray:
    """The impedance (complex ohm, shape (F,)) of driver ``spec`` by its model in its box at frequencies ``f``
    (Hz, (F,)): ``impedance = "model"``."""
    m = driver_model(job, spec)
    if m is None:  # the job reader refuses impedance = "model" without a ts table
        raise JobError(f"driver '{spec.name}' has no [driver.{spec.name}.ts] for impedance = \"model\"",
                       path=job.path, key=f"[driver.{spec.name}]")
    return impedance(m.ts, m.box, f)
