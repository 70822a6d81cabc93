"""Feasibility first: the order of designs under hard limits, and the polish that keeps to it.

Under ``[limits]`` every design has a cost and a total violation (0: every limit met; :mod:`xo_fit.model.
limits`). Designs are ranked by Deb's rules (K. Deb, "An efficient constraint handling method for genetic
algorithms", Comput. Methods Appl. Mech. Engrg. 186, 2000): a feasible design beats every infeasible one, of two
infeasible ones the smaller violation wins, of two feasible ones the lower cost. :func:`feasibility_key` writes
that order as one number per design, which every engine of :mod:`xo_fit.search.engines` compares;
:class:`EpsilonLevel` relaxes it inside a JADE run by an epsilon that falls to 0; the polish
(:func:`polish_limited`) needs smooth functions for its gradients and runs SLSQP with each limit as a
constraint instead, keeping the best point by the feasibility-first order that any of its steps reached.
"""

from __future__ import annotations

import numpy as np

from xo_fit.config import POLISH_STEP
from xo_fit.search.lbfgsb import drive, one_blas_thread
from xo_fit.search.slsqp import load_routine, minimize_slsqp, slsqp_steps

#: An infeasible design's key is LIMIT_KEY (1 + violation): above every feasible cost (the cost terms are squared
#: dB with weights up to 1e6; a feasible cost above LIMIT_KEY / 2 is held there), so that one number per design
#: keeps the feasibility-first order; 1 + violation resolves violations down to 2e-16.
LIMIT_KEY = 1e12
#: Share of the budget the polish may use under limits (POLISH_SHARE without): the global search only has to
#: find the best basin, the polish walks its boundary (limited three-way, 40 seeds at 20k: 0.15 25/40 in the
#: best basin, 0.3 38/40, 0.45 38/40; benchmarks/fit.py).
LIMITED_POLISH_SHARE = 0.3
#: The polish keeps each limit's relative excess below -margin (1e-4: a 3 ohm floor read as 3.0003 ohm), so
#: that its steps land inside the limits rather than a hair outside. Each round runs one SLSQP per margin here,
#: side by side: as reliable as one margin alone (limited three-way polished from 14k evaluations: 38-39 of 40
#: seeds either way), and the three share each call of the kernel (75k evaluations/s against 53k for one run
#: at a time); POLISH_ROUNDS rounds at most.
POLISH_MARGINS = (1e-4, 3e-4, 1e-5)
#: A prune's refit under [limits] (a polish alone, from a design a removal has just pushed out of its limits, on a
#: few hundred evaluations) runs one margin: the three split its budget so that most refits of the limited
#: three-way ended short of the limits (30 of 31 trials refused at 300 evaluations; with one margin the refits
#: reached the costs and steps that 1,500 evaluations with three reach: DEVELOPERS.md, Prune).
REFIT_MARGINS = POLISH_MARGINS[:1]
POLISH_ROUNDS = 3
#: An SLSQP run's iterations at most, and its tolerance (scipy's ftol).
SLSQP_MAXITER = 100
SLSQP_FTOL = 1e-12
#: Each limit is the worst of several smooth pieces (frequencies, parts, ways): the polish keeps this many
#: linearisations of pieces other than the current one per limit, a piece told from another by the direction
#: of its gradient (cosine under PIECE_COSINE).
PIECES = 2
PIECE_COSINE = 0.9
#: Where an SLSQP step breaks a limit, the polish also tries these multiples of the Newton step onto the broken
#: limits (the least change of the part values that meets their linearisations), as one batch.
RESTORE = (1.0, 2.0, 4.0)
#: What SLSQP sees for a cost or an excess that is not finite (a singular design), and for an unused piece.
BIG = 1e6
UNUSED = 1e3


class Stop(Exception):
    """Raised inside an engine when the budget or the time is used up."""


def feasibility_key(cost: np.ndarray, violation: np.ndarray) -> np.ndarray:
    """One number per design whose order is the feasibility-first order of Deb's rules.

    Parameters
    ----------
    cost : ndarray
        The designs' costs (dimensionless), shape (B,).
    violation : ndarray
        Their total violations of the [limits] (dimensionless: a sum of relative excesses; 0: every limit met),
        shape (B,).

    Returns
    -------
    ndarray
        The keys (dimensionless), shape (B,): the cost (held at LIMIT_KEY / 2 at most) where the violation is 0,
        LIMIT_KEY (1 + violation) where it is above 0, inf where the cost or the violation is not finite (a
        singular design).
    """
    c = np.asarray(cost, dtype=float)
    v = np.asarray(violation, dtype=float)
    ok = np.isfinite(c) & np.isfinite(v)
    with np.errstate(invalid="ignore"):
        key = np.where(v > 0, LIMIT_KEY * (1.0 + v), np.minimum(c, LIMIT_KEY / 2))
    return np.where(ok, key, np.inf)


def polish_limited(obj, n: int, start: np.ndarray | None = None, margins: tuple = POLISH_MARGINS) -> None:
    """The polish under hard limits: SLSQP on the cost with each limit's signed excess as a constraint.

    Minimises the cost subject to g_i(u) <= -margin for each limit's signed excess g_i (the objective's
    ``last_excess``) in the unit cube (:mod:`xo_fit.search.slsqp`, D. Kraft 1988; gradients by forward
    differences, one batch of n designs per iterate), the cost divided by 1 + its value at the start so that
    SLSQP's first quasi-Newton steps (an identity Hessian) are of a sensible length. Each excess is the worst
    of several smooth pieces (a floor's dips, the rated parts, a way's two stop bands), so it has a kink where
    two are equal, as they usually are at the constrained optimum; there a quasi-Newton method that sees only
    the worst piece steps back and forth across the kink. The polish therefore keeps the linearisations of the
    other pieces it has met as further constraints (:class:`LimitPolish`: cutting planes, J. E. Kelley 1960,
    as in the bundle methods of K. C. Kiwiel 1985), and where a step breaks a limit it also tries a Newton
    step back onto it. The objective keeps the best point by the feasibility-first order throughout, so the
    polish returns the best feasible design any step reached, never a worse one. Each round runs one SLSQP per
    margin of POLISH_MARGINS side by side from the best point so far (:func:`together_steps`); rounds follow until
    one gains nothing, POLISH_ROUNDS have run, or the budget ends.

    Parameters
    ----------
    obj : Objective
        The search's objective (:class:`xo_fit.search.engines.Objective`, ``constrained``): it counts the
        evaluations, keeps the best point (``best_u``, ``best_cost``, ``best_violation``: the result) and ends the
        polish at its budget.
    n : int
        The number of free values (dimensionless).
    start : ndarray or None
        The start point in the unit cube, shape (n,); None: the objective's best point (nothing to polish when
        it has none).
    margins : tuple of float
        The margins of the SLSQP runs of a round, side by side (dimensionless; a relative excess).

    Raises
    ------
    KeyboardInterrupt
        From the objective, where the process was asked to stop (Ctrl-C, SIGTERM, its parent); the best point so
        far stays in ``obj``.
    """
    u = obj.best_u if start is None else np.asarray(start, dtype=float)
    if u is None:
        return
    steps = polish_limited_steps(obj, n, u, margins)
    load_routine()  # before the limit, which covers the BLAS libraries loaded when it is set up
    with one_blas_thread():
        try:
            drive(steps, obj.evaluate)
        except Stop:  # the budget or the time is used up
            steps.close()


def polish_limited_steps(obj, n: int, start: np.ndarray, margins: tuple = POLISH_MARGINS):
    """:func:`polish_limited` from ``start`` (n,) as a generator, for callers that evaluate several polishes'
    points in one batch (:mod:`xo_fit.search.polish_batch`): it yields each batch of cube points (B, n) that
    ``obj`` must evaluate and is sent back ``obj.evaluate``'s (costs, violations), ``obj``'s ``last_excess`` and
    ``last_key`` set as that leaves them (:meth:`~xo_fit.search.engines.Objective.absorb`). The same points and
    the same end as :func:`polish_limited`, bit for bit; the caller stops it at the budget (:class:`Stop`)."""
    best: list = [np.inf, np.array(start, dtype=float)]  # the best [key, point] of this polish, feasibility first
    c0, _ = yield best[1][None]
    scale = 1.0 / (1.0 + (abs(float(c0[0])) if np.isfinite(c0[0]) else 0.0))
    for _ in range(POLISH_ROUNDS):
        before = best[0]
        yield from together_steps(obj, [LimitPolish(obj, n, m, scale, best) for m in margins])
        if not best[0] < before:
            return


def together_steps(obj, runs: list):
    """Run SLSQP runs side by side: each step, every run's request (one design, or n for a gradient, and the
    restoration's few) goes into ONE batch of the objective, so that the kernel's cost per call is shared (a
    single design costs several times its share of a batch). Where scipy's compiled routine cannot be driven
    (:func:`~xo_fit.search.slsqp.slsqp_steps` gives None) they run one after another instead.

    A generator: it yields each batch of cube points and is sent back ``obj.evaluate``'s (costs, violations)
    (see :func:`polish_limited_steps`). The caller holds one BLAS thread around it (a generator's context would
    be left out of order among several run side by side).

    Parameters
    ----------
    obj : Objective
        The constrained objective (:class:`xo_fit.search.engines.Objective`) every run evaluates through.
    runs : list of LimitPolish
        The runs, each from its ``best`` point; they update their shared ``best`` as they go.
    """
    made = [slsqp_steps(r.best[1], np.zeros(r.n), np.ones(r.n), ftol=SLSQP_FTOL, maxiter=SLSQP_MAXITER)
            for r in runs]
    steps = [s for s in made if s is not None]
    if len(steps) < len(runs):  # no compiled routine: one after another through scipy.optimize
        for r in runs:
            r.run()
        return
    asks = {i: next(s) for i, s in enumerate(steps)}
    while asks:
        blocks = [(i, kind, runs[i].points(kind, x)) for i, (kind, x) in asks.items()]
        cost, _ = yield np.vstack([b[2] for b in blocks])
        excess, key = obj.last_excess, obj.last_key
        at = 0
        for i, kind, points in blocks:
            k = points.shape[0]
            answer = runs[i].digest(kind, points, cost[at:at + k], excess[at:at + k], key[at:at + k])
            at += k
            try:
                asks[i] = steps[i].send(answer)
            except StopIteration:
                del asks[i]


class LimitPolish:
    """One SLSQP run of :func:`polish_limited`: the cost times ``scale`` over the unit cube, each limit's excess
    kept below -``margin``, and the other pieces of each limit met so far kept as cutting planes.

    It answers SLSQP's requests (:func:`~xo_fit.search.slsqp.slsqp_steps`) with m = L (1 + PIECES) constraints
    c >= 0: each of the L limits' excess, then each remembered piece's linearisation (:meth:`rows`).

    Parameters
    ----------
    obj : Objective
        The constrained objective (:class:`xo_fit.search.engines.Objective`); its ``last_excess`` gives each
        limit's signed relative excess.
    n : int
        The number of free values (dimensionless).
    margin : float
        How far inside each limit the run keeps: each relative excess at most -margin (dimensionless).
    scale : float
        The factor on the cost that SLSQP sees (dimensionless; 1 / (1 + the start's cost)).
    best : list
        [key, point (n,)]: the best design of the polish by the feasibility-first order, shared by the runs of a
        round and updated in place.

    Attributes
    ----------
    used : ndarray
        Which slots hold a remembered piece, bool, shape (PIECES, L).
    where : ndarray
        The point each piece was met at, in the unit cube, shape (PIECES, L, n).
    piece_excess : ndarray
        Its limit's relative excess there (dimensionless), shape (PIECES, L).
    piece_grad : ndarray
        The piece's gradient in the cube (dimensionless), shape (PIECES, L, n).
    """

    def __init__(self, obj, n: int, margin: float, scale: float, best: list) -> None:
        self.obj, self.n, self.margin, self.scale, self.best = obj, n, margin, scale, best
        self.cost = 0.0  # at the point evaluated last: its cost, each limit's excess (L,)
        self.excess = np.zeros(0)
        self.grad: np.ndarray | None = None  # the current iterate's excess gradients (L, n), its point, excesses
        self.point = np.zeros(n)
        self.at = np.zeros(0)
        self.used = np.zeros((PIECES, 0), dtype=bool)
        self.where = self.piece_grad = np.zeros((PIECES, 0, n))
        self.piece_excess = np.zeros((PIECES, 0))
        self.asked = np.zeros(n)  # the point of SLSQP's last request, its stencil's steps (n,)
        self.step = np.zeros(n)
        self.extra: np.ndarray | None = None  # the restoration's points, evaluated with the next request
        self.offset: np.ndarray | None = None  # each piece's gradient . its point (PIECES, L)

    def run(self) -> None:
        """This run on its own from its ``best`` point (:func:`~xo_fit.search.slsqp.minimize_slsqp`, each
        request its own batch): where the compiled routine cannot be driven side by side."""
        minimize_slsqp(self.values, self.gradients, self.best[1], np.zeros(self.n), np.ones(self.n),
                       ftol=SLSQP_FTOL, maxiter=SLSQP_MAXITER)

    def points(self, kind: str, x: np.ndarray) -> np.ndarray:
        """The designs to evaluate for SLSQP's request at x.

        Parameters
        ----------
        kind : str
            ``"values"`` or ``"gradients"``: what SLSQP asks for.
        x : ndarray
            SLSQP's point in the unit cube, shape (n,).

        Returns
        -------
        ndarray
            The points, shape (B, n): x itself ("values", B = 1) or its forward-difference stencil x + h e_i
            ("gradients", B = n, h = POLISH_STEP, negative at the cube's upper edge), then the restoration's points
            left from the last gradients, if any.
        """
        self.asked = x
        if kind == "values":
            pts = x[None]
        else:
            self.step = np.where(x + POLISH_STEP <= 1.0, POLISH_STEP, -POLISH_STEP)
            pts = x + np.diag(self.step)
        if self.extra is not None:
            pts, self.extra = np.vstack([pts, self.extra]), None
        return pts

    def digest(self, kind: str, points: np.ndarray, cost: np.ndarray, excess: np.ndarray, key: np.ndarray) -> tuple:
        """SLSQP's answer from the evaluated points; the best point kept, the pieces updated and the
        restoration's points set where a limit is broken.

        Parameters
        ----------
        kind : str
            ``"values"`` or ``"gradients"``, as :meth:`points` was asked.
        points : ndarray
            The points :meth:`points` gave, in the unit cube, shape (B, n).
        cost : ndarray
            Their costs (dimensionless), shape (B,).
        excess : ndarray
            Each limit's signed relative excess at each (dimensionless), shape (B, L).
        key : ndarray
            Their feasibility keys (:func:`feasibility_key`, dimensionless), shape (B,).

        Returns
        -------
        tuple
            For "values": f (float, the scaled cost, dimensionless) and c, shape (m,); for "gradients": the
            gradient of f, shape (n,), the Jacobian of c, shape (m, n), and c, shape (m,) (:meth:`rows`).
        """
        i = int(np.argmin(key))
        if key[i] < self.best[0]:
            self.best[:] = [float(key[i]), points[i].copy()]
        x = self.asked
        if kind == "values":
            self.cost = float(cost[0]) if cost[0] < BIG else BIG
            self.excess = np.where(np.isfinite(excess[0]), excess[0], BIG)
            return self.scale * self.cost, self.rows(x)
        h = self.step
        g = np.where(np.isfinite(excess[:self.n]), excess[:self.n], BIG)
        c = np.where(cost[:self.n] < BIG, cost[:self.n], BIG)
        grad = ((g - self.excess) / h[:, None]).T  # (L, n)
        if np.any(self.excess > 0):
            self.extra = self.restore(x, grad)
        if self.grad is None:
            big_l = grad.shape[0]
            self.used = np.zeros((PIECES, big_l), dtype=bool)
            self.where, self.piece_grad = np.zeros((PIECES, big_l, self.n)), np.zeros((PIECES, big_l, self.n))
            self.piece_excess = np.zeros((PIECES, big_l))
        elif PIECES:
            self.remember(grad)
        self.grad, self.point, self.at = grad, x.copy(), self.excess.copy()
        self.offset = np.einsum("kln,kln->kl", self.piece_grad, self.where)
        return self.scale * (c - self.cost) / h, self.jacobian(), self.rows(x)

    def values(self, x: np.ndarray) -> tuple[float, np.ndarray]:
        """SLSQP's f (the scaled cost) and c (m,) (:meth:`rows`) at x (n,), dimensionless, evaluated alone."""
        return self.evaluate("values", x)

    def gradients(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """SLSQP's gradient of f (n,), Jacobian of c (m, n) and c (m,) at x (n,) (where ``values`` was called
        last), dimensionless, evaluated alone."""
        return self.evaluate("gradients", x)

    def evaluate(self, kind: str, x: np.ndarray) -> tuple:
        """SLSQP's request (``kind``: "values" or "gradients") at x (n,) as its own batch of the objective:
        :meth:`digest`'s answer for :meth:`points`."""
        pts = self.points(kind, x)
        cost, _ = self.obj.evaluate(pts)
        return self.digest(kind, pts, cost, self.obj.last_excess, self.obj.last_key)

    def restore(self, x: np.ndarray, grad: np.ndarray) -> np.ndarray:
        """Points that step back onto the broken limits: RESTORE multiples of a Newton step, the sum over the
        broken limits of each one's least-norm step onto its linearisation held at -margin (for one broken limit
        the least change of the values that meets it).

        Parameters
        ----------
        x : ndarray
            The iterate in the unit cube, shape (n,).
        grad : ndarray
            Each limit's excess gradient there (dimensionless), shape (L, n).

        Returns
        -------
        ndarray
            The points, clipped to the cube, shape (R, n), R = len(RESTORE).
        """
        want = np.where(self.excess > 0, self.excess + self.margin, 0.0)
        norm2 = np.sum(grad * grad, axis=1)
        step = -np.sum((want / np.where(norm2 > 0, norm2, np.inf))[:, None] * grad, axis=0)
        return np.clip(x[None] + np.array(RESTORE)[:, None] * step[None], 0.0, 1.0)

    def remember(self, grad: np.ndarray) -> None:
        """Keep the last iterate's piece of each limit whose piece has changed since (a cutting plane); forget
        the remembered copies of a limit's current piece while it stays the same. Pieces are told apart by the
        direction of their gradients (cosine at most PIECE_COSINE: another piece); with every slot taken the
        oldest goes.

        Parameters
        ----------
        grad : ndarray
            The new iterate's excess gradients (dimensionless), shape (L, n).
        """
        assert self.grad is not None
        last = self.grad
        unit, unit_last, unit_slots = (a / np.maximum(np.linalg.norm(a, axis=-1, keepdims=True), 1e-300)
                                       for a in (grad, last, self.piece_grad))
        changed = (np.sum(unit * unit_last, axis=1) <= PIECE_COSINE) & np.any(last != 0, axis=1)  # (L,)
        current = self.used & (np.sum(unit_slots * unit[None], axis=2) > PIECE_COSINE)  # (PIECES, L)
        self.used &= ~(current & ~changed[None])
        for i in np.nonzero(changed)[0]:
            same = self.used[:, i] & (unit_slots[:, i] @ unit_last[i] > PIECE_COSINE)
            free = np.nonzero(same)[0] if same.any() else np.nonzero(~self.used[:, i])[0]
            if free.size:
                k = int(free[0])
            else:  # every slot holds another piece: the oldest (slot 0) goes, the others move up
                for a in (self.where, self.piece_excess, self.piece_grad):
                    a[:, i] = np.roll(a[:, i], -1, axis=0)
                k = PIECES - 1
            self.used[k, i] = True
            self.where[k, i], self.piece_excess[k, i], self.piece_grad[k, i] = self.point, self.at[i], last[i]

    def rows(self, x: np.ndarray) -> np.ndarray:
        """The constraints c >= 0 that SLSQP sees.

        Parameters
        ----------
        x : ndarray
            The point in the unit cube, shape (n,).

        Returns
        -------
        ndarray
            c (dimensionless), shape (m,), m = L (1 + PIECES): -(excess + margin) of each limit (its excess at the
            point evaluated last), then -(linearisation at x + margin) of each remembered piece, slot by slot
            (UNUSED where a slot is empty).
        """
        if self.offset is None:  # before the first gradients
            pieces = np.full(PIECES * self.excess.size, UNUSED)
        else:
            lin = self.piece_excess - self.offset + (self.piece_grad.reshape(-1, self.n) @ x).reshape(PIECES, -1)
            pieces = np.where(self.used, -(lin + self.margin), UNUSED).ravel()
        return np.concatenate([-(self.excess + self.margin), pieces])

    def jacobian(self) -> np.ndarray:
        """The Jacobian dc/du (m, n) of :meth:`rows` at the current iterate (dimensionless)."""
        assert self.grad is not None
        jac = np.where(self.used[..., None], -self.piece_grad, 0.0)
        return np.concatenate([-self.grad, jac.reshape(-1, self.n)], axis=0)


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
    follow epsilon down; ``best`` is always by the true order (epsilon 0).

    Parameters
    ----------
    obj : Objective
        The run's constrained objective (:class:`xo_fit.search.engines.Objective`): its evaluations so far and
        budget set epsilon's schedule (it falls to 0 over EPSILON_SHARE of what is left at the start).
    """

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
        """Evaluate the run's first population pop (N, n), set epsilon's start (the violation of its
        EPSILON_THETA-th best) from it and return its keys (N,) under that epsilon (dimensionless)."""
        self.cost, self.violation = self.obj.evaluate(pop)
        v = np.sort(np.where(np.isfinite(self.violation), self.violation, np.inf))
        k = min(int(EPSILON_THETA * v.size), v.size - 1)
        self.eps0 = self.eps = float(v[k]) if np.isfinite(v[k]) else 0.0
        return self.keys(self.cost, self.violation)

    def keys(self, cost: np.ndarray, violation: np.ndarray) -> np.ndarray:
        """:func:`feasibility_key` (N,) of costs (N,) and total violations (N,), a violation up to the current
        epsilon counted as 0 (dimensionless)."""
        with np.errstate(invalid="ignore"):
            return feasibility_key(cost, np.where(violation <= self.eps, 0.0, violation))

    def population(self) -> np.ndarray:
        """Set this generation's epsilon (from the evaluations used so far); the population's keys (N,) under
        it (dimensionless)."""
        t = (self.obj.evaluations - self.start) / self.span
        self.eps = 0.0 if t >= 1.0 else self.eps0 * (1.0 - t) ** EPSILON_POWER
        assert self.cost is not None and self.violation is not None, "first() evaluates the population"
        return self.keys(self.cost, self.violation)

    def trial(self, trial: np.ndarray) -> np.ndarray:
        """Evaluate the generation's trial points (N, n); their keys (N,) under this generation's epsilon
        (dimensionless)."""
        self.trial_cost, self.trial_violation = self.obj.evaluate(trial)
        return self.keys(self.trial_cost, self.trial_violation)

    def accept(self, better: np.ndarray) -> None:
        """Take the trials that replace their parents (``better``: bool (N,)) into the population's costs and
        violations."""
        assert self.cost is not None and self.violation is not None, "first() evaluates the population"
        assert self.trial_cost is not None and self.trial_violation is not None, "trial() evaluates the trials"
        self.cost = np.where(better, self.trial_cost, self.cost)
        self.violation = np.where(better, self.trial_violation, self.violation)

    def best(self, pop: np.ndarray) -> list:
        """[key (dimensionless), point (n,)] of the population pop (N, n)'s best by the true feasibility-first
        order (epsilon 0), from the costs and violations kept here."""
        assert self.cost is not None and self.violation is not None, "first() evaluates the population"
        key = feasibility_key(self.cost, self.violation)
        i = int(np.argmin(key))
        return [float(key[i]), pop[i].copy()]

    @property
    def settled(self) -> bool:
        """Whether epsilon has reached 0 (the run may stop once it converges or stagnates)."""
        return self.eps == 0.0
