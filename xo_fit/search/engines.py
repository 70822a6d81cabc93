"""Global search over the free part values, then a local polish; reproducible, interruptible.

Each free value is a parameter on a log scale between its ``min`` and ``max`` (normalised to u in [0, 1]:
value = min * (max/min)^u). Every engine asks for a whole population and evaluates it in ONE batched call of the
objective, so the Python work per candidate stays small.

Engines (``[search] optimizer`` or ``--optimizer``):

``de`` (the default, ``auto``)
    differential evolution in the JADE form (J. Zhang and A. C. Sanderson, IEEE Trans. Evol. Comput. 13(5), 2009:
    current-to-pbest/1 mutation with an archive, binomial crossover, self-adapting F and CR), written here as
    whole population array operations, restarted with a larger population (IPOP) until the budget ends.
``scipy-de``
    ``scipy.optimize.differential_evolution`` with ``vectorized=True``.
``ng-NAME``
    any nevergrad optimiser by its registry name (``ng-TwoPointsDE``, ``ng-CMA``, ``ng-NGOpt``, ...) through
    batched ask/tell on one ``ng.p.Array``; its own bookkeeping costs some 250 us per candidate (measured here),
    far more than a solve, so these engines are slower per evaluation (benchmarks/fit.py).

Then the polish (unless ``[search] polish = false``) with what the global search left, at least POLISH_SHARE of
the budget: L-BFGS-B in u-space from each of the best POLISH_BASINS distinct basins (each JADE restart's best)
with an equal share, gradients by forward differences evaluated as one batch of n + 1 designs.

Hard limits (``[limits]``): feasibility first (:mod:`xo_fit.search.feasibility`). The objective then returns each
design's cost and total violation, and every engine compares :func:`feasibility_key`, one number per design in
the order of Deb's rules (K. Deb, 2000: feasible before infeasible, then the smaller violation, then the lower
cost); inside a JADE run violations up to an epsilon falling to 0 count as none (:class:`xo_fit.search.
feasibility.EpsilonLevel`). The polish, with LIMITED_POLISH_SHARE of the budget, is SLSQP with each limit's
signed excess as a constraint (:func:`xo_fit.search.feasibility.polish_limited`).

The same seed gives the same result bit for bit (numpy's SeedSequence feeds every random draw). A time limit or
Ctrl-C stops the search between generations (the first population is always evaluated; no polish then) and the
best design so far is returned, marked incomplete; so is it when an engine fails. ``fit --workers N`` runs one
search as islands on N processes (:mod:`xo_fit.search.islands`).
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from collections.abc import Callable

import numpy as np

from xo_fit.config import (CONVERGED, MAX_POPULATION, POLISH_BASINS, POLISH_SHARE, RESTART_GROWTH, STAGNATION,
                           STAGNATION_TOL)
from xo_fit.errors import XoFitError
from xo_fit.job.settings import SearchSpec
from xo_fit.search.feasibility import (LIMITED_POLISH_SHARE, POLISH_MARGINS, EpsilonLevel, Stop, feasibility_key,
                                      polish_limited)
from xo_fit.search.interrupt import stop_requested
from xo_fit.search.polish import polish_box
from xo_fit.search.space import Space


_Stop = Stop  # raised inside an engine when the budget or the time is used up


@dataclass
class Objective:
    """Counts evaluations, keeps the best point, and stops the engine at the budget or the deadline.

    fn maps cube points (B, n) to costs (B,); with ``constrained`` to (costs (B,), total violations (B,)[, each
    limit's signed excess (B, L)]), and calling the objective returns :func:`feasibility_key` of the first two
    (the best kept is the best by it).
    """

    fn: Callable[[np.ndarray], np.ndarray]
    budget: int
    deadline: float | None = None
    progress: Callable[[int, int, float], None] | None = None
    evaluations: int = 0
    best_u: np.ndarray | None = None
    best_cost: float = math.inf
    stopped_by: str | None = None
    history: list = field(default_factory=list)
    basins: list = field(default_factory=list)  # (best cost, best point) of each restart, in order
    constrained: bool = False
    best_violation: float = 0.0
    best_key: float = math.inf  # the best's feasibility key (its cost when not constrained)
    last_excess: np.ndarray | None = None  # constrained: each limit's signed excess (B, L) of the last batch
    last_key: np.ndarray = field(default_factory=lambda: np.zeros(0))  # the last batch's keys (B,)
    #: islands (:mod:`xo_fit.search.islands`): called after each JADE generation as exchange(obj, pop, fit, rank,
    #: best); it may put migrants into the population (rows of pop, fit and rank's arrays, in place) and best
    exchange: Callable | None = None

    def __call__(self, u: np.ndarray) -> np.ndarray:
        cost, violation = self.evaluate(u)
        return feasibility_key(cost, violation) if self.constrained else cost

    def evaluate(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Costs (B,) and total violations (B,; zeros when not constrained) of cube points u (B, n), counted.
        A constrained fn may also return each limit's signed excess (B, L): kept as ``last_excess``."""
        if type(u) is not np.ndarray or u.ndim != 2 or u.dtype != np.float64:
            u = np.atleast_2d(np.asarray(u, dtype=float))
        take = self.admit(u)
        return self.absorb(u, take, self.fn(u if take == u.shape[0] else u[:take]))

    def absorb(self, u: np.ndarray, take: int, out) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`evaluate`'s result from ``fn``'s output ``out`` for the first ``take`` (from :meth:`admit`) of
        the points ``u`` (B, n): costs (B,) and total violations (B,), counted (:meth:`record`)."""
        violation = np.zeros(u.shape[0])
        if self.constrained:
            cost = np.full(u.shape[0], np.inf)
            violation[:] = np.inf
            cost[:take] = np.asarray(out[0], dtype=float)
            violation[:take] = np.asarray(out[1], dtype=float)
            g = np.asarray(out[2], dtype=float) if len(out) > 2 else violation[:take, None]
            self.last_excess = np.full((u.shape[0], g.shape[1]), np.inf)
            self.last_excess[:take] = g
        else:  # fn's own costs where the whole batch fits (no copy)
            cost = np.asarray(out, dtype=float)
        return self.record(u, take, cost, violation), violation

    def admit(self, u: np.ndarray) -> int:
        """How many of the points ``u`` (B, n) the budget lets in (the rest count as not evaluated); raises
        :class:`Stop` at the budget or the deadline and KeyboardInterrupt where the process was asked to stop."""
        if self.evaluations >= self.budget:
            self.stopped_by = self.stopped_by or "budget"
            raise _Stop
        if self.deadline is not None and self.evaluations and time.monotonic() > self.deadline:
            self.stopped_by = "time limit"
            raise _Stop
        if self.evaluations and stop_requested():  # a worker process asked to stop (Ctrl-C, SIGTERM, its parent)
            self.stopped_by = "interrupted"
            raise KeyboardInterrupt
        return min(u.shape[0], self.budget - self.evaluations)

    def record(self, u: np.ndarray, take: int, cost: np.ndarray, violation: np.ndarray) -> np.ndarray:
        """Counts the first ``take`` (from :meth:`admit`) of the points ``u`` (B, n) evaluated to ``cost``
        (``take``,) or (B,) and ``violation`` (B,), keeps the best, and returns the costs (B,): inf past ``take``
        and where not finite."""
        if cost.shape != violation.shape:
            cost, cost[:take] = np.full(u.shape[0], np.inf), cost  # the rest (past the budget) inf
        finite = np.isfinite(cost)
        if not finite.all():
            cost = np.where(finite, cost, np.inf)
        self.evaluations += take
        key = feasibility_key(cost, violation) if self.constrained else cost
        self.last_key = key
        i = int(key.argmin())
        if key[i] < self.best_key:
            self.best_key = float(key[i])
            self.best_cost = float(cost[i])
            self.best_violation = float(violation[i])
            self.best_u = u[i].copy()
        self.history.append((self.evaluations, self.best_cost, self.best_violation) if self.constrained
                            else (self.evaluations, self.best_cost))
        if self.progress is not None:
            self.progress(self.evaluations, self.budget, self.best_cost)
        return cost


@dataclass(frozen=True)
class SearchResult:
    """The outcome of :func:`search` (or :func:`polish_from`): the best point ``u`` (n,) in the cube, its ``cost``
    (dimensionless) and total ``violation`` of the [limits], the ``evaluations`` used, the wall-clock ``seconds``
    (s), whether it ran to its end (``complete``) and what stopped it otherwise (``stopped_by``); the other fields
    as commented (``basins``, ``basin_violations``, ``points``: each JADE restart's best before the polish)."""

    u: np.ndarray
    cost: float
    evaluations: int
    seconds: float
    optimizer: str
    seed: int
    complete: bool
    stopped_by: str | None
    history: tuple = ()  # (evaluations, best cost so far[, its total violation with limits]) after each batch
    restarts: int = 1  # searches run inside the budget (JADE restarts; 1 for other engines)
    best_restart: int = 0  # which of them led to the result, counting from 0
    basins: tuple = ()  # the best cost each restart reached before the polish
    violation: float = 0.0  # the result's total violation of the [limits] (0: every limit met, or none)
    basin_violations: tuple = ()  # with limits: the total violation of each restart's best
    points: tuple = ()  # the best point (n,) of each restart, as basins


def population_size(n: int) -> int:
    """DE population for n free values (Storn's 10 n is wasteful for smooth problems; measured in benchmarks/fit.py)."""
    return int(np.clip(8 + 3 * n, 16, 64))


# ----------------------------------------------------------------------------- engines


def latin_hypercube(npop: int, n: int, rng: np.random.Generator) -> np.ndarray:
    """npop points (npop, n) in [0, 1)^n, one in each of npop equal slices of every axis (M. D. McKay et al.,
    Technometrics 21(2), 1979). Written out because importing scipy.stats costs half a second."""
    perms = np.argsort(rng.random((npop, n)), axis=0)
    return (perms + rng.random((npop, n))) / npop


def _jade_run(obj: Objective, n: int, u0: np.ndarray | None, rng: np.random.Generator, npop: int,
              best: list) -> None:
    """One JADE run (current-to-pbest/1/bin with archive, vectorised over the population) until its population
    has converged or its best has stagnated; ``best`` receives [cost, point] of the run as it improves."""
    # the population and the archive share one buffer (the union the second difference vector draws from is
    # rows [0, npop + archived)), so that nothing is stacked per generation; pop and fit change in place
    buf = np.empty((3 * npop, n))
    pop = buf[:npop]
    pop[:] = latin_hypercube(npop, n, rng)
    if u0 is not None:
        pop[0] = u0
    rank = EpsilonLevel(obj) if obj.constrained else None  # under limits: epsilon-level comparisons
    fit = np.array(obj(pop), dtype=float) if rank is None else rank.first(pop)
    i = int(np.argmin(fit))
    best[:] = [float(fit[i]), pop[i].copy()] if rank is None else rank.best(pop)
    archived = 0
    rows = np.arange(npop)
    firsts = rows * n  # each row's first cell in the flattened (npop, n)
    mu_f, mu_cr, c, p_best = 0.5, 0.5, 0.1, 0.1
    top = max(2, int(round(p_best * npop)))
    trace = [best[0]]
    while True:
        if rank is not None:
            fit = rank.population()
        f = mu_f + 0.1 * rng.standard_cauchy(npop)
        while f.min() <= 0:  # JADE: regenerate non-positive F
            bad = f <= 0
            f[bad] = mu_f + 0.1 * rng.standard_cauchy(np.count_nonzero(bad))
        np.minimum(f, 1.0, out=f)
        cr = rng.normal(mu_cr, 0.1, npop)
        np.minimum(np.maximum(cr, 0.0, out=cr), 1.0, out=cr)
        order = np.argsort(fit, kind="stable")
        pbest = pop.take(order.take(rng.integers(0, top, npop)), axis=0)
        r1 = (rows + rng.integers(1, npop, npop)) % npop
        r2 = rng.integers(0, npop + archived, npop)
        # pop + F (pbest - pop) + F (pop[r1] - union[r2]), the same operations in the same order, in place
        fc = f[:, None]
        mutant = (pbest - pop) * fc
        mutant += pop
        step = pop.take(r1, axis=0) - buf.take(r2, axis=0)
        step *= fc
        mutant += step
        # bounds: halfway between the parent and the violated bound (JADE)
        np.copyto(mutant, pop * 0.5, where=mutant < 0)  # * 0.5: / 2 exactly
        np.copyto(mutant, (pop + 1) * 0.5, where=mutant > 1)
        keep = rng.random((npop, n)) >= cr[:, None]  # binomial crossover: the parent's coordinates kept
        keep.ravel()[firsts + rng.integers(0, n, npop)] = False  # one coordinate of each from the mutant
        trial = mutant
        np.copyto(trial, pop, where=keep)
        tfit = obj(trial) if rank is None else rank.trial(trial)
        better = tfit < fit
        k = int(np.count_nonzero(better))
        if k:
            buf[npop + archived:npop + archived + k] = pop[better]
            archived += k
            if archived > npop:
                buf[npop:2 * npop] = buf[npop:npop + archived][rng.permutation(archived)[:npop]]
                archived = npop
            sf, scr = f[better], cr[better]
            mu_f = (1 - c) * mu_f + c * float((sf * sf).sum() / sf.sum())
            mu_cr = (1 - c) * mu_cr + c * float(scr.sum() / k)
            np.copyto(pop, trial, where=better[:, None])
            np.copyto(fit, tfit, where=better)
        if rank is None:
            i = int(fit.argmin())
            if fit[i] < best[0]:
                best[:] = [float(fit[i]), pop[i].copy()]
        else:
            rank.accept(better)
            run_best = rank.best(pop)
            if run_best[0] < best[0]:
                best[:] = run_best
        if obj.exchange is not None:
            obj.exchange(obj, pop, fit, rank, best)
        trace.append(best[0])
        if rank is not None and not rank.settled:
            continue  # epsilon still falling: the run goes on
        low = fit.min()
        if fit.max() - low <= CONVERGED * (abs(float(low)) + CONVERGED) and (pop.max(0) - pop.min(0)).max() < 1e-6:
            return
        if len(trace) > STAGNATION and trace[-1] >= trace[-1 - STAGNATION] - STAGNATION_TOL * abs(trace[-1]):
            return  # the best has improved by less than 0.1 % over the last STAGNATION generations: a basin


def _jade(obj: Objective, n: int, u0: np.ndarray | None, rng: np.random.Generator) -> None:
    """JADE (J. Zhang, A. C. Sanderson, IEEE TEC 13(5), 2009) with restarts that spend the whole budget: when a
    run's population converges or its best stagnates, its basin is kept and a new run starts from a fresh Latin
    hypercube with a larger population (IPOP: A. Auger, N. Hansen, CEC 2005), until the budget ends."""
    k = 0
    while True:
        best: list = []
        npop = min(population_size(n) * RESTART_GROWTH**k, MAX_POPULATION)
        try:
            _jade_run(obj, n, u0 if k == 0 else None, rng, npop, best)
        finally:
            if best:
                obj.basins.append((best[0], best[1]))
        k += 1


def _scipy_de(obj: Objective, n: int, u0: np.ndarray | None, rng: np.random.Generator) -> None:
    from scipy.optimize import differential_evolution

    npop = population_size(n)
    differential_evolution(
        lambda x: obj(x.T), bounds=[(0.0, 1.0)] * n, vectorized=True, updating="deferred",
        popsize=max(1, math.ceil(npop / n)), maxiter=max(1, obj.budget // npop), tol=0.0, atol=0.0,
        seed=int(rng.integers(0, 2**31 - 1)), polish=False, init="latinhypercube", x0=u0)


def _nevergrad(name: str) -> Callable:
    def run(obj: Objective, n: int, u0: np.ndarray | None, rng: np.random.Generator) -> None:
        import nevergrad as ng

        if name not in ng.optimizers.registry:
            raise XoFitError(f"unknown nevergrad optimizer '{name}'")
        param = ng.p.Array(init=u0 if u0 is not None else np.full(n, 0.5), lower=0.0, upper=1.0)
        param.random_state = np.random.RandomState(int(rng.integers(0, 2**31 - 1)))
        import warnings

        npop = population_size(n)
        opt = ng.optimizers.registry[name](parametrization=param, budget=obj.budget, num_workers=npop)
        with warnings.catch_warnings():
            # a design whose solve failed is told as a very large cost; nevergrad warns about each one
            warnings.simplefilter("ignore", category=ng.errors.LossTooLargeWarning)
            while True:
                k = min(npop, obj.budget - obj.evaluations)
                if k <= 0:
                    raise _Stop
                asks = [opt.ask() for _ in range(k)]
                cost = obj(np.stack([a.value for a in asks]))
                for a, c_ in zip(asks, cost):
                    opt.tell(a, float(c_) if np.isfinite(c_) else 1e300)
    return run


ENGINES: dict[str, Callable] = {"de": _jade, "scipy-de": _scipy_de}
DEFAULT_ENGINE = "de"


def engine(name: str) -> Callable:
    """The engine for an optimizer name (``auto``, ``de``, ``scipy-de`` or ``ng-NAME``); a name that is none of
    them (a job's was checked when it was read, so it came from --optimizer) is an XoFitError naming the option."""
    from xo_fit.job.tables import optimizer_problem

    problem = None if name in ENGINES else optimizer_problem(name)
    if problem:
        raise XoFitError(problem, key="--optimizer")
    if name == "auto":
        name = DEFAULT_ENGINE
    if name in ENGINES:
        return ENGINES[name]
    if name.startswith("ng-"):
        return _nevergrad(name[3:])
    raise XoFitError(f"unknown optimizer {name!r}", key="--optimizer")


def search(fn: Callable, space: Space, *, optimizer: str = SearchSpec.optimizer, budget: int = SearchSpec.budget,
           seed: int = SearchSpec.seed, time_limit: float | None = SearchSpec.time_limit,
           polish: bool = SearchSpec.polish, progress: Callable[[int, int, float], None] | None = None,
           constrained: bool = False, exchange: Callable | None = None) -> SearchResult:
    """Minimise fn over the space's unit cube within ``budget`` evaluations (see the module); the defaults are
    ``[search]``'s.

    Parameters
    ----------
    fn, space : callable, Space
        Cube points (B, n) -> costs (B,), dimensionless (with ``constrained``: -> (costs (B,), total violations
        (B,)[, each limit's signed excess (B, L)])); the free values (:func:`~xo_fit.search.space.make_space`).
    optimizer, budget, seed, time_limit, polish, progress, constrained, exchange : optional
        The engine (:func:`engine`); evaluations at most, the polish included, and the seed (dimensionless); a
        wall-clock limit in s (None: none); polish or not; called after each batch as progress(evaluations,
        budget, best cost); feasibility first; an island's migration between JADE generations
        (:attr:`Objective.exchange`).

    Returns
    -------
    SearchResult
        The best point found, whether the search ran to its end (``complete``), and what stopped it otherwise
        (an XoFitError for an unknown optimizer, or where no design was evaluated).
    """
    run = engine(optimizer)
    name = DEFAULT_ENGINE if optimizer == "auto" else optimizer
    t0 = time.monotonic()
    deadline = t0 + time_limit if time_limit is not None else None
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    share = LIMITED_POLISH_SHARE if constrained else POLISH_SHARE
    global_budget = budget if not polish else max(1, int(budget * (1 - share)))
    obj = Objective(fn=fn, budget=global_budget, deadline=deadline, progress=progress, constrained=constrained,
                    exchange=exchange)
    interrupted = False
    failed = False
    try:
        run(obj, space.dims, space.u0, rng)
    except _Stop:
        pass
    except KeyboardInterrupt:
        interrupted = True
        obj.stopped_by = "interrupted"
    except XoFitError:
        raise
    except Exception as e:  # a failing engine (or objective) must not lose the best design found so far
        if obj.best_u is None:
            raise
        failed = True
        obj.stopped_by = f"optimizer failed: {type(e).__name__}: {e}"
    basins = list(obj.basins) or ([(obj.best_cost, obj.best_u)] if obj.best_u is not None else [])
    winner = int(np.argmin([b[0] for b in basins])) if basins else 0
    if polish and not interrupted and not failed and obj.stopped_by != "time limit":
        state = obj.stopped_by
        # polish the best few distinct basins, each with an equal share of what is left, and keep the best
        chosen = [i for i in np.argsort([b[0] for b in basins], kind="stable")]
        distinct: list[int] = []
        for i in chosen:
            if all(abs(basins[i][0] - basins[k][0]) > 1e-9 * max(1.0, abs(basins[k][0])) for k in distinct):
                distinct.append(int(i))
            if len(distinct) == POLISH_BASINS:
                break
        left = budget - obj.evaluations
        for m, i in enumerate(distinct):
            obj.budget = obj.evaluations + left // len(distinct) if m < len(distinct) - 1 else budget
            obj.stopped_by = None
            before = obj.best_key
            try:
                (polish_limited if constrained else polish_box)(obj, space.dims, basins[i][1])
            except _Stop:
                pass
            except KeyboardInterrupt:
                interrupted = True
                obj.stopped_by = "interrupted"
                break
            if obj.best_key < before:
                winner = i
            left = budget - obj.evaluations
        if not interrupted:
            obj.stopped_by = "converged" if state == "converged" else None
    if obj.best_u is None:
        raise XoFitError("the search evaluated no design (budget or time limit too small)")
    complete = obj.stopped_by in (None, "budget", "converged")
    costs, violations = [float(b[0]) for b in basins], []
    if constrained and basins:  # the basins' keys as costs and violations (one uncounted batch, for the report)
        c, v = fn(np.stack([b[1] for b in basins]))[:2]
        costs, violations = [float(x) for x in c], [float(x) for x in v]
    return SearchResult(u=obj.best_u, cost=obj.best_cost, evaluations=obj.evaluations,
                        seconds=time.monotonic() - t0, optimizer=name, seed=seed, complete=complete,
                        stopped_by=obj.stopped_by, history=tuple(obj.history), restarts=max(len(basins), 1),
                        best_restart=winner, basins=tuple(costs), violation=obj.best_violation,
                        basin_violations=tuple(violations), points=tuple(b[1] for b in basins))


def polish_from(fn: Callable, space: Space, start: np.ndarray, *, budget: int, constrained: bool = False,
                margins: tuple | None = None) -> SearchResult | None:
    """The polish of :func:`search` alone (L-BFGS-B, under limits the SLSQP of
    :func:`~xo_fit.search.feasibility.polish_limited`) from ``start`` (n,) within ``budget`` evaluations: an
    island's share of a search's polish (:mod:`xo_fit.search.islands`), or a prune's refit. The result is never
    worse than ``start`` (its first evaluation); None when stopped before it. ``margins``: those of the SLSQP runs
    under limits (default ``feasibility.POLISH_MARGINS``)."""
    t0 = time.monotonic()
    obj = Objective(fn=fn, budget=budget, constrained=constrained)
    try:
        if constrained:
            polish_limited(obj, space.dims, np.asarray(start, dtype=float), margins or POLISH_MARGINS)
        else:
            polish_box(obj, space.dims, np.asarray(start, dtype=float))
    except _Stop:
        pass
    except KeyboardInterrupt:
        obj.stopped_by = "interrupted"
    if obj.best_u is None:
        return None
    return SearchResult(u=obj.best_u, cost=obj.best_cost, evaluations=obj.evaluations,
                        seconds=time.monotonic() - t0, optimizer="polish", seed=0,
                        complete=obj.stopped_by != "interrupted", stopped_by=obj.stopped_by,
                        history=tuple(obj.history), violation=obj.best_violation)
