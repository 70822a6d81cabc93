"""One search on several processes as islands (``fit --workers N``).

Each of N processes (an island) runs the engine (:func:`xo_fit.search.engines.search`, without its polish) on an
equal share of the global search's budget from its own seed. When every island is done, the parent pools the
basins (each JADE restart's best) of all and hands out the polish of the best POLISH_BASINS distinct ones, each
to the island that found it where it can, with an equal share of what is left of the budget: the polish one
process would do, done side by side. The best design of all by the feasibility-first order wins.

With ``exchange`` (JADE only), every ``MIGRATION_GENERATIONS`` generations' worth of evaluations (an epoch) an
island also posts its best design so far and receives its ring predecessor's (island i from island i - 1), which
replaces the worst member of its population when it ranks better by that run's own order (feasibility first
under ``[limits]``: a migrant carries its cost and violation): the ring of islands of E. Cantu-Paz, "Efficient
and Accurate Parallel Genetic Algorithms", Kluwer 2000. The exchange is synchronous and ordered by epoch: island
i's migrant at epoch k is island i - 1's best at its epoch k or the next it reached (or its final best once it is
done), so a seed and a worker count give the same result bit for bit however the processes are scheduled. It is
off by default: on the demo and the three-ways it found no better designs than independent islands (every 10
generations, worse ones: benchmarks/workers.py and DEVELOPERS.md), and the ring runs at its slowest island's pace.

Start-up: the parent builds the cost (the compiled kernel loaded) before it starts the processes
(:mod:`xo_fit.search.forks`); where processes are forked (Linux) each inherits it, forked as a tree (no island
waits more than ceil(log2 N) + 1 forks of 1-3 ms); elsewhere each rebuilds it (the kernel comes from the on-disk
cache). Ctrl-C or SIGTERM, in the parent or the islands, stops every island at its next batch (no polish then);
each returns its best so far.
"""

from __future__ import annotations

import dataclasses
import math
import pickle
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from xo_fit.config import MAX_POPULATION, POLISH_BASINS, POLISH_SHARE
from xo_fit.search.feasibility import LIMITED_POLISH_SHARE
from xo_fit.search.engines import Objective, SearchResult, polish_from, population_size, search
from xo_fit.search.feasibility import LIMIT_KEY, feasibility_key
from xo_fit.search.interrupt import signals_set, stop_requested
from xo_fit.search.lbfgsb import inherit_one_blas_thread, one_blas_thread_for_forks

#: An epoch: this many generations of a first JADE population (population_size of the free values) between two
#: exchanges, when islands exchange (benchmarks/workers.py): every 10 generations the demo's 2-worker fits at
#: 320,000 ended in a basin 0.8 % worse for 4 seeds of 10 (every 200: 1 of 10; independent islands: none);
#: every 50 matched independent islands on the demo and the three-ways (8 and 16 workers).
MIGRATION_GENERATIONS = 50


@dataclass
class IslandRun:
    """What one island returns.

    Attributes
    ----------
    result, polish : SearchResult or None
        Its global search (None when its process died or the search failed) and the polish of the basins the
        parent gave it, if any (:func:`~xo_fit.search.engines.polish_from`, chained).
    error : BaseException or None
        What stopped its search, when not the budget, the time or a signal.
    received : int
        How many migrants entered its population (dimensionless).
    clock : dict
        time.monotonic (in s, shared by the processes of one machine) when its process ``began``, its search was
        ``ready`` to begin (the cost built or inherited), had ``searched`` and the island ``ended`` (after its
        polish); its CPU time in s (time.process_time) at the last three as ``cpu_ready``, ``cpu_searched``,
        ``cpu_ended`` (counted from its process's start, its forks included); ``forked``: {island: its CPU time
        in s when it forked the process of that island} (:mod:`xo_fit.search.forks`); with migration, the
        seconds it ``waited`` for migrants and its ``epochs``.
    migrants, posted : list
        Kept when asked (``keep``): (epoch, u (n,)) of each migrant that entered; (epoch, its evaluations then)
        of each of its posts.
    """

    result: SearchResult | None
    error: BaseException | None = None  # what stopped its search, when not the budget, the time or a signal
    received: int = 0
    clock: dict = field(default_factory=dict)
    polish: SearchResult | None = None  # the polish of the basin the parent gave it, if any
    migrants: list = field(default_factory=list)  # (epoch, u) of each migrant that entered, kept when asked
    posted: list = field(default_factory=list)  # (epoch, its evaluations then) of each of its posts, kept when asked


    def final(self) -> SearchResult | None:
        """The island's search with its polish, if any, folded in (:func:`chain`; interrupted where the polish
        was), or :attr:`result` alone (None: no search)."""
        if self.result is None or self.polish is None:
            return self.result
        out = chain(self.result, self.polish)
        return dataclasses.replace(out, stopped_by="interrupted" if self.polish.stopped_by == "interrupted" else None)


def _key(cost: float, violation: float) -> float:
    """:func:`feasibility_key` of one design, in plain floats (the same IEEE arithmetic, without numpy's
    per-call cost: :func:`chain` keys every entry of a polish's history)."""
    if not (math.isfinite(cost) and math.isfinite(violation)):
        return math.inf
    return LIMIT_KEY * (1.0 + violation) if violation > 0 else min(cost, LIMIT_KEY / 2)


def chain(first: SearchResult, then: SearchResult) -> SearchResult:
    """Two searches run one after the other (a search and its polish) as one.

    Parameters
    ----------
    first, then : SearchResult
        The earlier search and the later one.

    Returns
    -------
    SearchResult
        ``first``'s fields with the better design of the two by the feasibility-first order, the evaluations and
        seconds of both, the history of both (the best so far over both), complete when both are.
    """
    best = (first.cost, first.violation)
    history = list(first.history)
    for h in then.history:
        v = h[2] if len(h) > 2 else 0.0
        if _key(h[1], v) < _key(*best):
            best = (h[1], v)
        history.append((first.evaluations + h[0], *best) if len(h) > 2 else (first.evaluations + h[0], best[0]))
    better = _key(then.cost, then.violation) < _key(first.cost, first.violation)
    winner = then if better else first
    return dataclasses.replace(first, u=winner.u, cost=winner.cost, violation=winner.violation,
                               evaluations=first.evaluations + then.evaluations,
                               seconds=first.seconds + then.seconds, history=tuple(history),
                               complete=first.complete and then.complete)


class Problem:
    """What an island searches: ``build(data)`` -> (fn, space, constrained), built once in the parent. A forked
    process inherits it built; pickling (a spawned process) leaves the built part behind, to be built again.
    ``build``: e.g. :func:`xo_fit.search.fitting.search_problem`, ``data`` a loaded job; ``built``: the triple
    where already built."""

    def __init__(self, build: Callable, data, built: tuple | None = None) -> None:
        self.build = build
        self.data = data
        self.built = built

    def get(self) -> tuple:
        """(fn, space, constrained), built on the first call where not built yet."""
        if self.built is None:
            self.built = self.build(self.data)
        return self.built

    def __getstate__(self) -> dict:
        return {"build": self.build, "data": self.data, "built": None}


def epochs(budget: int, dims: int) -> tuple[int, int]:
    """(evaluations per epoch, the last epoch; 0: no exchange), dimensionless, of an island whose global search
    has ``budget`` evaluations, with ``dims`` free values. The last epoch ends at least two of the largest
    generations before the budget, so that every island reaches every epoch (none waits for another's end)."""
    every = MIGRATION_GENERATIONS * population_size(dims)
    return every, max(0, (budget - 2 * MAX_POPULATION) // every)


class Migration:
    """An island's side of the exchange: called after each JADE generation (:attr:`Objective.exchange`); at
    each epoch boundary it posts the island's best, waits for its predecessor's, and puts it into the
    population in place of the worst member when it is better. ``conn``: the island's pipe to the parent;
    ``every``, ``last``: :func:`epochs`; ``keep``: keep each migrant that entered and each post (for tests)."""

    def __init__(self, conn, every: int, last: int, keep: bool = False) -> None:
        self.conn = conn
        self.every = every
        self.last = last
        self.epoch = 0
        self.received = 0
        self.keep = keep
        self.migrants: list = []
        self.posted: list = []
        self.waited = 0.0  # seconds spent waiting for migrants

    def __call__(self, obj: Objective, pop: np.ndarray, fit: np.ndarray, rank, best: list) -> None:
        epoch = min(obj.evaluations // self.every, self.last)
        if epoch <= self.epoch or obj.best_u is None or stop_requested():
            return
        self.epoch = epoch
        t = time.monotonic()
        self.conn.send(("post", epoch, (obj.best_cost, obj.best_violation, obj.best_u)))
        if self.keep:
            self.posted.append((epoch, obj.evaluations))
        migrant = _wait(self.conn)  # None: the parent stops every island, no migrant now
        self.waited += time.monotonic() - t
        if migrant is not None and self.enter(migrant, pop, fit, rank, best):
            self.received += 1
            if self.keep:
                self.migrants.append((epoch, migrant[2].copy()))

    @staticmethod
    def enter(migrant: tuple, pop: np.ndarray, fit: np.ndarray, rank, best: list) -> bool:
        """Put ``migrant`` (cost, violation, u (n,)) in place of the worst member of pop (N, n) when it ranks
        better by the run's keys fit (N,) (rank: the run's EpsilonLevel under limits, else None); ``best`` is
        the run's [key, point]. Whether it entered."""
        cost, violation, u = migrant
        if any(np.array_equal(row, u) for row in pop):
            return False
        c, v = np.array([cost], dtype=float), np.array([violation], dtype=float)
        key = float(rank.keys(c, v)[0]) if rank is not None else float(cost)
        worst = int(np.argmax(fit))
        if not key < fit[worst]:
            return False
        pop[worst] = u
        fit[worst] = key
        if rank is not None:
            rank.cost[worst] = cost
            rank.violation[worst] = violation
        true_key = float(feasibility_key(c, v)[0]) if rank is not None else float(cost)
        if true_key < best[0]:
            best[:] = [true_key, np.array(u, dtype=float)]
        return True


def _island(problem: Problem, seeds: list[int], options: dict, keep: bool, index: int, conn, began: float,
            forked: dict) -> None:
    """Island ``index``'s work in its process (:func:`xo_fit.search.forks.start`): its global search from
    ``seeds[index]``, ("searched", IslandRun) to the parent; then the polish the parent asks for, if any, and
    ("done", what changed since: its polish, error and clock). ``began``: time.monotonic when its process began;
    ``forked``: the CPU time in s at which it forked each island below it (kept in its clock)."""
    run = IslandRun(result=None, clock={"began": began, "forked": forked})
    searched = False
    if options["one_blas_thread"]:
        inherit_one_blas_thread()
    try:
        fn, space, constrained = problem.get()
        run.clock.update(ready=time.monotonic(), cpu_ready=time.process_time())
        migration = None
        if options["exchange"]:
            every, last = epochs(options["budget"], space.dims)
            migration = Migration(conn, every, last, keep) if last > 0 else None
        run.result = search(fn, space, optimizer=options["optimizer"], budget=options["budget"],
                            seed=seeds[index], time_limit=options["time_limit"], polish=False,
                            constrained=constrained, exchange=migration)
        if migration is not None:
            run.received, run.migrants, run.posted = migration.received, migration.migrants, migration.posted
            run.clock.update(waited=migration.waited, epochs=migration.epoch)
        run.clock.update(searched=time.monotonic(), cpu_searched=time.process_time())
        conn.send(("searched", run))
        searched = True
        for u, budget in _wait(conn) or ():
            p = polish_from(fn, space, u, budget=budget, constrained=constrained)
            if p is not None:
                run.polish = p if run.polish is None else chain(run.polish, p)
            if stop_requested():
                break
    except Exception as e:  # sent to the parent, which raises it (as it was, when it travels)
        run.error = e
        try:
            pickle.loads(pickle.dumps(e))
        except Exception:
            run.error = RuntimeError(f"{type(e).__name__}: {e}")
    finally:
        run.clock.update(ended=time.monotonic(), cpu_ended=time.process_time())
        try:  # the parent has the search: only what changed travels again
            conn.send(("done", {"polish": run.polish, "error": run.error, "clock": run.clock} if searched
                       else run))
            conn.close()
        except OSError:  # the parent is gone
            pass


def _wait(conn):
    """The parent's next message, or None once this island is asked to stop (or the parent is gone)."""
    while not conn.poll(0.05):
        if stop_requested():
            return None
    try:
        return conn.recv()
    except (EOFError, OSError):
        return None


def exchanges(optimizer: str) -> bool:
    """Whether islands of this engine exchange migrants (JADE, the default, does; the others run independently)."""
    return optimizer in ("auto", "de")


def run_islands(problem: Problem, seeds: list[int], *, optimizer: str, budget: int, time_limit: float | None,
                polish: bool, exchange: bool = False, keep: bool = False) -> tuple[list[IslandRun], bool, dict]:
    """One search of ``budget`` evaluations on one island per seed (see the module).

    Parameters
    ----------
    problem : Problem
        The search's objective (fn, space, constrained), built here if not yet.
    seeds : list of int
        The seeds (dimensionless), one island each (:func:`xo_fit.search.fitting.restart_seeds`).
    optimizer : str
        The engine (:func:`xo_fit.search.engines.engine`).
    budget : int
        The whole search's evaluations (dimensionless); the global search's share is split equally.
    time_limit : float or None
        Each island's global search's wall-clock limit in s; None: none.
    polish : bool
        Polish the best POLISH_BASINS distinct basins of all islands, side by side, sharing what is left.
    exchange : bool
        The islands exchange their best every epoch (JADE only: :func:`exchanges`).
    keep : bool
        Keep each migrant that entered and each post (for tests).

    Returns
    -------
    runs : list of IslandRun
        The islands' runs in seed order.
    interrupted : bool
        Whether the search was interrupted (Ctrl-C, SIGTERM).
    clock : dict
        The parent's time.monotonic in s: ``start`` before the first process started, ``started`` after the
        last, ``searched`` every global search done, ``gathered`` every island done; its CPU time at the first two
        as ``cpu_start``, ``cpu_started``; ``forked``: {island: its CPU time in s from ``cpu_start`` when it had
        forked the process of that island} (:attr:`xo_fit.search.forks.Started.forked`).
    """
    import functools
    import multiprocessing

    from xo_fit.search import forks

    constrained = problem.get()[2]  # built here once: forked islands inherit it
    ctx = multiprocessing.get_context()
    event = ctx.Event()
    share = LIMITED_POLISH_SHARE if constrained else POLISH_SHARE  # as one process's search shares it
    global_budget = budget if not polish else max(1, int(budget * (1 - share)))
    options = {"optimizer": optimizer, "budget": max(1, global_budget // len(seeds)), "time_limit": time_limit,
               "exchange": exchange and exchanges(optimizer)}
    clock: dict = {"start": time.monotonic(), "cpu_start": time.process_time()}
    pipes = [ctx.Pipe() for _ in seeds]
    conns = [parent for parent, _ in pipes]
    started = forks.Started()
    coordinator = Coordinator(conns, event, budget if polish else 0)
    blas = one_blas_thread_for_forks(ctx)
    # a signal now stops the islands, and the parent gathers what they found; forked islands keep one BLAS thread
    with signals_set(event) as signals, blas as one_thread:
        options["one_blas_thread"] = one_thread
        try:
            started = forks.start(ctx, functools.partial(_island, problem, seeds, options, keep), pipes, event)
            clock.update(started=time.monotonic(), cpu_started=time.process_time(),
                         forked={i: t - clock["cpu_start"] for i, t in started.forked.items()})
            coordinator.run(clock)
        finally:
            clock["gathered"] = time.monotonic()
            forks.reap(started, event, len(coordinator.done) < len(conns))
    runs = [coordinator.done.get(i) or coordinator.searched.get(i) or IslandRun(result=None)
            for i in range(len(seeds))]  # an island that never started: no result
    return runs, coordinator.stopping or bool(signals), clock


class Coordinator:
    """The parent's side: answers each island's post at epoch k with its predecessor's best at epoch k or later
    (or its final best once its search is done); once every search is done, hands out the polish of the best
    distinct basins; gathers the islands' runs. ``conns``: the parent's ends of the islands' pipes, in seed order;
    ``event``: the islands' stop event; ``budget``: the whole search's evaluations (0: no polish)."""

    def __init__(self, conns: list, event, budget: int) -> None:
        self.conns = conns
        self.event = event
        self.budget = budget  # the whole search's (0: no polish)
        self.posts: dict[int, list] = {}  # island -> (epoch, migrant) in the order posted
        self.waiting: dict[int, int] = {}  # island -> the epoch it waits at
        self.searched: dict[int, IslandRun | None] = {}
        self.done: dict[int, IslandRun | None] = {}
        self.ordered = False
        self.stopping = False

    def run(self, clock: dict) -> None:
        """Serve the islands until each is done; once the event is set (Ctrl-C or SIGTERM: every island stops at
        its next batch and skips the polish) answer at once and go on gathering."""
        import selectors

        with selectors.DefaultSelector() as ready:  # one, registered once: a wait per message costs no set-up
            for i, conn in enumerate(self.conns):
                ready.register(conn.fileno(), selectors.EVENT_READ, i)
            while len(self.done) < len(self.conns):
                try:
                    self.stopping = self.stopping or self.event.is_set()
                    for key, _ in ready.select():
                        self.receive(key.data)
                        if key.data in self.done:
                            ready.unregister(key.fd)
                    self.stopping = self.stopping or self.event.is_set()
                    self.answer()
                    if not self.ordered and len(self.searched) == len(self.conns):
                        clock["searched"] = time.monotonic()
                        self.order()
                except KeyboardInterrupt:
                    self.stopping = True
                    self.event.set()

    def receive(self, i: int) -> None:
        """Take island i's next message: a post, its searched run, or its final run (None where it died)."""
        try:
            message = self.conns[i].recv()
        except (EOFError, OSError):  # the island's process died
            self.searched.setdefault(i, None)
            self.done[i] = None
            return
        if message[0] == "post":
            self.posts.setdefault(i, []).append((message[1], message[2]))
            self.waiting[i] = message[1]
        elif message[0] == "searched":
            self.searched[i] = message[1]
        else:  # after its search only what changed: its polish, error and clock
            run = message[1]
            if isinstance(run, dict):
                before = self.searched.get(i)
                run = dataclasses.replace(before, **run) if before is not None else IslandRun(result=None, **run)
            self.searched.setdefault(i, run)
            self.done[i] = run

    def migrant(self, i: int, epoch: int) -> tuple[bool, tuple | None]:
        """(ready, migrant) for island i waiting at ``epoch``: its predecessor's post at that epoch or later, else
        its final best once its search is done, else not ready."""
        pred = (i - 1) % len(self.conns)
        for k, m in self.posts.get(pred, ()):
            if k >= epoch:
                return True, m
        if pred in self.searched:
            run = self.searched[pred]
            r = run.result if run is not None else None
            return True, (r.cost, r.violation, r.u) if r is not None else None
        return self.stopping, None

    def answer(self) -> None:
        """Send each waiting island its migrant where ready (None once stopping, or with a single island)."""
        for i, epoch in list(self.waiting.items()):
            ready, m = self.migrant(i, epoch)
            if ready:
                del self.waiting[i]
                self.send(i, None if self.stopping or len(self.conns) == 1 else m)

    def send(self, i: int, message) -> None:
        """Send island i ``message``; an island whose pipe is gone is passed over."""
        try:
            self.conns[i].send(message)
        except (BrokenPipeError, OSError):
            pass

    def order(self) -> None:
        """Every global search is done: send each island the basin it polishes and its budget, or None."""
        self.ordered = True
        runs = {i: run for i, run in self.searched.items() if run is not None and run.result is not None}
        results = [run.result for run in runs.values() if run.result is not None]
        plan = {}
        if self.budget and not self.stopping and not any(r.stopped_by in ("time limit", "interrupted")
                                                         for r in results) \
                and not any(run.error is not None for run in runs.values()):
            plan = polish_plan(runs, self.budget - sum(r.evaluations for r in results))
        for i in runs:
            self.send(i, plan.get(i))


def polish_plan(runs: dict, left: int) -> dict:
    """Which island polishes which basin: the best POLISH_BASINS distinct basins of all islands by the
    feasibility-first order, each polished by the island that found it where that one has none yet (else by
    the one with the fewest), with an equal share of what is left.

    Parameters
    ----------
    runs : dict
        {island: IslandRun} of the islands whose search found a design.
    left : int
        The evaluations left for the polish (dimensionless).

    Returns
    -------
    dict
        {island: [(point (n,), budget), ...]}; empty where there is nothing to polish.
    """
    basins = []
    for i in sorted(runs):
        r = runs[i].result
        violations = r.basin_violations or (0.0,) * len(r.basins)
        keys = feasibility_key(np.array(r.basins, dtype=float), np.array(violations, dtype=float))
        basins += [(float(k), i, j, u) for j, (k, u) in enumerate(zip(keys, r.points))]
    basins.sort(key=lambda b: b[:3])
    chosen: list = []
    for b in basins:
        if all(abs(b[0] - c[0]) > 1e-9 * max(1.0, abs(c[0])) for c in chosen):
            chosen.append(b)
        if len(chosen) == POLISH_BASINS:
            break
    if not chosen or left < 1:
        return {}
    share = max(1, left // len(chosen))
    plan: dict = {}
    for _, i, _, u in chosen:
        if i in plan:  # its finder polishes another: the island with the fewest, the first of them
            i = min(sorted(runs), key=lambda k: len(plan.get(k, ())))
        plan.setdefault(i, []).append((u, share))
    return plan
