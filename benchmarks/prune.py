"""Pruning with refits against a fit of the same job: the demo two-way (13 parts), the 16-part hard three-way and
the limited two-way and three-way (12 and 16 parts, [limits] with rated parts judged).

Goals: issue 12, the demo's whole prune in at most 60 s on one core; issue 29, every prune at most 4x a fit of the
same job (the fit at its job's default budget), on one core and with --workers 2.
Run: python benchmarks/prune.py [--runs 3] [--workers 2] [--smoke].
Each job is loaded once and fitted once untimed (the kernels built or loaded from the cache); then fit, prune and
prune with workers are timed in turn, --runs times each, and the medians quoted side by side (the machine is
shared: the ratios are taken from runs interleaved in one process, in wall and in CPU seconds, which other work on
the machine disturbs less; --workers: the wall, and the CPU of every process). --smoke prunes the 4-part handbook
LR2 ladder with refits of 100 evaluations instead, once (the test suite's run).
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")  # one core
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

import xo_fit  # noqa: E402
from xo_fit.config import REFIT_BUDGET  # noqa: E402
from xo_fit.demo import write_scenario  # noqa: E402

HARD = ROOT / "tests" / "data" / "hard-three-way.toml"
LIMITED = [ROOT / "tests" / "data" / f"limited-{n}-way.toml" for n in ("two", "three")]


def timed(fn):
    """(wall seconds, CPU seconds of this process and its reaped children, fn's result)."""
    import resource

    def cpu() -> float:
        own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
        return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime

    c0, t0 = cpu(), time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, cpu() - c0, out


def bench(job, runs: int, workers: int, fit_budget: int | None, budget: int | None) -> dict:
    """Fit, prune and prune with ``workers`` of one job, each timed ``runs`` times in turn: wall and CPU seconds."""
    best = xo_fit.fit(job, seed=1, budget=fit_budget)  # warm: kernels built or loaded, untimed
    got: dict = {"fit": [], "prune": [], "pooled": []}
    pr = None
    for _ in range(runs):
        got["fit"].append(timed(lambda: xo_fit.fit(job, seed=1, budget=fit_budget))[:2])
        *t, pr = timed(lambda: xo_fit.prune(job, best, budget=budget))
        got["prune"].append(tuple(t))
        if workers > 1:
            got["pooled"].append(timed(lambda: xo_fit.prune(job, best, budget=budget, workers=workers))[:2])
    return {"job": job, "best": best, "pr": pr, **got}


def show(r: dict, workers: int, budget: int | None) -> None:
    job, pr, best = r["job"], r["pr"], r["best"]
    med = {k: (statistics.median(t[0] for t in r[k]), statistics.median(t[1] for t in r[k]))
           for k in ("fit", "prune", "pooled") if r[k]}
    (fit_s, fit_c), (prune_s, prune_c) = med["fit"], med["prune"]
    evals = best.sections["search"]["evaluations"]
    print(f"{job.name}: {len(job.valued_parts)} parts; fit {fit_s:.3f} s ({evals} evaluations, cost {best.cost:.4g}); "
          f"prune {prune_s:.3f} s ({len(pr.steps) - 1} steps, {len(pr.trials)} trial refits of at most "
          f"{budget or REFIT_BUDGET} evaluations, {pr.evaluations} evaluations)")
    print(f"  prune / fit, one process: {prune_s / fit_s:.1f} wall, {prune_c / fit_c:.1f} CPU "
          f"({prune_c:.3f} / {fit_c:.3f} CPU s) (goal <= 4)")
    if "pooled" in med:
        pooled_s, pooled_c = med["pooled"]
        print(f"  with --workers {workers}: {pooled_s:.3f} s wall, {pooled_s / fit_s:.1f}x the fit's wall (goal <= 4); "
              f"{pooled_c:.3f} CPU s in all")
    print("  wall seconds: " + "; ".join(f"{k} " + ", ".join(f"{t[0]:.3f}" for t in r[k])
                                         for k in ("fit", "prune", "pooled") if r[k]))
    print(f"  {'step':>4} {'parts':>5} {'removed':<8} {'how':<6} {'cost':>9} {'rms dB':>7} {'worst dB':>8}")
    for s in pr.steps:
        print(f"  {s['step']:>4} {s['parts']:>5} {s['removed']:<8} {s['how']:<6} {s['cost']:>9.4g} "
              f"{s['rms_error_db']:>7.2f} {s['max_error_db']:>8.2f}" + ("  <- chosen" * (s["step"] == pr.chosen)))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--smoke", action="store_true", help="a 4-part ladder, refits of 100 evaluations, one run")
    ap.add_argument("--runs", type=int, default=3, help="timed runs of each (median quoted)")
    ap.add_argument("--workers", type=int, default=2, help="the pooled prune's processes (1: none)")
    args = ap.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="xo_fit-bench-prune-"))
    if args.smoke:
        from conftest import ladder_job

        (folder / "ladder.toml").write_text(ladder_job("LR2", start=1.5, spread=4.0)[0])
        r = bench(xo_fit.load_job(folder / "ladder.toml"), 1, 1, 300, 100)
        show(r, 1, 100)
        return
    jobs = [xo_fit.load_job(write_scenario(folder / "scenario")), xo_fit.load_job(HARD)]
    jobs += [xo_fit.load_job(path) for path in LIMITED]
    print(f"one thread; medians of {args.runs} runs")
    for job in jobs:
        show(bench(job, args.runs, args.workers, None, None), args.workers, None)


if __name__ == "__main__":
    main()
