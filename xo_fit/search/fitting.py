"""Fitting a job: targets, cost and search put together; and the scoring shared with simulate.

:func:`run_fit` finds the free values that minimise the job's cost (:func:`run_fit_restarts`: the same on
several processes, as islands); :func:`score` evaluates any design (a hand design, a fit, a snap) into the
cost, its terms and the metrics that result.json carries.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from xo_fit.model.cost import CostModel, simulation_metrics
from xo_fit.model.fused import FusedCost
from xo_fit.search.engines import SearchResult, search
from xo_fit.search.space import Space, make_space
from xo_fit.model.targets import Targets, build_targets


@dataclass(frozen=True, eq=False)
class Scored:
    """One design with everything the outputs need.

    Attributes
    ----------
    values : ndarray
        The design's part values, SI (ohm, H, F), shape (P,).
    sim : Simulation
        Its simulation on the dense solve (:meth:`xo_fit.model.system.System.simulate`, one design).
    cost, level_db : float or None
        Its cost (dimensionless) and the level the targets were placed at (in dB SPL); None without way targets.
    terms, metrics : dict
        Each cost term before its weight (dimensionless; empty without targets); what result.json's ``metrics``
        hold (``rms_error_db`` in dB, ``impedance_min_ohm`` in ohm, ...).
    targets : Targets or None
        The job's targets on the grid (:class:`~xo_fit.model.targets.Targets`); None without way targets.
    preference : dict or None
        An off-axis job's predicted preference (``Preference.to_json``); None on axis.
    """

    values: np.ndarray  # (P,) SI
    sim: object  # Simulation of this one design
    cost: float | None
    terms: dict
    metrics: dict
    targets: Targets | None
    level_db: float | None
    preference: dict | None = None  # an off-axis job's predicted preference (Preference.to_json), else None


def cost_model(system) -> tuple[CostModel, Targets] | None:
    """The job's cost model, or None when the job has no way targets (then only metrics that need none).

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).

    Returns
    -------
    tuple or None
        (:class:`~xo_fit.model.cost.CostModel`, :class:`~xo_fit.model.targets.Targets`), or None.
    """
    if not system.job.target.ways:
        return None
    targets = build_targets(system.job, system.frequencies)
    return CostModel(system, targets), targets


def require_cost_model(system, what: str) -> tuple[CostModel, Targets]:
    """:func:`cost_model` where something needs one: a JobError (key ``[target]``) naming ``what`` needs it
    (``"fit to"``: "nothing to fit to: ...") when the job has no way targets."""
    model = cost_model(system)
    if model is None:
        from xo_fit.errors import JobError

        raise JobError(f"nothing to {what}: add [target.way.NAME] tables (type, alignment, order, fc) for the drivers",
                       path=system.job.path, key="[target]")
    return model


def score(system, values: np.ndarray, model: tuple[CostModel, Targets] | None = None) -> Scored:
    """Simulate one design and score it: cost, terms, metrics.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    values : ndarray
        The design's part values, SI (ohm, H, F), shape (P,).
    model : tuple or None
        The job's (CostModel, Targets) where already built (:func:`cost_model`); None: built here.

    Returns
    -------
    Scored
        The design scored (cost None where the job has no way targets).
    """
    values = np.asarray(values, dtype=float).reshape(-1)
    model = model if model is not None else cost_model(system)
    sim = system.simulate(values, dense=True)
    pref = design_preference(system, sim)
    if model is None:
        return Scored(values=values, sim=sim, cost=None, terms={}, metrics=simulation_metrics(system, sim),
                      targets=None, level_db=None, preference=pref)
    cm, targets = model
    metrics, ev = cm.metrics(values)
    level = metrics.pop("level_db")
    return Scored(values=values, sim=sim, cost=float(ev.cost[0]), terms={k: float(v[0]) for k, v in ev.terms.items()},
                  metrics=metrics, targets=targets, level_db=level, preference=pref)


def design_preference(system, sim) -> dict | None:
    """The predicted preference (Olive 2004) of the first design of ``sim`` (a Simulation of the loaded job
    ``system``), as result.json holds it: the six figures (None and a reason where the grid or the positions do
    not allow one); None for a job without off-axis positions."""
    if not system.positions:
        return None
    from xo_fit.model.acoustics import angle_pressures, curve_weights, directivity, preference_of
    from xo_fit.model.preference import make_plan

    p2 = np.abs(angle_pressures(sim.voltages[:1], system.angle_factors)) ** 2
    curves = {k: v[0] for k, v in directivity(p2, curve_weights(system.positions)).items()}
    return preference_of(make_plan(system.frequencies), curves).to_json()


def cost_function(cm: CostModel):
    """The batch cost a search calls: the fused kernel, or the numpy reference cost (:meth:`CostModel.evaluate`,
    the same terms, about 10x slower: 141 against 11 us per design on the demo) for a job with a term the kernel
    lacks (``[cost] protection``), so that no weight the job sets is silently left out.

    Parameters
    ----------
    cm : CostModel
        The job's cost model.

    Returns
    -------
    callable
        values (B, P), SI (ohm, H, F) -> costs (B,), dimensionless: a :class:`~xo_fit.model.fused.FusedCost` or
        a function.
    """
    if cm.needs_reference:
        return lambda values: cm.evaluate(np.atleast_2d(values)).cost
    return FusedCost(cm)


def limited_cost_function(cm: CostModel):
    """With [limits], the batch function a feasibility-first search calls, through the fused kernel (or the
    reference cost, as :func:`cost_function` chooses).

    Parameters
    ----------
    cm : CostModel
        The job's cost model.

    Returns
    -------
    callable or None
        values (B, P), SI (ohm, H, F) -> (costs (B,), total violations (B,), each limit's signed relative excess
        (B, L), L = 4 in the order of :data:`xo_fit.model.limits.NAMES`), all dimensionless; None without
        limits.
    """
    if cm.limits is None:
        return None
    if cm.needs_reference:
        from xo_fit.model.limits import NAMES

        def triple(values):
            ev = cm.evaluate(np.atleast_2d(values))
            return ev.cost, ev.violations["total"], np.stack([ev.violations[n] for n in NAMES], axis=-1)
        return triple
    return FusedCost(cm).limited


def robust_factors(job) -> np.ndarray | None:
    """The fixed tolerance draws of a robust fit ([search] robust = { samples = N }), or None.

    Drawn from the [spread] distribution and tolerances with a seed derived from [search] seed, so every
    candidate is judged on the same builds; a robust fit costs N solves per candidate.

    Parameters
    ----------
    job : Job
        The job (:class:`~xo_fit.job.model.Job`).

    Returns
    -------
    ndarray or None
        Factors on the part values (dimensionless), shape (N, P); None without ``robust``.
    """
    n = job.search.robust_samples
    if not n:
        return None
    from xo_fit.model.draws import draw_factors, part_tolerances

    rng = np.random.default_rng(np.random.SeedSequence([job.search.seed, 0x5EED]))
    return draw_factors(n, part_tolerances(job), job.spread.distribution, rng)


@dataclass(frozen=True, eq=False)
class FitOutcome:
    """What a fit found, scored (:func:`run_fit`, :func:`run_fit_restarts`).

    Attributes
    ----------
    scored : Scored
        The best design, scored (:func:`score`).
    search : SearchResult
        The search that found it (:class:`~xo_fit.search.engines.SearchResult`; with islands the winner's).
    start_cost : float or None
        The cost of the job's start values (dimensionless); None where no free part has one.
    kernel : str or None
        Which build ran the cost: ``"c"``, ``"numba"`` or ``"numpy"`` (the reference cost).
    islands : dict or None
        ``fit --workers``: ``"runs"`` (an :class:`~xo_fit.search.islands.IslandRun` each) and the parent's
        ``"clock"``; None on one process.
    """

    scored: Scored
    search: SearchResult
    start_cost: float | None
    kernel: str | None = None  # which build ran the cost: "c", "numba", or "numpy" (the reference cost)
    islands: dict | None = None  # --workers: "runs" (xo_fit.search.islands.IslandRun each) and the parent's "clock"


@dataclass(frozen=True, eq=False)
class FitProblem:
    """What a search of a job calls.

    Attributes
    ----------
    fn : callable
        Cube points (B, n) -> costs (B,), dimensionless; with [limits] (``constrained``) -> (costs (B,), total
        violations (B,), each limit's signed relative excess (B, L)); a robust fit's mean over its draws.
    space : Space
        The job's free values as a unit cube (:class:`~xo_fit.search.space.Space`).
    constrained : bool
        Whether the job has [limits] (the search is then feasibility first).
    model, cost : tuple, object
        The job's (CostModel, Targets); the batch cost whose build runs (:func:`backend_of`).
    """

    fn: Callable
    space: Space
    constrained: bool
    model: tuple[CostModel, Targets]
    cost: object

    @property
    def kernel(self) -> str:
        """Which build ran the cost so far (:func:`backend_of`)."""
        return backend_of(self.cost)

    def start_cost(self) -> float | None:
        """The cost of the job's start values as the search judges them (one evaluation; dimensionless, a
        robust fit's mean over its draws), or None where no free part has a start value."""
        if self.space.u0 is None:
            return None
        first = self.fn(self.space.u0[None])
        return float((first[0] if self.constrained else first)[0])

    def warm(self) -> float | None:
        """:meth:`start_cost`, and without start values one evaluation of the cube's centre: either way the
        cost's build is loaded (a C build resolves on its first call), so that forked processes inherit it."""
        if self.space.u0 is None:
            self.fn(np.full((1, self.space.dims), 0.5))
        return self.start_cost()


def fit_problem(system) -> FitProblem:
    """The job's :class:`FitProblem` (its cost's build is loaded on its first call).

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).

    Returns
    -------
    FitProblem
        Its function of cube points, space, limits flag, cost model and batch cost.

    Raises
    ------
    XoFitError
        A JobError where the job has no way targets; an XoFitError where it has no free values.
    """
    job = system.job
    model = require_cost_model(system, "fit to")
    cm, _ = model
    space = make_space(job)
    limited = limited_cost_function(cm)
    fused = cost_function(cm) if limited is None else (lambda values: limited(values)[0])
    robust = robust_factors(job)

    def fn(u: np.ndarray):
        values = space.values(u)
        if robust is None:
            return fused(values) if limited is None else limited(values)
        # the mean cost over the same tolerance draws for every candidate: one batch of B x N designs
        b, n = values.shape[0], robust.shape[0]
        builds = (values[:, None, :] * robust[None, :, :]).reshape(b * n, -1)
        if limited is None:
            return fused(builds).reshape(b, n).mean(axis=1)
        # the limits hold on every build the cost is averaged over and on the nominal design (which result.json
        # judges): each limit's excess is its worst over them, from the same kernel pass as the builds' costs
        cost, _, excess = limited(builds)
        excess = np.maximum(excess.reshape(b, n, -1).max(axis=1), limited(values)[2])
        return cost.reshape(b, n).mean(axis=1), np.sum(np.maximum(excess, 0.0), axis=-1), excess

    cost = getattr(limited, "__self__", None) if limited is not None else fused
    return FitProblem(fn=fn, space=space, constrained=limited is not None, model=model, cost=cost)


def search_problem(system) -> tuple:
    """(fn, space, constrained) of the loaded job ``system``'s :class:`FitProblem`: what an island of
    :func:`run_fit_restarts` searches (a process that is not forked builds it again)."""
    p = fit_problem(system)
    return p.fn, p.space, p.constrained


def run_fit(system, *, optimizer: str | None = None, budget: int | None = None, seed: int | None = None,
            time_limit: float | None = None, progress=None) -> FitOutcome:
    """Global search and polish of the job's free values on this process (:func:`~xo_fit.search.engines.search`).

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    optimizer : str, optional
        The engine (``auto``, ``de``, ``scipy-de``, ``ng-NAME``); default the job's ``[search] optimizer``.
    budget : int, optional
        Evaluations at most, the polish included (dimensionless); default (or 0) the job's ``[search] budget``.
    seed : int, optional
        The random seed (dimensionless); default the job's ``[search] seed``.
    time_limit : float, optional
        Wall-clock limit in s; default the job's ``[search] time_limit`` (None: none).
    progress : callable, optional
        Called after each batch as ``progress(evaluations, budget, best cost)``.

    Returns
    -------
    FitOutcome
        The best design scored, the search's result, the start values' cost and the cost's build.

    Raises
    ------
    XoFitError
        No way targets (a JobError), no free values, an unknown optimizer, or no design evaluated at all.
    """
    spec = system.job.search
    p = fit_problem(system)
    start = p.start_cost()
    result = search(p.fn, p.space, optimizer=optimizer or spec.optimizer, budget=budget or spec.budget,
                    seed=spec.seed if seed is None else seed,
                    time_limit=time_limit if time_limit is not None else spec.time_limit,
                    polish=spec.polish, progress=progress, constrained=p.constrained)
    return FitOutcome(scored=score(system, p.space.values(result.u)[0], p.model), search=result, start_cost=start,
                      kernel=p.kernel)


def backend_of(cost) -> str:
    """Which build ran a search's batch cost.

    Parameters
    ----------
    cost : object
        The batch cost (:attr:`FitProblem.cost`).

    Returns
    -------
    str
        ``"c"`` or ``"numba"`` for the fused kernel (:func:`xo_fit.solver.kernels.kernel_backend`), ``"numpy"``
        for the reference cost.
    """
    if not isinstance(cost, FusedCost):
        return "numpy"
    from xo_fit.solver.kernels import kernel_backend

    return kernel_backend(cost.kernel()) or "numba"


def restart_seeds(seed: int, n: int) -> list[int]:
    """The seeds of n islands derived from one seed (numpy's SeedSequence.spawn).

    Parameters
    ----------
    seed : int
        The fit's seed (dimensionless).
    n : int
        How many seeds (dimensionless).

    Returns
    -------
    list of int
        n seeds (dimensionless), the first the seed itself (so one island searches as one process does).
    """
    children = np.random.SeedSequence(seed).spawn(max(n - 1, 0))
    return [seed] + [int(c.generate_state(1)[0]) for c in children]


def run_fit_restarts(system, workers: int, *, optimizer: str | None = None, budget: int | None = None,
                     seed: int | None = None, time_limit: float | None = None,
                     exchange: bool = False) -> tuple[FitOutcome, list[dict]]:
    """One fit on ``workers`` processes: islands from seeds derived from the seed that share one budget
    (:mod:`xo_fit.search.islands`); the best basins of all are polished side by side and the best design wins.
    ``exchange``: the islands also exchange their best every few generations (measured no better on the demo
    and the three-ways, so off by default; benchmarks/workers.py).

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    workers : int
        The number of islands, one process each (dimensionless).
    optimizer, budget, seed, time_limit : optional
        As :func:`run_fit` (``budget``: the whole fit's, shared by the islands, dimensionless; ``time_limit`` in
        s; ``seed``: the first island's); default the job's [search].
    exchange : bool
        Whether the islands exchange their best (JADE only; see above).

    Returns
    -------
    outcome : FitOutcome
        The winner by the feasibility-first order (its ``islands``: each island's run and the parent's clock),
        marked incomplete where interrupted.
    summary : list of dict
        One per island that found a design: ``seed``, ``cost`` (dimensionless), ``evaluations`` (with its share
        of the polish), ``complete``, ``restarts``, ``kernel``.

    Raises
    ------
    XoFitError
        As :func:`run_fit`, or whatever error stopped an island's search (raised again here unless interrupted);
        KeyboardInterrupt where every island stopped before its first evaluation.
    """
    from xo_fit.search.islands import Problem, run_islands
    from xo_fit.search.lbfgsb import one_blas_thread_for_forks

    spec = system.job.search
    total = budget or spec.budget  # the processes share one budget
    # an island searches at least one design: no more islands than the budget has evaluations
    seeds = restart_seeds(spec.seed if seed is None else seed, max(1, min(workers, total)))
    p = fit_problem(system)  # built and loaded here once: forked islands inherit it
    start = p.warm()
    problem = Problem(search_problem, system, built=(p.fn, p.space, p.constrained))
    with one_blas_thread_for_forks():  # the forked islands keep one BLAS thread; this process's comes back at the end
        return _gathered(system, p, start, seeds, *run_islands(
            problem, seeds, optimizer=optimizer or spec.optimizer, budget=total,
            time_limit=time_limit if time_limit is not None else spec.time_limit, polish=spec.polish,
            exchange=exchange))


def _gathered(system, p: FitProblem, start: float | None, seeds: list[int], runs: list, interrupted: bool,
              clock: dict) -> tuple[FitOutcome, list[dict]]:
    """:func:`run_fit_restarts`'s outcome from the islands' runs: the winner scored, the summary."""
    import dataclasses

    errors = [run.error for run in runs if run.error is not None]
    if errors and not interrupted:
        raise errors[0]
    done = [(s_, run, r) for s_, run in zip(seeds, runs) if (r := run.final()) is not None]
    if not done:
        raise KeyboardInterrupt  # every island stopped before its first evaluation
    interrupted = interrupted or any(r.stopped_by == "interrupted" for _, _, r in done)
    summary = [{"seed": s_, "cost": r.cost, "evaluations": r.evaluations, "complete": r.complete,
                "restarts": r.restarts, "kernel": p.kernel} for s_, _, r in done]
    # feasibility first (a run's violation is 0 without limits): the feasible, then the smaller violation, cost
    best = min(range(len(done)), key=lambda i: (done[i][2].violation > 0, done[i][2].violation, done[i][2].cost, i))
    result = done[best][2]
    if interrupted:
        result = dataclasses.replace(result, complete=False, stopped_by="interrupted")
    return FitOutcome(scored=score(system, p.space.values(result.u)[0], p.model), search=result,
                      start_cost=start, kernel=p.kernel,
                      islands={"runs": runs, "clock": clock}), summary


def target_db(s: Scored) -> np.ndarray | None:
    """The system target on the grid at a design's level.

    Parameters
    ----------
    s : Scored
        A scored design (:func:`score`).

    Returns
    -------
    ndarray or None
        The target in dB SPL, shape (F,); None where the design has no targets.
    """
    if s.targets is None:
        return None
    with np.errstate(divide="ignore"):
        return s.level_db + 20 * np.log10(np.abs(s.targets.system))
