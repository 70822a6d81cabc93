"""Designs as values: a scored design (:class:`Design`) and a tolerance spread (:class:`Spread`).

A :class:`Design` is one set of part values of a job, simulated and scored,
with what the stage that made it adds (search figures, snap choices). It knows
how to become its result.json document (:meth:`Design.to_json`) and how to
write what the command line writes (:meth:`Design.save`). :func:`load_result`
rebuilds a design from a result.json alone: the result carries the resolved
job document and the job's folder (relative to the result and absolute), so a
moved result folder or a batch variant's result loads like any other.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from xo_fit.constants import RESULT_FORMAT
from xo_fit.errors import DataError, XoFitError

#: A stress this far over its limit (0.5 %, 0.02 dB) still counts as within the rating: the fit's quadratic
#: stress term approaches a limit from outside, and no part rating is that exact.
RATING_TOLERANCE = 0.005
#: A free value within this log distance of a bound (1 %) rests on it.
LIMIT_LOG_DISTANCE = math.log(1.01)


def _version() -> str:
    from xo_fit import __version__

    return __version__


@dataclass(eq=False)
class Design:
    """One design of a job: part values, their simulation and score, and what its stage adds.

    ``system`` is the loaded job (:class:`~xo_fit.model.system.System`), ``scored`` the simulation and cost
    (:class:`~xo_fit.search.fitting.Scored`), ``stage`` one of "simulate", "fit", "snap", "spread"; ``sections``
    are the stage's own result.json sections (``search``, ``snap``, ...) and ``source`` the provenance extras
    (``from``, ``inventory``); ``part_info`` adds entries per part (a snap's series, source and combination);
    ``info`` holds objects for the console and is never saved.
    """

    system: Any
    scored: Any
    stage: str
    sections: dict = field(default_factory=dict)
    source: dict = field(default_factory=dict)
    part_info: dict = field(default_factory=dict)
    info: dict = field(default_factory=dict)
    label: str | None = None
    tables: dict = field(default_factory=dict)  # extra CSV files written with the design: name -> rows (dicts)

    # ------------------------------------------------------------------ figures

    @property
    def job(self):
        return self.system.job

    @property
    def values(self) -> dict[str, float]:
        """Every R, L and C part's value by name, SI (ohm, H, F)."""
        return {n: float(v) for n, v in zip(self.system.part_names, self.scored.values)}

    @property
    def array(self) -> np.ndarray:
        """The values as the solver takes them, (P,) in the job's part order."""
        return self.scored.values

    @property
    def cost(self) -> float | None:
        return self.scored.cost

    @property
    def terms(self) -> dict:
        return dict(self.scored.terms)

    @property
    def metrics(self) -> dict:
        return dict(self.scored.metrics)

    @property
    def preference(self) -> dict | None:
        """An off-axis job's predicted preference (Olive 2004) as result.json holds it, else None."""
        return self.scored.preference

    @property
    def limits(self) -> dict[str, str]:
        """Free parts whose value rests on a bound of their range (within 1 % in log distance): name -> min/max."""
        out = {}
        for p, v in zip(self.job.valued_parts, self.scored.values):
            if not p.free:
                continue
            if abs(math.log(v / p.min)) <= LIMIT_LOG_DISTANCE:
                out[p.name] = "min"
            elif abs(math.log(p.max / v)) <= LIMIT_LOG_DISTANCE:
                out[p.name] = "max"
        return out

    @property
    def hard_limits(self) -> dict | None:
        """result.json's ``limits``: each [limits] limit against this design (:mod:`xo_fit.output.limits`), or
        None without a [limits] table."""
        if "hard_limits" not in self.info:
            from xo_fit.output.limits import limit_figures

            self.info["hard_limits"] = limit_figures(self)
        return self.info["hard_limits"]

    @property
    def findings(self) -> list[dict]:
        """What a designer should look at: unmet limits first, parts resting on a range limit, a load below the
        floor, breakup within 20 dB of the level."""
        from xo_fit.output.limits import breakup_findings, limit_findings
        from xo_fit.units import format_value

        out = limit_findings(self.hard_limits, self.job)
        for name, side in self.limits.items():
            p = self.job.part(name)
            bound = p.min if side == "min" else p.max
            out.append({"kind": "at_limit", "part": name,
                        "text": f"{name} rests on its {side} {format_value(bound, p.unit)}: widen the range, "
                                "or the part may not be needed"})
        out += self._phase_edges()
        if self.scored.cost is not None and not math.isfinite(self.scored.cost):
            out.append({"kind": "infeasible", "part": None,
                        "text": "the design has no finite response at some frequency (an ideal series resonance or "
                                "a short across the source or a driver): give the parts their resistance (dcr, esr) "
                                "or move the values"})
        if self.stage in ("simulate", "fit", "snap", "prune"):
            if "idle" not in self.info:
                from xo_fit.stages.removal import idle_parts

                self.info["idle"] = idle_parts(self.system, self.scored.values, self.scored.cost)
            out += self.info["idle"]
        from xo_fit.output.cautions import protection_findings

        out += protection_findings(self.protection, self.job.stress)
        floor = self.job.cost.impedance_min
        zmin = self.scored.metrics.get("impedance_min_ohm")
        if floor > 0 and zmin is not None and zmin < floor:
            out.append({"kind": "low_impedance", "part": None,
                        "text": f"the load dips to {zmin:.2f} ohm at {self.scored.metrics['impedance_min_hz']:.0f} Hz, "
                                f"below the floor of {floor:g} ohm"})
        if self.scored.level_db is not None:
            out += breakup_findings(self)
        return out

    def _phase_edges(self) -> list[dict]:
        """``phase_edge``: minimum phase derived within an octave of a file's end inside the target band, where the
        Hilbert transform of band-limited data errs by degrees (measured: 24 deg at a file edge, 4.5 two octaves
        in)."""
        out = []
        f = self.system.frequencies
        band = self.job.target.band or (float(f[0]), float(f[-1]))
        for d in self.system.drivers:
            spec = self.job.driver(d.name)
            for what, curve, phase, ext in (
                    ("response", d.response_curve, d.response_phase, (spec.extend_low, spec.extend_high)),
                    ("impedance", d.impedance_curve, d.impedance_phase,
                     (spec.impedance_extend_low, spec.impedance_extend_high))):
                if curve is None or phase != "minimum":
                    continue
                lo, hi = curve.f_range
                # an extended end reaches the grid's: the phase is derived from the extended magnitude there
                lo = min(lo, float(f[0])) if ext[0] != "none" else lo
                hi = max(hi, float(f[-1])) if ext[1] != "none" else hi
                ends = [f"{x:.0f} Hz" for x, near in ((lo, band[0] < 2 * lo), (hi, band[1] > hi / 2)) if near]
                if ends:
                    out.append({"kind": "phase_edge", "part": None,
                                "text": f"{d.name}'s {what} phase is derived (minimum phase) within an octave of its "
                                        f"file's end ({' and '.join(ends)}) inside the target band: expect some "
                                        "degrees of error there; measure further out, or extend the data"})
        return out

    @property
    def breakdown(self) -> dict | None:
        """Where the error lies: per way, per crossover region and for the sum (rms, worst and where), or None
        without way targets (see :meth:`xo_fit.model.cost.CostModel.breakdown`)."""
        if "breakdown" not in self.info:
            from xo_fit.search.fitting import cost_model

            model = cost_model(self.system)
            self.info["breakdown"] = model[0].breakdown(self.scored.values) if model else None
        return self.info["breakdown"]

    @property
    def stress(self) -> dict | None:
        """Part stresses at the job's [stress] drive (sine worst case; programme power for resistors), or None;
        the stress report itself is kept in ``info["stress_report"]``."""
        spec = self.job.stress
        if not spec.power:
            return None
        from xo_fit.model.stress import stresses

        st = self.info.get("stress_report")
        if st is None:
            st = stresses(self.system, self.scored.values, spec.power, spec.rated_impedance)
            self.info["stress_report"] = st
        out = {}
        for p in st.parts:
            e = {"figure": p.sine_worst, "unit": p.unit, "at_hz": p.at_hz}
            if p.programme is not None:
                e["programme_w"] = p.programme
            if p.rating is not None:
                e["rating"] = p.rating
                r = p.kind == "R"  # a resistor: its programme power against half its rating
                judged = p.programme if r and p.programme is not None else p.sine_worst
                limit = p.rating / 2 if r else p.rating
                e["within_rating"] = bool(judged <= limit * (1 + RATING_TOLERANCE))
            out[p.name] = e
        return out

    @property
    def protection(self) -> dict | None:
        """Each protected driver's peak excursion and programme power at the job's [stress] drive against its
        xmax and rating (:func:`xo_fit.model.protection.protection`), or None where nothing is judged."""
        if "protection" not in self.info:
            from xo_fit.model.protection import protection

            self.info["protection"] = protection(self.system, self.scored.sim.voltages)
        return self.info["protection"]

    @property
    def response(self):
        """The response.csv columns as a pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.response_table().columns)

    def response_table(self):
        from xo_fit.search.fitting import target_db
        from xo_fit.output.tables import response_table

        s = self.scored
        names = tuple(d.name for d in self.job.drivers)
        return response_table(self.system.frequencies, names, s.sim.pressure[0], s.sim.total[0], s.sim.impedance[0],
                              target_db(s))

    def off_axis(self) -> tuple | None:
        """An off-axis job's curves of this design: (positions, summed pressure at each, complex Pa (A, F),
        the ANSI/CTA-2034-A curves in Pa^2 (F,) each); None on axis."""
        if not self.system.positions:
            return None
        if "off_axis" not in self.info:
            from xo_fit.model.acoustics import angle_pressures, curve_weights, directivity

            p = angle_pressures(self.scored.sim.voltages[:1], self.system.angle_factors)  # (1, A, F)
            curves = directivity(np.abs(p) ** 2, curve_weights(self.system.positions))
            self.info["off_axis"] = (self.system.positions, p[0], {k: v[0] for k, v in curves.items()})
        return self.info["off_axis"]

    @property
    def directivity(self):
        """An off-axis job's directivity.csv columns as a pandas DataFrame (None on axis)."""
        tables = self.directivity_tables()
        if not tables:
            return None
        import pandas as pd

        return pd.DataFrame(tables["directivity.csv"].columns)

    def directivity_tables(self) -> dict:
        """{"directivity.csv": Table, "angles.csv": Table} of an off-axis job; {} otherwise."""
        data = self.off_axis()
        if data is None:
            return {}
        from xo_fit.output.tables import angles_table, directivity_table

        positions, p, curves = data
        f = self.system.frequencies
        return {"directivity.csv": directivity_table(f, curves), "angles.csv": angles_table(f, positions, p)}

    # ------------------------------------------------------------------ files

    def to_json(self, folder: str | Path | None = None) -> dict:
        """The result.json document; ``folder`` is where it will live (for the job folder relative to it)."""
        from xo_fit.io.results import part_entries

        job = self.job
        s = self.scored
        parts = part_entries(self.system.part_names, tuple(p.unit for p in job.valued_parts), s.values)
        for name, side in self.limits.items():
            parts[name]["limit"] = side
        for name, extra in self.part_info.items():
            parts[name].update(extra)
        metrics = dict(s.metrics)
        stress = self.stress
        if stress is not None:
            st = self.info["stress_report"]
            metrics["epdr_min_ohm"] = st.epdr_min_ohm
            metrics["epdr_min_hz"] = st.epdr_min_hz
        doc: dict = {"xo_fit_version": _version(), "format": RESULT_FORMAT, "job": job.name, "stage": self.stage}
        if self.hard_limits is not None:
            doc["limits"] = self.hard_limits
        doc.update({"parts": parts, "cost": s.cost, "cost_terms": dict(s.terms), "metrics": metrics})
        if s.level_db is not None:
            doc["level_db"] = s.level_db
        if s.preference is not None:
            doc["preference"] = s.preference
        doc["findings"] = self.findings
        if self.breakdown is not None:
            doc["error_breakdown"] = self.breakdown
        if stress is not None:
            doc["stress"] = stress
        if self.protection is not None:
            doc["protection"] = self.protection
        doc.update(self.sections)
        source = {"job": str(job.path) if job.path else None, "folder": str(job.folder)}
        if folder is not None:
            source["job_folder"] = os.path.relpath(job.folder, Path(folder).resolve())
        source.update(self.source)
        source["document"] = job.data
        doc["source"] = source
        return doc

    def save(self, folder: str | Path, *, plots: bool = True, title: str | None = None,
             home: str | Path | None = None) -> list[Path]:
        """Write result.json, response.csv and (with plots) response.png into ``folder``; returns the paths.

        ``home`` is the folder the files will finally live in, when it is not ``folder`` (a batch worker
        writes into a private folder whose files the coordinator moves).
        """
        from xo_fit.io.results import make_folder, write_csv, write_json, write_rows

        folder = make_folder(folder)
        write_json(folder / "result.json", self.to_json(home if home is not None else folder))
        write_csv(folder / "response.csv", self.response_table())
        written = [folder / "result.json", folder / "response.csv"]
        for name, table in self.directivity_tables().items():
            write_csv(folder / name, table)
            written.append(folder / name)
        for name, rows in self.tables.items():
            write_rows(folder / name, rows)
            written.append(folder / name)
        if plots:
            from xo_fit.output.plots import plot_design

            compare = self.info.get("compare")
            plot_design(folder / "response.png", self.system, self.scored,
                        title=title or f"{self.job.name}: {self.stage}", compare=compare)
            written.append(folder / "response.png")
        return written


@dataclass(eq=False)
class Spread:
    """A tolerance spread of a design: yields, sensitivity ranking, percentile curves.

    ``design`` is the nominal design (stage "spread"), ``section`` the result.json
    "spread" section, ``columns`` the spread.csv columns (frequency_hz, then
    ``<x>_p05_db``, ``<x>_p50_db``, ``<x>_p95_db`` for the sum and each driver),
    ``result`` the full :class:`~xo_fit.stages.tolerance.SpreadResult` when computed here.
    """

    design: Design
    section: dict
    columns: dict
    result: Any = None

    @property
    def yield_band(self) -> float:
        return float(self.section["yield"]["within_band"])

    @property
    def yield_limits(self) -> float:
        return float(self.section["yield"]["meeting_limits"])

    @property
    def sensitivity(self) -> list[tuple[str, float]]:
        """(part, dB per +1 %) ranked, most sensitive first."""
        return [(r["part"], float(r["db_per_pct"])) for r in self.section["sensitivity"]]

    @property
    def curves(self):
        """The spread.csv columns as a pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.columns)

    @property
    def stage(self) -> str:
        return "spread"

    @property
    def label(self) -> str | None:
        return self.design.label

    def to_json(self, folder: str | Path | None = None) -> dict:
        return self.design.to_json(folder)

    def save(self, folder: str | Path, *, plots: bool = True, home: str | Path | None = None) -> list[Path]:
        """Write result.json, response.csv, spread.csv and (with plots and a computed result) spread.png."""
        from xo_fit.io.results import Table, write_csv

        folder = Path(folder)
        files = self.design.save(folder, plots=False, home=home)
        write_csv(folder / "spread.csv", Table(self.columns))
        files.append(folder / "spread.csv")
        if plots and self.result is not None:
            from xo_fit.output.plots import plot_spread

            job = self.design.job
            plot_spread(folder / "spread.png", self.design.system, self.design.scored, self.result,
                        title=f"{job.name}: p05-p95 over {self.result.samples} builds")
            files.append(folder / "spread.png")
        return files


# ----------------------------------------------------------------------------- loading results


#: Sections recomputed when a result is loaded (everything else is kept as the stage wrote it).
_RECOMPUTED = {"xo_fit_version", "format", "job", "stage", "parts", "cost", "cost_terms", "metrics", "level_db",
               "findings", "stress", "source", "error_breakdown", "protection", "limits"}
#: Entries of parts.NAME recomputed when a result is loaded.
PART_RECOMPUTED = {"value", "unit", "text", "limit"}


def job_of_result(doc: dict, folder: Path, path: Path):
    """The job a result was made from: rebuilt from its resolved document, data found relative to the result
    (as the folders stood when it was written) or at the job folder's absolute path; or, for a result written
    before format 2, read from the job file it names."""
    from xo_fit.job.reader import load_job
    from xo_fit.model.system import load_system

    src = doc.get("source") or {}
    document = src.get("document")
    if not isinstance(document, dict):
        job_file = src.get("job")
        if not job_file:
            raise DataError("the result names no job (source.document or source.job); make it with xo-fit",
                            path=path, key="source")
        return load_system(load_job(job_file))
    bases = []
    if isinstance(src.get("job_folder"), str):
        bases.append((folder / src["job_folder"]).resolve())
    if isinstance(src.get("folder"), str):
        bases.append(Path(src["folder"]))
    if not bases:
        bases.append(folder)
    first: XoFitError | None = None
    for base in dict.fromkeys(bases):
        try:
            return load_system(load_job(document, base=base))
        except XoFitError as e:
            first = first or e
    raise DataError(f"cannot rebuild the result's job: {first} (looked for its data in "
                    f"{' and '.join(str(b) for b in dict.fromkeys(bases))})", path=path, key="source") from None


def spread_columns(table: Path, f: np.ndarray) -> dict[str, np.ndarray]:
    """The columns of a spread.csv (each (F,)), checked against the result's grid ``f`` (F,) in Hz: a DataError
    naming the file for a missing or short table, a cell that is no finite number, a column the report needs."""
    import csv

    from xo_fit.errors import read_user_text

    if not table.exists():
        raise DataError("a spread result needs its spread.csv beside it", path=table)
    rows = list(csv.reader(read_user_text(table, "spread table").splitlines()))
    if len(rows) < 2:
        raise DataError("spread.csv holds no rows", path=table)
    head, body = rows[0], rows[1:]
    need = ["frequency_hz", "sum_p05_db", "sum_p50_db", "sum_p95_db"]
    if [h for h in need if h not in head] or len(set(head)) != len(head):
        raise DataError(f"spread.csv: expected the columns {', '.join(need)}, ... once each, got {head[:12]!r}",
                        path=table, line=1)
    if len(body) != f.size:
        raise DataError(f"spread.csv holds {len(body)} rows; the result's grid has {f.size} points", path=table)
    data = np.full((len(body), len(head)), np.nan)
    for i, r in enumerate(body):
        if len(r) != len(head):
            raise DataError(f"expected {len(head)} cells, got {len(r)}", path=table, line=i + 2)
        for k, x in enumerate(r):
            try:
                data[i, k] = float(x) if x != "" else np.nan
            except ValueError:
                raise DataError(f"{head[k]}: {x[:40]!r} is not a number", path=table, line=i + 2) from None
            if np.isinf(data[i, k]):
                raise DataError(f"{head[k]}: {x[:40]!r} is not a finite number", path=table, line=i + 2)
    if not np.allclose(data[:, 0], f, rtol=1e-4, atol=0):
        raise DataError("spread.csv's frequencies are not the result's grid", path=table)
    return {h: data[:, k] for k, h in enumerate(head)}


def load_result(path: str | Path, *, system=None) -> Design | Spread:
    """A result.json (or its folder) as a :class:`Design`, or a :class:`Spread` for a spread result.

    The design is rebuilt and re-scored from the result alone (see :func:`job_of_result`); ``system``
    reuses an already loaded job instead.
    """
    from xo_fit.search.fitting import score
    from xo_fit.io.results import read_result, result_values

    path = Path(path)
    doc = read_result(path)
    folder = path if path.is_dir() else path.parent
    file = folder / "result.json" if path.is_dir() else path
    system = system if system is not None else job_of_result(doc, folder, file)
    values = system.values(result_values(doc, system.part_names, file))
    part_info = {n: {k: v for k, v in e.items() if k not in PART_RECOMPUTED}
                 for n, e in doc["parts"].items() if isinstance(e, dict)}
    part_info = {n: e for n, e in part_info.items() if e}
    source = {k: v for k, v in (doc.get("source") or {}).items() if k in ("from", "inventory")}
    design = Design(system=system, scored=score(system, values), stage=str(doc.get("stage", "result")),
                    sections={k: v for k, v in doc.items() if k not in _RECOMPUTED}, source=source,
                    part_info=part_info, label=str(doc.get("stage", "result")))
    if design.stage != "spread":
        return design
    columns = spread_columns(folder / "spread.csv", system.frequencies)
    return Spread(design=design, section=dict(doc.get("spread") or {}), columns=columns)
