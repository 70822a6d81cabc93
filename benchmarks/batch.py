"""Batch throughput: 32 small jobs with 1 and 2 local workers; jobs per minute, scaling, runner overhead.

Each job is a small fit (the 4-part handbook LR2 ladder from a 1.5x-off start,
budget 2000, seed varied). Printed for 1 and 2 workers: wall time, jobs per
minute, the scaling ratio, and the runner's overhead per job (wall time x
workers / jobs, minus the jobs' own compute time as the workers measured it).

Run: python benchmarks/batch.py
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from conftest import ladder_job  # noqa: E402

from xo_fit.batch.runner import run_batch  # noqa: E402

N_JOBS = 32


def make_jobs(folder: Path) -> None:
    for i in range(N_JOBS):
        text, _ = ladder_job("LR2", start=1.5, spread=4.0)
        (folder / f"job{i:02d}.toml").write_text(f'name = "job{i:02d}"\n' + text +
                                                 f"\n[search]\nbudget = 2000\nseed = {i + 1}\n")


def main() -> None:
    folder = Path(tempfile.mkdtemp())
    make_jobs(folder)
    run_batch([str(folder / "job00.toml")], folder / "warm", ["fit"], workers=1, plots=False)  # caches
    walls = {}
    for workers in (1, 2):
        out = folder / f"out{workers}"
        t = time.perf_counter()
        rep = run_batch([str(folder / "*.toml")], out, ["fit"], workers=workers, plots=False)
        wall = time.perf_counter() - t
        walls[workers] = wall
        searched = []
        import json

        for i in range(N_JOBS):
            doc = json.loads((out / f"job{i:02d}" / "fit" / "result.json").read_text())
            searched.append(doc["search"]["seconds"])
        per_job = wall * workers / N_JOBS
        print(f"{workers} worker(s): {rep.done} jobs in {wall:.2f} s = {N_JOBS / wall * 60:.0f} jobs/min; "
              f"per job {per_job * 1000:.0f} ms of worker time, of which search {sum(searched) / N_JOBS * 1000:.0f} ms; "
              f"overhead {(per_job - sum(searched) / N_JOBS) * 1000:.0f} ms/job (loading, scoring, files, store)")
    print(f"scaling 1 -> 2 workers: {walls[1] / walls[2]:.2f}x")


if __name__ == "__main__":
    main()
