"""The search over the snapped parts' choices (:mod:`xo_fit.stages.choices`), with the drawer's counts kept.

The choice of every part is searched together, with the job's real cost
evaluated for whole batches of complete designs through the fused kernel:

* exhaustively when the number of combinations is at most EXHAUSTIVE;
* otherwise a beam search over the parts (most sensitive first) followed by
  coordinate moves (one part at a time) and pair moves (two parts at once,
  which is how a trap's L and C keep their centre frequency) until no move
  helps, from the beam's best states and from seeded random restarts.

The search starts from its baseline (log-nearest rounding) and only ever
accepts an improvement, so the result is never worse than the baseline. The
cost compared is whatever the caller gives: under ``[limits]`` the snap
(:mod:`xo_fit.stages.snapping`) gives the feasibility-first key. A part in
the drawer is never used more times than the drawer holds: such an
assignment costs infinity.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from xo_fit.config import BEAM, CHUNK, EXHAUSTIVE, RESTARTS
from xo_fit.errors import XoFitError
from xo_fit.job.settings import SearchSpec
from xo_fit.stages.choices import Choice


@dataclass
class ChoiceEvaluator:
    """Cost of assignments (rows of choice indices), with the drawer's counts enforced.

    Calling it with assignments ``assign`` (M, S) of int, an index into each of the S snapped parts' choices,
    gives their costs (M,), dimensionless; an assignment that uses a drawer part more often than the drawer
    holds costs inf and is not evaluated.

    Attributes
    ----------
    cost_fn : callable
        Complete designs (M, P), SI (ohm, H, F) -> their costs (M,), dimensionless: the job's cost, or under
        [limits] the feasibility-first key (:func:`~xo_fit.search.feasibility.feasibility_key`).
    base : ndarray
        The values of every part, the snapped ones overwritten, SI (ohm, H, F), shape (P,).
    columns : list of int
        The column in ``base`` of each snapped part, S of them.
    options : list of list of Choice
        Each snapped part's choices (:func:`~xo_fit.stages.choices.choices_for`).
    stock : dict
        (kind, value) -> the count the drawer holds; empty: no drawer, nothing counted.
    evaluations : int
        The designs evaluated so far (dimensionless).
    """

    cost_fn: Callable[[np.ndarray], np.ndarray]  # (M, P) values -> (M,) costs or keys
    base: np.ndarray  # (P,) values of every part
    columns: list[int]  # column of each snapped part
    options: list[list[Choice]]
    stock: dict = field(default_factory=dict)  # (kind, value) -> count
    evaluations: int = 0

    def __post_init__(self) -> None:
        self.values_of = [np.array([c.value for c in opts]) for opts in self.options]

    def feasible(self, assign: np.ndarray) -> np.ndarray:
        """Whether each assignment keeps to the drawer's counts.

        Parameters
        ----------
        assign : ndarray
            Assignments, an index into each snapped part's choices, int, shape (M, S).

        Returns
        -------
        ndarray
            True where no drawer part is used more often than the drawer holds, bool, shape (M,).
        """
        if not self.stock:
            return np.ones(assign.shape[0], dtype=bool)
        ok = np.ones(assign.shape[0], dtype=bool)
        for r, row in enumerate(assign):
            used: dict = {}
            for j, idx in enumerate(row):
                for key in self.options[j][idx].uses:
                    used[key] = used.get(key, 0) + 1
                    if used[key] > self.stock.get(key, 0):
                        ok[r] = False
                        break
                if not ok[r]:
                    break
        return ok

    def __call__(self, assign: np.ndarray) -> np.ndarray:
        assign = np.atleast_2d(assign)
        out = np.full(assign.shape[0], np.inf)
        ok = self.feasible(assign)
        rows = np.nonzero(ok)[0]
        for lo in range(0, rows.size, CHUNK):
            sel = rows[lo:lo + CHUNK]
            vals = np.repeat(self.base[None, :], sel.size, axis=0)
            for j, col in enumerate(self.columns):
                vals[:, col] = self.values_of[j][assign[sel, j]]
            out[sel] = self.cost_fn(vals)
            self.evaluations += sel.size
        return out


def _exhaustive(ev: ChoiceEvaluator, sizes: list[int]) -> tuple[np.ndarray | None, float]:
    """The best of every assignment and its cost; None when none has a finite cost."""
    best, best_cost = None, np.inf
    grids = itertools.product(*[range(n) for n in sizes])
    while True:
        block = list(itertools.islice(grids, CHUNK))
        if not block:
            break
        a = np.array(block, dtype=np.int64)
        c = ev(a)
        i = int(np.argmin(c))
        if c[i] < best_cost:
            best, best_cost = a[i].copy(), float(c[i])
    return best, best_cost


def _local(ev: ChoiceEvaluator, start: np.ndarray, start_cost: float, sizes: list[int]) -> tuple[np.ndarray, float]:
    """Coordinate and pair moves until none helps."""
    cur, cur_cost = start.copy(), start_cost
    m = len(sizes)
    while True:
        moves = []
        for j in range(m):
            for v in range(sizes[j]):
                if v != cur[j]:
                    a = cur.copy()
                    a[j] = v
                    moves.append(a)
        for i, j in itertools.combinations(range(m), 2):
            for vi in range(sizes[i]):
                for vj in range(sizes[j]):
                    if vi != cur[i] and vj != cur[j]:
                        a = cur.copy()
                        a[i], a[j] = vi, vj
                        moves.append(a)
        if not moves:
            return cur, cur_cost
        a = np.array(moves)
        c = ev(a)
        k = int(np.argmin(c))
        if c[k] < cur_cost * (1 - 1e-12) - 1e-15:
            cur, cur_cost = a[k].copy(), float(c[k])
        else:
            return cur, cur_cost


def _beam(ev: ChoiceEvaluator, start: np.ndarray, start_cost: float,
          sizes: list[int]) -> list[tuple[float, np.ndarray]]:
    m = len(sizes)
    # most sensitive parts first: the largest cost change among their choices
    probe = []
    owner = []
    for j in range(m):
        for v in range(sizes[j]):
            a = start.copy()
            a[j] = v
            probe.append(a)
            owner.append(j)
    pc = ev(np.array(probe))
    spread = np.zeros(m)
    for j in range(m):
        cj = pc[np.array(owner) == j]
        cj = cj[np.isfinite(cj)]
        spread[j] = (cj.max() - cj.min()) if cj.size else 0.0
    order = list(np.argsort(-spread, kind="stable"))
    states = [(start_cost, start)]
    for j in order:
        expanded = []
        for _, s in states:
            for v in range(sizes[j]):
                a = s.copy()
                a[j] = v
                expanded.append(a)
        a = np.unique(np.array(expanded), axis=0)
        c = ev(a)
        keep = np.argsort(c, kind="stable")[:BEAM]
        states = [(float(c[i]), a[i]) for i in keep if np.isfinite(c[i])] or states
    return states


@dataclass(frozen=True)
class SnapSearch:
    """The choice search's result, for the S snapped parts.

    Attributes
    ----------
    assignment : ndarray
        The best assignment found: an index into each part's choices, int, shape (S,).
    cost : float
        Its cost (dimensionless; under [limits] the feasibility-first key, until
        :func:`~xo_fit.stages.snapping.run_snap` puts the cost in).
    baseline : ndarray
        The start: log-nearest rounding, or the first assignment in stock, int, shape (S,).
    baseline_cost : float
        Its cost (dimensionless; as ``cost``).
    evaluations : int
        The cost evaluations made (dimensionless).
    exhaustive : bool
        Whether every assignment was scored (at most EXHAUSTIVE of them).
    """
    assignment: np.ndarray
    cost: float
    baseline: np.ndarray
    baseline_cost: float
    evaluations: int
    exhaustive: bool


def search_choices(ev: ChoiceEvaluator, baseline: np.ndarray, seed: int = SearchSpec.seed) -> SnapSearch:
    """The best assignment of the snapped parts' choices found from ``baseline``, never worse than it.

    Every assignment is scored where there are at most EXHAUSTIVE; else a beam search, random restarts and
    local moves (see the module).

    Parameters
    ----------
    ev : ChoiceEvaluator
        The cost of assignments, the drawer's counts enforced.
    baseline : ndarray
        The start, an index into each part's choices, int, shape (S,).
    seed : int
        The random restarts' seed (dimensionless).

    Returns
    -------
    SnapSearch
        The best assignment, the baseline and their costs.
    """
    sizes = [len(o) for o in ev.options]
    base_cost = float(ev(baseline[None])[0])
    total = int(np.prod([float(s) for s in sizes]))
    if total <= EXHAUSTIVE:
        best, cost = _exhaustive(ev, sizes)
        if best is None or not cost <= base_cost:
            best, cost = baseline.copy(), base_cost
        return SnapSearch(best, cost, baseline, base_cost, ev.evaluations, True)
    best, cost = baseline.copy(), base_cost
    starts = _beam(ev, baseline, base_cost, sizes)[:4]
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    for _ in range(RESTARTS):
        a = np.array([rng.integers(0, s) for s in sizes])
        c = float(ev(a[None])[0])
        if np.isfinite(c):
            starts.append((c, a))
    for c0, a0 in starts:
        a, c = _local(ev, a0, c0, sizes)
        if c < cost:
            best, cost = a, c
    return SnapSearch(best, cost, baseline, base_cost, ev.evaluations, False)


def first_feasible(ev: ChoiceEvaluator, base: np.ndarray, path=None) -> np.ndarray:
    """A feasible assignment near ``base``: walk the parts, moving each to its nearest choice still in stock.

    Parameters
    ----------
    ev : ChoiceEvaluator
        The choices and the drawer's counts.
    base : ndarray
        The assignment to start from (log-nearest rounding), int, shape (S,).
    path : Path, optional
        The inventory file, named in the error.

    Returns
    -------
    ndarray
        An assignment that uses no drawer part more often than the drawer holds, int, shape (S,).

    Raises
    ------
    XoFitError
        Where the walk finds none: which kinds the drawer lacks, with counts.
    """
    a = base.copy()
    for j in range(len(a)):
        target = ev.options[j][base[j]].value
        order = sorted(range(len(ev.options[j])), key=lambda v: abs(np.log(ev.options[j][v].value / target)))
        for v in order:
            a[j] = v
            trial = a.copy()
            # parts not yet placed do not count against the stock
            for k in range(j + 1, len(a)):
                trial[k] = -1
            if _feasible_partial(ev, trial):
                break
    if not ev.feasible(a[None])[0]:
        raise XoFitError(_shortfall(ev), path=path)
    return a


def _shortfall(ev: ChoiceEvaluator) -> str:
    """Which kinds the drawer lacks, with counts: "coils: 6 needed, 5 held"."""
    names = {"R": "resistors", "L": "coils", "C": "capacitors"}
    needed: dict[str, int] = {}
    for opts in ev.options:
        kinds = {k for o in opts for k, _ in o.uses}
        if len(kinds) == 1:
            k = kinds.pop()
            needed[k] = needed.get(k, 0) + 1
    held: dict[str, int] = {}
    for (k, _), n in ev.stock.items():
        held[k] = held.get(k, 0) + n
    short = [f"{names[k]}: {n} needed, {held.get(k, 0)} held" for k, n in sorted(needed.items()) if n > held.get(k, 0)]
    if short:
        return "the inventory does not hold enough parts for this design (" + "; ".join(short) + ")"
    return ("the inventory holds enough parts in number, but not of values that fit every part at once "
            f"(held: {', '.join(f'{names[k]} {n}' for k, n in sorted(held.items()))}); add parts or allow "
            "combine = 2")


def _feasible_partial(ev: ChoiceEvaluator, row: np.ndarray) -> bool:
    used: dict = {}
    for j, idx in enumerate(row):
        if idx < 0:
            continue
        for key in ev.options[j][idx].uses:
            used[key] = used.get(key, 0) + 1
            if used[key] > ev.stock.get(key, 0):
                return False
    return True
