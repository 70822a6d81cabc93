"""Pruning the demo two-way (13 parts) with refits: steps, seconds, the trade-off table.

Goal (issue 12): the whole prune in at most 60 s on one core; issue 29: at most 4x a fit of the same job.
Run: .venv/bin/python benchmarks/prune.py [--smoke].
The fit and three prunes are timed; the median is quoted (the machine is shared). --smoke prunes the 4-part handbook
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

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import xo_fit  # noqa: E402
from xo_fit.demo import write_scenario  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--smoke", action="store_true", help="a 4-part ladder, refits of 100 evaluations, one run")
    smoke = ap.parse_args().smoke
    folder = Path(tempfile.mkdtemp(prefix="xo_fit-bench-prune-"))
    if smoke:
        from conftest import ladder_job

        (folder / "ladder.toml").write_text(ladder_job("LR2", start=1.5, spread=4.0)[0])
        job = xo_fit.load_job(folder / "ladder.toml")
    else:
        job = xo_fit.load_job(write_scenario(folder / "scenario"))
    t0 = time.perf_counter()
    best = xo_fit.fit(job, seed=1, budget=300 if smoke else None)
    fit_s = time.perf_counter() - t0
    times = []
    for _ in range(1 if smoke else 3):
        t0 = time.perf_counter()
        pr = xo_fit.prune(job, best, budget=100 if smoke else None)
        times.append(time.perf_counter() - t0)
    print(f"{job.name}: {len(job.valued_parts)} parts, fit cost {best.cost:.4g}; prune with refits of "
          f"{100 if smoke else 600} evaluations "
          f"(the fit's kernel, stand-ins for removed parts; one thread): {len(pr.steps) - 1} steps, "
          f"{len(pr.trials)} trial refits, "
          f"{pr.evaluations} evaluations; seconds {', '.join(f'{t:.1f}' for t in times)}, median "
          f"{statistics.median(times):.2f} (goal <= 60); the fit {fit_s:.2f} s, prune / fit "
          f"{statistics.median(times) / fit_s:.1f} (goal <= 4)")
    print(f"{'step':>4} {'parts':>5} {'removed':<8} {'how':<6} {'cost':>9} {'rms dB':>7} {'worst dB':>8}")
    for r in pr.steps:
        print(f"{r['step']:>4} {r['parts']:>5} {r['removed']:<8} {r['how']:<6} {r['cost']:>9.4g} "
              f"{r['rms_error_db']:>7.2f} {r['max_error_db']:>8.2f}" + ("  <- chosen" if r["step"] == pr.chosen else ""))


if __name__ == "__main__":
    main()
