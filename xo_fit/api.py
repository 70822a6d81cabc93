"""The Python API: load a job, simulate, fit, snap and spread designs, write a report.

Every function takes a job (a :class:`~xo_fit.job.model.Job` from :func:`load_job`,
a path to a job file, or an already loaded :class:`~xo_fit.model.system.System`) and
returns a :class:`~xo_fit.output.design.Design` or :class:`~xo_fit.output.design.Spread`.
Values are SI floats by part name. User errors raise
:class:`~xo_fit.errors.XoFitError`; the command line is built on these same
functions.

>>> import xo_fit
>>> job = xo_fit.load_job("job.toml")                 # doctest: +SKIP
>>> best = xo_fit.fit(job, budget=20000, seed=1)    # doctest: +SKIP
>>> buy = xo_fit.snap(job, best)                    # doctest: +SKIP
>>> tol = xo_fit.spread(job, buy, samples=2000)     # doctest: +SKIP
>>> xo_fit.write_report([best, buy, tol], "report")   # doctest: +SKIP
"""

from __future__ import annotations

from pathlib import Path
from typing import Any
from collections.abc import Mapping

import numpy as np

from xo_fit.config import MAX_INCREASE, REFIT_BUDGET
from xo_fit.constants import PART_UNIT
from xo_fit.output.design import Design, Spread
from xo_fit.output.loading import load_result
from xo_fit.errors import XoFitError
from xo_fit.job.model import Job
from xo_fit.job.reader import load_job as _load_job

__all__ = ["load_job", "simulate", "fit", "snap", "spread", "prune", "fit_driver", "baffle", "write_report",
           "load_result", "Design", "Spread"]


def load_job(source: str | Path | Mapping[str, Any], base: str | Path | None = None) -> Job:
    """A validated job from a TOML file, or from a mapping with the TOML's structure.

    Parameters
    ----------
    source : str, Path or Mapping
        The job file's path, or a mapping with the TOML's structure (tables as dicts, values as TOML gives
        them, e.g. ``"4.7uF"`` or ``4.7e-6``); a mapping is copied, never changed.
    base : str or Path, optional
        The folder relative data paths are taken from (default: the job file's folder; for a mapping, the
        current folder).

    Returns
    -------
    Job
        The job, every default filled in and every value in SI units (docs/job-format.md).

    Raises
    ------
    JobError
        For anything wrong with the job (a ``[sweep]`` too: that is for ``xo-fit batch``), naming the file,
        line and key.
    """
    return _load_job(source, base)


def _system(job):
    """A loaded system for a job given as a System, a Job or a path."""
    from xo_fit.model.system import System, load_system

    if isinstance(job, System):
        return job
    if isinstance(job, (str, Path)):
        job = _load_job(job)
    if not isinstance(job, Job):
        raise XoFitError(f"expected a job (xo_fit.load_job) or a job file path, got {type(job).__name__}")
    return load_system(job)


def _values(system, design) -> np.ndarray:
    """Values (P,) of a design given as a Design, a Spread, a mapping name -> SI value, or None (the job's own)."""
    if design is None:
        return system.values()
    if isinstance(design, Spread):
        design = design.design
    if isinstance(design, Design):
        if design.system.part_names != system.part_names:
            raise XoFitError("the design belongs to a job with other parts "
                             f"({', '.join(design.system.part_names)}; this job: {', '.join(system.part_names)})")
        return np.array(design.array, dtype=float)
    if isinstance(design, Mapping):
        unknown = [k for k in design if k not in system.part_names]
        if unknown:
            raise XoFitError(f"no part named {unknown[0]} in the job (parts: {', '.join(system.part_names)})")
        bad = [k for k, v in design.items() if not (isinstance(v, (int, float)) and np.isfinite(v) and v > 0)]
        if bad:
            raise XoFitError(f"part {bad[0]}: expected a value above 0 in SI units, got {design[bad[0]]!r}")
        return system.values({k: float(v) for k, v in design.items()})
    raise XoFitError(f"expected a Design or a mapping of part values, got {type(design).__name__}")


def _reuse(job, design):
    """The design's own loaded system when the job is the design's job (saves reading the data again)."""
    d = design.design if isinstance(design, Spread) else design
    if isinstance(d, Design) and (job is d.system or job is d.job):
        return d.system
    return _system(job)


def simulate(job, values: Mapping[str, float] | Design | None = None) -> Design:
    """The job's own values (a hand design), some replaced by ``values``, simulated and scored.

    Parameters
    ----------
    job : Job, str, Path or System
        A :class:`~xo_fit.job.model.Job` (:func:`load_job`), a job file's path, or a loaded System.
    values : Mapping or Design, optional
        Part values replacing the job's own: a mapping part name -> value in ohm, H or F by the part's
        kind (each above 0), or a Design of the same job's parts (all its values). Default: the job's values.

    Returns
    -------
    Design
        The design (stage ``"simulate"``): its responses, cost and metrics.

    Raises
    ------
    XoFitError
        For a part the job lacks, a value not a finite number above 0, or a Design of another job's parts.
    """
    from xo_fit.search.fitting import score

    system = _reuse(job, values)
    v = _values(system, values)
    return Design(system=system, scored=score(system, v), stage="simulate", source={"from": None})


def fit(job, *, budget: int | None = None, seed: int | None = None, optimizer: str | None = None,
        time_limit: float | None = None, workers: int = 1, progress=None) -> Design:
    """Global search and polish of the job's free values; the arguments override the job's ``[search]``.

    Parameters
    ----------
    job : Job, str, Path or System
        A :class:`~xo_fit.job.model.Job` (:func:`load_job`), a job file's path, or a loaded System.
    budget : int, optional
        Cost evaluations for the search (dimensionless); default the job's ``[search] budget``.
    seed : int, optional
        The random seed (dimensionless); default the job's ``[search] seed``.
    optimizer : str, optional
        The search engine (``"auto"``, ``"de"``, ``"scipy-de"`` or ``"ng-NAME"``); default the job's.
    time_limit : float, optional
        Stop after this long, in s, and keep the best so far; default the job's (none: no limit).
    workers : int
        Processes (dimensionless). Above 1, the search runs as that many islands forked from this process
        (seeds derived from ``seed``), each on an equal share of the global search; their best basins are
        polished side by side and the best wins; ``progress`` is then not called. Default 1.
    progress : callable, optional
        Called as ``progress(evaluations, budget, best_cost)`` while a single search runs.

    Returns
    -------
    Design
        The fitted design (stage ``"fit"``), with the search's figures in its ``"search"`` section.

    Raises
    ------
    XoFitError
        When the job cannot be fitted (no way targets, no free values) or ``optimizer`` is unknown.
    """
    from xo_fit.search.fitting import run_fit, run_fit_restarts

    system = _system(job)
    j = system.job
    runs = None
    if workers > 1:
        outcome, runs = run_fit_restarts(system, workers, optimizer=optimizer, budget=budget, seed=seed,
                                         time_limit=time_limit)
    else:
        outcome = run_fit(system, optimizer=optimizer, budget=budget, seed=seed, time_limit=time_limit,
                          progress=progress)
    r = outcome.search
    search = {"optimizer": r.optimizer, "evaluations": r.evaluations, "seconds": round(r.seconds, 4),
              "seed": r.seed, "complete": r.complete, "stopped_by": r.stopped_by, "restarts": r.restarts,
              "best_restart": r.best_restart, "basins": list(r.basins), "kernel": outcome.kernel}
    if j.limits.active:  # the feasibility-first search's total violation of the result (0: every limit met)
        search["violation"] = r.violation
    if runs is not None:  # --workers: the processes shared the budget; the winner's derived seed is "seed"
        search["workers"] = runs
        search["evaluations"] = sum(x["evaluations"] for x in runs)
    if j.search.robust_samples:
        search["robust"] = {"samples": j.search.robust_samples,
                            "solves": search["evaluations"] * j.search.robust_samples,  # every island's
                            "note": "cost = mean over fixed tolerance draws; each evaluation solves one design "
                                    "per draw"}
    return Design(system=system, scored=outcome.scored, stage="fit", sections={"search": search},
                  outcome=outcome, runs=runs, label="fit")


def snap(job, design: Design | Mapping[str, float] | None = None, *, series: Mapping[str, str] | None = None,
         inventory=None, combine: int | None = None, top_up: str | None = None) -> Design:
    """Every snappable value moved to a purchasable one (a series, or the parts on hand) and re-scored.

    Parameters
    ----------
    job : Job, str, Path or System
        A :class:`~xo_fit.job.model.Job` (:func:`load_job`), a job file's path, or a loaded System.
    design : Design or Mapping, optional
        The continuous design to snap: a Design (or Spread) of the job, or a mapping part name -> value in ohm,
        H or F by the part's kind. Default: the job's own values.
    series : Mapping, optional
        Kind (``"R"``, ``"L"``, ``"C"``) -> series name (``"E12"``, ...), overriding the job's ``[snap] series``.
    inventory : str, Path or Inventory, optional
        A drawer CSV's path (or a read :class:`~xo_fit.io.inventory.Inventory`) to take parts from; default the
        job's own, if any.
    combine : int, optional
        Parts that may make one value (dimensionless): 1 or 2; default the job's ``[snap] combine``.
    top_up : str, optional
        With an inventory, a series to buy from where the drawer lacks a value; default the job's.

    Returns
    -------
    Design
        The snapped design (stage ``"snap"``), scored with the parts that will be built (a drawer's own DCR,
        ESR and ratings where it gives them), with the continuous cost in its ``"snap"`` section and parts.csv.
    """
    from xo_fit.search.fitting import cost_model, score
    from xo_fit.io.inventory import Inventory, read_inventory
    from xo_fit.stages.snapping import parts_table, run_snap, with_drawer_parts
    from xo_fit.units import format_value

    system = _reuse(job, design)
    j = system.job
    continuous = _values(system, design)
    if inventory is None and j.snap.inventory is not None:
        inventory = j.snap.inventory
    if inventory is not None and not isinstance(inventory, Inventory):
        inventory = read_inventory(inventory)
    outcome = run_snap(system, continuous, series_override=dict(series) if series else None, inventory=inventory,
                       combine=combine, top_up=top_up)
    model = cost_model(system)
    before = score(system, continuous, model)
    drawer_system = with_drawer_parts(system, outcome, inventory)
    after = score(system, outcome.values, model) if drawer_system is None else score(drawer_system, outcome.values)
    if drawer_system is not None:
        system = drawer_system
    sr = outcome.search
    sections = {"snap": {"continuous_cost": before.cost,
                         "log_nearest_cost": sr.baseline_cost if sr else before.cost,
                         "evaluations": sr.evaluations if sr else 0, "exhaustive": sr.exhaustive if sr else True,
                         "seconds": round(outcome.seconds, 4), "continuous_metrics": before.metrics}}
    part_info = {}
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
        part_info[sp.name] = e
    return Design(system=system, scored=after, stage="snap", sections=sections,
                  source={"from": None, "inventory": str(inventory.path) if inventory else None},
                  part_info=part_info, tables={"parts.csv": parts_table(outcome, j, dict(j.spread.tolerance))},
                  outcome=outcome, before=before, label="snap")


def spread(job, design: Design | Mapping[str, float] | None = None, *, samples: int | None = None,
           seed: int | None = None, progress=None) -> Spread:
    """Tolerance Monte Carlo of a design: yields, sensitivity, percentile curves.

    Parameters
    ----------
    job : Job, str, Path or System
        A :class:`~xo_fit.job.model.Job` (:func:`load_job`), a job file's path, or a loaded System.
    design : Design or Mapping, optional
        The nominal design: a Design (or Spread) of the job, or a mapping part name -> value in ohm, H or F
        by the part's kind. Default: the job's own values.
    samples : int, optional
        Tolerance draws (dimensionless); default the job's ``[spread] samples``.
    seed : int, optional
        The random seed (dimensionless); default the job's ``[spread] seed``.
    progress : callable, optional
        Called as ``progress(done, samples, fraction_within_band)`` after each chunk of draws.

    Returns
    -------
    Spread
        The nominal design (stage ``"spread"``) with the ``"spread"`` section (yields, worst draw, sensitivity,
        corners, pair matching) and the p05/p50/p95 curves in dB of the sum and of each driver on the grid.
    """
    from xo_fit.search.fitting import score
    from xo_fit.stages.tolerance import run_spread

    system = _reuse(job, design)
    j = system.job
    nominal = _values(system, design)
    r = run_spread(system, nominal, samples=samples, seed=seed, progress=progress)
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
    d0 = design.design if isinstance(design, Spread) else design
    nominal_design = Design(system=system, scored=score(system, nominal), stage="spread",
                            sections={"spread": section}, source={"from": None}, label="spread",
                            part_info=dict(d0.part_info) if isinstance(d0, Design) else {})
    return Spread(design=nominal_design, section=section, columns=cols, result=r)


def prune(job, design: Design | Mapping[str, float] | None = None, *, budget: int | None = None,
          seed: int | None = None, max_increase: float = MAX_INCREASE, workers: int = 1, progress=None):
    """Greedy backward elimination of parts, with a refit after each removal.

    Parameters
    ----------
    job : Job, str, Path or System
        A :class:`~xo_fit.job.model.Job` (:func:`load_job`), a job file's path, or a loaded System.
    design : Design or Mapping, optional
        The starting design: a Design (or Spread) of the job, or a mapping part name -> value in ohm, H or F
        by the part's kind. Default: the job's own values, fitted first (:func:`fit` with the job's
        ``[search]``), so that the prune starts from a fitted design; the fit's figures go into the section's
        ``fit``.
    budget : int, optional
        Cost evaluations for each refit at most (dimensionless); default (or 0) ``xo_fit.config.REFIT_BUDGET``.
    seed : int, optional
        The seed of that first fit (dimensionless; default the job's ``[search] seed``), recorded; the refits
        are local polishes from the current values and draw no random numbers.
    max_increase : float
        The largest cost increase over step 0 (the starting design refitted) that the chosen design may have,
        as a fraction (dimensionless): 0.10 is 10 %.
    workers : int
        Processes the trial removals of a step run in (dimensionless); default 1.
    progress : callable, optional
        Called as ``progress(step, removed, how, cost)`` after each step (step 0: removed and how "").

    Returns
    -------
    Pruning
        A :class:`~xo_fit.output.pruned.Pruning`: ``steps`` (the prune.csv rows), ``designs`` (one per step),
        ``design`` (the chosen one: the fewest parts within ``max_increase`` of step 0's cost), ``save(folder)``.

    Raises
    ------
    XoFitError
        Where ``budget`` is no whole number of evaluations (checked before the fit), or the job has no way
        targets (JobError).
    """
    from xo_fit.output.pruned import Pruning
    from xo_fit.stages.pruning import run_prune

    if budget is not None and (isinstance(budget, bool) or not isinstance(budget, (int, np.integer)) or budget < 0):
        raise XoFitError(f"budget: expected a whole number of cost evaluations per refit, at least 1 (0 or None: "
                         f"{REFIT_BUDGET}), got {budget!r}")
    system = _reuse(job, design)
    fitted = None
    if design is None and system.job.free_parts:  # the job's own values: a fit first, so step 0 is a fitted design
        design = fitted = fit(system, seed=seed, workers=workers)
    search = fitted.sections["search"] if fitted is not None else {}
    run = run_prune(system, _values(system, design), budget=budget, seed=seed, max_increase=max_increase,
                    workers=workers, progress=progress, interrupted=search.get("stopped_by") == "interrupted")
    if fitted is not None:
        run.section["fit"] = {"cost": fitted.cost, **{k: search[k] for k in ("seed", "evaluations", "complete")}}
    return Pruning.of_run(run)


def fit_driver(path: str | Path, model: str = "ts", volume: float | None = None):
    """An equivalent circuit fitted to a measured impedance file.

    Parameters
    ----------
    path : str or Path
        The impedance file (frequency in Hz, magnitude in ohm, phase in degrees where given).
    model : str
        ``"ts"``: Small's model of a driver in free air; ``"ts-lossy"``: with L2 || R2 for the voice coil;
        ``"vented"``: a driver in its vented box, fitted to the twin-peak impedance; ``"vented-lossy"``: that
        with L2 || R2.
    volume : float, optional
        For the vented models only: the box's net volume in m^3, where known; it gives the driver's vas.

    Returns
    -------
    ImpedanceFit or VentedFit
        For ``"ts"`` and ``"ts-lossy"`` an :class:`xo_fit.physics.impedance_fit.ImpedanceFit` (``params``,
        ``rms_error_pct``, ``max_error_pct``, ``toml(name)``); for the vented models a
        :class:`xo_fit.physics.vented_fit.VentedFit` (re, le, fs, qms, qes, alpha = Vas/Vb, fb, ql, the same
        error figures, ``toml(name)`` with the ts and box tables).

    Raises
    ------
    XoFitError
        For an unknown model, a volume with a free-air model, a bad file or a fit that fails.
    """
    from xo_fit.io.measure import read_curve
    from xo_fit.physics.impedance_fit import MODELS, fit_impedance

    if model not in MODELS + VENTED_MODELS:
        raise XoFitError(f"expected one of {', '.join(MODELS + VENTED_MODELS)}, got {model!r}", key="--model")
    curve = read_curve(path, "impedance")
    if model in VENTED_MODELS:
        from xo_fit.physics.vented_fit import fit_vented

        z = curve.magnitude if curve.phase_deg is None else curve.magnitude * np.exp(1j * np.deg2rad(curve.phase_deg))
        return fit_vented(curve.frequency, z, lossy=model == "vented-lossy", volume=volume, path=curve.path)
    if volume is not None:
        raise XoFitError(f"a box volume belongs to --model vented, not {model}", key="--volume")
    return fit_impedance(curve, model)


#: The vented-box models ``fit_driver`` takes besides the free-air ones.
VENTED_MODELS = ("vented", "vented-lossy")


def baffle(job):
    """Each driver's diffraction response on the job's ``[baffle]`` (docs/baffle.md), without reading any data.

    Parameters
    ----------
    job : Job, str, Path or System
        The job: a :class:`~xo_fit.job.model.Job`, a job file's path or a loaded System (its job is used).

    Returns
    -------
    BaffleResponses
        An :class:`xo_fit.output.baffle.BaffleResponses`: ``frequencies`` (F,) in Hz, ``positions`` (A,) (the
        axis first), ``names`` (D,), ``response`` complex (D, A, F) dimensionless (the baffle's pressure over
        the free-field pressure), ``table()``, ``save(folder)`` writing baffle.csv and baffle.png.

    Raises
    ------
    JobError
        When the job has no ``[baffle]``.
    """
    from xo_fit.model.system import System
    from xo_fit.output.baffle import baffle_responses

    if isinstance(job, System):
        job = job.job
    elif isinstance(job, (str, Path)):
        job = _load_job(job)
    if not isinstance(job, Job):
        raise XoFitError(f"expected a job (xo_fit.load_job) or a job file path, got {type(job).__name__}")
    return baffle_responses(job)


def write_report(items: list, out: str | Path, command: list[str] | None = None, *, buy=None,
                 speakers: int | None = None) -> Path:
    """report.html (self-contained), its PNGs and bom.csv for designs and spreads, overlaid.

    Parameters
    ----------
    items : list of Design, Spread, str or Path
        The results, overlaid in the order given: designs, spreads, or result paths (a result.json or its
        folder). They must share one grid and one set of drivers.
    out : str or Path
        The folder to write into (made where missing).
    command : list of str, optional
        The command line that made the report, shown with the version and date (default: "the Python API").
    buy : Design, Spread, str or Path, optional
        The result whose parts are listed to buy and written to bom.csv: one of ``items``, a result path (one of
        theirs, or another result, then added to the report) or a Design/Spread. Default: the last snap among
        ``items``, else the last result whose parts all come from a series or a drawer, else none (continuous
        values are never listed to buy unasked).
    speakers : int, optional
        Speakers the quantities of bom.csv are for (dimensionless); default 2, a stereo pair.

    Returns
    -------
    Path
        The report.html written.

    Raises
    ------
    XoFitError
        When ``items`` is empty, a result file cannot be read, or the results do not share a grid and drivers.
    """
    from xo_fit.output.report import write_report as _write

    loaded = [load_result(x) if isinstance(x, (str, Path)) else x for x in items]
    if not loaded:
        raise XoFitError("nothing to report: give at least one design or result")
    if isinstance(buy, (str, Path)):
        where = [_result_file(x) if isinstance(x, (str, Path)) else None for x in items]
        wanted = _result_file(buy)
        buy = loaded[len(where) - 1 - where[::-1].index(wanted)] if wanted in where else load_result(buy)
    return _write(loaded, Path(out), command, buy=buy, speakers=speakers)


def _result_file(path: str | Path) -> Path:
    """A result path (the file or its folder) as its result.json, resolved: two spellings of one result match."""
    p = Path(path)
    return (p / "result.json" if p.is_dir() else p).resolve()
