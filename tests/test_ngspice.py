"""Cross-check against ngspice (a general-purpose circuit simulator): a multi-way network with DCR, ESR,
a Zobel, a notch, an L-pad and Thiele-Small drivers (their RLC equivalent on the ngspice side).

Missing ngspice is a skip locally; CI sets XO_FIT_REQUIRE_NGSPICE=1, which turns it into a failure.
"""

from __future__ import annotations

import os
import shutil
import subprocess

import numpy as np
import pytest

from xo_fit.solver.network import Branch, compile_network

from conftest import ts_impedance

NGSPICE = shutil.which("ngspice")
if NGSPICE is None:
    if os.environ.get("XO_FIT_REQUIRE_NGSPICE") == "1":
        raise RuntimeError("ngspice is required (XO_FIT_REQUIRE_NGSPICE=1) but not on PATH")
    pytest.skip("ngspice not installed", allow_module_level=True)

# drivers as Thiele-Small models: Z = Re + s Le + Res / (1 + Qms (s/ws + ws/s)), Res = Re Qms / Qes
# (R. H. Small, JAES 1972); the motional part is Res || Lces || Cmes with Lces = Res / (Qms ws),
# Cmes = Qms / (Res ws).
DRIVERS = [dict(re=6.0, le=0.5e-3, fs=45.0, qms=3.0, qes=0.4), dict(re=4.8, le=0.06e-3, fs=850.0, qms=1.8, qes=1.3),
           dict(re=3.6, le=0.1e-3, fs=300.0, qms=2.5, qes=0.8)]

# a three-way: woofer (2nd-order + Zobel + notch), midrange band-pass, tweeter (3rd-order + L-pad)
PARTS = [
    # name, kind, a, b, value, series resistance (DCR / ESR)
    ("L1", "L", "in", "w1", 2.2e-3, 0.45), ("C1", "C", "w1", "0", 22e-6, 0.02),
    ("RZ", "R", "w1", "z1", 7.5, 0.0), ("CZ", "C", "z1", "0", 12e-6, 0.0),
    ("RN", "R", "w1", "n1", 4.0, 0.0), ("LN", "L", "n1", "n2", 0.4e-3, 0.3), ("CN", "C", "n2", "0", 6.8e-6, 0.05),
    ("CM1", "C", "in", "m1", 33e-6, 0.03), ("LM1", "L", "m1", "0", 1.5e-3, 0.5), ("LM2", "L", "m1", "m2", 0.47e-3, 0.2),
    ("CM2", "C", "m2", "0", 5.6e-6, 0.0),
    ("C3", "C", "in", "t1", 6.8e-6, 0.01), ("L3", "L", "t1", "0", 0.27e-3, 0.25), ("C4", "C", "t1", "t2", 18e-6, 0.0),
    ("R1", "R", "t2", "t3", 2.7, 0.0), ("R2", "R", "t3", "0", 6.8, 0.0),
]
LOADS = [("WOOF", "w1", "0", 0), ("MID", "0", "m2", 2), ("TW", "t3", "0", 1)]


def _node(n: str) -> str:
    return "0" if n == "0" else f"v({n})"


def spice_netlist(vs: float, rs: float) -> str:
    lines = ["* xo_fit cross-check", f"V1 src 0 DC 0 AC {vs!r}"]
    lines.append(f"RS src inx {rs!r}" if rs > 0 else "VS0 src inx DC 0")
    lines.append("VAM inx in DC 0")  # ammeter: the current into the network at "in"
    for name, kind, a, b, value, r in PARTS:
        mid = f"{name}_m" if r else b
        lines.append(f"{kind}{name} {a} {mid} {value!r}")
        if r:
            lines.append(f"R{name}_s {mid} {b} {r!r}")
    for name, a, b, k in LOADS:
        d = DRIVERS[k]
        ws = 2 * np.pi * d["fs"]
        res = d["re"] * d["qms"] / d["qes"]
        lines += [f"R{name}_e {a} {name}_1 {d['re']!r}", f"L{name}_e {name}_1 {name}_2 {d['le']!r}",
                  f"R{name}_m {name}_2 {b} {res!r}", f"L{name}_m {name}_2 {b} {res / (d['qms'] * ws)!r}",
                  f"C{name}_m {name}_2 {b} {d['qms'] / (res * ws)!r}"]
    lines += [".control", "set wr_vecnames", "set wr_singlescale", "option numdgt=16",
              "ac dec 25 20 20000",
              # each vector in parentheses: "v(a) -v(b)" would parse as one subtraction
              "wrdata out.txt " + " ".join(f"({_node(a)}-{_node(b)})" for _, a, b, _ in LOADS) + " v(in) i(vam)",
              "quit", ".endc", ".end"]
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("rs", [0.0, 0.05])
def test_against_ngspice(tmp_path, rs):
    vs = 2.83
    (tmp_path / "x.cir").write_text(spice_netlist(vs, rs))
    run = subprocess.run([NGSPICE, "-b", "x.cir"], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stdout + run.stderr
    data = np.loadtxt(tmp_path / "out.txt", skiprows=1)
    f = data[:, 0]
    cols = data[:, 1:].reshape(len(f), -1, 2)
    spice = cols[..., 0] + 1j * cols[..., 1]  # (F, loads + 2)

    branches = [Branch(n, k, a, b, r_coef=r) for n, k, a, b, _, r in PARTS]
    branches += [Branch(n, "D", a, b, driver=k) for n, a, b, k in LOADS]
    zd = np.stack([ts_impedance(f, **DRIVERS[k]) for k in range(3)])
    net = compile_network(branches, ["woofer", "tweeter", "mid"], f, zd, vs, rs)
    sol = net.solve_compiled(np.array([p[4] for p in PARTS]))
    for i, (_, _, _, k) in enumerate(LOADS):
        np.testing.assert_allclose(sol.voltages[0, k], spice[:, i], rtol=1e-6)
    z_spice = spice[:, -2] / spice[:, -1]
    np.testing.assert_allclose(sol.impedance[0], z_spice, rtol=1e-6)
    # and the dense reference path agrees too
    ref = net.solve_reference(np.array([p[4] for p in PARTS]))
    np.testing.assert_allclose(ref.voltages[0], sol.voltages[0], rtol=1e-9)
