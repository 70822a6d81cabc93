"""Snap speed and quality: 12 free parts, E12 for every kind, two neighbours on each side.

The demo two-way, with its last resistor held fixed so that 12 parts are
snapped, is fitted; the fit and four designs around it (each part moved by
a random +-10 %, as hand designs would be) are snapped to E12. Printed per design: seconds to the final design, designs
scored, and the cost of the continuous design, of log-nearest rounding and of
the snapped design; then medians. Goal: under 5 s on one core.

Run: python benchmarks/snap.py [--smoke]   (--smoke: fits of 300 evaluations, one design: the test suite's run)
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from xo_fit.demo import JOB_TEXT, write_scenario  # noqa: E402
from xo_fit.search.fitting import cost_model, run_fit  # noqa: E402
from xo_fit.job.reader import load_job  # noqa: E402
from xo_fit.series import nearest  # noqa: E402
from xo_fit.config import NEIGHBOURS  # noqa: E402
from xo_fit.stages.snapping import run_snap  # noqa: E402
from xo_fit.model.system import load_system  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--smoke", action="store_true", help="fits of 300 evaluations, one design")
    smoke = ap.parse_args().smoke
    folder = Path(tempfile.mkdtemp())
    job_path = write_scenario(folder)
    text = JOB_TEXT.replace('name = "R2"\ntype = "R"\nnodes = ["t3", "0"]\nvalue = "15"\nmin = "2"\nmax = "50"',
                            'name = "R2"\ntype = "R"\nnodes = ["t3", "0"]\nvalue = "15"\nmin = "2"\nmax = "50"\nfixed = true')
    job_path.write_text(text)
    system = load_system(load_job(job_path))
    cm, _ = cost_model(system)
    e12 = {"R": "E12", "L": "E12", "C": "E12"}
    snapped_parts = sum(not p.fixed for p in system.job.valued_parts)
    print(f"demo two-way, {snapped_parts} parts snapped to E12, {NEIGHBOURS} neighbours each side")
    print(f"{'design':>6} {'seconds':>8} {'designs':>8} {'continuous':>11} {'log-nearest':>12} {'snapped':>9}")
    rows = []
    run_snap(system, run_fit(system, budget=300 if smoke else 2000).scored.values, series_override=e12)  # warm
    fitted = run_fit(system, budget=300 if smoke else None).scored.values
    for seed in range(1, 2 if smoke else 6):
        # the fit itself, then four designs around it (+-10 % per part, as hand designs would be)
        rng = np.random.default_rng(seed)
        free = np.array([not p.fixed for p in system.job.valued_parts])
        cont = fitted * np.where(free, np.exp(rng.normal(0, 0.1, fitted.size)), 1.0) if seed > 1 else fitted
        out = run_snap(system, cont, series_override=e12)
        rounded = np.array([nearest(v, "E12") if not p.fixed else v for v, p in zip(cont, system.job.valued_parts)])
        c_cont, c_round, c_snap = (float(cm.evaluate(v[None]).cost[0]) for v in (cont, rounded, out.values))
        rows.append((out.seconds, c_cont, c_round, c_snap))
        print(f"{seed:>6} {out.seconds:>8.2f} {out.search.evaluations:>8} {c_cont:>11.4f} {c_round:>12.4f} "
              f"{c_snap:>9.4f}")
    med = np.median(np.array(rows), axis=0)
    print(f"median: {med[0]:.2f} s (goal < 5 s); cost continuous {med[1]:.4f}, log-nearest {med[2]:.4f}, "
          f"snapped {med[3]:.4f} ({(1 - med[3] / med[2]) * 100:.0f} % below log-nearest)")


if __name__ == "__main__":
    main()
