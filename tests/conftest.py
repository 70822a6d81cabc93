"""Shared helpers for the tests.

Reference values are quoted beside each check with their source; the facts
come from docs/references.md unless a test says otherwise.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import pytest

import os
import subprocess
import sys
import tempfile

# the suite compiles into a kernel cache of its own (a warm user cache would hide build failures, and the suite
# must not fill the user's): set before xo_fit is imported, removed with the session's temporary folder
_CACHE = tempfile.TemporaryDirectory(prefix="xo_fit-test-cache-")
os.environ["XO_FIT_CACHE"] = _CACHE.name

# the suite runs the kernels as users do: C builds where a compiler is (tests/test_standalone.py holds them to
# numba's); XO_FIT_STANDALONE=0 in the environment runs it all on numba instead
from xo_fit.cli.app import main  # noqa: E402
from xo_fit.solver.network import Branch, compile_network  # noqa: E402


def net_of(parts: list[tuple], loads: list[np.ndarray | float], f: np.ndarray, *, rs: float = 0.0,
           vs: float = 1.0):
    """Compile a network from compact tuples (name, kind, a, b[, r_coef[, r_exp]]) or (name, "D", a, b, driver).

    loads: driver impedances, each a number (resistive) or an array (F,).
    """
    branches = []
    for p in parts:
        name, kind, a, b = p[:4]
        if kind == "D":
            branches.append(Branch(name, "D", a, b, driver=p[4]))
        else:
            branches.append(Branch(name, kind, a, b, r_coef=p[4] if len(p) > 4 else 0.0,
                                   r_exp=p[5] if len(p) > 5 else 0.0))
    zd = np.stack([np.full(f.size, z, dtype=complex) if np.isscalar(z) else np.asarray(z, dtype=complex)
                   for z in loads])
    return compile_network(branches, [f"d{i}" for i in range(len(loads))], f, zd, vs, rs)


def ts_impedance(f, re=6.0, le=0.5e-3, fs=45.0, qms=3.0, qes=0.4):
    """Thiele-Small driver impedance (R. H. Small, JAES 1972), ideal voice-coil inductance."""
    s = 2j * np.pi * np.asarray(f)
    ws = 2 * np.pi * fs
    res = re * qms / qes
    return re + s * le + res / (1 + qms * (s / ws + ws / s))


def need(module: str):
    """Import an optional test dependency: skipped where it is missing, but a failure under CI (CI=true), where
    .ci/run installs every test extra, so that a check never goes missing silently."""
    if os.environ.get("CI"):
        import importlib

        return importlib.import_module(module)
    return pytest.importorskip(module)


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The README's main command run once per session as a subprocess (the console script's module form):
    (its folder, the completed process). Tests that read the demo's outputs share it; none may change them."""
    out = tmp_path_factory.mktemp("demo") / "demo"
    run = subprocess.run([sys.executable, "-m", "xo_fit", "demo", "--out", str(out)], capture_output=True,
                         text=True, timeout=600)
    assert run.returncode == 0, run.stderr
    return out, run


@pytest.fixture
def write_job(tmp_path):
    """Write a job file (and optional data files) into tmp_path; return its path."""

    def _write(text: str, files: dict[str, str] | None = None, name: str = "job.toml") -> Path:
        for rel, content in (files or {}).items():
            p = tmp_path / rel
            p.parent.mkdir(parents=True, exist_ok=True)
            p.write_text(content)
        path = tmp_path / name
        path.write_text(textwrap.dedent(text))
        return path

    return _write


@pytest.fixture
def cli(capsys):
    """Run the command line in-process; return (exit code, stdout, stderr)."""

    def _run(*args: str):
        code = main([str(a) for a in args])
        out = capsys.readouterr()
        return code, out.out, out.err

    return _run


def flat_curve(f_lo=10.0, f_hi=40000.0, n=200, level=90.0, phase=0.0) -> str:
    f = np.geomspace(f_lo, f_hi, n)
    return "\n".join(f"{x:.6f} {level:.4f} {phase:.4f}" for x in f) + "\n"


def resistive_curve(r=8.0, f_lo=10.0, f_hi=40000.0, n=200) -> str:
    f = np.geomspace(f_lo, f_hi, n)
    return "\n".join(f"{x:.6f} {r:.6f} 0.0" for x in f) + "\n"


# docs/references.md ladder coefficients, L = kL R / fc, C = kC / (R fc), source side first
LADDERS = {
    "LR2": ("LC", [0.31831, 0.07958], "CL", [0.07958, 0.31831]),
    "BW3": ("LCL", [0.23873, 0.21221, 0.07958], "CLC", [0.10610, 0.11937, 0.31831]),
    "LR4": ("LCLC", [0.30011, 0.25321, 0.15005, 0.05627], "CLCL", [0.08440, 0.10004, 0.16881, 0.45016]),
}


def ladder_job(name: str, *, r: float = 8.0, fc: float = 2000.0, start: float = 1.0, spread: float | None = None,
               tweeter_inverted: bool | None = None, impedance_min: float = 0.0, extra: str = "") -> tuple[str, dict]:
    """A two-way job with ideal resistive drivers and the handbook ladders of `name` (LR2, BW3, LR4).

    start: factor on the handbook values for the start; spread: search range handbook / s .. handbook * s
    (None: the parts are fixed). Returns (job text, handbook values by part name).
    """
    kl, cl, kh, ch = LADDERS[name]
    alignment, order = ("LR", int(name[2])) if name.startswith("LR") else ("BW", int(name[2]))
    lines = ['[grid]', 'f_min = 20', 'f_max = 20000', 'points = 241', '[source]', 'voltage = 2.83',
             '[driver.woofer]', 'response = 90', f'impedance = {r}', '[driver.tweeter]', 'response = 90',
             f'impedance = {r}']
    truth = {}

    def ladder(kinds, coefs, prefix, load):
        node = "in"
        for i, (kind, k) in enumerate(zip(kinds, coefs)):
            value = k * r / fc if kind == "L" else k / (r * fc)
            pname = f"{prefix}{kind}{i}"
            truth[pname] = value
            if i % 2 == 0:
                nxt = f"{prefix}{i}"
                nodes = (node, nxt)
                node = nxt
            else:
                nodes = (node, "0")
            lines.extend(['[[part]]', f'name = "{pname}"', f'type = "{kind}"', f'nodes = ["{nodes[0]}", "{nodes[1]}"]',
                          f'value = {value * start!r}'])
            if spread:
                lines.extend([f'min = {value / spread!r}', f'max = {value * spread!r}'])
        return node

    wn = ladder(kl, cl, "w", "woofer")
    lines.extend(['[[part]]', 'name = "WOOFER"', 'type = "driver"', 'driver = "woofer"', f'nodes = ["{wn}", "0"]'])
    tn = ladder(kh, ch, "t", "tweeter")
    inverted = (order % 4 == 2) if tweeter_inverted is None else tweeter_inverted
    nodes = f'["0", "{tn}"]' if inverted else f'["{tn}", "0"]'
    lines.extend(['[[part]]', 'name = "TWEETER"', 'type = "driver"', 'driver = "tweeter"', f'nodes = {nodes}'])
    lines.extend(['[target]', 'band = [100, 15000]',
                  '[target.way.woofer]', 'type = "lowpass"', f'alignment = "{alignment}"', f'order = {order}',
                  f'fc = {fc}', '[target.way.tweeter]', 'type = "highpass"', f'alignment = "{alignment}"',
                  f'order = {order}', f'fc = {fc}', '[cost]', f'impedance_min = {impedance_min}'])
    return "\n".join(lines) + "\n" + extra, truth
