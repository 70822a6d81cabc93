"""Search quality: success rates over seeds, per engine and budget, on six problems, in one run.

(a) the demo two-way (13 free parts, measured-style drivers);
(b) the hard three-way of tests/data/hard-three-way.toml (16 free parts: woofer ladder and Zobel, band-pass
    mid with a notch, tweeter high-pass and L-pad, Thiele-Small loads, ranges 1/2x..2x of a hand design);
(c) the ideal LR4 two-way: the 8-part handbook ladders, every part 2x off, ranges 1/4x..4x;
(d) (b) with a hard impedance floor ([limits] impedance_min = 3 ohm, above the plain fit's 2.71; no breakup rule):
    one limit active at the optimum;
(e) tests/data/limited-three-way.toml: (b) with every limit ([limits] floor 3 ohm, rated resistors, the woofer's
    xmax and power at 50 W, the 20 dB breakup rule): the floor, the ratings and the breakup rule active at the
    optimum;
(f) tests/data/limited-two-way.toml: another topology and set of limits (12 free parts: LR4 ladders, a Zobel, an
    L-pad, ranges 1/4x..4x; a 3.2 ohm floor and two rated resistors), so that the figure is not tuned to (e).

A seed succeeds when its design meets every limit (the limited problems) and its cost is within 0.5 % of the
best cost known for the problem: the lowest of BEST_KNOWN (the best any longer run found, with its budget and
seed) and what any run here reached that meets the limits; 1e-9 where that is the exact design. For each engine
and budget: successes out of the seeds, the median evaluations a successful run needed to get there (from its
history), the median search seconds, the search's own
evaluations per second, and the whole fit's (api.fit in this process: search, polish, the reported design's
scoring) evaluations per second against an ngspice .control loop that alters every part and reruns the AC
analysis of the same circuit on the same number of points (the hard three-way's Thiele-Small drivers as their
RLC equivalents; goal: 20x).

Run: python benchmarks/fit.py [--seeds 20] [--budgets 20000,100000] [--engines de,scipy-de] [--quick] [--smoke]
[--problems hard,floor,limited,twoway]
(nevergrad engines, e.g. --engines de,ng-CMA, take seconds per fit; they are left out by default.)
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
sys.path.insert(0, str(ROOT / "tests"))

from conftest import ladder_job  # noqa: E402  (the test helper that writes handbook ladder jobs)

from xo_fit.demo import write_scenario  # noqa: E402
from xo_fit.search.fitting import run_fit  # noqa: E402
from xo_fit.job.reader import load_job  # noqa: E402
from xo_fit.model.system import load_system  # noqa: E402


#: A cost this small is the exact design (the ideal LR4's handbook ladder): success however far below it lies.
EXACT = 1e-9
#: The lowest cost known per problem, meeting its limits (found with the default engine; budget, seed), so that
#: a success means the best basin whichever budgets a run compares; a run that finds lower says so.
BEST_KNOWN = {"hard": (11.23234, 100_000, 11), "floor": (12.92863, 20_000, 13), "limited": (17.77762, 500_000, 8),
              "twoway": (1.872769, 500_000, 2)}


def problems(folder: Path) -> dict:
    lr4 = folder / "lr4.toml"
    lr4.write_text(ladder_job("LR4", start=2.0, spread=4.0)[0])
    hard = ROOT / "tests" / "data" / "hard-three-way.toml"
    floor = folder / "floor.toml"
    floor.write_text(hard.read_text() + "[limits]\nimpedance_min = 3.0\nbreakup_db = 0\n")
    return {"demo": write_scenario(folder / "demo"), "hard": hard, "lr4": lr4, "floor": floor,
            "limited": ROOT / "tests" / "data" / "limited-three-way.toml",
            "twoway": ROOT / "tests" / "data" / "limited-two-way.toml"}


def to_success(history: tuple, target: float) -> int | None:
    """The evaluations after which the best so far met the limits and was within the target cost."""
    for h in history:
        if h[1] <= target and (len(h) < 3 or h[2] == 0):
            return int(h[0])
    return None


def ngspice_rate(system, sweeps: tuple[int, int] = (40, 200)) -> float | None:
    """Sweeps per second of one ngspice process altering every part and rerunning the AC analysis of the
    job's circuit (drivers with Thiele-Small impedance tables as their RLC equivalents; the same number of log
    points over the same range); None without ngspice or such drivers."""
    import math
    import shutil
    import subprocess

    from xo_fit.job.model import ThieleSmall

    exe = shutil.which("ngspice")
    job = system.job
    if exe is None or not all(isinstance(d.impedance, ThieleSmall) for d in job.drivers):
        return None
    f = system.frequencies
    per_decade = round((f.size - 1) / math.log10(f[-1] / f[0]))
    lines = ["* xo_fit fit benchmark", f"V1 src 0 DC 0 AC {job.source_voltage!r}", "RS src in 1e-9"]
    for p in job.valued_parts:
        lines.append(f"{p.type}{p.name} {p.nodes[0]} {p.nodes[1]} {float(p.value)!r}")
    for p in job.parts:
        if p.type != "driver":
            continue
        t = job.driver(p.driver).impedance
        ws, res = 2 * math.pi * t.fs, t.re * t.qms / t.qes
        a, b = p.nodes
        lines += [f"R{p.name}_e {a} {p.name}_1 {t.re!r}", f"L{p.name}_e {p.name}_1 {p.name}_2 {t.le!r}",
                  f"R{p.name}_m {p.name}_2 {b} {res!r}", f"L{p.name}_m {p.name}_2 {b} {res / (t.qms * ws)!r}",
                  f"C{p.name}_m {p.name}_2 {b} {t.qms / (res * ws)!r}"]
    times = []
    rng = np.random.default_rng(3)
    v0 = system.values()
    for n in sweeps:
        ctl = [".control", "set noaskquit"]
        for row in v0 * np.exp(rng.uniform(-0.4, 0.4, (n, v0.size))):
            ctl += [f"alter {p.type.lower()}{p.name.lower()} = {float(v)!r}" for p, v in zip(job.valued_parts, row)]
            ctl += [f"ac dec {per_decade} {f[0]!r} {f[-1]!r}", "destroy all"]
        deck = "\n".join(lines + ctl + ["quit", ".endc", ".end", ""])
        with tempfile.TemporaryDirectory() as d:
            Path(d, "bench.cir").write_text(deck)
            t = time.perf_counter()
            run = subprocess.run([exe, "-b", "bench.cir"], cwd=d, capture_output=True, text=True)
            times.append(time.perf_counter() - t)
            if run.returncode != 0:
                return None
    return (sweeps[1] - sweeps[0]) / (times[1] - times[0])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--budgets", default="20000,100000")
    ap.add_argument("--engines", default="de,scipy-de")
    ap.add_argument("--quick", action="store_true", help="5 seeds, 20000 only")
    ap.add_argument("--smoke", action="store_true", help="1 seed, budget 300, de only (the test suite's run)")
    ap.add_argument("--problems", default="demo,hard,lr4,floor,limited,twoway")
    a = ap.parse_args()
    seeds = 1 if a.smoke else 5 if a.quick else a.seeds
    budgets = [300] if a.smoke else [20000] if a.quick else [int(x) for x in a.budgets.split(",")]
    engines = ["de"] if a.smoke else a.engines.split(",")
    folder = Path(tempfile.mkdtemp(prefix="xo_fit-bench-fit-"))
    wanted = a.problems.split(",")
    spice = None
    for name, path in problems(folder).items():
        if name not in wanted:
            continue
        system = load_system(load_job(path))
        if name == "hard":
            spice = ngspice_rate(system)
        runs = {}
        for engine in engines:
            for budget in budgets:
                out = []
                for seed in range(1, seeds + 1):
                    t0 = time.perf_counter()
                    r = run_fit(system, optimizer=engine, budget=budget, seed=seed).search
                    out.append((r, time.perf_counter() - t0))
                runs[(engine, budget)] = out
        met = [r.cost for out in runs.values() for r, _ in out if r.violation == 0]
        known = BEST_KNOWN.get(name)
        best = min(met + ([known[0]] if known else [])) if met or known else float("nan")
        target = max(best * 1.005, EXACT)  # a cost of 1e-25 against 3e-29: both are the exact design
        limited = system.job.limits.active
        meeting = " meeting the limits" if limited else ""
        print(f"\n({name}) {len(system.job.free_parts)} free parts; best cost known {best:.6g}{meeting}; "
              f"success = {'meets the limits and ' if limited else ''}within 0.5 %")
        if known and met and min(met) < known[0] * (1 - 1e-4):
            print(f"  (lower than BEST_KNOWN's {known[0]:.6g} ({known[1]} evaluations, seed {known[2]}): update it)")
        print(f"  {'engine':<10} {'budget':>7} {'success':>8} {'median evals to success':>24} {'median s':>9} "
              f"{'evals/s':>9} {'whole fit/s':>11} {'median restarts':>15}" + (f" {'feasible':>8}" if limited else ""))
        for (engine, budget), out in runs.items():
            ok = [to_success(r.history, target) for r, _ in out]
            hits = [k for k in ok if k is not None]
            secs = statistics.median(r.seconds for r, _ in out)
            rate = statistics.median(r.evaluations / max(r.seconds, 1e-9) for r, _ in out)
            whole = statistics.median(r.evaluations / wall for r, wall in out)
            med = f"{statistics.median(hits):.0f}" if hits else "-"
            feas = f" {sum(r.violation == 0 for r, _ in out):>5}/{len(out):<2}" if limited else ""
            print(f"  {engine:<10} {budget:>7} {len(hits):>5}/{len(out):<2} {med:>24} {secs:>9.3f} {rate:>9.0f} "
                  f"{whole:>11.0f} {statistics.median(r.restarts for r, _ in out):>15.0f}{feas}")
            if spice:
                print(f"  {'':<10} {'':>7} whole fit {whole / spice:.1f}x the ngspice loop's {spice:.0f} sweeps/s "
                      "(goal 20x)")
        worst = {k: max(r.cost for r, _ in v) for k, v in runs.items()}
        print("  worst cost per engine and budget: " + ", ".join(f"{e} {b}: {c:.6g}" for (e, b), c in worst.items()))
    print(f"\n(evals/s: the search's own, evaluations / search seconds; whole fit/s: evaluations / the whole run_fit's "
          f"seconds in this process; numpy {np.__version__})")


if __name__ == "__main__":
    main()
