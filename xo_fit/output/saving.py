"""A design to files: its result.json document, and what a command writes for a design or a spread.

:func:`result_document` is the result.json of a :class:`~xo_fit.output.design.Design` (docs/outputs.md);
:func:`write_design` writes it with response.csv, an off-axis job's directivity.csv and angles.csv, the stage's
own tables (a snap's parts.csv; the snap command adds bom.csv to them) and response.png; :func:`write_spread`
adds a spread's spread.csv and spread.png. Both return result.json's document as written with the paths;
:func:`save_design` and :func:`save_spread` return the paths alone. :meth:`Design.to_json
<xo_fit.output.design.Design.to_json>`, :meth:`Design.save <xo_fit.output.design.Design.save>` and
:meth:`Spread.save <xo_fit.output.design.Spread.save>` call :func:`result_document`, :func:`save_design` and
:func:`save_spread`; a batch's tasks call the ``write_`` ones.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING

from xo_fit.constants import RESULT_FORMAT

if TYPE_CHECKING:
    from xo_fit.output.design import Design, Spread


def _version() -> str:
    from xo_fit import __version__

    return __version__


def result_document(design: Design, folder: str | Path | None = None) -> dict:
    """The result.json document of ``design``; ``folder`` is where it will live (for the job folder relative to
    it; None leaves ``source.job_folder`` out)."""
    from xo_fit.io.results import part_entries

    job = design.job
    s = design.scored
    parts = part_entries(design.system.part_names, tuple(p.unit for p in job.valued_parts), s.values)
    for name, side in design.limits.items():
        parts[name]["limit"] = side
    for name, extra in design.part_info.items():
        parts[name].update(extra)
    metrics = dict(s.metrics)
    stress = design.stress
    st = design.stress_report
    if st is not None:
        metrics["epdr_min_ohm"] = st.epdr_min_ohm
        metrics["epdr_min_hz"] = st.epdr_min_hz
    doc: dict = {"xo_fit_version": _version(), "format": RESULT_FORMAT, "job": job.name, "stage": design.stage}
    if design.hard_limits is not None:
        doc["limits"] = design.hard_limits
    doc.update({"parts": parts, "cost": s.cost, "cost_terms": dict(s.terms), "metrics": metrics})
    if s.level_db is not None:
        doc["level_db"] = s.level_db
    if s.preference is not None:
        doc["preference"] = s.preference
    doc["findings"] = design.findings
    if design.breakdown is not None:
        doc["error_breakdown"] = design.breakdown
    if stress is not None:
        doc["stress"] = stress
    if design.protection is not None:
        doc["protection"] = design.protection
    doc.update(design.sections)
    source = {"job": str(job.path) if job.path else None, "folder": str(job.folder)}
    if folder is not None:
        source["job_folder"] = os.path.relpath(job.folder, Path(folder).resolve())
    source.update(design.source)
    source["document"] = job.data
    doc["source"] = source
    return doc


def write_design(design: Design, folder: str | Path, *, plots: bool = True, title: str | None = None,
                 home: str | Path | None = None) -> tuple[dict, list[Path]]:
    """Write result.json, response.csv, an off-axis job's directivity.csv and angles.csv, the design's own
    tables and (with ``plots``) response.png into ``folder``; returns result.json's document as written and
    the paths written.

    ``title`` heads the plot (default "JOB: STAGE"); a snap's continuous design (``design.before``) is drawn
    in grey under it. ``home`` is the folder the files will finally live in, when it is not ``folder`` (a
    batch worker writes into a private folder whose files the coordinator moves).
    """
    from xo_fit.io.results import make_folder, write_csv, write_json, write_rows

    folder = make_folder(folder)
    doc = write_json(folder / "result.json", result_document(design, home if home is not None else folder))
    write_csv(folder / "response.csv", design.response_table())
    written = [folder / "result.json", folder / "response.csv"]
    for name, table in design.directivity_tables().items():
        write_csv(folder / name, table)
        written.append(folder / name)
    for name, rows in design.tables.items():
        write_rows(folder / name, rows)
        written.append(folder / name)
    if plots:
        from xo_fit.output.plots import plot_design

        compare = ("continuous", design.before) if design.before is not None else None
        plot_design(folder / "response.png", design.system, design.scored,
                    title=title or f"{design.job.name}: {design.stage}", compare=compare)
        written.append(folder / "response.png")
    return doc, written


def save_design(design: Design, folder: str | Path, *, plots: bool = True, title: str | None = None,
                home: str | Path | None = None) -> list[Path]:
    """What :func:`write_design` writes; returns the paths written (the public ``Design.save``)."""
    return write_design(design, folder, plots=plots, title=title, home=home)[1]


def write_spread(spread: Spread, folder: str | Path, *, plots: bool = True,
                 home: str | Path | None = None) -> tuple[dict, list[Path]]:
    """Write the nominal design's files (no plot), spread.csv and (with ``plots`` and a computed result)
    spread.png into ``folder``; returns result.json's document as written and the paths written (``home`` as in
    :func:`write_design`)."""
    from xo_fit.io.results import Table, write_csv

    folder = Path(folder)
    doc, files = write_design(spread.design, folder, plots=False, home=home)
    write_csv(folder / "spread.csv", Table(spread.columns))
    files.append(folder / "spread.csv")
    if plots and spread.result is not None:
        from xo_fit.output.plots import plot_spread

        job = spread.design.job
        plot_spread(folder / "spread.png", spread.design.system, spread.design.scored, spread.result,
                    title=f"{job.name}: p05-p95 over {spread.result.samples} builds")
        files.append(folder / "spread.png")
    return doc, files


def save_spread(spread: Spread, folder: str | Path, *, plots: bool = True,
                home: str | Path | None = None) -> list[Path]:
    """What :func:`write_spread` writes; returns the paths written (the public ``Spread.save``)."""
    return write_spread(spread, folder, plots=plots, home=home)[1]
