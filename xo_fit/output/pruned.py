"""A prune as a value: its steps, the design after each, the chosen one, and the files it writes."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from xo_fit.output.design import Design
from xo_fit.stages.pruning import PRUNE_COLUMNS, PruneRun


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
    interrupted: bool = False  # Ctrl-C or SIGTERM stopped it: the steps so far

    @classmethod
    def of_run(cls, run: PruneRun) -> Pruning:
        """The designs of a computed prune (stage "prune"; the chosen one labelled "pruned")."""
        designs = [Design(system=s, scored=sc, stage="prune", label=f"prune step {i}", sections={"prune": run.section})
                   for i, (s, sc) in enumerate(run.states)]
        designs[run.chosen].label = "pruned"
        return cls(steps=run.steps, designs=designs, chosen=run.chosen, max_increase=run.max_increase,
                   trials=run.trials, evaluations=run.evaluations, interrupted=run.interrupted)

    @property
    def design(self) -> Design:
        """The chosen design (stage "prune")."""
        return self.designs[self.chosen]

    def job_toml(self, folder: str | Path) -> str:
        """The chosen design as a job file to be written into ``folder``: the pruned netlist, the fitted values as
        start values, data paths taken relative to ``folder``."""
        import os

        import tomli_w

        from xo_fit.job.model import FileCurve, SplicedResponse

        job = self.design.job
        doc = job.data
        values = self.design.values
        for p in doc.get("part", []):
            if p.get("name") in values:
                spec = job.part(p["name"])
                v = values[p["name"]]
                if spec.min is not None and spec.max is not None:  # the search's exp(log) can land a hair outside
                    v = min(max(v, spec.min), spec.max)  # (5.000000000000002 mH against max 5 mH once: refused)
                p["value"] = v
        here = Path(folder).resolve()

        def moved(path: Path) -> str:
            return os.path.relpath(path, here)

        for d in job.drivers:
            for key in ("response", "impedance"):
                spec = getattr(d, key)
                if isinstance(spec, FileCurve) and isinstance(doc["driver"][d.name][key], dict):
                    doc["driver"][d.name][key].update(file=moved(spec.path))  # { file, baffle }
                elif isinstance(spec, FileCurve):
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
        from xo_fit.io.results import write_rows, write_text

        folder = Path(folder)
        files = self.design.save(folder, plots=plots, title=f"{self.design.job.name}: pruned to "
                                                            f"{self.steps[self.chosen]['parts']} parts")
        write_rows(folder / "prune.csv", self.steps, columns=PRUNE_COLUMNS)
        write_text(folder / "job.toml", self.job_toml(folder))
        files += [folder / "prune.csv", folder / "job.toml"]
        if plots:
            from xo_fit.output.plots import plot_pruning

            plot_pruning(folder / "prune.png", self.steps, self.chosen, title=f"{self.design.job.name}: pruning")
            files.append(folder / "prune.png")
        return files
