"""Solver speed: candidate sweeps per second on the reference two-way network, against ngspice in one run.

The network is the demo's 13-part two-way (third-order ladders, a Zobel, a
notch, an L-pad; coils with wire DCR, 0.05 ohm source) at 300 log points,
with Thiele-Small drivers so that ngspice can run the very same circuit (their
RLC equivalent). Printed, each as the median of several repeats:

* ``kernel``: the generated kernel alone (what the fit's fused cost loop sees);
* ``solve()``: Network.solve with its complex result arrays and checks;
* ``dense``: numpy.linalg.solve over the full nodal matrix (the reference path);
* ``ngspice``: one ngspice process running a .control loop that alters every
  part and reruns the AC analysis, timed at two loop lengths so that start-up
  cancels out.

Run: python benchmarks/solver.py [--repeats 7] [--smoke]   (--smoke: tiny sizes, the test suite's run)
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from xo_fit.demo import JOB_TEXT  # noqa: E402
from xo_fit.job.reader import load_job  # noqa: E402
from xo_fit.constants import PIVOT_TOLERANCE  # noqa: E402
from xo_fit.model.system import load_system  # noqa: E402

WOOFER = dict(re=5.4, le=0.6e-3, fs=58.0, qms=3.4, qes=0.62)
TWEETER = dict(re=4.7, le=0.06e-3, fs=780.0, qms=1.6, qes=1.3)


def reference_system(ideal: bool = False):
    """The demo topology with Thiele-Small drivers (ideal Le) on 301 points, 20 Hz-20 kHz (ngspice's dec 100).

    ideal: lossless coils and capacitors and an ideal source (Rs = 0) instead of wire DCR and 0.05 ohm.
    """
    text = re.sub(r"\[driver\.\w+\.angles\].*?mirror = true\n", "", JOB_TEXT, flags=re.S)  # on axis only
    for line in ('reference = "listening_window"\n', 'extend_low = "order2"\n', 'phase = "minimum"\n'):
        text = text.replace(line, "")  # an ideal driver's response is not extended; the system target on axis
    if ideal:
        text = re.sub(r'\ndcr = "\d+awg"', "", text).replace("resistance = 0.05", "resistance = 0.0")
    text = re.sub(r'\[baffle\].*?\n\n', "", text, flags=re.S)  # no diffraction: an ideal flat driver
    text = re.sub(r'\nradius = [^\n]*', "", text)
    text = re.sub(r'response = [^\n]*\nimpedance = "data/woofer-impedance.txt"',
                  "response = 88\nimpedance = { " + ", ".join(f"{k} = {float(v)!r}" for k, v in WOOFER.items()) + " }", text)
    text = re.sub(r'response = "data/tweeter-response.txt"\nimpedance = "data/tweeter-impedance.txt"',
                  "response = 91\nimpedance = { " + ", ".join(f"{k} = {float(v)!r}" for k, v in TWEETER.items()) + " }", text)
    text = text.replace("f_min = 40", "f_min = 20").replace("points = 300", "points = 301")
    folder = Path(tempfile.mkdtemp())
    (folder / "job.toml").write_text(text)
    return load_system(load_job(folder / "job.toml"))


def candidates(system, b: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    v0 = system.values()
    return v0 * np.exp(rng.uniform(-0.4, 0.4, (b, v0.size)))


#: How long one timing of a batch lasts at least, s (--smoke: much less).
MIN_SECONDS = 0.2


def median_rate(fn, b: int, repeats: int, min_seconds: float | None = None) -> float:
    min_seconds = MIN_SECONDS if min_seconds is None else min_seconds
    fn()
    n = 1
    while True:
        t = time.perf_counter()
        for _ in range(n):
            fn()
        if time.perf_counter() - t > min_seconds / 4 or n > 1 << 16:
            break
        n *= 2
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        for _ in range(n):
            fn()
        times.append((time.perf_counter() - t) / n)
    return b / float(np.median(times))


def spice_deck(system, values: np.ndarray, out: str) -> str:
    job = system.job
    lines = ["* reference two-way", f"V1 src 0 DC 0 AC {job.source_voltage!r}", f"RS src in {job.source_resistance!r}"]
    r = system.network.series_resistance(values[None])[0]
    for p, v, rr in zip(job.valued_parts, values[0] if values.ndim > 1 else values, r):
        mid = f"{p.name}_m" if rr else p.nodes[1]
        lines.append(f"{p.type}{p.name} {p.nodes[0]} {mid} {float(v)!r}")
        if rr:
            lines.append(f"R{p.name}_s {mid} {p.nodes[1]} {float(rr)!r}")
    for p in job.parts:
        if p.type != "driver":
            continue
        d = WOOFER if p.driver == "woofer" else TWEETER
        ws = 2 * np.pi * d["fs"]
        res = d["re"] * d["qms"] / d["qes"]
        a, b = p.nodes
        lines += [f"R{p.name}_e {a} {p.name}_1 {d['re']!r}", f"L{p.name}_e {p.name}_1 {p.name}_2 {d['le']!r}",
                  f"R{p.name}_m {p.name}_2 {b} {res!r}", f"L{p.name}_m {p.name}_2 {b} {res / (d['qms'] * ws)!r}",
                  f"C{p.name}_m {p.name}_2 {b} {d['qms'] / (res * ws)!r}"]
    return "\n".join(lines) + "\n" + out + ".end\n"


def ngspice_rate(system, sweeps: tuple[int, int] = (50, 250)) -> float | None:
    exe = shutil.which("ngspice")
    if exe is None:
        return None
    job = system.job
    times = []
    for n in sweeps:
        vals = candidates(system, n, seed=3)
        ctl = [".control", "set noaskquit"]
        for row in vals:
            for p, v in zip(job.valued_parts, row):
                ctl.append(f"alter {p.type.lower()}{p.name.lower()} = {float(v)!r}")
            ctl.append("ac dec 100 20 20000")
            ctl.append("destroy all")
        ctl += ["quit", ".endc", ""]
        deck = spice_deck(system, vals[0], "\n".join(ctl))
        with tempfile.TemporaryDirectory() as d:
            Path(d, "bench.cir").write_text(deck)
            t = time.perf_counter()
            run = subprocess.run([exe, "-b", "bench.cir"], cwd=d, capture_output=True, text=True)
            times.append(time.perf_counter() - t)
            if run.returncode != 0:
                print(run.stdout[-2000:], run.stderr[-2000:])
                return None
    return (sweeps[1] - sweeps[0]) / (times[1] - times[0])


def flops_per_point(net) -> int:
    """Floating-point operations of the generated code per (candidate, frequency) point: the arithmetic
    operators and calls of the loop body's IR (a division or a square root counted as one)."""
    from xo_fit.solver import ir
    from xo_fit.solver.codegen import solver_code
    from xo_fit.solver.ir_kernel import expressions, walk

    code = solver_code(net)
    exprs = list(expressions(code.body)) + [e for pair in code.volts + (code.zin,) for e in pair]
    return sum(isinstance(x, (ir.Bin, ir.Neg)) or (isinstance(x, ir.Call) and x.fn in ("abs", "max", "sqrt"))
               for e in exprs for x in walk(e))


def peak_flops(seconds: float = 0.2) -> float:
    """A core's fused multiply-add rate (flop/s), measured: independent chains over an L1-resident array in a
    loop numba vectorises (the bound the generated kernel could reach were it only arithmetic)."""
    import numba

    @numba.njit(fastmath={"contract"})  # fused multiply-adds, no reassociation: the chain is not folded
    def fma(x, y, n, c, d):
        for _ in range(n):
            for i in range(x.size):  # independent lanes: vectorised; 32 dependent FMAs each, in registers
                v = x[i]
                for _k in range(32):
                    v = v * c + d
                y[i] = v
        return y[0]

    x = np.random.default_rng(0).random(1024)
    y = np.empty_like(x)
    fma(x, y, 1, 0.999, 0.001)
    n = 16
    while True:
        t = time.perf_counter()
        fma(x, y, n, 0.999, 0.001)
        dt = time.perf_counter() - t
        if dt > seconds / 4:
            break
        n *= 2
    best = min(_timed(fma, x, y, n, 0.999, 0.001) for _ in range(5))
    return 32 * 2 * x.size * n / best


def _timed(fn, *a) -> float:
    t = time.perf_counter()
    fn(*a)
    return time.perf_counter() - t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--repeats", type=int, default=7)
    ap.add_argument("--smoke", action="store_true", help="one repeat, batches 1 and 16, a short ngspice loop")
    args = ap.parse_args()
    if args.smoke:
        global MIN_SECONDS
        MIN_SECONDS = 0.002
    for ideal in (False, True):
        print("=" * 72)
        print("coils with wire DCR, 0.05 ohm source" if not ideal else "ideal L and C, ideal source (Rs = 0)")
        run(reference_system(ideal), 1 if args.smoke else args.repeats, (1, 16) if args.smoke else (1, 16, 256, 4096),
            (10, 40) if args.smoke else (50, 250))


def run(system, repeats: int, batches: tuple = (1, 16, 256, 4096), sweeps: tuple = (50, 250)) -> None:
    class args:  # noqa: N801 - keep the body below readable
        pass

    args.repeats = repeats
    net = system.network
    kernel = net.kernel()
    k = net.kernel_args()
    nf = net.frequencies.size
    d = len(net.driver_names)
    print(f"reference network: {len(net.valued)} valued parts, {d} drivers, {nf} points; "
          f"NUMBA_CPU_FEATURES {'set' if 'NUMBA_CPU_FEATURES' in os.environ else 'default'}")
    # correctness first: the fast path against the dense reference
    v = candidates(system, 64)
    fast, ref = net.solve(v), net.solve_reference(v)
    err = float(np.max(np.abs(fast.voltages - ref.voltages) / np.abs(ref.voltages)))
    print(f"max relative difference fast vs dense over 64 candidates: {err:.2e}")
    print(f"{'batch':>6} {'kernel /s':>12} {'solve() /s':>12} {'dense /s':>10}")
    rates = {}
    for b in batches:
        v = candidates(system, b)
        res = np.empty((b, d + 1, nf), dtype=complex)
        bad = np.empty((b, nf))
        scratch = np.empty((2 * d + 3, nf))

        def run_kernel():
            kernel(v, k["r_coef"], k["r_exp"], k["fin"], net.source_voltage, net.source_resistance,
                   PIVOT_TOLERANCE**2, scratch, res.view(np.float64), bad)

        rk = median_rate(run_kernel, b, args.repeats)
        rs = median_rate(lambda: net.solve(v), b, args.repeats)
        rd = median_rate(lambda: net.solve_reference(v[:16]), min(b, 16), 3) if b <= 16 else float("nan")
        rates[b] = (rk, rs)
        print(f"{b:>6} {rk:>12,.0f} {rs:>12,.0f} {rd:>10,.0f}")
    sp = ngspice_rate(system, sweeps)
    if sp is None:
        print("ngspice: not installed or failed (apt-get install ngspice) - no ratio")
        return
    ops = flops_per_point(net)
    peak = peak_flops(0.02 if args.repeats == 1 else 0.2)
    best = max(r[0] for r in rates.values())
    print(f"flop bound: {ops} flops per point x {nf} points per sweep; the kernel's best {best * ops * nf / 1e9:.2f} "
          f"GFLOP/s against a measured peak of {peak / 1e9:.2f} GFLOP/s (fused multiply-adds, one core): "
          f"{best * ops * nf / peak:.0%} of the bound, which would be {peak / (ops * nf):,.0f} sweeps/s")
    print(f"ngspice .control loop (alter + ac, one process): {sp:,.0f} sweeps/s")
    for b in (16, 256):
        if b not in rates:
            continue
        print(f"ratio at batch {b}: kernel {rates[b][0] / sp:,.0f}x, solve() {rates[b][1] / sp:,.0f}x ngspice "
              f"(goal 500x)")


if __name__ == "__main__":
    main()
