"""Pruning: which parts earn their place, by greedy backward elimination with refits.

From a starting design, every R, L and C without ``keep = true`` is tried
removed, opened (deleted) and shorted (its nodes merged), skipping removals
that are no legal netlist (:mod:`xo_fit.removal`). After each trial removal the
remaining free values are refitted from the current ones (a short search and
polish on the dense solve, so that no topology waits for a compiler). The
cheapest removal is taken and the step repeated until nothing is left to
remove. The chosen design is the one with the fewest parts whose cost stays
within ``max_increase`` of step 0's (the starting design refitted).

Trial removals are independent: with ``workers`` > 1 they run in processes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .design import Design
from .removal import removals

#: Refit budget (cost evaluations) when none is given: a short search and polish from the current values.
REFIT_BUDGET = 600
#: Default largest cost increase over step 0 for the chosen design.
MAX_INCREASE = 0.10
PRUNE_COLUMNS = ["step", "parts", "removed", "how", "cost", "rms_error_db", "max_error_db", "phase_mismatch_deg",
                 "impedance_min_ohm"]


def refit(system, budget: int, seed: int):
    """The system's free values refitted from its job's values (the start): (Scored, evaluations)."""
    from .fitting import require_cost_model, score
    from .search import make_space, search

    model = require_cost_model(system, "prune against")
    cm, _ = model
    if not system.job.free_parts:
        return score(system, system.values(), model), 0
    space = make_space(system.job)

    def fn(u: np.ndarray) -> np.ndarray:
        v = space.values(u)
        return cm.evaluate_simulation(system.simulate(v, dense=True), v).cost

    r = search(fn, space, optimizer="de", budget=budget, seed=seed, polish=True)
    return score(system, space.values(r.u)[0], model), r.evaluations


def _trial(args):
    """One trial removal, refitted (in a worker process or here): (name, how, Scored, system, evaluations)."""
    name, how, system, budget, seed = args
    scored, n = refit(system, budget, seed)
    return name, how, scored, system, n


@dataclass(eq=False)
class Pruning:
    """The steps of a prune and the design chosen.

    ``steps``: rows as prune.csv has them (step 0 the starting design refitted); ``designs``: the design after
    each step; ``chosen``: the index of the chosen step; ``trials``: every trial removal of every step (step,
    removed, how, cost).
    """

    steps: list[dict]
    designs: list[Design]
    chosen: int
    max_increase: float
    trials: list[dict] = field(default_factory=list)
    evaluations: int = 0

    @property
    def design(self) -> Design:
        """The chosen design (stage "prune")."""
        return self.designs[self.chosen]

    def job_toml(self, folder: str | Path) -> str:
        """The chosen design as a job file to be written into ``folder``: the pruned netlist, the fitted values as
        start values, data paths taken relative to ``folder``."""
        import os

        import tomli_w

        from .io.job import FileCurve, SplicedResponse

        job = self.design.job
        doc = job.data
        values = self.design.values
        for p in doc.get("part", []):
            if p.get("name") in values:
                p["value"] = values[p["name"]]
        here = Path(folder).resolve()

        def moved(path: Path) -> str:
            return os.path.relpath(path, here)

        for d in job.drivers:
            for key in ("response", "impedance"):
                spec = getattr(d, key)
                if isinstance(spec, FileCurve):
                    doc["driver"][d.name][key] = moved(spec.path)
                elif isinstance(spec, SplicedResponse):
                    doc["driver"][d.name][key].update(near=moved(spec.near), far=moved(spec.far))
            if d.angles is not None:
                for orbit in ("horizontal", "vertical"):
                    pattern = getattr(d.angles, orbit)
                    if pattern is not None:
                        doc["driver"][d.name]["angles"][orbit] = moved(Path(pattern))
        curve = doc.get("target", {}).get("curve")
        if isinstance(curve, str) and (Path(curve).suffix or "/" in curve or os.sep in curve):
            doc["target"]["curve"] = moved(job.folder / curve)
        if job.snap.inventory is not None:
            doc["snap"]["inventory"] = moved(job.snap.inventory)
        return tomli_w.dumps(doc)

    def save(self, folder: str | Path, *, plots: bool = True) -> list[Path]:
        """prune.csv, job.toml, and the chosen design's result.json, response.csv (and plots)."""
        from .io.results import write_rows, write_text

        folder = Path(folder)
        files = self.design.save(folder, plots=plots, title=f"{self.design.job.name}: pruned to "
                                                            f"{self.steps[self.chosen]['parts']} parts")
        write_rows(folder / "prune.csv", self.steps, columns=PRUNE_COLUMNS)
        write_text(folder / "job.toml", self.job_toml(folder))
        files += [folder / "prune.csv", folder / "job.toml"]
        if plots:
            from .plots import plot_pruning

            plot_pruning(folder / "prune.png", self.steps, self.chosen, title=f"{self.design.job.name}: pruning")
            files.append(folder / "prune.png")
        return files


def _row(step: int, design: Design, removed: str, how: str) -> dict:
    m = design.metrics
    return {"step": step, "parts": len(design.job.valued_parts), "removed": removed, "how": how,
            "cost": design.cost, "rms_error_db": m.get("rms_error_db"), "max_error_db": m.get("max_error_db"),
            "phase_mismatch_deg": m.get("phase_mismatch_deg"), "impedance_min_ohm": m.get("impedance_min_ohm")}


def run_prune(system, start: np.ndarray, *, budget: int | None = None, seed: int | None = None,
              max_increase: float = MAX_INCREASE, workers: int = 1, progress=None) -> Pruning:
    """Greedy backward elimination from design ``start`` (P,) of ``system``; see the module's docstring."""
    from .io.job import load_job
    from .removal import removal_document
    from .system import derive_system

    budget = budget or REFIT_BUDGET
    seed = system.job.search.seed if seed is None else seed
    values = dict(zip(system.part_names, np.asarray(start, dtype=float)))
    doc = removal_document(system.job, None, "none", values)
    current = derive_system(system, load_job(doc, base=system.job.folder))
    scored, evaluations = refit(current, budget, seed)
    first = Design(system=current, scored=scored, stage="prune", label="prune step 0")
    steps, designs, trials = [_row(0, first, "", "")], [first], []
    pool = None
    if workers > 1:
        from concurrent.futures import ProcessPoolExecutor

        pool = ProcessPoolExecutor(max_workers=workers)
    try:
        while True:
            last = designs[-1]
            options = removals(last.system, last.values)
            if not options:
                break
            args = [(name, how, s, budget, seed) for name, how, s in options]
            results = list(pool.map(_trial, args)) if pool else [_trial(a) for a in args]
            for name, how, sc, _, n in results:
                evaluations += n
                trials.append({"step": len(steps), "removed": name, "how": how, "cost": sc.cost})
            feasible = [r for r in results if r[2].cost is not None and math.isfinite(r[2].cost)]
            if not feasible:
                break
            name, how, sc, s, _ = min(feasible, key=lambda r: (r[2].cost, r[0], r[1]))
            d = Design(system=s, scored=sc, stage="prune", label=f"prune step {len(steps)}")
            steps.append(_row(len(steps), d, name, how))
            designs.append(d)
            if progress:
                progress(len(steps) - 1, name, how, sc.cost)
    finally:
        if pool:
            pool.shutdown()
    limit = steps[0]["cost"] * (1 + max_increase) if steps[0]["cost"] is not None else math.inf
    within = [i for i, r in enumerate(steps) if r["cost"] is not None and r["cost"] <= limit]
    chosen = min(within, key=lambda i: (steps[i]["parts"], steps[i]["cost"])) if within else 0
    section = {"steps": steps, "chosen_step": chosen, "max_increase": max_increase, "refit_budget": budget,
               "seed": seed, "evaluations": evaluations, "trials": trials}
    for d in designs:
        d.sections = {"prune": section}
    designs[chosen].label = "pruned"
    return Pruning(steps=steps, designs=designs, chosen=chosen, max_increase=max_increase, trials=trials,
                   evaluations=evaluations)
