"""Pruning: which parts earn their place, by greedy backward elimination with refits.

From a starting design, every R, L and C without ``keep = true`` is tried
removed, opened (deleted) and shorted (its nodes merged), skipping removals
that are no legal netlist (:mod:`xo_fit.stages.removal`). After each trial removal the
remaining free values are refitted from the current ones: a local polish
(L-BFGS-B; SLSQP under ``[limits]``) of at most the refit budget, which draws no
random numbers. The refits search on the starting design's compiled cost kernel
(:class:`Family`: a removed part stands in as an extreme value, so no removal
waits for a compiler), a step's refits side by side with their points in one
batch of the kernel (:mod:`xo_fit.search.polish_batch`); each trial's cost is the
kernel's (within ~1e-6 relative of the reduced netlist's; under ``[limits]``
each trial is scored on its reduced netlist, exact) and the removal taken is
scored on the reduced netlist itself, so every step's cost is exact. The kernel
judges a rated part (the stress term, the ratings limit) only where it
is not at a stand-in value, as the reduced netlist leaves a removed one out; a
job without a fused kernel (``[cost] protection``, the reference cost) refits on
the dense solve, every trial scored exactly. The cheapest removal is taken and
the step repeated until nothing is left to remove. The chosen design is the one
with the fewest parts whose cost stays within ``max_increase`` of step 0's (the
starting design refitted; the increase as a share of COST_FLOOR where step 0's
cost is below it, a start on target).

Under ``[limits]`` the refits are feasibility first, and a removal whose
refitted design breaks a limit the current design meets (a larger total
violation) is refused: it is listed among the trials with the limits it breaks
and never taken.

Trial removals are independent: with ``workers`` > 1 they run in processes.
"""

from __future__ import annotations

import contextlib
import math
import pickle
import threading
from dataclasses import dataclass, field, replace

import numpy as np

from xo_fit.config import COST_FLOOR, MAX_INCREASE, REFIT_BUDGET
from xo_fit.model.fused import FusedCost
from xo_fit.model.fused_rated import judging
from xo_fit.stages.refitting import (Interrupted, broken_limits, model_of, pooled_trials, refit, share,
                                     step_trials)
from xo_fit.stages.removal import HOWS, JobDocument, variant

#: The columns of prune.csv, one row a step (the keys of :attr:`PruneRun.steps`' rows).
PRUNE_COLUMNS = ["step", "parts", "removed", "how", "cost", "rms_error_db", "max_error_db", "phase_mismatch_deg",
                 "impedance_min_ohm"]


#: Values that stand for a removed part inside the starting design's compiled cost kernel (SI: ohm, henry,
#: farad): over 20 Hz..20 kHz an opened part's impedance stays above ~1e7 ohm and a shorted one's below ~1e-5
#: ohm (a coil's DCR, a L**0.6, with it), so the responses differ from the reduced netlist's by ~1e-6 relative
#: (~1e-5 dB) while the matrix stays far from singular in double precision.
STAND_IN = {"open": {"R": 1e8, "L": 1e5, "C": 1e-12}, "short": {"R": 1e-6, "L": 1e-10, "C": 1e3}}


@dataclass(eq=False)
class Family:
    """The starting system's fused cost kernel, shared by every trial removal of a prune: a reduced design is
    written into the starting topology with each removed part at its stand-in value (:data:`STAND_IN`), so one
    compiled kernel serves all trials and steps (each removal's own topology would need its own C build).

    Attributes
    ----------
    fused : StandInCost
        The starting system's fused cost (a :class:`xo_fit.model.fused.FusedCost`, its pivot check relaxed).
    names, kinds : tuple of str
        The starting system's part names in its part order, and each part's type ("R", "L" or "C").
    values : ndarray
        Its part values, SI (ohm, H, F), shape (P,) (the fixed parts keep theirs).
    limited : bool
        Whether the job has [limits] (the kernel then returns the violations too).
    """

    fused: FusedCost
    names: tuple
    values: np.ndarray
    kinds: tuple
    limited: bool

    @classmethod
    def of(cls, system):
        """The family of ``system`` (the starting design, its job's values), or None where there is nothing to
        search (no way targets, no free part) or the stand-ins would not be faithful: no fused kernel for the job
        (``[cost] protection``: the reference cost), a part not R, L or C, or a rated part judged (the stress
        term, the ratings limit) whose values could be a stand-in's (the kernel takes such a value for a removal:
        :func:`xo_fit.model.fused_rated.switches`)."""
        from xo_fit.search.fitting import cost_model

        model = cost_model(system)
        if model is None or not system.job.free_parts:
            return None
        cm = model[0]
        if cm.needs_reference:
            return None
        kinds = tuple(system.job.part(n).type for n in system.part_names)
        if any(k not in ("R", "L", "C") for k in kinds):
            return None
        parts = system.job.valued_parts
        for _, col, kind, _ in cm.rated or (cm.limits.rated if cm.limits is not None else []):
            p = parts[col]
            lo, hi = (p.min, p.max) if p.free else (p.value, p.value)
            if any(lo <= STAND_IN[how][kind] <= hi for how in HOWS):
                return None
        return cls(fused=StandInCost(cm), names=tuple(system.part_names), values=np.asarray(system.values(), float),
                   kinds=kinds, limited=cm.limits is not None)

    def embed(self, system, removed: dict):
        """A map ``full(v)`` of ``system``'s designs (B, P') into the family's (B, P), SI: its parts in their
        columns, the ``removed`` ones ({name: "open" | "short"}) at their stand-ins, the rest at :attr:`values`;
        None where ``system``'s parts and ``removed`` are not exactly the family's parts."""
        col = {n: i for i, n in enumerate(self.names)}
        if set(system.part_names) | set(removed) != set(self.names) or set(system.part_names) & set(removed):
            return None
        idx = np.array([col[n] for n in system.part_names], dtype=int)
        base = self.values.copy()
        for name, how in removed.items():
            base[col[name]] = STAND_IN[how][self.kinds[col[name]]]

        def full(v: np.ndarray) -> np.ndarray:
            out = np.repeat(base[None], v.shape[0], axis=0)
            out[:, idx] = v
            return out
        return full

    def cube_map(self, system, space, removed: dict):
        """A map of ``space``'s cube points (B, n) (``system``'s free values, :func:`xo_fit.search.space.
        make_space`) straight into the family's designs (B, P), SI, the ``removed`` parts at their stand-ins;
        None where :meth:`embed` gives none."""
        full = self.embed(system, removed)
        if full is None:
            return None
        columns = np.array([self.names.index(n) for n in system.part_names])[space.columns]
        return replace(space, columns=columns, base=full(space.base[None])[0]).values


#: The pivot check of the family's kernel (relative to the node's summed admittance): a shorted stand-in is
#: ~1e8 times its neighbours by design, which the default 1e-3 would send to the dense path on every point.
STAND_IN_PIVOT = 1e-11


class StandInCost(FusedCost):
    """The fused cost with its pivot check at STAND_IN_PIVOT, its rated parts judged only where not at a stand-in
    value (:attr:`~xo_fit.model.fused.FusedCost.stand_ins`; a job without rated parts judged has the fit's kernel
    text, the same build).

    Its designs are the family's own (:meth:`Family.embed`: (B, P), finite, above zero), so the arguments skip the
    network's checks and reuse the constant ones and one scratch per thread: a prune calls it thousands of times
    on a few dozen designs each, where those checks cost as much as a tenth of the kernel's own time."""

    stand_ins = STAND_IN

    def kernel_args(self, values: np.ndarray) -> tuple:
        """The kernel's arguments for the family's designs ``values`` (B, P), SI, the pivot check at STAND_IN_PIVOT:
        the constant ones built once, the thread's scratch reused and a fresh output last (any other shape goes
        through :meth:`xo_fit.model.fused.FusedCost.kernel_args`, checked as any design is)."""
        fixed = self.__dict__.get("_fixed")
        if fixed is None:
            k = self.net.kernel_args()
            fixed = self._fixed = (len(self.net.valued), k["r_coef"], k["r_exp"], k["fin"],
                                   float(self.net.source_voltage), float(self.net.source_resistance),
                                   float(STAND_IN_PIVOT**2), self.tgt, self.ang, self.angw)
        v = np.ascontiguousarray(values, dtype=float)
        if v.ndim != 2 or v.shape[1] != fixed[0]:
            args = list(super().kernel_args(values))  # checked (and refused) as any design is
            args[6] = float(STAND_IN_PIVOT**2)
            return tuple(args)
        scratch = self.__dict__.setdefault("_scratch", {})
        rows = scratch.get(threading.get_ident())
        if rows is None:
            rows = scratch[threading.get_ident()] = np.empty((self.scratch_rows, self.net.frequencies.size))
        out = np.empty((v.shape[0], self.col_limits + (5 if self.limit_code is not None else 0)))
        return (v, *fixed[1:], rows, out)

    def rescore(self, values: np.ndarray, redo: np.ndarray, out: np.ndarray, cm=None) -> None:
        """Rows ``redo`` (indices) of the kernel's output ``out`` that it flagged, from the reference cost of
        ``values`` (B, P), SI: as the kernel, a rated part at a stand-in value is not judged (the rows grouped by
        which are, each group scored by the cost model judging those alone)."""
        judged = self.judged
        if not judged:
            return super().rescore(values, redo, out, cm)
        off = np.stack([np.isin(values[redo, col], [STAND_IN[how][kind] for how in HOWS])
                        for _, col, kind, _ in judged], axis=1)
        for pattern in np.unique(off, axis=0):
            kept = [r for r, o in zip(judged, pattern) if not o]
            super().rescore(values, redo[np.all(off == pattern, axis=1)], out, judging(self.cm, kept))

    def __getstate__(self) -> dict:
        state = super().__getstate__()
        state.pop("_scratch", None)
        return state


@dataclass(eq=False)
class PruneRun:
    """What a prune computed.

    Attributes
    ----------
    steps : list of dict
        The prune.csv rows (:data:`PRUNE_COLUMNS`), step 0 the starting design refitted.
    states : list of tuple
        (System, Scored) after each step: the reduced system and its design.
    chosen : int
        The index of the chosen step (dimensionless).
    max_increase : float
        The cost increase over step 0 the chosen step may have, a fraction (dimensionless; 0.1 is +10 %).
    section : dict
        The result.json ``prune`` section.
    trials : list of dict
        Every trial removal refitted: step, removed, how, cost (and ``refused``: the limits it breaks).
    evaluations : int
        The cost evaluations of the refits (dimensionless).
    interrupted : bool
        Whether Ctrl-C or SIGTERM stopped the prune (the steps finished are kept).
    """

    steps: list[dict]
    states: list[tuple]
    chosen: int
    max_increase: float
    section: dict
    trials: list[dict] = field(default_factory=list)
    evaluations: int = 0
    interrupted: bool = False


def _row(step: int, system, scored, removed: str, how: str) -> dict:
    m = scored.metrics
    return {"step": step, "parts": len(system.job.valued_parts), "removed": removed, "how": how,
            "cost": scored.cost, "rms_error_db": m.get("rms_error_db"), "max_error_db": m.get("max_error_db"),
            "phase_mismatch_deg": m.get("phase_mismatch_deg"), "impedance_min_ohm": m.get("impedance_min_ohm")}


def run_prune(system, start: np.ndarray, *, budget: int | None = None, seed: int | None = None,
              max_increase: float = MAX_INCREASE, workers: int = 1, progress=None,
              interrupted: bool = False) -> PruneRun:
    """Greedy backward elimination from one design of a system; see the module's docstring.

    Parameters
    ----------
    system : System
        The loaded job (:class:`~xo_fit.model.system.System`).
    start : ndarray
        The starting design's part values, SI (ohm, H, F), shape (P,).
    budget : int, optional
        Cost evaluations for each refit at most (dimensionless); default (or 0) ``xo_fit.config.REFIT_BUDGET``.
    seed : int, optional
        Recorded in the section (dimensionless); default the job's ``[search] seed``. The refits draw no random
        numbers.
    max_increase : float
        The cost increase over step 0 the chosen step may have, a fraction (dimensionless; 0.1 is +10 %).
    workers : int
        Processes the trial removals run in (dimensionless); 1: in this one.
    progress : callable, optional
        Called as ``progress(step, removed, how, cost)`` after each step (step 0: removed and how "").
    interrupted : bool
        Ctrl-C or SIGTERM stopped what came before (the fit of the start): step 0 alone, marked interrupted.

    Returns
    -------
    PruneRun
        The steps, the chosen one (the fewest parts within ``max_increase`` of step 0's cost) and every trial.

    Raises
    ------
    JobError
        Where the job has no way targets.
    """
    from xo_fit.model.system import derive_system
    from xo_fit.search.fitting import score
    from xo_fit.stages.removal import reduced_job

    budget = budget or REFIT_BUDGET
    seed = system.job.search.seed if seed is None else seed
    values = dict(zip(system.part_names, np.asarray(start, dtype=float)))
    job = reduced_job(system.job, None, "none", values)
    assert job is not None, "with no part removed there is always a job"
    current = derive_system(system, job)
    model = model_of(current)
    targets = model[1]
    family = None
    if interrupted:  # the start's fit was stopped: the start itself is step 0
        scored, evaluations = score(current, current.values(), model), 0
    else:
        try:
            family = Family.of(current)
            scored, evaluations = refit(current, budget, seed, family, {}, targets=targets)
        except Interrupted as e:  # step 0 stopped early: its best so far is the only step
            (scored, evaluations), interrupted = e.args, True
        except KeyboardInterrupt:  # Ctrl-C or SIGTERM outside the polish (the kernel's set-up, the scoring): the
            scored, evaluations, interrupted = score(current, current.values(), model), 0, True  # start is step 0
    steps, states = [_row(0, current, scored, "", "")], [(current, scored)]
    if progress:
        progress(0, "", "", scored.cost)
    trials: list[dict] = []
    spent = [evaluations]
    if not interrupted:
        try:
            _eliminate(steps, states, trials, spent, budget, seed, workers, progress, family, targets)
        except KeyboardInterrupt:  # Ctrl-C or SIGTERM: the steps taken so far are kept, the step under way is not
            interrupted = True
    evaluations = spent[0]
    base = steps[0]["cost"]  # the increase as a share of it, or of COST_FLOOR for a start on target (as idle_parts)
    limit = base + max_increase * max(base, COST_FLOOR) if base is not None else math.inf
    within = [i for i, r in enumerate(steps) if r["cost"] is not None and r["cost"] <= limit]
    chosen = min(within, key=lambda i: (steps[i]["parts"], steps[i]["cost"])) if within else 0
    section = {"steps": steps, "chosen_step": chosen, "max_increase": max_increase, "refit_budget": budget,
               "seed": seed, "evaluations": evaluations, "trials": trials}
    if interrupted:
        section["interrupted"] = True
    return PruneRun(steps=steps, states=states, chosen=chosen, max_increase=max_increase, section=section,
                    trials=trials, evaluations=evaluations, interrupted=interrupted)


def _eliminate(steps: list, states: list, trials: list, spent: list, budget: int, seed: int, workers: int,
               progress, family: Family | None = None, targets=None) -> None:
    """The elimination steps after step 0, appended to ``steps``, ``states`` and ``trials``; the evaluations of
    each finished step are added to ``spent[0]``. Trial removals run in ``workers`` processes when more than 1
    (each gets the starting system, ``family`` and ``targets`` once, and per trial the step's job, its design and
    the removal, whose system it derives and checks itself); their refits search on ``family``'s kernel where
    given (see :class:`Family`)."""
    from xo_fit.search.fitting import score

    pool = stop = None
    held = contextlib.ExitStack()
    if workers > 1:
        import multiprocessing

        from xo_fit.search.interrupt import stopping_pool
        from xo_fit.search.lbfgsb import one_blas_thread_for_forks

        # forked workers keep one BLAS thread without setting it (setting it after a fork wakes spinning threads)
        one = held.enter_context(one_blas_thread_for_forks(multiprocessing.get_context()))
        pool, stop = stopping_pool(workers, share, (states[0][0], family, targets, one))
    try:
        while True:
            last_system, last_scored = states[-1]
            values = dict(zip(last_system.part_names, last_scored.values))
            source = JobDocument(last_system.job)
            gone = {r["removed"]: r["how"] for r in steps[1:]}
            options = [(p.name, how) for p in last_system.job.valued_parts if not p.keep for how in HOWS]
            if pool:  # each worker derives its removals' systems and checks them too
                job = pickle.dumps(last_system.job)
                found: list = [None] * len(options)
                # dealt round, a part's open and short to different workers and the opens (often illegal, no
                # refit) spread over all: option k = (part k // 2, how k % 2) to worker (k // 2 + k % 2) % workers
                dealt = [[k for k in range(len(options)) if (k // 2 + k % 2) % workers == i] for i in range(workers)]
                dealt = [ks for ks in dealt if ks]
                for ks, got in zip(dealt, pool.map(pooled_trials, [(job, values, [options[k] for k in ks], budget,
                                                                     seed, gone) for ks in dealt])):
                    for k, f in zip(ks, got):
                        found[k] = f
            else:
                found = step_trials(last_system, values, options, budget, seed, family, gone, targets, source)
            if not any(f is not None for f in found):
                break
            allowed, _ = broken_limits(last_system, last_scored.values, targets)
            feasible = []
            for (name, how), got in zip(options, found):
                if got is None:
                    continue
                sc, n, judged = got
                spent[0] += n
                trials.append({"step": len(steps), "removed": name, "how": how, "cost": sc.cost})
                if sc.cost is None or not math.isfinite(sc.cost):
                    continue
                s = None
                if last_system.job.limits.active:
                    if judged is None:  # not judged with its score: on its reduced netlist here
                        s = variant(last_system, name, how, values, check_dead=False, source=source)
                        assert s is not None, "a removal refitted is a legal one"
                        judged = broken_limits(s, sc.values, targets)
                    violation, broken = judged
                    if violation > allowed + 1e-12:  # it breaks a limit the current design meets: refused
                        trials[-1]["refused"] = broken
                        continue
                feasible.append((name, how, sc, s))
            if not feasible:
                break
            name, how, sc, s = min(feasible, key=lambda r: (r[2].cost, r[0], r[1]))
            s = s if s is not None else variant(last_system, name, how, values, check_dead=False, source=source)
            assert s is not None, "a removal refitted is a legal one"
            sc = score(s, sc.values, model_of(s, targets))  # the trial's cost, its terms and metrics
            steps.append(_row(len(steps), s, sc, name, how))
            states.append((s, sc))
            if progress:
                progress(len(steps) - 1, name, how, sc.cost)
    except KeyboardInterrupt:
        if stop is not None:
            stop.set()  # the workers' refits stop at their next batch
        raise
    finally:
        if pool:
            pool.shutdown(wait=True, cancel_futures=True)
        held.close()
