"""Off-axis cost: evaluations per second of the fused kernel, on axis against the listening window and the
full ANSI/CTA-2034-A set, measured side by side in one run on the demo (2 drivers, 300 points, 13 parts).

Variants (the same job, the same candidates):
  on axis          [target] reference = "on_axis", no off-axis terms (the kernel of an on-axis job);
  LW unpositioned  the listening window (9 positions read) with the demo's positions and about = "driver" taken
                   out: every driver's files taken as they stand, the off-axis kernel as it was before positions;
  listening window reference = "listening_window" (9 positions read), the demo as it is: drivers positioned, the
                   path from each acoustic centre in every position's factors;
  LW + ER + SP     the listening window and both roughness terms (all 70 positions read), positioned.

Prints the median of --repeats timings of a batch of --batch candidates, evaluations per second, and the ratio
to the on-axis kernel and to the unpositioned listening window. The goals: the listening window within 3x of on
axis; the positioned listening window within 1.5x of the unpositioned one (the geometry lives in the
per-position factors, so the kernel is the same).

Run: python benchmarks/offaxis.py [--batch 512] [--repeats 9] [--smoke]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from xo_fit.demo import write_scenario  # noqa: E402
from xo_fit.search.fitting import cost_model  # noqa: E402
from xo_fit.job.reader import load_job  # noqa: E402
from xo_fit.search.space import make_space  # noqa: E402
from xo_fit.model.fused import FusedCost  # noqa: E402
from xo_fit.model.system import load_system  # noqa: E402


def variant(folder: Path, name: str, reference: str, er: float, sp: float, positioned: bool = True) -> FusedCost:
    job = write_scenario(folder / name)
    text = job.read_text().replace('reference = "listening_window"', f'reference = "{reference}"')
    if not positioned:
        text = "\n".join(line for line in text.splitlines() if not line.startswith(("position =", "about ="))) + "\n"
    job.write_text(text.replace("[cost]\n", f"[cost]\nearly_reflections = {er}\nsound_power = {sp}\n"))
    cm, _ = cost_model(load_system(load_job(job)))
    return FusedCost(cm)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--batch", type=int, default=512)
    ap.add_argument("--repeats", type=int, default=9)
    ap.add_argument("--smoke", action="store_true", help="batch 16, one repeat (the test suite's run)")
    args = ap.parse_args()
    if args.smoke:
        args.batch, args.repeats = 16, 1
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        variants = {"on axis": variant(folder, "a", "on_axis", 0.0, 0.0),
                    "LW unpositioned": variant(folder, "u", "listening_window", 0.0, 0.0, positioned=False),
                    "listening window": variant(folder, "b", "listening_window", 0.0, 0.0),
                    "LW + ER + SP": variant(folder, "c", "listening_window", 1.0, 1.0)}
        first = next(iter(variants.values()))
        space = make_space(first.cm.system.job)
        values = space.values(np.random.default_rng(1).random((args.batch, space.dims)))
        for fc in variants.values():
            fc(values[:4])  # compile (or load from the cache) outside the timing
        times = {k: [] for k in variants}
        for _ in range(args.repeats):  # interleaved, so that a noisy moment hits every variant alike
            for k, fc in variants.items():
                t = time.perf_counter()
                fc(values)
                times[k].append(time.perf_counter() - t)
        base = statistics.median(times["on axis"])
        before = statistics.median(times["LW unpositioned"])
        print(f"fused cost on the demo, batch {args.batch}, median of {args.repeats}")
        print(f"{'variant':<18} {'positions':>9} {'ms/batch':>9} {'evals/s':>10} {'x on axis':>10} {'x LW unpos.':>12}")
        for k, fc in variants.items():
            m = statistics.median(times[k])
            print(f"{k:<18} {fc.n_angles:>9} {1e3 * m:>9.2f} {args.batch / m:>10.0f} {m / base:>10.2f} "
                  f"{m / before:>12.2f}")


if __name__ == "__main__":
    main()
