"""The stages a job goes through (fit, snap, spread), each computing and writing its outputs into a folder.

The command line and the batch runner call the same functions: a command
writes into its --out folder, a batch worker into a private temporary folder
whose files it sends back to the coordinator (which alone writes the batch's
folders and store).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .fit import cost_model, run_fit, run_fit_restarts, score, write_outputs
from .constants import PART_UNIT
from .io.results import Table, write_csv, write_json, write_rows
from .units import format_value

@dataclass
class StageOutput:
    """What a stage produced: its result document, the files it wrote, and objects for the console."""

    stage: str
    document: dict
    files: list[Path]
    info: dict = field(default_factory=dict)

    @property
    def cost(self) -> float | None:
        return self.document.get("cost")

    @property
    def metrics(self) -> dict:
        return self.document.get("metrics", {})


def _read_doc(out: Path) -> dict:
    return json.loads((out / "result.json").read_text(encoding="utf-8"))


def fit_stage(system, out: Path, *, optimizer=None, budget=None, seed=None, time_limit=None, workers: int = 1,
              plots: bool = True, progress=None) -> StageOutput:
    j = system.job
    runs = None
    if workers > 1:
        outcome, runs = run_fit_restarts(system, workers, optimizer=optimizer, budget=budget, seed=seed,
                                         time_limit=time_limit)
    else:
        outcome = run_fit(system, optimizer=optimizer, budget=budget, seed=seed, time_limit=time_limit,
                          progress=progress)
    r = outcome.search
    extra = {"search": {"optimizer": r.optimizer, "evaluations": r.evaluations, "seconds": round(r.seconds, 4),
                        "seed": r.seed, "complete": r.complete, "stopped_by": r.stopped_by},
             "source": {"job": str(j.path)}}
    if runs is not None:
        extra["search"]["restarts"] = runs
    if j.search.robust_samples:
        extra["search"]["robust"] = {"samples": j.search.robust_samples,
                                     "solves": r.evaluations * j.search.robust_samples,
                                     "note": "cost = mean over fixed tolerance draws; each evaluation solves "
                                             "one design per draw"}
    files = write_outputs(system, out, "fit", outcome.scored, extra, title=f"{j.name}: fit", plots=plots)
    return StageOutput("fit", _read_doc(out), files, {"outcome": outcome, "runs": runs})


def snap_stage(system, out: Path, continuous: np.ndarray, *, series_override=None, inventory=None, combine=None,
               plots: bool = True, source_from: str | None = None) -> StageOutput:
    from .snap import parts_table, run_snap

    j = system.job
    outcome = run_snap(system, continuous, series_override=series_override, inventory=inventory, combine=combine)
    model = cost_model(system)
    before = score(system, continuous, model)
    after = score(system, outcome.values, model)
    sr = outcome.search
    extra = {"snap": {"continuous_cost": before.cost, "log_nearest_cost": sr.baseline_cost if sr else before.cost,
                      "evaluations": sr.evaluations if sr else 0, "exhaustive": sr.exhaustive if sr else True,
                      "seconds": round(outcome.seconds, 4), "continuous_metrics": before.metrics},
             "source": {"job": str(j.path), "from": source_from, "inventory": str(inventory.path) if inventory else None}}
    files = write_outputs(system, out, "snap", after, extra, title=f"{j.name}: snapped (grey: continuous)",
                          plots=plots, compare=("continuous", before))
    doc = _read_doc(out)
    for sp in outcome.parts:
        unit = PART_UNIT[sp.kind]
        e = {"continuous": sp.continuous, "source": sp.source}
        if sp.source == "inventory":
            e["inventory"] = str(inventory.path)
        elif sp.source not in ("continuous", "fixed"):
            e["series"] = sp.source
        if sp.choice is not None and sp.choice.connection != "single":
            e["combination"] = {"connection": sp.choice.connection,
                                "parts": [{"value": v, "text": format_value(v, unit)} for v in sp.choice.pieces]}
        doc["parts"][sp.name].update(e)
    write_json(out / "result.json", doc)
    write_rows(out / "parts.csv", parts_table(outcome, j, dict(j.spread.tolerance)))
    files.append(out / "parts.csv")
    return StageOutput("snap", doc, files, {"outcome": outcome, "before": before, "after": after})


def spread_stage(system, out: Path, nominal: np.ndarray, *, samples=None, seed=None, plots: bool = True,
                 source_from: str | None = None, progress=None) -> StageOutput:
    from .spread import run_spread

    j = system.job
    r = run_spread(system, nominal, samples=samples, seed=seed, progress=progress)
    s = score(system, nominal)
    names = ["sum"] + [d.name for d in j.drivers]
    cols = {"frequency_hz": system.frequencies}
    for i, n in enumerate(names):
        cols[f"{n}_p05_db"] = r.p05[i]
        cols[f"{n}_p50_db"] = r.p50[i]
        cols[f"{n}_p95_db"] = r.p95[i]
    section = {
        "samples": r.samples, "distribution": j.spread.distribution, "qmc": j.spread.qmc,
        "seed": j.spread.seed if seed is None else seed,
        "tolerances_pct": {n: float(t * 100) for n, t in zip(system.part_names, r.tolerances)},
        "yield": {"within_band": r.yield_band, "meeting_limits": r.yield_limits, **r.limits},
        "worst_draw": {"deviation_db": r.worst_deviation_db, "at_hz": r.worst_at_hz,
                       "parts_pct": {n: float((x - 1) * 100) for n, x in zip(system.part_names, r.worst_factors)}},
        "sensitivity": r.sensitivity,
        "corners": r.corners,
        "pair_matching": {"p50_db": r.pair_p50_db, "p95_db": r.pair_p95_db},
    }
    files = write_outputs(system, out, "spread", s, {"spread": section, "source": {"job": str(j.path),
                          "from": source_from}}, title=f"{j.name}: tolerance spread", plots=False)
    write_csv(out / "spread.csv", Table(cols))
    files.append(out / "spread.csv")
    if plots:
        from .report import plot_spread

        plot_spread(out / "spread.png", system, s, r, title=f"{j.name}: p05-p95 over {r.samples} builds")
        files.append(out / "spread.png")
    return StageOutput("spread", _read_doc(out), files, {"result": r})
