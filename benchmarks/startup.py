"""Start-up: where the time of a whole `xo-fit fit` goes, warm and with a topology seen for the first time.

Goals (issue 13): a whole fit of the 16-part three-way (tests/data/hard-three-way.toml) with a warm kernel
cache in <= 0.8 s, and a first fit of a new topology (empty cache) in <= 1.5 s. Each figure is the median of
several runs of a fresh process (the machine is shared).

Warm means the kernel cache holds the topology's kernels; with a C compiler (the default) these are standalone
C builds (xo_fit.solver.standalone: they load without numba). "numba kernel" is the same with
XO_FIT_STANDALONE=0 (numba's cached kernel). Empty cache means a topology this machine has never seen: with a
compiler its kernel is printed as C and built in-line (once); with XO_FIT_STANDALONE=0 numba compiles it.

Run: python benchmarks/startup.py [--runs 5] [--smoke]
(--smoke: one run of each warm figure, no numba kernel and no empty cache: the test suite's run)
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
JOB = ROOT / "tests" / "data" / "hard-three-way.toml"
PY = sys.executable


# as installed: pip writes byte code when it installs a wheel, so the runs may keep theirs
# (some shells here set PYTHONDONTWRITEBYTECODE, which would compile xo_fit's modules in every run)
BASE_ENV = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}


def timed(cmd: list[str], env: dict | None = None) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, capture_output=True, env={**BASE_ENV, **(env or {})})
    return time.perf_counter() - t0


def median(cmd: list[str], runs: int, env_for=None) -> float:
    return statistics.median(timed(cmd, env_for(k) if env_for else None) for k in range(runs))


PHASES = r"""
import time, sys
t0 = time.perf_counter()
import numpy, scipy
t_np = time.perf_counter()
t_nb = time.perf_counter()
import xo_fit.cli.app
from xo_fit.job.reader import load_job
from xo_fit.model.system import load_system
t_imp = time.perf_counter()
s = load_system(load_job(sys.argv[1]))
t_load = time.perf_counter()
from xo_fit.search.fitting import cost_model
from xo_fit.model.fused import FusedCost
fc = FusedCost(cost_model(s)[0])
fc(s.values()[None])
t_first = time.perf_counter()
from xo_fit.search.fitting import run_fit
out = run_fit(s)
t_fit = time.perf_counter()
print(f"{t_np - t0:.3f} {t_imp - t_nb:.3f} {t_load - t_imp:.3f} {t_first - t_load:.3f} "
      f"{out.search.seconds:.3f} {t_fit - t_first - out.search.seconds:.3f} {int('numba' in sys.modules)}")
"""


KERNELS = r"""
import ctypes, statistics, sys, time
import numpy as np
from xo_fit.search.fitting import cost_model
from xo_fit.job.reader import load_job
from xo_fit.search.space import make_space
from xo_fit.solver import standalone
from xo_fit.model.fused import FusedCost
from xo_fit.model.system import load_system

s = load_system(load_job(sys.argv[1]))
fc = FusedCost(cost_model(s)[0])
space = make_space(s.job)
v = np.ascontiguousarray(space.values(np.random.default_rng(1).random((512, len(space.u0)))))
def args():
    return fc.kernel_args(v)
import tempfile, pathlib
fixed = standalone.inner_dims(args(), fc.ir())  # as a fit builds it
lib = standalone.build(fc.ir(), pathlib.Path(tempfile.mkdtemp()) / "k.so",
                       fixed=fixed)
c = standalone.open_built(lib, fc.ir(), fixed)
ns = {}
exec(compile(fc.text().replace("cache=True, ", ""), "<kernel>", "exec"), ns)
jit = ns["cost_kernel"]
a = args(); jit(*a); c(*a)
tc, tj = [], []
for _ in range(21):
    for fn, ts in ((c, tc), (jit, tj)):
        a = args(); t0 = time.perf_counter(); fn(*a); ts.append(time.perf_counter() - t0)
print(statistics.median(tc), statistics.median(tj))
"""


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--smoke", action="store_true", help="one run, warm figures only")
    args = ap.parse_args()
    runs = 1 if args.smoke else args.runs
    out = tempfile.mkdtemp(prefix="xo_fit-bench-startup-")
    fit = [PY, "-m", "xo_fit", "-q", "fit", str(JOB), "--out", out, "--no-plots"]
    if not args.smoke:
        subprocess.run(fit, check=True, capture_output=True, env={**BASE_ENV, "XO_FIT_STANDALONE": "0"})  # JIT
    subprocess.run(fit, check=True, capture_output=True, env=BASE_ENV)  # the C build, once
    print(f"python -c pass:            {median([PY, '-c', 'pass'], runs):.3f} s")
    print(f"import xo_fit:             {median([PY, '-c', 'import xo_fit'], runs):.3f} s")
    print(f"xo-fit --version:          {median([PY, '-m', 'xo_fit', '--version'], runs):.3f} s")
    print(f"xo-fit check (hard job):   {median([PY, '-m', 'xo_fit', '-q', 'check', str(JOB)], runs):.3f} s")
    warm = median(fit, runs)
    if args.smoke:
        print(f"whole fit, warm cache:     {warm:.3f} s (goal <= 0.8)")
        phases(runs)
        return
    jit = median(fit, runs, lambda k: {"XO_FIT_STANDALONE": "0"})
    cold = median(fit, runs, lambda k: {"XO_FIT_CACHE": tempfile.mkdtemp(prefix="xo_fit-cold-")})
    cold_jit = median(fit, max(2, runs // 2), lambda k: {"XO_FIT_CACHE": tempfile.mkdtemp(prefix="xo_fit-cold-"),
                                                         "XO_FIT_STANDALONE": "0"})
    print(f"whole fit, warm cache:     {warm:.3f} s (goal <= 0.8)")
    print(f"whole fit, warm, numba kernel: {jit:.3f} s ({jit / warm:.2f}x the standalone start)")
    print(f"whole fit, empty cache:    {cold:.3f} s (goal <= 1.5; the C build in-line)")
    print(f"whole fit, empty cache, numba: {cold_jit:.3f} s ({cold_jit / cold:.2f}x)")
    r = subprocess.run([PY, "-c", KERNELS, str(JOB)], check=True, capture_output=True, text=True, env=BASE_ENV)
    tc, tj = (float(x) for x in r.stdout.split())
    print(f"fused cost kernel, 512 candidates (medians of 21, interleaved): C {tc * 1e3:.2f} ms, "
          f"numba {tj * 1e3:.2f} ms (C at {tj / tc:.2f}x numba's rate)")
    phases(runs)


def phases(runs: int) -> None:
    """Where one warm process spends its time, medians of ``runs`` processes."""
    rows = []
    for _ in range(runs):
        r = subprocess.run([PY, "-c", PHASES, str(JOB)], check=True, capture_output=True, text=True, env=BASE_ENV)
        rows.append([float(x) for x in r.stdout.split()])
    names = ["numpy + scipy import", "xo_fit import", "job + data load", "first kernel call",
             "search (20,000 evaluations)", "scoring after the search"]
    print("phases inside one warm process (medians):")
    for i, n in enumerate(names):
        print(f"  {n:<28} {statistics.median(p[i] for p in rows):.3f} s")
    print(f"  numba loaded in the process: {'yes' if any(p[-1] for p in rows) else 'no'}")


if __name__ == "__main__":
    main()
