"""Many polishes side by side: several L-BFGS-B minimisations whose points share one batch of the cost.

A prune refits a dozen or more trial removals per step, each a short polish of a few hundred evaluations in
batches of n + 1 points (the forward-difference stencil). One call of the compiled cost per stencil pays the
call's fixed cost (argument checks, the kernel's entry, the reductions' set-up) a dozen times over for a few
designs each. Here every polish is a generator (:func:`xo_fit.search.polish.polish_steps`) and one round asks
each for its next stencil, maps each into the common designs (a trial's free values written into its columns of
the shared kernel's designs) and evaluates them all in ONE call. Each design's cost depends on that design
alone, so every polish takes the iterates it would take on its own (:func:`xo_fit.search.engines.polish_from`),
bit for bit (tests/test_polish_batch.py).
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence

import numpy as np

from xo_fit.search.engines import Objective, SearchResult, polish_from
from xo_fit.search.polish import polish_steps
from xo_fit.search.feasibility import POLISH_MARGINS, Stop, polish_limited_steps
from xo_fit.search.lbfgsb import one_blas_thread
from xo_fit.search.slsqp import load_routine
from xo_fit.search.space import Space


def polish_together(evaluate: Callable, problems: Sequence[tuple[Space, Callable]], starts: Sequence[np.ndarray],
                    budget: int, constrained: bool = False, margins: tuple | None = None) -> list[SearchResult | None]:
    """Polishes (L-BFGS-B; under limits SLSQP, as :func:`~xo_fit.search.engines.polish_from`) of several problems
    whose designs one cost function evaluates, their points evaluated in one batch per round.

    Parameters
    ----------
    evaluate : callable
        Designs (B, P) -> costs (B,), dimensionless; with ``constrained`` -> (costs (B,), total violations (B,),
        each limit's signed excess (B, L)) (:class:`~xo_fit.search.engines.Objective`'s ``fn``). Each row's
        figures must depend on that row alone.
    problems : sequence of (Space, callable)
        Each problem's free values (its unit cube, n_i dimensions) and its map of cube points (B, n_i) to
        designs (B, P), in ``evaluate``'s units.
    starts : sequence of ndarray
        Each problem's start point in its cube, shape (n_i,).
    budget : int
        Evaluations for each problem at most (dimensionless).
    constrained : bool
        Feasibility first under [limits]: the SLSQP polish (:func:`~xo_fit.search.feasibility.polish_limited`).
    margins : tuple of float, optional
        Its runs' margins (dimensionless); default the fit's.

    Returns
    -------
    list of SearchResult or None
        Each problem's polish: what ``polish_from(lambda u: evaluate(to_designs(u)), space, start,
        budget=budget, constrained=constrained, margins=margins)`` returns, bit for bit (None where it would be).

    Raises
    ------
    KeyboardInterrupt
        Where the process was asked to stop (Ctrl-C, SIGTERM, its parent): the polishes are dropped.
    """
    fns = [(lambda u, to=to: evaluate(to(u))) for _, to in problems]
    objs = [Objective(fn=fn, budget=budget, constrained=constrained) for fn in fns]
    starts = [np.asarray(s, dtype=float) for s in starts]
    runs: list  # each problem's generator (None: the routine cannot be driven)
    if constrained:
        runs = ([polish_limited_steps(o, space.dims, s, margins or POLISH_MARGINS)
                 for o, (space, _), s in zip(objs, problems, starts)] if load_routine() else [None])
    else:
        runs = [polish_steps(space.dims, s) for (space, _), s in zip(problems, starts)]
    if any(r is None for r in runs):  # scipy's routine cannot be driven: one after another
        return [polish_from(fn, space, s, budget=budget, constrained=constrained, margins=margins)
                for fn, (space, _), s in zip(fns, problems, starts)]
    t0 = time.monotonic()
    with one_blas_thread():
        asked = {i: next(r) for i, r in enumerate(runs)}
        while asked:
            batch, parts = [], []
            for i, pts in list(asked.items()):
                try:
                    take = objs[i].admit(pts)
                except Stop:
                    runs[i].close()
                    del asked[i]
                    continue
                batch.append(problems[i][1](pts[:take]))
                parts.append((i, pts, take))
            if not parts:
                break
            out = evaluate(np.concatenate(batch) if len(batch) > 1 else batch[0])
            at = 0
            for i, pts, take in parts:
                mine = (tuple(np.asarray(x)[at:at + take] for x in out) if constrained
                        else np.asarray(out, dtype=float)[at:at + take])
                got = objs[i].absorb(pts, take, mine)
                at += take
                try:
                    asked[i] = runs[i].send(got if constrained else got[0])
                except StopIteration:
                    del asked[i]
    seconds = time.monotonic() - t0
    return [None if o.best_u is None else
            SearchResult(u=o.best_u, cost=o.best_cost, evaluations=o.evaluations, seconds=seconds,
                         optimizer="polish", seed=0, complete=True, stopped_by=o.stopped_by,
                         history=tuple(o.history), violation=o.best_violation) for o in objs]
