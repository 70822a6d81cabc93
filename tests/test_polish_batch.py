"""Polishes side by side (xo_fit.search.polish_batch, the prune's refits) against scipy's L-BFGS-B.

Each problem's polish, run side by side with others whose points share one batch of the cost, must take the
iterates scipy.optimize.minimize(method="L-BFGS-B") takes on that problem alone [reference library] with the
polish's forward-difference gradient, and end where it ends, bit for bit; a budget that ends a polish part way
must end it where the polish alone would end (xo_fit.search.engines.polish_from, the stage's single refit).
"""

import numpy as np
import pytest
from scipy.optimize import minimize, rosen

from xo_fit.config import POLISH_FTOL, POLISH_GTOL, POLISH_STEP
from xo_fit.search import lbfgsb
from xo_fit.search.engines import polish_from
from xo_fit.search.polish_batch import polish_together
from xo_fit.search.space import Space

P = 6  # the shared designs' columns


def cost(designs: np.ndarray) -> np.ndarray:
    """A smooth cost of designs (B, P) (values in 0.1..10), each row's alone: Rosenbrock's function of the
    logarithms plus a bowl [scipy.optimize.rosen, a reference test function]."""
    x = np.log10(designs)
    return np.array([rosen(r) for r in x]) + 0.3 * np.sum((x - 0.2) ** 2, axis=1)


def space_of(columns, base) -> Space:
    """A log-scale space over some columns of the shared designs (0.1..10), the rest at ``base``."""
    n = len(columns)
    return Space(names=tuple(f"p{i}" for i in columns), columns=np.array(columns), lo=np.full(n, np.log(0.1)),
                 hi=np.full(n, np.log(10.0)), base=np.asarray(base, dtype=float), u0=None)


PROBLEMS = [([0, 1, 2, 3], np.full(P, 1.0), [0.45, 0.6, 0.52, 0.4]),
            ([1, 3, 5], np.full(P, 2.0), [0.2, 0.7, 0.5]),
            ([0, 2, 4, 5, 1], np.linspace(0.5, 3, P), [0.5, 0.5, 0.5, 0.999999, 0.3]),  # one start at the upper edge
            ([4], np.full(P, 1.0), [0.9])]


def fd(space):
    """The polish's value and forward-difference gradient in the unit cube (steps POLISH_STEP, backwards at the
    upper edge), as scipy is given it; counts its calls."""
    calls = []

    def f(u):
        calls.append(u.copy())
        h = np.where(u + POLISH_STEP <= 1.0, POLISH_STEP, -POLISH_STEP)
        pts = np.vstack([u, u + np.diag(h)])
        c = cost(space.values(pts))
        g = (c[1:] - c[0]) / h
        return float(c[0]), np.where(np.isfinite(g), g, 0.0)
    return f, calls


def test_side_by_side_polishes_take_scipys_iterates():
    spaces = [space_of(cols, base) for cols, base, _ in PROBLEMS]
    starts = [np.array(s) for _, _, s in PROBLEMS]
    calls = []

    def batched(designs):
        calls.append(designs.shape[0])
        return cost(designs)

    got = polish_together(batched, [(s, s.values) for s in spaces], starts, budget=10**6)
    assert len(calls) < sum(r.evaluations for r in got) / 5  # shared batches, not one call per stencil
    for space, start, r in zip(spaces, starts, got):
        f, seen = fd(space)
        res = minimize(f, start, jac=True, method="L-BFGS-B", bounds=[(0, 1)] * space.dims,
                       options={"maxiter": 10_000, "ftol": POLISH_FTOL, "gtol": POLISH_GTOL})
        assert res.success
        # the same points evaluated: as many, and the best of them (a stencil point may beat scipy's end point,
        # which the polish keeps) the best of every stencil scipy asked for, bit for bit
        assert r.evaluations == len(seen) * (space.dims + 1)
        stencils = [np.vstack([u, u + np.diag(np.where(u + POLISH_STEP <= 1.0, POLISH_STEP, -POLISH_STEP))])
                    for u in seen]
        costs = [cost(space.values(pts)) for pts in stencils]
        k = int(np.argmin([c.min() for c in costs]))
        assert r.cost == costs[k].min() <= res.fun
        assert np.array_equal(r.u, stencils[k][int(np.argmin(costs[k]))])


@pytest.mark.parametrize("budget", [1, 7, 40, 133])
def test_a_budget_ends_each_polish_where_it_ends_alone(budget):
    spaces = [space_of(cols, base) for cols, base, _ in PROBLEMS]
    starts = [np.array(s) for _, _, s in PROBLEMS]
    got = polish_together(cost, [(s, s.values) for s in spaces], starts, budget=budget)
    for space, start, r in zip(spaces, starts, got):
        alone = polish_from(lambda u, sp=space: cost(sp.values(u)), space, start, budget=budget)
        assert r is not None and alone is not None
        assert np.array_equal(r.u, alone.u) and r.cost == alone.cost
        assert r.evaluations == alone.evaluations <= budget
        assert r.history == alone.history


def test_without_scipys_routine_they_run_one_after_another(monkeypatch):
    monkeypatch.setattr(lbfgsb, "_setulb", lambda: None)
    spaces = [space_of(cols, base) for cols, base, _ in PROBLEMS[:2]]
    starts = [np.array(s) for _, _, s in PROBLEMS[:2]]
    got = polish_together(cost, [(s, s.values) for s in spaces], starts, budget=500)
    for space, start, r in zip(spaces, starts, got):
        assert r is not None and r.evaluations <= 500 and r.cost <= cost(space.values(start[None]))[0]


def limited(designs: np.ndarray):
    """The cost above under one limit: the sum of the logarithms at most 0.5 (its signed relative excess), as
    the objective takes a constrained cost: (costs, total violations, each limit's excess)."""
    x = np.log10(designs)
    excess = (np.sum(x, axis=1) - 0.5)[:, None]
    return cost(designs), np.maximum(excess[:, 0], 0.0), excess


@pytest.mark.parametrize("budget", [5, 60, 400])
@pytest.mark.parametrize("margins", [None, (1e-4,)])
def test_limited_polishes_side_by_side_end_where_each_ends_alone(budget, margins):
    """Under limits each polish is the SLSQP of polish_limited (held to scipy's SLSQP in tests/test_slsqp.py);
    run side by side it must evaluate the same points and end where it ends alone, at any budget."""
    spaces = [space_of(cols, base) for cols, base, _ in PROBLEMS]
    starts = [np.array(s) for _, _, s in PROBLEMS]
    got = polish_together(limited, [(s, s.values) for s in spaces], starts, budget=budget, constrained=True,
                          margins=margins)
    for space, start, r in zip(spaces, starts, got):
        alone = polish_from(lambda u, sp=space: limited(sp.values(u)), space, start, budget=budget,
                            constrained=True, margins=margins)
        assert r is not None and alone is not None
        assert np.array_equal(r.u, alone.u) and r.cost == alone.cost and r.violation == alone.violation
        assert r.evaluations == alone.evaluations <= budget and r.history == alone.history
