"""`fit --workers N`: one fit on N processes (islands, xo_fit.search.islands) against one process, and where the time
goes, so that the figures for 8 and 16 workers can be read on a machine with fewer cores.

Problems: the demo two-way (13 free parts, 140 off-axis positions) and the hard three-way of
tests/data/hard-three-way.toml (16 free parts); budgets 320,000 and 40,000 evaluations. For each problem, budget
and worker count (1 and 2 by default), over --seeds seeds, side by side in one run (seed by seed, each
configuration in turn): the median wall time, the median CPU time (this process and its children), the median
and the worst final cost, and the successes (within 0.5 % of the best cost any run here reached). With more than
one worker both schemes run: ``islands`` (exchanging their best every MIGRATION_GENERATIONS generations) and
``indep`` (the same islands without exchange).

The model (--model 8,16: those worker counts run too, with as many processes on however many cores this machine
has; their CPU times and costs do not depend on the cores, their walls do): from the islands' own clocks,
    serial     the parent's CPU: the cost built once (kernel loaded), the processes started (fork, per process),
               the winner scored and the start cost, the gathering: nothing of it shrinks with N;
    island     each island's global search CPU (the parallel part; its sum against the 1-worker search CPU is the
               work the split adds: smaller populations, more generations) and its polish CPU (the best three
               basins of all islands, polished side by side);
    exchange   the epochs and the seconds an island waited at them (on a loaded machine mostly the neighbour's
               lost time slices; on free cores the pipe's round trip, measured here by a ping-pong);
and the wall they predict on N free cores: the parent's CPU + the largest island's search and polish CPU + epochs x
round trip, against the 1-worker fit's CPU (its wall on a free core): the speed-up. CPU times barely depend on the
load beside (walls do). Issue 29 goal: 8 workers >= 5x on 320,000 at equal quality.

Run: python benchmarks/workers.py [--seeds 3] [--budgets 320000,40000] [--workers 1,2] [--model 8,16]
[--problems demo,hard] [--smoke]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from conftest import ladder_job  # noqa: E402  (the test helper that writes handbook ladder jobs)

from xo_fit.demo import write_scenario  # noqa: E402
from xo_fit.job.reader import load_job  # noqa: E402
from xo_fit.model.system import load_system  # noqa: E402
from xo_fit.search.fitting import fit_problem, run_fit, run_fit_restarts  # noqa: E402
from xo_fit.search.islands import MIGRATION_GENERATIONS  # noqa: E402


#: A cost this small is the exact design (the smoke run's LR4 ladder): success however far below it lies.
EXACT = 1e-9
#: Seconds of rest before each measured fit: OpenBLAS threads that the one before started (a thread count set after
#: a fork starts them again) spin about 0.1 s, which would count in the next one's CPU (xo_fit.search.lbfgsb).
SETTLE = 0.3


def problems(folder: Path, smoke: bool) -> dict:
    if smoke:
        lr4 = folder / "lr4.toml"
        lr4.write_text(ladder_job("LR4", start=2.0, spread=4.0)[0])
        return {"lr4": lr4}
    return {"demo": write_scenario(folder / "demo"), "hard": ROOT / "tests" / "data" / "hard-three-way.toml"}


def cpu() -> float:
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def one(system, budget: int, workers: int, seed: int, exchange: bool) -> dict:
    time.sleep(SETTLE)
    c0, own0, t0 = cpu(), time.process_time(), time.perf_counter()
    if workers == 1:
        out = run_fit(system, budget=budget, seed=seed)
    else:
        out, _ = run_fit_restarts(system, workers, budget=budget, seed=seed, exchange=exchange)
    wall, used, own = time.perf_counter() - t0, cpu() - c0, time.process_time() - own0
    row = {"wall": wall, "cpu": used, "cost": out.scored.cost, "ok": out.search.violation == 0,
           "evaluations": out.search.evaluations}
    if out.islands is not None:
        row.update(parts(out.islands, own))
    return row


def parts(islands: dict, own: float) -> dict:
    """Where an islands fit's time went, from the clocks (seconds); own: the parent's CPU in the call."""
    c, runs = islands["clock"], [r for r in islands["runs"] if r.result is not None]
    search = [r.clock["cpu_searched"] - r.clock["cpu_ready"] for r in runs]
    polish = [r.clock["cpu_ended"] - r.clock["cpu_searched"] for r in runs]
    fork = c["cpu_started"] - c["cpu_start"]
    lead = leads(islands)
    return {"start": c["started"] - c["start"], "fork": fork, "first": min(r.clock["ready"] for r in runs) - c["start"],
            "after": own - fork, "lead_max": max(lead[i] for i, r in enumerate(islands["runs"]) if r.result),
            "reach": max(lead[i] + r.clock["cpu_searched"] - r.clock["cpu_ready"]
                         for i, r in enumerate(islands["runs"]) if r.result is not None),
            "search_sum": sum(search), "search_max": max(search),
            "polish_max": max(polish), "epochs": max(r.clock.get("epochs", 0) for r in runs),
            "waited": statistics.median(r.clock.get("waited", 0.0) for r in runs),
            "received": sum(r.received for r in runs)}


def leads(islands: dict) -> list[float]:
    """Per island, the CPU seconds on its path before it could search: the forks of the processes above it up to
    the one that forked its own (their CPU when that fork returned, from the forking processes' clocks:
    xo_fit.search.forks) and its own CPU until ready (its start-up, the forks it made itself). Where the parent
    started every process itself (no "forked" in its clock), every island's path is the parent's whole start."""
    c, runs = islands["clock"], islands["runs"]
    if "forked" not in c or not c["forked"]:
        return [c["cpu_started"] - c["cpu_start"] + r.clock.get("cpu_ready", 0.0) for r in runs]
    path = dict(c["forked"])  # island -> CPU on its path until its process began
    pending = True
    while pending:
        pending = False
        for i, r in enumerate(runs):
            for j, at in r.clock.get("forked", {}).items():
                if i in path and j not in path:
                    path[j] = path[i] + at
                    pending = True
    return [path.get(i, 0.0) + r.clock.get("cpu_ready", 0.0) for i, r in enumerate(runs)]


def round_trip(n: int = 2000) -> float:
    """Seconds of one exchange's pipe round trip between two processes (a small message each way)."""
    import multiprocessing

    import numpy as np

    a, b = multiprocessing.Pipe()
    p = multiprocessing.Process(target=_echo, args=(b, n), daemon=True)
    p.start()
    msg = ("post", 1, (1.0, 0.0, np.zeros(16)))
    a.send(msg)
    a.recv()
    t = time.perf_counter()
    for _ in range(n):
        a.send(msg)
        a.recv()
    dt = (time.perf_counter() - t) / n
    p.join()
    return dt


def _echo(conn, n: int) -> None:
    for _ in range(n + 1):
        conn.send(conn.recv())


def med(rows: list, key: str) -> float:
    return statistics.median(r[key] for r in rows)


def report(name: str, budget: int, results: dict, model: list[int], rtt: float) -> None:
    best = min(r["cost"] for rows in results.values() for r in rows if r["ok"])
    print(f"\n({name}) budget {budget}; best cost here {best:.6g}; success = within 0.5 %")
    print(f"  {'workers':>7} {'scheme':<8} {'wall s':>7} {'cpu s':>7} {'speed-up':>8} {'median cost':>12} "
          f"{'worst cost':>11} {'success':>8}")
    one_wall = med(results[(1, "-")], "wall")
    for (w, scheme), rows in results.items():
        note = "" if w == 1 or w not in model else "  (oversubscribed: wall not a speed figure)"
        ok = sum(r["ok"] and r["cost"] <= max(best * 1.005, EXACT) for r in rows)
        print(f"  {w:>7} {scheme:<8} {med(rows, 'wall'):>7.3f} {med(rows, 'cpu'):>7.3f} "
              f"{one_wall / med(rows, 'wall'):>7.2f}x {med(rows, 'cost'):>12.7g} "
              f"{max(r['cost'] for r in rows):>11.7g} {ok:>5}/{len(rows):<2}{note}")
    single = med(results[(1, "-")], "cpu")  # one process: its wall on a free core
    print(f"  model (medians, ms unless marked; pipe round trip {rtt * 1e6:.0f} us; 1 worker: {single:.3f} s CPU)")
    print(f"  {'workers':>7} {'scheme':<8} {'start':>6} {'cpu':>6} {'/proc':>6} {'first':>6} {'after':>6} "
          f"{'lead':>6} {'search sum s':>12} {'x 1-worker':>10} {'largest s':>9} {'polish':>6} {'epochs':>6} "
          f"{'waited':>6} {'migrants':>8} {'predicted s':>11} {'speed-up':>8}")
    for (w, scheme), rows in results.items():
        if w == 1:
            continue
        predicted = med(rows, "after") + med(rows, "reach") + med(rows, "polish_max") + med(rows, "epochs") * rtt
        print(f"  {w:>7} {scheme:<8} {1e3 * med(rows, 'start'):>6.1f} {1e3 * med(rows, 'fork'):>6.1f} "
              f"{1e3 * med(rows, 'fork') / w:>6.2f} "
              f"{1e3 * med(rows, 'first'):>6.1f} {1e3 * med(rows, 'after'):>6.1f} {1e3 * med(rows, 'lead_max'):>6.1f} "
              f"{med(rows, 'search_sum'):>12.3f} "
              f"{med(rows, 'search_sum') / single:>9.2f}x {med(rows, 'search_max'):>9.3f} "
              f"{1e3 * med(rows, 'polish_max'):>6.1f} {med(rows, 'epochs'):>6.0f} {1e3 * med(rows, 'waited'):>6.1f} "
              f"{med(rows, 'received'):>8.0f} {predicted:>11.3f} {single / predicted:>7.2f}x")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--budgets", default="320000,40000")
    ap.add_argument("--workers", default="1,2")
    ap.add_argument("--model", default="", help="more worker counts to run for the model, e.g. 8,16")
    ap.add_argument("--problems", default="demo,hard")
    ap.add_argument("--smoke", action="store_true", help="the LR4 ladder, budget 4000, 1 seed, 1 and 2 workers")
    a = ap.parse_args()
    seeds = 1 if a.smoke else a.seeds
    budgets = [4000] if a.smoke else [int(x) for x in a.budgets.split(",")]
    model = [] if a.smoke or not a.model else [int(x) for x in a.model.split(",")]
    counts = sorted({1, *(int(x) for x in a.workers.split(",")), *model})
    folder = Path(tempfile.mkdtemp(prefix="xo_fit-bench-workers-"))
    rtt = round_trip(200 if a.smoke else 2000)
    print(f"{os.cpu_count()} cores here; islands exchange every {MIGRATION_GENERATIONS} generations")
    for name, path in problems(folder, a.smoke).items():
        if not a.smoke and name not in a.problems.split(","):
            continue
        system = load_system(load_job(path))
        t = time.perf_counter()
        fit_problem(system)
        print(f"\n({name}) the cost built and loaded in {1e3 * (time.perf_counter() - t):.1f} ms (first time)")
        run_fit(system, budget=500)  # warm: the kernel is cached and loaded
        for budget in budgets:
            results: dict = {}
            for seed in range(1, seeds + 1):  # side by side: every configuration for one seed, then the next
                for w in counts:
                    for scheme in (["-"] if w == 1 else ["islands", "indep"]):
                        results.setdefault((w, scheme), []).append(one(system, budget, w, seed, scheme == "islands"))
            report(name, budget, results, model, rtt)
    print("\n(wall and cpu: medians over seeds; cpu counts this process and its children; speed-up: the 1-worker "
          "wall over this one's; model: start = the parent starting every process (wall), cpu = its CPU for it, "
          "/proc = that per island (in a fork tree the parent forks log2 N + 1 times), "
          "first = until the first island could search (wall), after = the rest of the "
          "parent's CPU (the cost built, the winner and the start scored, the gathering); lead = the largest CPU "
          "on an island's path before it searches (the forks above it, its start-up); search sum = the "
          "islands' global search CPU together, x 1-worker against the 1-worker fit's CPU; largest = the largest "
          "island's; polish = the largest island's polish CPU; predicted = after + the largest lead + search of "
          "an island + polish + epochs x round trip, on N free cores; its speed-up against the 1-worker fit's "
          "CPU, which is its wall on a free core)")


if __name__ == "__main__":
    main()
