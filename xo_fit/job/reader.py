"""A job file (or mapping) read, checked and built into a frozen :class:`~xo_fit.job.model.Job`."""

from __future__ import annotations

import json
import re
import tomllib
from pathlib import Path
from typing import Any
from collections.abc import Mapping

import numpy as np

from xo_fit.errors import JobError, read_user_text
from xo_fit.job.model import (is_name, JOB_NAME_PATTERN, DEFAULTS, MAX_PARTS, OHMS, VOLTS, Job)
from xo_fit.job.settings import FrozenMap
from xo_fit.job.reading import (Lines, Reader, Context)
from xo_fit.job.parts import (read_part, check_plausible, check_parts)
from xo_fit.job.tables import check_protection
from xo_fit.job.baffle import read_baffle, check_baffle
from xo_fit.job.limits import check_limits, read_limits
from xo_fit.job.placement import check_distance, read_distance
from xo_fit.job.tables import (read_stress, read_grid, read_driver, read_target, read_cost, read_search, read_snap,
                               read_spread)

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
    data, ctx = read_document(source, base, copy=copy)
    if "sweep" in data:
        raise JobError("this job has a [sweep] of variants: run it with 'xo-fit batch' (the other commands take "
                       "one design)", path=ctx.path, line=ctx.lines.find(("sweep",)), key="[sweep]")
    return build_job(data, ctx)


def read_document(source: str | Path | Mapping[str, Any], base: str | Path | None = None, *,
          copy: bool = True) -> tuple[dict, Context]:
    """A job document and its reading context, before any table is read.

    Parameters
    ----------
    source : str, Path or Mapping
        A TOML file's path, or a mapping with the TOML's structure.
    base : str or Path, optional
        The folder relative data paths are taken from (default: the file's folder; for a mapping, the current
        folder).
    copy : bool
        Deep-copy a mapping (False: the caller gives it away).

    Returns
    -------
    tuple of (dict, Context)
        The document and its context (file, folder, line finder, stem).

    Raises
    ------
    JobError
        For a file that cannot be read or is not valid TOML (with the line where TOML gives one).
    """
    if isinstance(source, Mapping):
        import copy as copying

        data = copying.deepcopy(dict(source)) if copy else dict(source)
        folder = Path(base if base is not None else ".").resolve()
        return data, Context(path=None, folder=folder, lines=Lines(""), stem="job")
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
    ctx = Context(path=path.resolve(), folder=folder, lines=Lines(text), stem=path.stem)
    return data, ctx


def build_job(data: dict, ctx: Context) -> Job:
    """The frozen :class:`Job` of a read document: every table read and checked, then checked across tables."""
    top = Reader(data, (), "job", ctx)
    name = top.text("name", ctx.stem)
    if not is_name(name, JOB_NAME_PATTERN):
        raise top.error("name", f"{name!r} cannot name files and folders: no '/', '\\', control characters "
                                "(a line break), and not '.' or '..'")

    grid = read_grid(top.sub("grid", "[grid]"))
    src = top.sub("source", "[source]")
    voltage = src.value("voltage", "V", DEFAULTS["source"]["voltage"])
    if not VOLTS[0] <= voltage <= VOLTS[1]:
        raise src.error("voltage", f"{voltage:g} V is outside {VOLTS[0]:g} to {VOLTS[1]:g} V")
    resistance = src.value("resistance", "ohm", DEFAULTS["source"]["resistance"], allow_zero=True, limits=OHMS)
    src.done()
    ac = top.sub("acoustics", "[acoustics]")
    c = ac.value("speed_of_sound", "m/s", DEFAULTS["acoustics"]["speed_of_sound"])
    distance = read_distance(ac)
    ac.done()

    drv_table = top.sub("driver", "[driver]")
    drivers = []
    for dname in drv_table.data:
        drv_table.used.add(dname)
        drivers.append(read_driver(dname, drv_table.sub(dname, f"[driver.{dname}]"), voltage))
    if not drivers:
        raise ctx.error((), None, "no drivers: add at least one [driver.NAME] table", "job")
    check_distance(ac, distance, drivers)
    baffle = read_baffle(top.sub("baffle", "[baffle]")) if top.has("baffle") else None
    check_baffle(ctx, baffle, drivers, distance)
    check_same_angles(drivers, ctx)

    parts = read_parts(top, data, drivers, ctx)

    target = read_target(top.sub("target", "[target]"), {d.name for d in drivers})
    if target.band is not None:
        f = grid.frequencies
        if not np.any((f >= target.band[0]) & (f <= target.band[1])):
            raise ctx.error(("target",), "band", f"the band {target.band[0]:g}-{target.band[1]:g} Hz holds no point "
                            f"of the grid ({f[0]:g}-{f[-1]:g} Hz, {f.size} points)", "[target] band")
    cost = read_cost(top.sub("cost", "[cost]"))
    search = read_search(top.sub("search", "[search]"))
    snap = read_snap(top.sub("snap", "[snap]"))
    spread = read_spread(top.sub("spread", "[spread]"))
    stress = read_stress(top.sub("stress", "[stress]"))
    if cost.stress > 0 and not stress.power:
        raise ctx.error(("cost",), "stress", "a stress weight needs the drive: [stress] power and rated_impedance",
                        "[cost] stress")
    if cost.stress > 0 and not any(p.rating for p in parts):
        ctx.warn(("cost",), "stress", "[cost] stress is set but no part has a rating: the term is always 0")
    check_protection(cost, stress, drivers, ctx)
    limits = read_limits(top.sub("limits", "[limits]"), "limits" in data)
    check_limits(limits, stress, parts, drivers, bool(target.ways), ctx)
    top.done()
    document = dict(data)
    document["name"] = name
    lines = {p.name: ctx.lines.find(("part", i), "nodes") for i, p in enumerate(parts)}
    return Job(name=name, path=ctx.path, grid=grid, source_voltage=voltage, source_resistance=resistance,
               speed_of_sound=c, drivers=tuple(drivers), parts=parts, target=target, cost=cost,
               search=search, snap=snap, spread=spread, stress=stress, limits=limits, folder=ctx.folder,
               document=json.dumps(document, default=str),
               part_lines=FrozenMap({k: v for k, v in lines.items() if v is not None}),
               warnings=tuple(ctx.warnings), distance=distance, baffle=baffle)


def check_same_angles(drivers: list, ctx: Context) -> None:
    """Every driver of an off-axis job covers the same angles (or none has angle files)."""
    with_angles = [d for d in drivers if d.angles is not None]
    if with_angles:
        first = with_angles[0]
        assert first.angles is not None  # with_angles holds the drivers that have angles
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


def read_parts(top: Reader, data: dict, drivers: list, ctx: Context) -> tuple:
    """The [[part]] tables, each read and checked, then checked together."""
    top.used.add("part")
    raw_parts = data.get("part", [])
    if not isinstance(raw_parts, list) or not raw_parts:
        raise ctx.error((), "part", "no parts: the network needs [[part]] tables", "job")
    if len(raw_parts) > MAX_PARTS:
        raise ctx.error((), "part", f"{len(raw_parts)} parts: a network may have at most {MAX_PARTS} [[part]] tables "
                        "(drivers included)", "job")
    driver_names = {d.name for d in drivers}
    parts = tuple(read_part(Reader(p, ("part", i), f"[[part]] #{i + 1}", ctx), driver_names)
                  for i, p in enumerate(raw_parts))
    for i, p in enumerate(parts):
        check_plausible(p, ctx, ("part", i))
    check_parts(parts, drivers, ctx)
    return parts
