"""Snapping a design to purchasable values: series or parts on hand, singly or in pairs, with the real cost.

Every snapped part gets a short list of choices (:mod:`xo_fit.stages.choices`):
its log-nearest purchasable value and its nearest neighbours in the series or
the drawer, plus, with ``combine = 2``, the best two-part combinations. The
choice of every part is then searched together with the job's real cost
(:mod:`xo_fit.stages.choice_search`): exhaustively where there are few
combinations, else a beam search, random restarts and local moves.

The search starts from log-nearest rounding and only ever accepts an
improvement, so the snapped design is never worse than log-nearest rounding.
Under ``[limits]`` every comparison is feasibility first
(:func:`xo_fit.search.feasibility.feasibility_key`): a snapped design that
breaks a limit is chosen only when no snapped design the search meets does.
A part in the drawer is never used more times than the drawer holds. Parts
left continuous (series "none") are then re-optimised with the others held.

Which parts are snapped: every R, L and C except those with ``fixed = true``
or series ``none``. A part with a range keeps to it where the series allows.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from xo_fit.config import FAR_COST, FAR_STEPS
from xo_fit.io.inventory import Inventory
from xo_fit.series import check_name
from xo_fit.stages.choice_search import ChoiceEvaluator, SnapSearch, first_feasible, search_choices
from xo_fit.stages.choices import Choice, choices_for, log_nearest_index
from xo_fit.units import format_value


@dataclass(frozen=True)
class SnappedPart:
    """One valued part after the snap.

    Attributes
    ----------
    name : str
        The part's name.
    kind : str
        ``"R"``, ``"L"`` or ``"C"``.
    continuous : float
        Its value before the snap, SI (in ohm, H or F).
    value : float
        Its value after the snap, SI (in ohm, H or F).
    source : str
        A series name, ``"inventory"``, ``"continuous"`` or ``"fixed"``.
    choice : Choice or None
        The choice made; None for fixed and continuous parts.
    """
    name: str
    kind: str
    continuous: float
    value: float
    source: str  # series name, "inventory", "continuous" or "fixed"
    choice: Choice | None


@dataclass(frozen=True, eq=False)
class SnapOutcome:
    """What a snap computed.

    Attributes
    ----------
    parts : tuple of SnappedPart
        Every valued part, in the job's part order.
    values : ndarray
        The snapped design, SI (ohm, H, F), shape (P,).
    continuous : ndarray
        The design it started from, SI (ohm, H, F), shape (P,).
    search : SnapSearch or None
        The choice search; None where no part snaps.
    seconds : float
        The snap's wall time, in s.
    """
    parts: tuple[SnappedPart, ...]
    values: np.ndarray  # (P,) the snapped design
    continuous: np.ndarray  # (P,) the design it started from
    search: SnapSearch | None
    seconds: float


def part_sources(job, series_override: dict | None, inventory: Inventory | None) -> dict[str, str]:
    """Where each valued part's value comes from.

    A part's own ``series`` first; else the drawer where it holds parts of the kind; else the [snap] series of
    its kind (``series_override`` first).

    Parameters
    ----------
    job : Job
        The job (:class:`~xo_fit.job.model.Job`).
    series_override : dict or None
        Kind (``"R"``, ``"L"``, ``"C"``) -> series name, over the job's [snap] series.
    inventory : Inventory or None
        The drawer (:class:`~xo_fit.io.inventory.Inventory`).

    Returns
    -------
    dict
        Part name -> a series name, ``"inventory"``, ``"none"`` (continuous) or ``"fixed"``.
    """
    series = dict(job.snap.series)
    series.update(series_override or {})
    out = {}
    for p in job.valued_parts:
        if p.fixed:
            out[p.name] = "fixed"
            continue
        own = p.series
        if own is not None:
            out[p.name] = check_name(own)
        elif inventory is not None and inventory.values(p.type):
            out[p.name] = "inventory"
        else:
            out[p.name] = check_name(series[p.type])
    return out


def run_snap(system, continuous: np.ndarray, *, series_override: dict | None = None,
             inventory: Inventory | None = None, combine: int | None = None, seed: int | None = None,
             top_up: str | None = None) -> SnapOutcome:
    """Snap a design to purchasable values with the job's cost (see the module).

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    continuous : ndarray
        The design to snap, SI (ohm, H, F), shape (P,).
    series_override : dict, optional
        Kind (``"R"``, ``"L"``, ``"C"``) -> series name, over the job's [snap] series.
    inventory : Inventory, optional
        The drawer (:class:`~xo_fit.io.inventory.Inventory`); its parts are never used more often than it holds.
    combine : int, optional
        1: single parts; 2: two-part combinations too (dimensionless); default the job's [snap] combine.
    seed : int, optional
        The random seed (dimensionless); default the job's [search] seed.
    top_up : str, optional
        A series to buy from where the drawer lacks a value (``"none"``: no top-up); default [snap] top_up.

    Returns
    -------
    SnapOutcome
        Every part's value and source, the snapped design and the choice search.

    Raises
    ------
    XoFitError
        Where the job has no way targets (JobError), or the drawer cannot make the design.
    """
    import time

    from xo_fit.search.fitting import cost_function, limited_cost_function, require_cost_model
    from xo_fit.search.engines import search
    from xo_fit.search.space import Space
    from xo_fit.search.feasibility import feasibility_key

    t0 = time.monotonic()
    job = system.job
    combine = job.snap.combine if combine is None else combine
    top_up = job.snap.top_up if top_up is None else check_name(top_up)
    if top_up == "none":  # "none" (continuous values) is no series to buy from: no top-up
        top_up = None
    seed = job.search.seed if seed is None else seed
    cm, _ = require_cost_model(system, "score the snap with")
    limited = limited_cost_function(cm)
    plain_cost = cost_function(cm) if limited is None else (lambda v: limited(v)[0])
    # the snap's comparisons: the cost, or under [limits] the feasibility-first key
    cost_fn = plain_cost if limited is None else (lambda v: feasibility_key(*limited(v)[:2]))
    sources = part_sources(job, series_override, inventory)
    parts = job.valued_parts
    continuous = np.asarray(continuous, dtype=float)
    snap_idx = [i for i, p in enumerate(parts) if sources[p.name] not in ("fixed", "none")]
    options, baseline = [], []
    for i in snap_idx:
        p = parts[i]
        opts = choices_for(p.type, continuous[i], sources[p.name], inventory=inventory, combine=combine,
                           lo=p.min, hi=p.max, top_up=top_up)
        options.append(opts)
        baseline.append(log_nearest_index(opts, continuous[i]))
    stock = {}
    if inventory is not None:
        for kind, items in inventory.parts.items():
            for v, n in items:
                stock[(kind, v)] = n
    values = continuous.copy()
    result = None
    if snap_idx:
        ev = ChoiceEvaluator(cost_fn, continuous.copy(), snap_idx, options, stock)
        base = np.array(baseline, dtype=np.int64)
        if stock and not ev.feasible(base[None])[0]:
            # log-nearest would use a drawer part more often than it holds: start from a feasible design
            base = first_feasible(ev, base, inventory.path if inventory is not None else None)
        result = search_choices(ev, base, seed)
        for j, i in enumerate(snap_idx):
            values[i] = options[j][result.assignment[j]].value
        if limited is not None:  # report costs, not keys
            base_values = continuous.copy()
            for j, i in enumerate(snap_idx):
                base_values[i] = options[j][result.baseline[j]].value
            real = plain_cost(np.stack([values, base_values]))
            result = replace(result, cost=float(real[0]), baseline_cost=float(real[1]))
    # parts left continuous: re-optimise them with the snapped ones held
    cont = [i for i, p in enumerate(parts) if sources[p.name] == "none" and p.free]
    if cont and snap_idx:
        lo = np.log([parts[i].min for i in cont])
        hi = np.log([parts[i].max for i in cont])
        space = Space(names=tuple(parts[i].name for i in cont), columns=np.array(cont), lo=lo, hi=hi,
                      base=values.copy(), u0=np.clip((np.log(values[cont]) - lo) / (hi - lo), 0, 1))
        r = search((lambda u: cost_fn(space.values(u))) if limited is None else (lambda u: limited(space.values(u))),
                   space, budget=min(job.search.budget, 4000), seed=seed, constrained=limited is not None)
        cand = space.values(r.u)[0]
        if cost_fn(cand[None])[0] <= cost_fn(values[None])[0]:
            values = cand
    out_parts = []
    for i, p in enumerate(parts):
        src = sources[p.name]
        choice = None
        if i in snap_idx:
            assert result is not None, "the choice search ran since some part snaps"
            choice = options[snap_idx.index(i)][result.assignment[snap_idx.index(i)]]
        out_parts.append(SnappedPart(p.name, p.type, float(continuous[i]), float(values[i]),
                                     "continuous" if src == "none" else (choice.source if choice else src), choice))
    return SnapOutcome(parts=tuple(out_parts), values=values, continuous=continuous, search=result,
                       seconds=time.monotonic() - t0)


def parts_table(outcome: SnapOutcome, job, tolerance_defaults: dict) -> list[dict]:
    """Rows of parts.csv, one a valued part.

    Parameters
    ----------
    outcome : SnapOutcome
        The snap.
    job : Job
        The job (:class:`~xo_fit.job.model.Job`; its parts' own tolerances).
    tolerance_defaults : dict
        Kind -> tolerance as a fraction (dimensionless), where a part gives none.

    Returns
    -------
    list of dict
        ``name``, ``kind``, ``value`` (SI), ``text``, ``source``, ``tolerance`` (e.g. "5%", or "") and
        ``combination`` (e.g. "parallel: 4.7 µF || 1 µF", or "").
    """
    from xo_fit.constants import PART_UNIT

    rows = []
    for sp, p in zip(outcome.parts, job.valued_parts):
        unit = PART_UNIT[sp.kind]
        tol = p.tolerance if p.tolerance is not None else tolerance_defaults.get(sp.kind)
        comb = ""
        if sp.choice is not None and sp.choice.connection != "single":
            comb = f"{sp.choice.connection}: {sp.choice.describe(unit)}"
        rows.append({"name": sp.name, "kind": sp.kind, "value": sp.value, "text": format_value(sp.value, unit),
                     "source": sp.source, "tolerance": f"{tol * 100:g}%" if tol is not None else "",
                     "combination": comb})
    return rows


def snap_warnings(outcome: SnapOutcome, continuous_cost: float | None, snapped_cost: float | None,
                  inventory: bool) -> list[str]:
    """One-line warnings for a snap that moved parts far from their continuous values or raised the cost by more
    than half, each with what usually helps (--top-up, --combine 2, a finer series).

    Parameters
    ----------
    outcome : SnapOutcome
        The snap.
    continuous_cost, snapped_cost : float or None
        The costs before and after the snap (dimensionless); None: no cost to compare.
    inventory : bool
        Whether the snap took parts from a drawer (the advice differs).

    Returns
    -------
    list of str
        The warnings: parts moved more than FAR_STEPS E12 steps, a cost raised by more than FAR_COST.
    """
    step = math.log(10.0) / 12  # one E12 step in log distance
    out = []
    far = []
    for sp in outcome.parts:
        if sp.source in ("fixed", "continuous") or not sp.continuous or sp.value <= 0:
            continue
        steps = abs(math.log(sp.value / sp.continuous)) / step
        if steps >= FAR_STEPS + 0.5:
            far.append(f"{sp.name} {100 * (sp.value / sp.continuous - 1):+.0f} %")
    helps = ("--top-up E12 (or [snap] top_up) buys what the drawer lacks, --combine 2 makes a value of two parts"
             if inventory else "--combine 2 makes a value of two parts, or a finer series (--series E24)")
    if far:
        out.append(f"the snap moved {len(far)} part(s) more than {FAR_STEPS} E12 steps from the fit "
                   f"({', '.join(far)}): {helps}")
    if continuous_cost is not None and snapped_cost is not None and continuous_cost > 0 \
            and snapped_cost > continuous_cost * (1 + FAR_COST):
        out.append(f"the snap raised the cost from {continuous_cost:.4g} to {snapped_cost:.4g} "
                   f"(+{100 * (snapped_cost / continuous_cost - 1):.0f} %): {helps}")
    return out


def with_drawer_parts(system, outcome: SnapOutcome, inventory: Inventory | None):
    """The system with the drawer's own figures for the parts taken from it (a coil's measured DCR, a
    capacitor's ESR, the rating it is sold for), or None where the drawer gives none: the snap's search scores
    with the job's part model, the snapped design is scored with the parts that will be built.

    Parameters
    ----------
    system : System
        The job the snap ran on (:class:`~xo_fit.model.system.System`).
    outcome : SnapOutcome
        The snap's choices (:func:`run_snap`).
    inventory : Inventory or None
        The drawer the snap took parts from, if any.

    Returns
    -------
    System or None
        The same job with each single part taken from the drawer given the drawer's dcr, esr or rating
        (ohm, ohm, W), or None when the drawer gives none for the parts taken.
    """
    if inventory is None or not getattr(inventory, "extras", None):
        return None
    given = {}
    for sp in outcome.parts:
        if sp.source == "inventory" and sp.choice is not None and sp.choice.connection == "single":
            extra = inventory.extra(sp.kind, sp.value)
            if extra:
                given[sp.name] = extra
    if not given:
        return None
    from xo_fit.job.reader import load_job as read_job
    from xo_fit.model.system import derive_system

    doc = system.job.data
    for p in doc.get("part", []):
        for key, value in given.get(p.get("name"), {}).items():
            p[key] = value
    return derive_system(system, read_job(doc, base=system.job.folder))
