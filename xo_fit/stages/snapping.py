"""Snapping a design to purchasable values: series or parts on hand, singly or in pairs, with the real cost.

Every snapped part gets a short list of choices: its log-nearest purchasable
value and the ``NEIGHBOURS`` nearest on each side (series values from
:mod:`xo_fit.series`, or values in the drawer), plus, with ``combine = 2``,
the best two-part combinations near its value (two capacitors in parallel;
two resistors in series or in parallel; two coils in series). The choice of
every part is then searched together, with the job's real cost evaluated for
whole batches of complete designs through the fused kernel:

* exhaustively when the number of combinations is at most EXHAUSTIVE;
* otherwise a beam search over the parts (most sensitive first) followed by
  coordinate moves (one part at a time) and pair moves (two parts at once,
  which is how a trap's L and C keep their centre frequency) until no move
  helps, from the beam's best states and from seeded random restarts.

The search starts from log-nearest rounding and only ever accepts an
improvement, so the snapped design is never worse than log-nearest rounding.
Under ``[limits]`` every comparison is feasibility first
(:func:`xo_fit.search.feasibility.feasibility_key`): a snapped design that
breaks a limit is chosen only when no snapped design the search meets does.
A part in the drawer is never used more times than the drawer holds. Parts
left continuous (series "none") are then re-optimised with the others held.

Which parts are snapped: every R, L and C except those with ``fixed = true``
or series ``none``. A part with a range keeps to it where the series allows.
"""

from __future__ import annotations

import math

import itertools
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np

from xo_fit.config import BEAM, CHUNK, EXHAUSTIVE, FAR_COST, FAR_STEPS, NEIGHBOURS, PAIRS_PER_PART, RESTARTS
from xo_fit.errors import XoFitError
from xo_fit.io.inventory import Inventory
from xo_fit.series import check_name, neighbours
from xo_fit.units import format_value


# ----------------------------------------------------------------------------- choices


@dataclass(frozen=True)
class Choice:
    """A purchasable way to make one part's value.

    value: the resulting value (SI); source: the series name or "inventory";
    pieces: the values of the parts that make it (one, or two); connection:
    "single", "parallel" or "series"; uses: (kind, value) of each drawer part used.
    """

    value: float
    source: str
    pieces: tuple[float, ...]
    connection: str = "single"
    uses: tuple = ()

    def describe(self, unit: str) -> str:
        """The choice as the console and parts.csv write it (:func:`combination_text`), in ``unit`` ("ohm", ...)."""
        return combination_text(self.connection, [format_value(p, unit) for p in self.pieces])


def combination_text(connection: str, texts: list[str]) -> str:
    """One notation for a part made of two, in the console, parts.csv and the report: "4.7 µF || 1 µF" in
    parallel, "2.2 Ω + 1 Ω" in series."""
    if connection == "single":
        return texts[0]
    return (" || " if connection == "parallel" else " + ").join(texts)


def _combine(kind: str, a: float, b: float) -> list[tuple[float, str]]:
    if kind == "C":
        return [(a + b, "parallel")]
    if kind == "L":
        return [(a + b, "series")]
    return [(a + b, "series"), (a * b / (a + b), "parallel")]


def _pool(kind: str, target: float, source: str, inventory: Inventory | None) -> list[float]:
    """Candidate single values near ``target``: series values or drawer values, within a factor 4."""
    if source == "inventory":
        assert inventory is not None, "a part takes its values from the drawer only when there is one"
        return [v for v, _ in inventory.values(kind) if target / 4 <= v <= target * 4]
    return neighbours(target, source, 6)


def choices_for(kind: str, target: float, source: str, *, inventory: Inventory | None = None, combine: int = 1,
                lo: float | None = None, hi: float | None = None, k: int = NEIGHBOURS,
                top_up: str | None = None) -> list[Choice]:
    """The choices of one part: the nearest purchasable values (k each side) and the best pairs; with a drawer
    and ``top_up`` (a series name), also the nearest values of that series, to be bought where the drawer
    lacks them (they count against no stock)."""
    out: list[Choice] = []
    if source == "inventory":
        assert inventory is not None, "a part takes its values from the drawer only when there is one"
        avail = sorted(v for v, _ in inventory.values(kind))
        if not avail:
            raise XoFitError(f"the inventory has no parts of kind {kind}", path=inventory.path)
        i = int(np.argmin(np.abs(np.log(np.array(avail) / target))))
        singles = avail[max(0, i - k): i + k + 1]
        out += [Choice(v, "inventory", (v,), uses=((kind, v),)) for v in singles]
        if top_up is not None:
            have = set(singles)
            out += [Choice(v, top_up, (v,)) for v in neighbours(target, top_up, k, lo, hi) if v not in have]
    else:
        singles = neighbours(target, source, k, lo, hi)
        out += [Choice(v, source, (v,)) for v in singles]
    if combine >= 2:
        pool = sorted(set(_pool(kind, target, source, inventory)))
        pairs = []
        for a, b in itertools.combinations_with_replacement(pool, 2):
            for value, how in _combine(kind, a, b):
                if lo is not None and hi is not None and not lo * (1 - 1e-9) <= value <= hi * (1 + 1e-9):
                    continue
                uses = ((kind, a), (kind, b)) if source == "inventory" else ()
                pairs.append((abs(np.log(value / target)), Choice(value, source, (b, a), how, uses)))
        pairs.sort(key=lambda t: t[0])
        best_single = min(abs(np.log(c.value / target)) for c in out)
        out += [c for d, c in pairs[:PAIRS_PER_PART] if d < best_single]
    return out


def log_nearest_index(choices: list[Choice], target: float) -> int:
    """Index of the single-part choice nearest to target in log distance (the rounding baseline)."""
    singles = [i for i, c in enumerate(choices) if c.connection == "single"]
    return min(singles, key=lambda i: (abs(np.log(choices[i].value / target)), -choices[i].value))


# ----------------------------------------------------------------------------- search


@dataclass
class _Evaluator:
    """Cost of assignments (rows of choice indices), with the drawer's counts enforced."""

    cost_fn: Callable[[np.ndarray], np.ndarray]  # (M, P) values -> (M,) costs or keys
    base: np.ndarray  # (P,) values of every part
    columns: list[int]  # column of each snapped part
    options: list[list[Choice]]
    stock: dict = field(default_factory=dict)  # (kind, value) -> count
    evaluations: int = 0

    def __post_init__(self) -> None:
        self.values_of = [np.array([c.value for c in opts]) for opts in self.options]

    def feasible(self, assign: np.ndarray) -> np.ndarray:
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


def _exhaustive(ev: _Evaluator, sizes: list[int]) -> tuple[np.ndarray | None, float]:
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


def _local(ev: _Evaluator, start: np.ndarray, start_cost: float, sizes: list[int]) -> tuple[np.ndarray, float]:
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


def _beam(ev: _Evaluator, start: np.ndarray, start_cost: float, sizes: list[int]) -> list[tuple[float, np.ndarray]]:
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
    """The choice search's result: ``assignment`` and ``baseline`` (S,), an index into each of the S snapped parts'
    choices (the best found; the start: log-nearest, or the first in stock), their ``cost`` and ``baseline_cost``
    (dimensionless; under [limits] the feasibility-first key, until :func:`run_snap` puts the costs in), the cost
    ``evaluations`` made (dimensionless) and whether the search was ``exhaustive``."""
    assignment: np.ndarray
    cost: float
    baseline: np.ndarray
    baseline_cost: float
    evaluations: int
    exhaustive: bool


def search_choices(ev: _Evaluator, baseline: np.ndarray, seed: int = 1) -> SnapSearch:
    """The best assignment of ``ev``'s choices found from ``baseline`` (S,), never worse than it: every assignment
    where at most EXHAUSTIVE, else the beam, ``seed``'s random restarts and local moves (see the module)."""
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


# ----------------------------------------------------------------------------- a whole design


@dataclass(frozen=True)
class SnappedPart:
    """One valued part after the snap: its ``continuous`` and snapped ``value`` (SI: ohm, H or F), its ``kind``, the
    value's ``source`` and the ``choice`` made (None for fixed and continuous parts)."""
    name: str
    kind: str
    continuous: float
    value: float
    source: str  # series name, "inventory", "continuous" or "fixed"
    choice: Choice | None


@dataclass(frozen=True, eq=False)
class SnapOutcome:
    """A snap: every valued part (:class:`SnappedPart`), the snapped and continuous designs (P,), SI, the choice
    search (None where no part snaps) and the snap's wall time in ``seconds`` (s)."""
    parts: tuple[SnappedPart, ...]
    values: np.ndarray  # (P,) the snapped design
    continuous: np.ndarray  # (P,) the design it started from
    search: SnapSearch | None
    seconds: float


def part_sources(job, series_override: dict | None, inventory: Inventory | None) -> dict[str, str]:
    """Where each valued part's value comes from: a series name, "inventory", "none" (continuous) or "fixed"."""
    series = dict(job.snap.series)
    series.update(series_override or {})
    out = {}
    for p in job.valued_parts:
        if p.fixed:
            out[p.name] = "fixed"
            continue
        own = p.series
        if own is not None:
            out[p.name] = check_name(own)
        elif inventory is not None and inventory.values(p.type):
            out[p.name] = "inventory"
        else:
            out[p.name] = check_name(series[p.type])
    return out


def run_snap(system, continuous: np.ndarray, *, series_override: dict | None = None,
             inventory: Inventory | None = None, combine: int | None = None, seed: int | None = None,
             top_up: str | None = None) -> SnapOutcome:
    """Snap design ``continuous`` (P,), SI, of ``system`` to purchasable values with the job's cost."""
    import time

    from xo_fit.search.fitting import cost_function, limited_cost_function, require_cost_model
    from xo_fit.search.engines import Space, search
    from xo_fit.search.feasibility import feasibility_key

    t0 = time.monotonic()
    job = system.job
    combine = job.snap.combine if combine is None else combine
    top_up = job.snap.top_up if top_up is None else check_name(top_up)
    if top_up == "none":  # "none" (continuous values) is no series to buy from: no top-up
        top_up = None
    seed = job.search.seed if seed is None else seed
    cm, _ = require_cost_model(system, "score the snap with")
    limited = limited_cost_function(cm)
    plain_cost = cost_function(cm) if limited is None else (lambda v: limited(v)[0])
    # the snap's comparisons: the cost, or under [limits] the feasibility-first key
    cost_fn = plain_cost if limited is None else (lambda v: feasibility_key(*limited(v)[:2]))
    sources = part_sources(job, series_override, inventory)
    parts = job.valued_parts
    continuous = np.asarray(continuous, dtype=float)
    snap_idx = [i for i, p in enumerate(parts) if sources[p.name] not in ("fixed", "none")]
    options, baseline = [], []
    for i in snap_idx:
        p = parts[i]
        opts = choices_for(p.type, continuous[i], sources[p.name], inventory=inventory, combine=combine,
                           lo=p.min, hi=p.max, top_up=top_up)
        options.append(opts)
        baseline.append(log_nearest_index(opts, continuous[i]))
    stock = {}
    if inventory is not None:
        for kind, items in inventory.parts.items():
            for v, n in items:
                stock[(kind, v)] = n
    values = continuous.copy()
    result = None
    if snap_idx:
        ev = _Evaluator(cost_fn, continuous.copy(), snap_idx, options, stock)
        base = np.array(baseline, dtype=np.int64)
        if stock and not ev.feasible(base[None])[0]:
            # log-nearest would use a drawer part more often than it holds: start from a feasible design
            base = _first_feasible(ev, base, inventory.path if inventory is not None else None)
        result = search_choices(ev, base, seed)
        for j, i in enumerate(snap_idx):
            values[i] = options[j][result.assignment[j]].value
        if limited is not None:  # report costs, not keys
            base_values = continuous.copy()
            for j, i in enumerate(snap_idx):
                base_values[i] = options[j][result.baseline[j]].value
            real = plain_cost(np.stack([values, base_values]))
            result = replace(result, cost=float(real[0]), baseline_cost=float(real[1]))
    # parts left continuous: re-optimise them with the snapped ones held
    cont = [i for i, p in enumerate(parts) if sources[p.name] == "none" and p.free]
    if cont and snap_idx:
        lo = np.log([parts[i].min for i in cont])
        hi = np.log([parts[i].max for i in cont])
        space = Space(names=tuple(parts[i].name for i in cont), columns=np.array(cont), lo=lo, hi=hi,
                      base=values.copy(), u0=np.clip((np.log(values[cont]) - lo) / (hi - lo), 0, 1))
        r = search((lambda u: cost_fn(space.values(u))) if limited is None else (lambda u: limited(space.values(u))),
                   space, budget=min(job.search.budget, 4000), seed=seed, constrained=limited is not None)
        cand = space.values(r.u)[0]
        if cost_fn(cand[None])[0] <= cost_fn(values[None])[0]:
            values = cand
    out_parts = []
    for i, p in enumerate(parts):
        src = sources[p.name]
        choice = None
        if i in snap_idx:
            assert result is not None, "the choice search ran since some part snaps"
            choice = options[snap_idx.index(i)][result.assignment[snap_idx.index(i)]]
        out_parts.append(SnappedPart(p.name, p.type, float(continuous[i]), float(values[i]),
                                     "continuous" if src == "none" else (choice.source if choice else src), choice))
    return SnapOutcome(parts=tuple(out_parts), values=values, continuous=continuous, search=result,
                       seconds=time.monotonic() - t0)


def _first_feasible(ev: _Evaluator, base: np.ndarray, path=None) -> np.ndarray:
    """A feasible assignment near ``base``: walk the parts, moving each to its nearest choice still in stock."""
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


def _shortfall(ev: _Evaluator) -> str:
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


def _feasible_partial(ev: _Evaluator, row: np.ndarray) -> bool:
    used: dict = {}
    for j, idx in enumerate(row):
        if idx < 0:
            continue
        for key in ev.options[j][idx].uses:
            used[key] = used.get(key, 0) + 1
            if used[key] > ev.stock.get(key, 0):
                return False
    return True


def parts_table(outcome: SnapOutcome, job, tolerance_defaults: dict) -> list[dict]:
    """Rows of parts.csv: name, kind, value, text, source, tolerance, combination."""
    from xo_fit.constants import PART_UNIT

    rows = []
    for sp, p in zip(outcome.parts, job.valued_parts):
        unit = PART_UNIT[sp.kind]
        tol = p.tolerance if p.tolerance is not None else tolerance_defaults.get(sp.kind)
        comb = ""
        if sp.choice is not None and sp.choice.connection != "single":
            comb = f"{sp.choice.connection}: {sp.choice.describe(unit)}"
        rows.append({"name": sp.name, "kind": sp.kind, "value": sp.value, "text": format_value(sp.value, unit),
                     "source": sp.source, "tolerance": f"{tol * 100:g}%" if tol is not None else "",
                     "combination": comb})
    return rows


def snap_warnings(outcome: SnapOutcome, continuous_cost: float | None, snapped_cost: float | None,
                  inventory: bool) -> list[str]:
    """One-line warnings for a snap that moved parts far from their continuous values or raised the cost by more
    than half, each with what usually helps (--top-up, --combine 2, a finer series)."""
    step = math.log(10.0) / 12  # one E12 step in log distance
    out = []
    far = []
    for sp in outcome.parts:
        if sp.source in ("fixed", "continuous") or not sp.continuous or sp.value <= 0:
            continue
        steps = abs(math.log(sp.value / sp.continuous)) / step
        if steps >= FAR_STEPS + 0.5:
            far.append(f"{sp.name} {100 * (sp.value / sp.continuous - 1):+.0f} %")
    helps = ("--top-up E12 (or [snap] top_up) buys what the drawer lacks, --combine 2 makes a value of two parts"
             if inventory else "--combine 2 makes a value of two parts, or a finer series (--series E24)")
    if far:
        out.append(f"the snap moved {len(far)} part(s) more than {FAR_STEPS} E12 steps from the fit "
                   f"({', '.join(far)}): {helps}")
    if continuous_cost is not None and snapped_cost is not None and continuous_cost > 0 \
            and snapped_cost > continuous_cost * (1 + FAR_COST):
        out.append(f"the snap raised the cost from {continuous_cost:.4g} to {snapped_cost:.4g} "
                   f"(+{100 * (snapped_cost / continuous_cost - 1):.0f} %): {helps}")
    return out
