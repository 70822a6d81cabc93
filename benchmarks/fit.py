"""Fit quality and speed: engines side by side on two problems, several seeds and budgets, in one run.

(a) ideal resistive drivers (8 ohm, flat, zero phase), an LR4 target at 2 kHz
    and the 8-part handbook ladder pair, every part starting 2x off its
    handbook value with a range of 1/4x..4x: does the engine find the unique
    handbook design (every part within 2 %)?
(b) the demo scenario (13 free parts, measured-style drivers).

For each engine (the default, scipy's vectorised differential evolution, two
nevergrad optimisers) and budget (2k, 5k, 20k evaluations): the median final
cost and search time over the seeds, and for (a) how many seeds recovered the
handbook ladder. Then the default at 20k over 10 seeds on (a), the goal being
at least 9 of 10, and the evaluation rate of the fused cost kernel.

Run: python benchmarks/fit.py [--seeds 5] [--quick]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from conftest import ladder_job  # noqa: E402  (the test helper that writes handbook ladder jobs)

from xo_fit.demo import write_scenario  # noqa: E402
from xo_fit.fitting import cost_model  # noqa: E402
from xo_fit.solver.fused import FusedCost  # noqa: E402
from xo_fit.io.job import load_job  # noqa: E402
from xo_fit.search import make_space, search  # noqa: E402
from xo_fit.system import load_system  # noqa: E402

ENGINES = ("de", "scipy-de", "ng-TwoPointsDE", "ng-CMA")


def problem_ideal():
    text, truth = ladder_job("LR4", start=2.0, spread=4.0)
    folder = Path(tempfile.mkdtemp())
    (folder / "job.toml").write_text(text)
    return load_system(load_job(folder / "job.toml")), truth


def problem_demo():
    folder = Path(tempfile.mkdtemp())
    return load_system(load_job(write_scenario(folder))), None


def run(system, engine: str, budget: int, seed: int):
    cm, _ = cost_model(system)
    fused = FusedCost(cm)
    space = make_space(system.job)
    fn = lambda u: fused(space.values(u))  # noqa: E731
    fn(space.u0[None])  # load the kernel outside the timing
    r = search(fn, space, optimizer=engine, budget=budget, seed=seed, polish=system.job.search.polish)
    return r, space.values(r.u)[0]


def recovered(system, values, truth) -> bool:
    return all(abs(v / truth[n] - 1) <= 0.02 for n, v in zip(system.part_names, values))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=5)
    ap.add_argument("--quick", action="store_true", help="budgets 2k and 5k only, 3 seeds")
    args = ap.parse_args()
    budgets = (2000, 5000) if args.quick else (2000, 5000, 20000)
    seeds = range(1, (3 if args.quick else args.seeds) + 1)
    problems = {"(a) ideal LR4 ladder": problem_ideal(), "(b) demo two-way": problem_demo()}
    for title, (system, truth) in problems.items():
        print(f"\n{title}: {len(make_space(system.job).names)} free values")
        print(f"{'engine':<16} {'budget':>7} {'median cost':>12} {'median s':>9} " + ("recovered" if truth else ""))
        for engine in ENGINES:
            for budget in budgets:
                costs, secs, ok = [], [], 0
                for seed in seeds:
                    r, v = run(system, engine, budget, seed)
                    costs.append(r.cost)
                    secs.append(r.seconds)
                    ok += bool(truth) and recovered(system, v, truth)
                rec = f"{ok}/{len(seeds)}" if truth else ""
                print(f"{engine:<16} {budget:>7} {np.median(costs):>12.4g} {np.median(secs):>9.3f} {rec}")
    system, truth = problems["(a) ideal LR4 ladder"]
    ok = sum(recovered(system, run(system, "de", 20000, seed)[1], truth) for seed in range(1, 11))
    print(f"\ndefault engine, 20k evaluations, 10 seeds on (a): handbook ladder within 2 % in {ok}/10 (goal >= 9)")
    system, _ = problems["(b) demo two-way"]
    cm, _ = cost_model(system)
    fused = FusedCost(cm)
    space = make_space(system.job)
    rng = np.random.default_rng(0)
    for b in (16, 64, 256):
        v = space.values(rng.random((b, space.dims)))
        fused(v)
        t = []
        for _ in range(7):
            t0 = time.perf_counter()
            for _ in range(20):
                fused(v)
            t.append((time.perf_counter() - t0) / 20)
        cm.evaluate(v)
        tr = []
        for _ in range(5):
            t1 = time.perf_counter()
            cm.evaluate(v)
            tr.append(time.perf_counter() - t1)
        tn = float(np.median(tr))
        print(f"cost evaluation, batch {b}: fused kernel {np.median(t) / b * 1e6:.2f} us per candidate; "
              f"numpy reference {tn / b * 1e6:.1f} us")


if __name__ == "__main__":
    main()
