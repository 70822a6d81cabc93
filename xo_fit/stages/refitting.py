"""A prune's refits: one reduced system's refit from the current values, and a step's trial removals.

The prune (:mod:`xo_fit.stages.pruning`) asks for every legal removal of a step refitted; here each is a
local polish from the current design with the part removed (:func:`refit`), on the prune's shared kernel (its
``Family``: ``fused``, ``limited``, ``cube_map``) or on the dense solve, and a step's refits on the shared kernel
run side by side (:func:`step_trials`); with workers, each process runs some of them (:func:`pooled_trials`).
"""

from __future__ import annotations

import pickle

import numpy as np

from xo_fit.model.cost import CostModel
from xo_fit.model.limits import NAMES as LIMIT_NAMES
from xo_fit.model.system import derive_system
from xo_fit.search.engines import polish_from
from xo_fit.search.feasibility import REFIT_MARGINS
from xo_fit.search.fitting import Scored, cost_model, require_cost_model, score
from xo_fit.search.lbfgsb import inherit_one_blas_thread
from xo_fit.search.polish_batch import polish_together
from xo_fit.search.space import make_space
from xo_fit.stages.removal import JobDocument, variant


def refit(system, budget: int, seed: int, family=None, removed: dict | None = None,
          light: bool = False, targets=None):
    """The system's free values refitted from its job's values (the start): a polish (L-BFGS-B, under
    ``[limits]`` SLSQP; :func:`xo_fit.search.engines.polish_from`) within ``budget`` evaluations.

    A refit starts from the current design with one part removed, close to the optimum it seeks; a local polish
    from there got nearer the best cost of a long global search (DE of 4,000 evaluations) than the short global
    search of 600 the prune ran before, in half the evaluations (DEVELOPERS.md, Prune). With ``family`` (where
    :meth:`Family.embed` maps the system into it) it runs on the family's compiled kernel; else on the dense
    solve. Either way the design found is scored on the system's own netlist, so the costs reported are exact.

    Parameters
    ----------
    system : System
        The (reduced) system (:class:`~xo_fit.model.system.System`); its job's values are the start.
    budget : int
        The polish's cost evaluations at most (dimensionless).
    seed : int
        Kept for the callers' signature: the polish draws no random numbers (dimensionless).
    family : Family, optional
        The prune's :class:`Family`; None: the dense solve.
    removed : dict, optional
        The parts ``system`` lacks against the family's: name -> "open" or "short".
    light : bool
        Score the design by its cost alone (a Scored without ``sim``, terms or metrics, scored in full if taken).
    targets : Targets, optional
        The job's targets where already built (they do not change when a part is removed).

    Returns
    -------
    tuple
        (:class:`~xo_fit.search.fitting.Scored`, evaluations (dimensionless)); without free parts the start's.

    Raises
    ------
    Interrupted
        Where Ctrl-C or SIGTERM stopped the search, with the best design so far.
    """

    model = model_of(system, targets)
    cm, _ = model
    if not system.job.free_parts:
        return score(system, system.values(), model), 0
    space = make_space(system.job)
    to_family = family.cube_map(system, space, removed or {}) if family is not None else None
    if to_family is not None:
        assert family is not None  # the map comes from the family
        fused, limited = family.fused, family.limited

        def fn(u: np.ndarray):
            v = to_family(u)
            return fused.limited(v) if limited else fused(v)
    else:
        def fn(u: np.ndarray):
            v = space.values(u)
            ev = cm.evaluate_simulation(system.simulate(v, dense=True), v)
            if ev.violations is None:
                return ev.cost
            return ev.cost, ev.violations["total"], np.stack([ev.violations[n] for n in LIMIT_NAMES], axis=-1)

    seen = [0]  # designs evaluated

    def counted(u: np.ndarray):
        seen[0] += len(u)
        return fn(u)
    r = polish_from(counted, space, start_of(space), budget=budget, constrained=cm.limits is not None,
                    margins=REFIT_MARGINS)
    if r is None:  # no design kept: stopped before its first evaluation, or every design it saw singular
        start = score(system, system.values(), model)
        if not seen[0]:
            raise Interrupted(start, 0)
        return start, seen[0]
    scored = light_score(system, model, space.values(r.u)[0]) if light else score(system, space.values(r.u)[0], model)
    if r.stopped_by == "interrupted":
        raise Interrupted(scored, r.evaluations)
    return scored, r.evaluations


def start_of(space) -> np.ndarray:
    """The refit's start in ``space``'s cube (n,): the job's values (the middle of the cube for a free part
    without one)."""
    return space.u0 if space.u0 is not None else np.full(space.dims, 0.5)


def light_score(system, model, values: np.ndarray):
    """A Scored of design ``values`` (P,), SI, with its exact cost on the system's own netlist (dense solve) and
    nothing else (no ``sim``, terms or metrics): a trial's, scored in full only if taken."""
    return light_judged(system, model, values)[0]


def light_judged(system, model, values: np.ndarray) -> tuple:
    """:func:`light_score` and, from the same dense solve, what :func:`broken_limits` says of the design: (Scored,
    (total violation, names of the limits broken)), the second None where the cost model has no limits."""
    v = np.asarray(values, dtype=float)[None]
    ev = model[0].evaluate_simulation(system.simulate(v, dense=True), v)  # what score() computes the cost with
    scored = Scored(values=v[0], sim=None, cost=float(ev.cost[0]), terms={}, metrics={}, targets=None, level_db=None)
    if ev.violations is None:
        return scored, None
    return scored, (float(ev.violations["total"][0]), [n for n in LIMIT_NAMES if ev.violations[n][0] > 0])


def model_of(system, targets=None):
    """The system's cost model and targets: (CostModel, Targets), the targets built here unless given (a reduced
    system's are its starting system's: nothing they depend on changes when a part is removed). Raises JobError
    where the job has no way targets."""

    if targets is None:
        return require_cost_model(system, "prune against")
    return CostModel(system, targets), targets


class Interrupted(KeyboardInterrupt):
    """A refit stopped by Ctrl-C or SIGTERM: ``args`` = (its best design so far as Scored, evaluations)."""


def broken_limits(system, values: np.ndarray, targets=None) -> tuple[float, list[str]]:
    """The total violation of the job's [limits] by design ``values`` (P,), SI (dimensionless, 0 where all are
    met), and the names of the limits it breaks: (0, []) without limits or targets; ``targets`` as in
    :func:`refit`."""

    if not system.job.limits.active:
        return 0.0, []
    model = cost_model(system) if targets is None else model_of(system, targets)
    if model is None or model[0].limits is None:
        return 0.0, []
    judged = light_judged(system, model, values)[1]
    assert judged is not None, "a cost model with limits reports their violations"
    return judged


#: What every trial of a prune shares in a worker process (:func:`share`): the starting system (its driver data,
#: grid and off-axis data serve every reduced job), the family and the targets, handed over once per worker; and
#: the step's system and document (``step``: derived once per step, from the first of its trials the worker runs).
_SHARED: dict = {}


def share(base, family, targets, one_blas_thread: bool = False) -> None:
    """Pool initializer: what the trials of this prune share (see :data:`_SHARED`); ``one_blas_thread``: the
    worker was forked with one BLAS thread and keeps it (:func:`xo_fit.search.lbfgsb.inherit_one_blas_thread`)."""
    if one_blas_thread:
        inherit_one_blas_thread()
    _SHARED.update(base=base, family=family, targets=targets, step=None)


def pooled_trials(args):
    """Some of a step's trial removals in a worker process: :func:`step_trials` of them. ``args``: (the step's job
    pickled (once a step, not once a trial), its design {name: value}, the removals [(name, how)], budget, seed,
    the parts removed before this step {name: how}); the step's system is derived from the shared starting
    system."""

    job, values, options, budget, seed, gone = args
    step = _SHARED["step"]
    if step is None or step[0] != job:
        loaded = pickle.loads(job)
        step = _SHARED["step"] = (job, derive_system(_SHARED["base"], loaded), JobDocument(loaded))
    try:
        return step_trials(step[1], values, options, budget, seed, _SHARED["family"], gone, _SHARED["targets"],
                           step[2])
    except Interrupted:
        raise KeyboardInterrupt from None  # the trials are dropped: nothing heavy to send back from a worker


def step_trials(system, values: dict, options: list, budget: int, seed: int, family, gone: dict,
                targets, source=None) -> list:
    """The trial removals ``options`` [(name, how)] from ``system`` at design ``values`` ({name: value}, SI): for
    each, (Scored, evaluations, limits) of the reduced system's refit (``light``, see :func:`refit`; ``limits``:
    what :func:`broken_limits` says of it where already judged, else None), or None where the
    removal is no legal netlist (:func:`xo_fit.stages.removal.variant`; ``source``: the system's job's
    JobDocument). ``gone``: the parts removed before this step ({name: how}). On ``family``'s kernel the refits
    run side by side, their points in one batch per round (:func:`xo_fit.search.polish_batch.polish_together`:
    each refit's result as on its own, bit for bit); on the dense solve one after another. Raises
    :class:`Interrupted` or KeyboardInterrupt where Ctrl-C or SIGTERM stopped them."""

    reduced = [variant(system, name, how, values, source=source) for name, how in options]
    out: list = [None] * len(options)
    together: list = []  # (index, space, map into the family)
    for k, (s, (name, how)) in enumerate(zip(reduced, options)):
        if s is None:
            continue
        removed = {**gone, name: how}
        space = make_space(s.job) if family is not None and s.job.free_parts else None
        to = family.cube_map(s, space, removed) if space is not None and family is not None else None
        if to is None:
            out[k] = (*refit(s, budget, seed, family, removed, light=True, targets=targets), None)
        else:
            together.append((k, space, to))
    if together:
        assert family is not None  # only the family's refits go side by side
        got = polish_together(family.fused.limited if family.limited else family.fused,
                              [(space, to) for _, space, to in together], [start_of(space) for _, space, _ in together],
                              budget, constrained=family.limited, margins=REFIT_MARGINS)
        for (k, space, _), r in zip(together, got):
            u, s = start_of(space) if r is None else r.u, reduced[k]
            if r is None or family.limited:  # scored exactly: under [limits] every trial, its limits judged too
                scored, judged = light_judged(s, model_of(s, targets), space.values(u)[0])
                out[k] = (scored, 0 if r is None else r.evaluations, judged)
            else:  # the family kernel's cost (see the module): the step taken is scored exactly
                out[k] = (Scored(values=space.values(u)[0], sim=None, cost=r.cost, terms={}, metrics={},
                                 targets=None, level_db=None), r.evaluations, None)
    return out
