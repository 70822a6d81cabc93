"""Feasibility first: the order of designs under hard limits, and the polish that keeps to it.

Under ``[limits]`` every design has a cost and a total violation (0: every limit met; :mod:`xo_fit.model.
limits`). Designs are ranked by Deb's rules (K. Deb, "An efficient constraint handling method for genetic
algorithms", Comput. Methods Appl. Mech. Engrg. 186, 2000): a feasible design beats every infeasible one, of two
infeasible ones the smaller violation wins, of two feasible ones the lower cost. :func:`feasibility_key` writes
that order as one number per design, which every engine of :mod:`xo_fit.search.engines` compares;
:class:`EpsilonLevel` relaxes it inside a JADE run by an epsilon that falls to 0; the polish
(:func:`polish_limited`) needs a continuous function for its gradients and minimises an augmented Lagrangian
instead, then projects back to feasibility.
"""

from __future__ import annotations

import numpy as np

from xo_fit.config import POLISH_FTOL, POLISH_GTOL, POLISH_STEP
from xo_fit.search.lbfgsb import minimize_box

#: An infeasible design's key is LIMIT_KEY (1 + violation): above every feasible cost (the cost terms are squared
#: dB with weights up to 1e6; a feasible cost above LIMIT_KEY / 2 is held there), so that one number per design
#: keeps the feasibility-first order; 1 + violation resolves violations down to 2e-16.
LIMIT_KEY = 1e12
#: The polish's first penalty weight (rho of its augmented Lagrangian) per squared unit of excess, relative to
#: 1 + the start's cost, and how many multiplier updates it makes after the first run (see polish_limited).
PENALTY_START = 100.0
PENALTY_STAGES = 4
#: Bisection steps of the projection of an infeasible polish end point back to feasibility.
PROJECTION_STEPS = 12


class Stop(Exception):
    """Raised inside an engine when the budget or the time is used up."""


def feasibility_key(cost: np.ndarray, violation: np.ndarray) -> np.ndarray:
    """One number per design (B,) whose order is the feasibility-first order of Deb's rules: the cost (B,) of a
    design whose total violation (B,) is 0, LIMIT_KEY (1 + violation) of one that breaks a limit; a design
    without a finite cost or violation (a singular point) is inf."""
    c = np.asarray(cost, dtype=float)
    v = np.asarray(violation, dtype=float)
    ok = np.isfinite(c) & np.isfinite(v)
    with np.errstate(invalid="ignore"):
        key = np.where(v > 0, LIMIT_KEY * (1.0 + v), np.minimum(c, LIMIT_KEY / 2))
    return np.where(ok, key, np.inf)


def polish_limited(obj, n: int, start: np.ndarray | None = None) -> None:
    """The polish under hard limits: L-BFGS-B on an augmented Lagrangian, then a projection back to feasibility.

    Each limit's signed excess g_i (> 0: broken; the objective's ``last_excess``) enters as the smooth term
    (rho / 2) (max(0, g_i + lam_i / rho)^2 - (lam_i / rho)^2) (M. J. D. Powell 1969, R. T. Rockafellar 1973; J.
    Nocedal and S. J. Wright, Numerical Optimization, 2nd ed., 17.4): after each bounded L-BFGS-B run the
    multipliers take lam_i <- max(0, lam_i + rho g_i), and rho grows tenfold where the violation has not
    fallen to a quarter; the multipliers converge to the limits' own, so the minimiser converges to the
    constrained optimum without an infinite weight. An end point still infeasible is projected back (bisection
    toward the best feasible point). The objective keeps the best point by the feasibility-first order
    throughout, so the polish never returns a worse design.
    """
    u = obj.best_u if start is None else np.asarray(start, dtype=float)
    if u is None:
        return
    budget = obj.budget
    obj.budget = max(obj.evaluations + 1, budget - PROJECTION_STEPS)  # kept for the projection
    lowest: list = [np.inf, u]  # the lowest augmented Lagrangian seen in the current run, and where
    try:
        _augmented(obj, n, u, lowest)
    except Stop:
        pass
    finally:
        obj.budget = budget
    if obj.best_violation == 0.0 and obj.best_u is not None and not np.array_equal(obj.best_u, lowest[1]):
        project(obj, lowest[1])


def _augmented(obj, n: int, u: np.ndarray, lowest: list) -> None:
    """The augmented Lagrangian runs of :func:`polish_limited` from ``u``; ``lowest`` receives [value, point] of
    the lowest value of the current run."""
    c0, _ = obj.evaluate(u[None])
    g0 = obj.last_excess[0]
    scale = 1.0 + (abs(float(c0[0])) if np.isfinite(c0[0]) else 0.0)
    rho = PENALTY_START * scale
    lam = np.zeros(g0.size)
    last = np.inf
    for _ in range(PENALTY_STAGES + 1):
        cache: dict[bytes, tuple[float, np.ndarray, np.ndarray]] = {}
        lowest[0] = np.inf

        def fun(x: np.ndarray, rho: float = rho, lam: np.ndarray = lam,
                cache: dict[bytes, tuple[float, np.ndarray, np.ndarray]] = cache):
            key = x.tobytes()
            if key not in cache:
                h = np.where(x + POLISH_STEP <= 1.0, POLISH_STEP, -POLISH_STEP)
                c, _ = obj.evaluate(np.vstack([x, x + np.diag(h)]))
                g = np.where(np.isfinite(obj.last_excess), obj.last_excess, np.inf)
                shifted = np.maximum(g + lam / rho, 0.0)
                with np.errstate(invalid="ignore"):
                    p = c + 0.5 * rho * np.sum(shifted**2 - (lam / rho) ** 2, axis=-1)
                p = np.where(np.isfinite(p), p, np.inf)
                grad = (p[1:] - p[0]) / h
                cache.clear()
                cache[key] = (float(p[0]), np.where(np.isfinite(grad), grad, 0.0), g[0])
                if p[0] < lowest[0]:
                    lowest[:] = [float(p[0]), x.copy()]
            return cache[key][:2]

        end, _ = minimize_box(fun, np.array(u, dtype=float), np.zeros(n), np.ones(n), maxiter=10_000,
                              ftol=POLISH_FTOL, gtol=POLISH_GTOL)
        known = cache.get(end.tobytes())
        if known is None:
            obj.evaluate(end[None])
            g_end = obj.last_excess[0]
        else:
            g_end = known[2]
        if not np.all(np.isfinite(g_end)):
            return
        broken = float(np.sum(np.maximum(g_end, 0.0)))
        lam = np.maximum(lam + rho * g_end, 0.0)
        if broken > 0.25 * last:
            rho *= 10.0
        last = broken
        u = end
        if broken <= 0.0 and np.all(lam == 0.0):
            return  # no limit is active: the plain polish's optimum


def project(obj, end: np.ndarray) -> None:
    """Bisection from the best feasible point toward ``end`` (infeasible): the objective keeps the feasible point
    nearest to ``end`` when it is better. Nothing to do while no feasible point is known."""
    if obj.best_violation > 0 or obj.best_u is None:
        return
    a, b = obj.best_u.copy(), np.asarray(end, dtype=float)
    lo, hi = 0.0, 1.0
    for _ in range(PROJECTION_STEPS):
        t = 0.5 * (lo + hi)
        _, v = obj.evaluate((a + t * (b - a))[None])
        if v[0] > 0:
            hi = t
        else:
            lo = t


#: The epsilon level of a constrained JADE run (T. Takahama and S. Sakai, "Constrained optimization by the
#: epsilon constrained differential evolution with an archive and gradient-based mutation", IEEE CEC 2010):
#: designs whose violation is at most epsilon compare by cost alone. Epsilon starts at the violation of the
#: EPSILON_THETA-th best of the run's first population and falls as (1 - t)^EPSILON_POWER to 0 over
#: EPSILON_SHARE of the evaluations the run may still use; from then on the order is Deb's.
EPSILON_THETA = 0.2
EPSILON_POWER = 5.0
EPSILON_SHARE = 0.5


class EpsilonLevel:
    """How a JADE run under limits ranks its designs: by :func:`feasibility_key` with violations up to the run's
    epsilon (falling to 0) counted as none. Keeps the population's costs and violations, so that its keys
    follow epsilon down; ``best`` is always by the true order (epsilon 0)."""

    def __init__(self, obj) -> None:
        self.obj = obj
        self.start = obj.evaluations
        self.span = max(EPSILON_SHARE * (obj.budget - obj.evaluations), 1.0)
        self.eps0 = 0.0
        self.eps = 0.0
        self.cost: np.ndarray | None = None  # the population's (N,), set by first()
        self.violation: np.ndarray | None = None
        self.trial_cost: np.ndarray | None = None  # the last trials' (N,), set by trial()
        self.trial_violation: np.ndarray | None = None

    def first(self, pop: np.ndarray) -> np.ndarray:
        """Evaluate the run's first population (N, n); its keys (N,)."""
        self.cost, self.violation = self.obj.evaluate(pop)
        v = np.sort(np.where(np.isfinite(self.violation), self.violation, np.inf))
        k = min(int(EPSILON_THETA * v.size), v.size - 1)
        self.eps0 = self.eps = float(v[k]) if np.isfinite(v[k]) else 0.0
        return self.keys(self.cost, self.violation)

    def keys(self, cost: np.ndarray, violation: np.ndarray) -> np.ndarray:
        with np.errstate(invalid="ignore"):
            return feasibility_key(cost, np.where(violation <= self.eps, 0.0, violation))

    def population(self) -> np.ndarray:
        """This generation's epsilon (from the evaluations used so far) and the population's keys under it."""
        t = (self.obj.evaluations - self.start) / self.span
        self.eps = 0.0 if t >= 1.0 else self.eps0 * (1.0 - t) ** EPSILON_POWER
        assert self.cost is not None and self.violation is not None, "first() evaluates the population"
        return self.keys(self.cost, self.violation)

    def trial(self, trial: np.ndarray) -> np.ndarray:
        """Evaluate trial points (N, n); their keys under this generation's epsilon."""
        self.trial_cost, self.trial_violation = self.obj.evaluate(trial)
        return self.keys(self.trial_cost, self.trial_violation)

    def accept(self, better: np.ndarray) -> None:
        """The trials that replace their parents (bool (N,))."""
        assert self.cost is not None and self.violation is not None, "first() evaluates the population"
        assert self.trial_cost is not None and self.trial_violation is not None, "trial() evaluates the trials"
        self.cost = np.where(better, self.trial_cost, self.cost)
        self.violation = np.where(better, self.trial_violation, self.violation)

    def best(self, pop: np.ndarray) -> list:
        """[true key, point] of the population's best by the feasibility-first order."""
        assert self.cost is not None and self.violation is not None, "first() evaluates the population"
        key = feasibility_key(self.cost, self.violation)
        i = int(np.argmin(key))
        return [float(key[i]), pop[i].copy()]

    @property
    def settled(self) -> bool:
        """Whether epsilon has reached 0 (the run may stop once it converges or stagnates)."""
        return self.eps == 0.0
