"""summary.csv: the batch's jobs sorted by cost, one row each, from the store's rows.

A row that cannot be read as it should (hand-edited metrics, a cost that is not
a number) gives empty figures, never a failure. A text cell that a spreadsheet
would take for a formula (beginning with = + - @, a tab or a carriage return)
gets a leading apostrophe, as spreadsheets expect.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

from xo_fit.batch.store import BatchStopped, Store
from xo_fit.io.results import write_rows

ORDER = {"load": -1, "fit": 0, "snap": 1, "spread": 2}
FIGURES = ("rms_error_db", "max_error_db", "phase_mismatch_deg", "impedance_min_ohm")
#: The first characters that make a spreadsheet read a cell as a formula (OWASP's CSV injection list).
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def metrics_of(row: dict) -> dict:
    """A row's metrics as a dict: {} when absent or not a JSON object."""
    try:
        m = json.loads(row["metrics"]) if row["metrics"] else {}
    except (TypeError, ValueError):
        return {}
    return m if isinstance(m, dict) else {}


def number(x) -> float | None:
    """A figure from the store as a finite float, or None (a damaged or missing one)."""
    if isinstance(x, bool) or not isinstance(x, (int, float)):
        return None
    return float(x) if math.isfinite(x) else None


def job_rows(rows: dict[tuple[str, str], dict]) -> list[dict]:
    """One dict per job: status (done unless a stage is not), its last stage done with its figures, yields,
    swept values, the first error; sorted done first, by cost, by name."""
    jobs: dict[str, dict] = {}
    for (job, stage), r in rows.items():
        j = jobs.setdefault(job, {"job": job, "status": "done", "stage": None, "cost": None, **dict.fromkeys(FIGURES),
                                  "yield_band": None, "yield_limits": None, "swept": {}, "error": "",
                                  "folder": r["folder"]})
        m = metrics_of(r)
        swept = m.get("swept")
        j["swept"].update(swept if isinstance(swept, dict) else {})
        if stage == "spread" and r["status"] == "done":
            j["yield_band"], j["yield_limits"] = number(m.get("yield_band")), number(m.get("yield_limits"))
        if r["status"] != "done":
            j["status"] = r["status"]
            if r["error"] and not j["error"]:
                j["error"] = str(r["error"]).splitlines()[0][:200]
            continue
        if j["stage"] is None or ORDER.get(stage, -2) > ORDER.get(j["stage"], -2):
            j.update(stage=stage, cost=number(r["cost"]), **{k: number(m.get(k)) for k in FIGURES})
    return sorted(jobs.values(), key=lambda j: (j["status"] != "done", j["cost"] if j["cost"] is not None
                                                else float("inf"), j["job"]))


def cell(x):
    """A CSV cell: None as empty; text that a spreadsheet would run as a formula with a leading apostrophe."""
    if x is None:
        return ""
    if isinstance(x, str) and x.startswith(FORMULA_START):
        return "'" + x
    return x


def write_summary(out: Path, store: Store | None = None) -> list[dict]:
    """The jobs sorted by cost (of their last stage done) with the key metrics; written to ``out/summary.csv``.

    Returns the rows (dicts with job, status, stage, cost, the figures, yields, swept, folder, error).
    """
    own = store is None
    store = store or Store(out)
    try:
        rows = store.rows()
    finally:
        if own:
            store.close()
    summary = job_rows(rows)
    swept = sorted({str(k) for j in summary for k in j["swept"]})
    for j in summary:
        for k in swept:
            j[f"sweep_{k}"] = j["swept"].get(k)
    columns = (["job"] + [f"sweep_{k}" for k in swept] +
               ["status", "stage", "cost", *FIGURES, "yield_band", "yield_limits", "folder", "error"])
    try:
        write_rows(out / "summary.csv", [{c: cell(j[c]) for c in columns} for j in summary], columns=columns)
    except OSError as e:
        raise BatchStopped(f"cannot write summary.csv: {e.strerror or e} (the results are in results.sqlite: "
                           "'xo-fit batch --summary DIR' writes it again)", path=out) from None
    return summary
