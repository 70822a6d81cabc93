"""Batch coordinator overhead: what the coordinating process costs per job, with 1 and 2 local workers.

Two quick sweeps, each one job file with a [sweep] of seeds, each at two sizes:
  ladder   the 4-part handbook LR2 ladder (two data-free drivers), 32 and 64 variants, budget 300;
  offaxis  the demo scenario (104 off-axis files, minimum phase), 8 and 16 variants, budget 150.
For each sweep, size and worker count, the medians over --repeats fresh batches of:
  coordinator CPU per job  the batch process's own CPU time (workers excluded) / jobs;
  overhead per job         (wall - the stages' own time / workers) / jobs, the stages' time being the sum of
                           (finished - started) in results.sqlite: what the batch adds around the stages
                           (collecting, hashing, loading, shipping, writing, the store). Issue 29 goal: <= 20 ms,
                           so that 16 workers give >= 14x;
then, from the two sizes, the overhead each more job adds (the serial part) and what a batch costs once; and the
scaling 1 -> 2 workers (wall). --dask repeats it on a LocalCluster (its scheduler runs in this process,
so the coordinator CPU includes the scheduler's).

Run: python benchmarks/batch.py [--repeats 3] [--dask] [--smoke]
"""

from __future__ import annotations

import argparse
import sqlite3
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from conftest import ladder_job  # noqa: E402

from xo_fit.batch.runner import run_batch  # noqa: E402


def ladder_sweep(folder: Path, n: int, budget: int) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    text, _ = ladder_job("LR2", start=1.5, spread=4.0)
    seeds = ", ".join(str(i + 1) for i in range(n))
    path = folder / "ladder.toml"
    path.write_text('name = "ladder"\n' + text + f"\n[search]\nbudget = {budget}\n[sweep]\n\"search.seed\" = [{seeds}]\n")
    return path


def offaxis_sweep(folder: Path, n: int, budget: int) -> Path:
    from xo_fit.demo import write_scenario

    job = write_scenario(folder / "demo")
    seeds = ", ".join(str(i + 1) for i in range(n))
    path = folder / "demo" / "offaxis.toml"
    path.write_text(job.read_text().replace('name = "wren-2way"', 'name = "offaxis"')
                    + f"\n[search]\nbudget = {budget}\n[sweep]\n\"search.seed\" = [{seeds}]\n")
    return path


def stage_seconds(out: Path) -> float:
    with sqlite3.connect(out / "results.sqlite") as db:
        return sum(f - s for s, f in db.execute("SELECT started, finished FROM runs WHERE status = 'done'"))


def one(job: Path, out: Path, workers: int, scheduler: str | None) -> dict:
    cpu, t = time.process_time(), time.perf_counter()
    rep = run_batch([str(job)], out, ["fit"], workers=workers, scheduler=scheduler, plots=False)
    wall, cpu = time.perf_counter() - t, time.process_time() - cpu
    n = rep.done
    assert n == rep.total and not rep.failed, rep
    stages = stage_seconds(out)
    return {"wall": wall, "cpu": cpu / n, "over": (wall - stages / workers) / n, "stage": stages / n}


def measure(label: str, jobs: dict, folder: Path, workers_list, repeats: int, cluster=None) -> None:
    """Medians per worker count and sweep size; then the overhead's two parts, from the two sizes: what each
    more job adds (the serial part, Amdahl's) and what a batch costs once (start-up, first loads, summary)."""
    walls = {}
    for workers in workers_list:
        over = {}
        for n, job in jobs.items():
            runs = []
            for r in range(repeats):
                scheduler = None
                if cluster is not None:
                    cluster.scale(workers)
                    cluster.wait_for_workers(workers)
                    scheduler = cluster.scheduler_address
                runs.append(one(job, folder / f"{label}-{n}-{workers}-{r}", workers, scheduler))
            med = {k: statistics.median(x[k] for x in runs) for k in runs[0]}
            walls[workers, n] = med["wall"]
            over[n] = med["over"] * n
            print(f"{label:>12} {n:>3} jobs, {workers} worker(s): wall {med['wall']:6.2f} s, stage "
                  f"{med['stage'] * 1000:5.0f} ms/job, coordinator CPU {med['cpu'] * 1000:5.1f} ms/job, overhead "
                  f"{med['over'] * 1000:6.1f} ms/job (medians of {repeats})", flush=True)
        if len(over) == 2:
            (n1, o1), (n2, o2) = sorted(over.items())
            slope = (o2 - o1) / (n2 - n1)
            print(f"{label:>12} {workers} worker(s): overhead {slope * 1000:.1f} ms per more job, {(o1 - slope * n1):.2f} s "
                  "once per batch", flush=True)
    n = max(jobs)
    if (1, n) in walls and (2, n) in walls:
        print(f"{label:>12} scaling 1 -> 2 workers at {n} jobs: {walls[1, n] / walls[2, n]:.2f}x", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--dask", action="store_true", help="also on a Dask LocalCluster")
    ap.add_argument("--smoke", action="store_true", help="tiny sizes, one repeat, one worker (the test suite's run)")
    args = ap.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="xo_fit-bench-batch-"))
    if args.smoke:
        sweeps = {"ladder": {2: ladder_sweep(folder / "l2", 2, 40)}, "offaxis": {2: offaxis_sweep(folder / "o2", 2, 20)}}
        workers_list, repeats = (1,), 1
    else:
        sweeps = {"ladder": {n: ladder_sweep(folder / f"l{n}", n, 300) for n in (32, 64)},
                  "offaxis": {n: offaxis_sweep(folder / f"o{n}", n, 150) for n in (8, 16)}}
        workers_list, repeats = (1, 2), args.repeats
    for label, jobs in sweeps.items():  # warm: kernels built, modules imported
        run_batch([str(jobs[min(jobs)])], folder / f"warm-{label}", ["fit"], workers=1, plots=False)
    for label, jobs in sweeps.items():
        measure(label, jobs, folder, workers_list, repeats)
    if args.dask:
        import distributed

        with distributed.LocalCluster(n_workers=0, threads_per_worker=1, processes=True, host="127.0.0.1",
                                      dashboard_address=None) as cluster:
            for label, jobs in sweeps.items():
                measure(f"dask-{label}", jobs, folder, workers_list, repeats, cluster)


if __name__ == "__main__":
    main()
