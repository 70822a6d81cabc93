"""The stages a job goes through (fit, snap, spread), each computing a design and writing it into a folder.

The command line and the batch runner call the same functions: a command
writes into its --out folder, a batch worker into a private temporary folder
whose files it sends back to the coordinator (which alone writes the batch's
folders and store); ``home`` then names the folder the files will live in, so
that the result's provenance points at the job from there.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from xo_fit import api
from xo_fit.output.saving import write_design, write_spread

if TYPE_CHECKING:
    from xo_fit.output.design import Design, Spread


@dataclass
class StageOutput:
    """What a stage produced: its result document, the files it wrote, and for the console the design (with
    what its stage adds: a fit's or a snap's ``outcome``, a fit's ``runs``, a snap's ``before``) and, for a
    spread, the :class:`~xo_fit.output.design.Spread` (its full ``result``)."""

    stage: str
    document: dict
    files: list[Path]
    design: Design
    spread: Spread | None = None

    @property
    def cost(self) -> float | None:
        """The result's cost (dimensionless), or None where the stage scored none."""
        return self.document.get("cost")

    @property
    def metrics(self) -> dict:
        """The result's metrics by name (result.json's ``metrics``; empty where it has none)."""
        return self.document.get("metrics", {})


def fit_stage(system, out: Path, *, optimizer=None, budget=None, seed=None, time_limit=None, workers: int = 1,
              plots: bool = True, progress=None, home: Path | None = None) -> StageOutput:
    """Fit ``system`` (:func:`xo_fit.api.fit`) and save the result into folder ``out``.

    The keyword arguments are those of :func:`xo_fit.api.fit` and of ``Design.save`` (``plots``, ``home``).
    Returns the stage's :class:`StageOutput` (result.json as written, the files, the design).
    """
    d = api.fit(system, optimizer=optimizer, budget=budget, seed=seed, time_limit=time_limit, workers=workers,
                progress=progress)
    doc, files = write_design(d, out, plots=plots, title=f"{system.job.name}: fit", home=home)
    return StageOutput(d.stage, doc, files, d)


def snap_stage(system, out: Path, continuous: np.ndarray, *, series_override=None, inventory=None, combine=None,
               plots: bool = True, source_from: str | None = None, home: Path | None = None,
               top_up: str | None = None, speakers: int = 2) -> StageOutput:
    """``speakers``: the quantities of bom.csv (the parts to buy), written beside the result."""
    from xo_fit.output.bom import bom_rows

    values = dict(zip(system.part_names, np.asarray(continuous, dtype=float)))
    d = api.snap(system, values, series=series_override, inventory=inventory, combine=combine,
                 top_up=top_up)
    d.source["from"] = source_from
    d.tables["bom.csv"] = bom_rows(d, speakers)
    doc, files = write_design(d, out, plots=plots, title=f"{system.job.name}: snapped (grey: continuous)",
                              home=home)
    return StageOutput(d.stage, doc, files, d)


def spread_stage(system, out: Path, nominal: np.ndarray, *, samples=None, seed=None, plots: bool = True,
                 source_from: str | None = None, progress=None, home: Path | None = None,
                 part_info: dict | None = None) -> StageOutput:
    """``part_info``: what the design's own result said of each part (a snap's series, source, combination),
    carried into the spread's result so that its part list still says what to buy."""
    values = dict(zip(system.part_names, np.asarray(nominal, dtype=float)))
    sp = api.spread(system, values, samples=samples, seed=seed, progress=progress)
    sp.design.source["from"] = source_from
    sp.design.part_info = dict(part_info or {})
    doc, files = write_spread(sp, out, plots=plots, home=home)
    return StageOutput(sp.design.stage, doc, files, sp.design, spread=sp)
