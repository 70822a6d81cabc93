"""Designs as values: a scored design (:class:`Design`) and a tolerance spread (:class:`Spread`).

A :class:`Design` is one set of part values of a job, simulated and scored,
with what the stage that made it adds (search figures, snap choices) as typed
fields. What is worked out of it (the stresses, the protection, the limits,
the error breakdown, the findings, the off-axis curves) is computed on first
use and kept: a design is a value, its analysis a function of it.
Turning it into files lives beside it: :mod:`xo_fit.output.saving` writes a
design's result.json and tables (:meth:`Design.to_json` and :meth:`Design.save`
call it), and :mod:`xo_fit.output.loading` rebuilds a design from a result.json
(:func:`~xo_fit.output.loading.load_result`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from xo_fit.model.stress import StressReport
    from xo_fit.search.fitting import FitOutcome, Scored
    from xo_fit.stages.snapping import SnapOutcome
    from xo_fit.stages.tolerance import SpreadResult

#: A stress this far over its limit (0.5 %, 0.02 dB) still counts as within the rating: the fit's quadratic
#: stress term approaches a limit from outside, and no part rating is that exact.
RATING_TOLERANCE = 0.005
#: A free value within this log distance of a bound (1 %) rests on it.
LIMIT_LOG_DISTANCE = math.log(1.01)


@dataclass(eq=False)
class Design:
    """One design of a job: part values, their simulation and score, and what its stage adds.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    scored : Scored
        The simulation and cost of the values (:class:`~xo_fit.search.fitting.Scored`).
    stage : str
        "simulate", "fit", "snap", "spread" or "prune" (a loaded result: the stage it names).
    sections : dict
        The stage's own result.json sections (``search``, ``snap``, ...).
    source : dict
        Provenance extras for result.json's ``source`` (``from``, ``inventory``).
    part_info : dict
        Entries added to result.json's ``parts.NAME`` (a snap's series, source and combination).
    label : str or None
        The design's name in a report.
    tables : dict
        Extra CSV files written with the design: file name -> rows (dicts).
    outcome : FitOutcome or SnapOutcome or None
        A fit's search (:class:`~xo_fit.search.fitting.FitOutcome`) or a snap's choices
        (:class:`~xo_fit.stages.snapping.SnapOutcome`), for the console; never saved.
    runs : list of dict or None
        A fit with several worker processes: each process's seed, evaluations and cost.
    before : Scored or None
        A snap's continuous design, scored (drawn in grey under the snapped one in response.png).
    """

    system: Any
    scored: Any
    stage: str
    sections: dict = field(default_factory=dict)
    source: dict = field(default_factory=dict)
    part_info: dict = field(default_factory=dict)
    label: str | None = None
    tables: dict = field(default_factory=dict)
    outcome: FitOutcome | SnapOutcome | None = None
    runs: list[dict] | None = None
    before: Scored | None = None

    def __setattr__(self, name: str, value) -> None:
        """Set a field; a new ``system`` or ``scored`` drops the analysis cached from the old one."""
        if name in ("system", "scored"):
            for cached in [k for k, v in type(self).__dict__.items() if isinstance(v, cached_property)]:
                self.__dict__.pop(cached, None)
        object.__setattr__(self, name, value)

    # ------------------------------------------------------------------ figures

    @property
    def job(self):
        """The design's :class:`~xo_fit.job.model.Job` (its system's)."""
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
        """The design's cost, the sum of its :attr:`terms` times their ``[cost]`` weights (0 on target); None
        without way targets, inf where the response is not finite somewhere."""
        return self.scored.cost

    @property
    def terms(self) -> dict:
        """result.json's ``cost_terms``: each cost term by name before its ``[cost]`` weight (mostly mean squares
        in dB^2; :mod:`xo_fit.model.cost`); empty without way targets."""
        return dict(self.scored.terms)

    @property
    def metrics(self) -> dict:
        """result.json's ``metrics`` (each name carries its unit: ``rms_error_db``, ``impedance_min_ohm``, ...;
        docs/outputs.md), without the [stress] EPDR figures the result adds."""
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

    @cached_property
    def hard_limits(self) -> dict | None:
        """result.json's ``limits``: each [limits] limit against this design (:mod:`xo_fit.output.limits`), or
        None without a [limits] table."""
        from xo_fit.output.limits import limit_figures

        return limit_figures(self)

    @cached_property
    def breakup(self) -> list[tuple[str, float, float]]:
        """(way, Hz, dB under the level) of each way's loudest stop-band point under the job's breakup rule
        (:func:`xo_fit.output.limits.rule_db`); empty without way targets."""
        from xo_fit.output.limits import breakup_points_of, rule_db

        return breakup_points_of(self, rule_db(self.job))

    @cached_property
    def idle(self) -> list[dict]:
        """``negligible`` findings: parts whose removal changes the cost by (almost) nothing
        (:func:`xo_fit.stages.removal.idle_parts`)."""
        from xo_fit.stages.removal import idle_parts

        return idle_parts(self.system, self.scored.values, self.scored.cost)

    @property
    def findings(self) -> list[dict]:
        """result.json's ``findings``, what a designer should look at, as ``{"kind", "part", "text"}`` dicts:
        unmet [limits] first, then parts resting on a range limit, phase derived near a file's end, no finite
        response, parts that may not be needed, drivers past their xmax or rating, a load below the floor, and
        breakup within 20 dB (or [limits] breakup_db) of the level (docs/outputs.md)."""
        from xo_fit.output.cautions import protection_findings
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
            out += self.idle
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

    @cached_property
    def breakdown(self) -> dict | None:
        """Where the error lies: per way, per crossover region and for the sum (rms, worst and where), or None
        without way targets (see :meth:`xo_fit.model.cost.CostModel.breakdown`)."""
        from xo_fit.search.fitting import cost_model

        model = cost_model(self.system)
        return model[0].breakdown(self.scored.values) if model else None

    @cached_property
    def stress_report(self) -> StressReport | None:
        """The part stresses at the job's [stress] drive (:func:`xo_fit.model.stress.stresses`: each part's sine
        worst case and where, a resistor's programme power, the lowest EPDR), or None without [stress] power."""
        spec = self.job.stress
        if not spec.power:
            return None
        from xo_fit.model.stress import stresses

        return stresses(self.system, self.scored.values, spec.power, spec.rated_impedance)

    @property
    def stress(self) -> dict | None:
        """result.json's ``stress``: per part its figure (W, V or A), where, a resistor's programme power and,
        with a rating, whether it is within it; None without [stress] power (see :attr:`stress_report`)."""
        st = self.stress_report
        if st is None:
            return None
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

    @cached_property
    def protection(self) -> dict | None:
        """Each protected driver's peak excursion and programme power at the job's [stress] drive against its
        xmax and rating (:func:`xo_fit.model.protection.protection`), or None where nothing is judged."""
        from xo_fit.model.protection import protection

        return protection(self.system, self.scored.sim.voltages)

    @property
    def response(self):
        """The response.csv columns as a pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.response_table().columns)

    def response_table(self):
        """The response.csv table of this design (:func:`xo_fit.output.tables.response_table`).

        Returns
        -------
        Table
            The columns ``frequency_hz`` (Hz), each driver's ``<driver>_db`` (dB SPL) and ``<driver>_deg``
            (degrees), ``sum_db``, ``sum_deg``, ``target_db``, ``impedance_ohm`` (ohm) and ``impedance_deg``,
            each an ndarray of shape (F,).
        """
        from xo_fit.search.fitting import target_db
        from xo_fit.output.tables import response_table

        s = self.scored
        names = tuple(d.name for d in self.job.drivers)
        return response_table(self.system.frequencies, names, s.sim.pressure[0], s.sim.total[0], s.sim.impedance[0],
                              target_db(s))

    @cached_property
    def _off_axis(self) -> tuple | None:
        if not self.system.positions:
            return None
        from xo_fit.model.acoustics import angle_pressures, curve_weights, directivity

        p = angle_pressures(self.scored.sim.voltages[:1], self.system.angle_factors)  # (1, A, F)
        curves = directivity(np.abs(p) ** 2, curve_weights(self.system.positions))
        return self.system.positions, p[0], {k: v[0] for k, v in curves.items()}

    def off_axis(self) -> tuple | None:
        """An off-axis job's curves of this design.

        Returns
        -------
        tuple or None
            (positions, pressure, curves): the measuring positions, ``("h" | "v", degrees)`` each, the axis
            first (A positions); the summed pressure at each, complex, in Pa, shape (A, F); and the
            ANSI/CTA-2034-A curves by name, mean squared pressure in Pa^2, shape (F,) each. None on axis.
        """
        return self._off_axis

    @property
    def directivity(self):
        """An off-axis job's directivity.csv columns as a pandas DataFrame (None on axis)."""
        tables = self.directivity_tables()
        if not tables:
            return None
        import pandas as pd

        return pd.DataFrame(tables["directivity.csv"].columns)

    def directivity_tables(self) -> dict:
        """The directivity.csv and angles.csv tables of an off-axis job.

        Returns
        -------
        dict
            ``{"directivity.csv": Table, "angles.csv": Table}`` (docs/outputs.md), each column an ndarray of
            shape (F,) in Hz, dB SPL or dB; ``{}`` for an on-axis job.
        """
        data = self.off_axis()
        if data is None:
            return {}
        from xo_fit.output.tables import angles_table, directivity_table

        positions, p, curves = data
        f = self.system.frequencies
        return {"directivity.csv": directivity_table(f, curves), "angles.csv": angles_table(f, positions, p)}

    # ------------------------------------------------------------------ files (xo_fit.output.saving)

    def to_json(self, folder: str | Path | None = None) -> dict:
        """The result.json document (:func:`xo_fit.output.saving.result_document`).

        Parameters
        ----------
        folder : str or Path, optional
            Where the document will live (``source.job_folder`` is the job's folder relative to it); None
            leaves ``source.job_folder`` out.

        Returns
        -------
        dict
            The document, as docs/outputs.md describes it (values SI, levels in dB).
        """
        from xo_fit.output.saving import result_document

        return result_document(self, folder)

    def save(self, folder: str | Path, *, plots: bool = True, title: str | None = None,
             home: str | Path | None = None) -> list[Path]:
        """Write the design's files into ``folder`` (:func:`xo_fit.output.saving.save_design`).

        Writes result.json, response.csv, an off-axis job's directivity.csv and angles.csv, the stage's own
        tables (:attr:`tables`: a snap's parts.csv, and bom.csv where the command adds it) and, with ``plots``,
        response.png.

        Parameters
        ----------
        folder : str or Path
            The folder to write into (made if missing).
        plots : bool
            Also draw response.png. Default True.
        title : str, optional
            The plot's title (default "JOB: STAGE").
        home : str or Path, optional
            The folder the files will finally live in, when it is not ``folder`` (a batch worker writes into a
            private folder whose files the coordinator moves); result.json's job folder is relative to it.

        Returns
        -------
        list of Path
            The files written.
        """
        from xo_fit.output.saving import save_design

        return save_design(self, folder, plots=plots, title=title, home=home)


@dataclass(eq=False)
class Spread:
    """A tolerance spread of a design: yields, sensitivity ranking, percentile curves.

    Parameters
    ----------
    design : Design
        The nominal design (stage "spread").
    section : dict
        result.json's ``spread`` section (samples, yield, sensitivity, ...; docs/outputs.md).
    columns : dict of str to ndarray
        The spread.csv columns, each of shape (F,): ``frequency_hz`` (Hz), then ``<x>_p05_db``, ``<x>_p50_db``
        and ``<x>_p95_db`` (dB SPL) for the sum (``x`` = ``sum``) and each driver.
    result : SpreadResult or None
        The full :class:`~xo_fit.stages.tolerance.SpreadResult` when computed here (drawn in spread.png);
        None for a loaded result.
    """

    design: Design
    section: dict
    columns: dict
    result: SpreadResult | None = None

    @property
    def yield_band(self) -> float:
        """The share of builds whose sum stays within ``[spread] band_db`` of the nominal over the target band
        (dimensionless, 0 to 1)."""
        return float(self.section["yield"]["within_band"])

    @property
    def yield_limits(self) -> float:
        """The share of builds meeting the limits: rms error against the target at most ``[spread]
        rms_limit_db``, the load at least the impedance floor (dimensionless, 0 to 1)."""
        return float(self.section["yield"]["meeting_limits"])

    @property
    def sensitivity(self) -> list[tuple[str, float]]:
        """(part, dB per +1 %): each part's worst change of the sum in the band per +1 % of its value, signed,
        the most sensitive first."""
        return [(r["part"], float(r["db_per_pct"])) for r in self.section["sensitivity"]]

    @property
    def curves(self):
        """The spread.csv columns as a pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.columns)

    @property
    def stage(self) -> str:
        """Always "spread"."""
        return "spread"

    @property
    def label(self) -> str | None:
        """The nominal design's name in a report (or None)."""
        return self.design.label

    def to_json(self, folder: str | Path | None = None) -> dict:
        """The result.json document of the nominal design, its ``spread`` section included.

        Parameters
        ----------
        folder : str or Path, optional
            Where the document will live (as for :meth:`Design.to_json`).

        Returns
        -------
        dict
            The document (docs/outputs.md).
        """
        return self.design.to_json(folder)

    def save(self, folder: str | Path, *, plots: bool = True, home: str | Path | None = None) -> list[Path]:
        """Write the nominal design's files (no response.png), spread.csv and, with ``plots`` and a computed
        ``result``, spread.png into ``folder`` (:func:`xo_fit.output.saving.save_spread`).

        Parameters
        ----------
        folder : str or Path
            The folder to write into.
        plots : bool
            Also draw spread.png (only where ``result`` is set). Default True.
        home : str or Path, optional
            The folder the files will finally live in, when it is not ``folder`` (as for :meth:`Design.save`).

        Returns
        -------
        list of Path
            The files written.
        """
        from xo_fit.output.saving import save_spread

        return save_spread(self, folder, plots=plots, home=home)
