"""Spread speed: 10,000 tolerance draws of the reference network at 300 points, and a robust fit against a plain one.

The network is the demo's 13-part two-way on its 300-point grid (5 % parts,
uniform). Printed: the median seconds of a 10,000-draw spread over several
runs (goal: under 1 s on one core), its rate, and the wall time of a robust
fit ([search] robust = { samples = N }, N = 8 and 16) against the plain fit
at the same budget, with the yields of the resulting designs.

Run: python benchmarks/spread.py [--smoke]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from xo_fit.demo import JOB_TEXT, write_scenario  # noqa: E402
from xo_fit.search.fitting import run_fit  # noqa: E402
from xo_fit.job.reader import load_job  # noqa: E402
from xo_fit.stages.tolerance import run_spread  # noqa: E402
from xo_fit.model.system import load_system  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--smoke", action="store_true", help="500 draws, budgets of 200, N = 2 (the test suite's run)")
    smoke = ap.parse_args().smoke
    draws, budget, robust, check = (500, 200, (2,), 500) if smoke else (10_000, 6000, (8, 16), 4000)
    folder = Path(tempfile.mkdtemp())
    job = write_scenario(folder)
    system = load_system(load_job(job))
    nominal = run_fit(system, budget=budget if smoke else None).scored.values
    run_spread(system, nominal, samples=500)  # compile caches
    times = []
    for _ in range(1 if smoke else 5):
        t = time.perf_counter()
        r = run_spread(system, nominal, samples=draws)
        times.append(time.perf_counter() - t)
    med = float(np.median(times))
    print(f"{draws:,} draws, {system.frequencies.size} points: median {med:.3f} s (goal < 1 s at 10,000), "
          f"{draws / med:,.0f} draws/s; yield within +-1 dB {r.yield_band:.3f}")
    t = time.perf_counter()
    plain = run_fit(system, budget=budget)
    t_plain = time.perf_counter() - t
    y_plain = run_spread(system, plain.scored.values, samples=check, seed=9)
    print(f"plain fit, budget {budget}: {t_plain:.2f} s, cost {plain.scored.cost:.4f}, "
          f"yield {y_plain.yield_band:.3f} / limits {y_plain.yield_limits:.3f}")
    for n in robust:
        text = JOB_TEXT.replace("[cost]", f"[search]\nrobust = {{ samples = {n} }}\n\n[cost]")
        path = folder / f"robust{n}.toml"
        path.write_text(text)
        rs = load_system(load_job(path))
        run_fit(rs, budget=200)  # kernel load outside the timing
        t = time.perf_counter()
        rob = run_fit(rs, budget=budget)
        t_rob = time.perf_counter() - t
        y = run_spread(system, rob.scored.values, samples=check, seed=9)
        print(f"robust fit N={n}, budget {budget}: {t_rob:.2f} s ({t_rob / t_plain:.1f}x the plain fit; "
              f"{rob.search.evaluations * n} solves), nominal cost {rob.scored.cost:.4f}, "
              f"yield {y.yield_band:.3f} / limits {y.yield_limits:.3f}")


if __name__ == "__main__":
    main()
