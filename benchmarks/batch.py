"""Batch coordinator overhead: what the coordinating process costs per job, with 1 and 2 local workers.

Two quick sweeps, each one job file with a [sweep] of seeds:
  ladder   the 4-part handbook LR2 ladder (two data-free drivers), 32 variants, budget 300;
  offaxis  the demo scenario (104 off-axis files, minimum phase), 8 variants, budget 150.
For each sweep and worker count, the medians over --repeats fresh batches of:
  coordinator CPU per job  the batch process's own CPU time (workers excluded) / jobs;
  overhead per job         (wall - the stages' own time / workers) / jobs, the stages' time being the sum of
                           (finished - started) in results.sqlite: what the batch adds around the stages
                           (collecting, hashing, loading, shipping, writing, the store). Issue 29 goal: <= 20 ms,
                           so that 16 workers give >= 14x;
and the scaling 1 -> 2 workers (wall). --dask repeats it on a LocalCluster (its scheduler runs in this process,
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


def measure(label: str, job: Path, folder: Path, workers_list, repeats: int, cluster=None) -> None:
    walls = {}
    for workers in workers_list:
        runs = []
        for r in range(repeats):
            scheduler = None
            if cluster is not None:
                cluster.scale(workers)
                cluster.wait_for_workers(workers)
                scheduler = cluster.scheduler_address
            runs.append(one(job, folder / f"{label}-{workers}-{r}", workers, scheduler))
        med = {k: statistics.median(x[k] for x in runs) for k in runs[0]}
        walls[workers] = med["wall"]
        print(f"{label:>8} {workers} worker(s): wall {med['wall']:6.2f} s, stage {med['stage'] * 1000:6.0f} ms/job, "
              f"coordinator CPU {med['cpu'] * 1000:6.1f} ms/job, overhead {med['over'] * 1000:6.1f} ms/job "
              f"(medians of {repeats})", flush=True)
    if 1 in walls and 2 in walls:
        print(f"{label:>8} scaling 1 -> 2 workers: {walls[1] / walls[2]:.2f}x", flush=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--dask", action="store_true", help="also on a Dask LocalCluster")
    ap.add_argument("--smoke", action="store_true", help="tiny sizes, one repeat, one worker (the test suite's run)")
    args = ap.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="xo_fit-bench-batch-"))
    if args.smoke:
        sweeps = [("ladder", ladder_sweep(folder, 2, 40)), ("offaxis", offaxis_sweep(folder, 2, 20))]
        workers_list, repeats = (1,), 1
    else:
        sweeps = [("ladder", ladder_sweep(folder, 32, 300)), ("offaxis", offaxis_sweep(folder, 8, 150))]
        workers_list, repeats = (1, 2), args.repeats
    for label, job in sweeps:  # warm: kernels built, modules imported
        run_batch([str(job)], folder / f"warm-{label}", ["fit"], workers=1, plots=False)
    for label, job in sweeps:
        measure(label, job, folder, workers_list, repeats)
    if args.dask:
        import distributed

        with distributed.LocalCluster(n_workers=0, threads_per_worker=1, processes=True, host="127.0.0.1",
                                      dashboard_address=None) as cluster:
            for label, job in sweeps:
                measure(f"dask-{label}", job, folder, workers_list, repeats, cluster)


if __name__ == "__main__":
    main()
