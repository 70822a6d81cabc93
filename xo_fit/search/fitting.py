"""Fitting a job: targets, cost and search put together; and the scoring shared with simulate.

:func:`run_fit` finds the free values that minimise the job's cost;
:func:`score` evaluates any design (a hand design, a fit, a snap) into the
cost, its terms and the metrics that result.json carries.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from xo_fit.model.cost import CostModel, simulation_metrics
from xo_fit.model.fused import FusedCost
from xo_fit.search.engines import SearchResult, make_space, search
from xo_fit.model.targets import Targets, build_targets


@dataclass(frozen=True, eq=False)
class Scored:
    """One design with everything the outputs need."""

    values: np.ndarray  # (P,) SI
    sim: object  # Simulation of this one design
    cost: float | None
    terms: dict
    metrics: dict
    targets: Targets | None
    level_db: float | None
    preference: dict | None = None  # an off-axis job's predicted preference (Preference.to_json), else None


def cost_model(system) -> tuple[CostModel, Targets] | None:
    """The job's cost model, or None when the job has no way targets (then only metrics that need none)."""
    if not system.job.target.ways:
        return None
    targets = build_targets(system.job, system.frequencies)
    return CostModel(system, targets), targets


def require_cost_model(system, what: str) -> tuple[CostModel, Targets]:
    """The job's cost model; a JobError naming what needs it when the job has no way targets."""
    model = cost_model(system)
    if model is None:
        from xo_fit.errors import JobError

        raise JobError(f"nothing to {what}: add [target.way.NAME] tables (type, alignment, order, fc) for the drivers",
                       path=system.job.path, key="[target]")
    return model


def score(system, values: np.ndarray, model: tuple[CostModel, Targets] | None = None) -> Scored:
    """Simulate one design (P,) and score it: cost, terms, metrics."""
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
    """The predicted preference (Olive 2004) of the first design of a Simulation, as result.json holds it (the
    six figures, None and a reason where the grid or the positions do not allow one); None on axis."""
    if not system.positions:
        return None
    from xo_fit.model.acoustics import angle_pressures, curve_weights, directivity, preference_of
    from xo_fit.model.preference import make_plan

    p2 = np.abs(angle_pressures(sim.voltages[:1], system.angle_factors)) ** 2
    curves = {k: v[0] for k, v in directivity(p2, curve_weights(system.positions)).items()}
    return preference_of(make_plan(system.frequencies), curves).to_json()


def cost_function(cm: CostModel):
    """The batch cost a search calls, values (B, P) -> cost (B,): the fused kernel, or the numpy reference cost
    (:meth:`CostModel.evaluate`, the same terms, about 10x slower: 141 against 11 us per design on the demo)
    for a job with a term the kernel lacks (``[cost] protection``), so that no weight the job sets is
    silently left out."""
    if cm.needs_reference:
        return lambda values: cm.evaluate(np.atleast_2d(values)).cost
    return FusedCost(cm)


def limited_cost_function(cm: CostModel):
    """With [limits], the batch function a feasibility-first search calls: values (B, P) -> (cost (B,), total
    violation (B,), each limit's signed excess (B, L)), through the fused kernel (or the reference cost, as
    :func:`cost_function` chooses); None without limits."""
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
    """The fixed tolerance draws (N, P) of a robust fit ([search] robust = { samples = N }), or None.

    Drawn from the [spread] distribution and tolerances with a seed derived from [search] seed, so every
    candidate is judged on the same builds; a robust fit costs N solves per candidate.
    """
    n = job.search.robust_samples
    if not n:
        return None
    from xo_fit.model.draws import draw_factors, part_tolerances

    rng = np.random.default_rng(np.random.SeedSequence([job.search.seed, 0x5EED]))
    return draw_factors(n, part_tolerances(job), job.spread.distribution, rng)


@dataclass(frozen=True, eq=False)
class FitOutcome:
    scored: Scored
    search: SearchResult
    start_cost: float | None
    kernel: str | None = None  # which build ran the cost: "c", "numba", or "numpy" (the reference cost)


def run_fit(system, *, optimizer: str | None = None, budget: int | None = None, seed: int | None = None,
            time_limit: float | None = None, progress=None) -> FitOutcome:
    """Global search and polish of the job's free values; arguments override the job's [search]."""
    job = system.job
    spec = job.search
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

    start = None
    if space.u0 is not None:
        first = fn(space.u0[None])
        start = float((first if limited is None else first[0])[0])
    result = search(fn, space, optimizer=optimizer or spec.optimizer, budget=budget or spec.budget,
                    seed=spec.seed if seed is None else seed,
                    time_limit=time_limit if time_limit is not None else spec.time_limit,
                    polish=spec.polish, progress=progress, constrained=limited is not None)
    return FitOutcome(scored=score(system, space.values(result.u)[0], model), search=result, start_cost=start,
                      kernel=backend_of(getattr(limited, "__self__", None) if limited is not None else fused))


def backend_of(cost) -> str:
    """Which build ran a search's batch cost: ``"c"`` or ``"numba"`` for the fused kernel
    (:func:`xo_fit.solver.kernels.kernel_backend`), ``"numpy"`` for the reference cost."""
    if not isinstance(cost, FusedCost):
        return "numpy"
    from xo_fit.solver.kernels import kernel_backend

    return kernel_backend(cost.kernel()) or "numba"


def _fit_worker(args):
    """One restart in a worker process: (system, optimizer, budget, seed, time_limit) -> (seed, cost, u)."""
    system, optimizer, budget, seed, time_limit = args
    out = run_fit(system, optimizer=optimizer, budget=budget, seed=seed, time_limit=time_limit)
    return seed, out.search, out.scored.values, out.kernel


def restart_seeds(seed: int, n: int) -> list[int]:
    """The seeds of n independent restarts derived from one seed (the first restart uses the seed itself)."""
    children = np.random.SeedSequence(seed).spawn(max(n - 1, 0))
    return [seed] + [int(c.generate_state(1)[0]) for c in children]


def run_fit_restarts(system, workers: int, *, optimizer: str | None = None, budget: int | None = None,
                     seed: int | None = None, time_limit: float | None = None) -> tuple[FitOutcome, list[dict]]:
    """``workers`` independent fits from derived seeds in as many processes, sharing one budget; the best wins.

    Whole searches are distributed, never single evaluations (those cost more to ship than to compute).
    Returns the winner and one summary per restart (seed, cost, evaluations, complete).
    """
    import dataclasses
    from concurrent.futures import wait

    from xo_fit.search.interrupt import stopping_pool

    base = system.job.search.seed if seed is None else seed
    seeds = restart_seeds(base, workers)
    total = budget or system.job.search.budget
    budget = max(1, total // workers)  # the processes share one budget
    pool, stop = stopping_pool(workers)
    interrupted = False
    with pool:
        futures = [pool.submit(_fit_worker, (system, optimizer, budget, s_, time_limit)) for s_ in seeds]
        try:
            wait(futures)
        except KeyboardInterrupt:  # Ctrl-C or SIGTERM: every worker stops and returns its best so far
            interrupted = True
            stop.set()
        results = []
        for fut in futures:
            try:
                results.append(fut.result())
            except Exception:
                if not interrupted:
                    raise
                # a worker stopped before its first evaluation (or died): the others' designs are kept
    if not results:
        raise KeyboardInterrupt
    interrupted = interrupted or any(r.stopped_by == "interrupted" for _, r, _, _ in results)
    runs = [{"seed": s_, "cost": r.cost, "evaluations": r.evaluations, "complete": r.complete,
             "restarts": r.restarts, "kernel": k} for s_, r, _, k in results]
    # feasibility first (a run's violation is 0 without limits): the feasible, then the smaller violation, cost
    best = min(range(len(results)), key=lambda i: (results[i][1].violation > 0, results[i][1].violation,
                                                   results[i][1].cost, i))
    _, search_result, values, kernel = results[best]
    if interrupted:
        search_result = dataclasses.replace(search_result, complete=False, stopped_by="interrupted")
    model = cost_model(system)
    space = make_space(system.job)
    start = score(system, space.values(space.u0)[0], model).cost if space.u0 is not None else None
    return FitOutcome(scored=score(system, values, model), search=search_result, start_cost=start,
                      kernel=kernel), runs


def target_db(s: Scored) -> np.ndarray | None:
    """The system target in dB SPL on the grid at the design's level, or None."""
    if s.targets is None:
        return None
    with np.errstate(divide="ignore"):
        return s.level_db + 20 * np.log10(np.abs(s.targets.system))
