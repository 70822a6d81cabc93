"""Standalone kernels: the fused cost compiled ahead of time loads without numba and gives the JIT kernel's
numbers bit for bit (the comparison is with numba's own JIT build of the same generated code, a second code
path of the same compiler). A real background build, start to end, in a private cache of the test's own.

Needs a C compiler and Python's headers (pycc compiles a small C wrapper); missing ones skip the test
locally, while CI sets XO_FIT_REQUIRE_STANDALONE=1, which turns the skip into a failure.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import sysconfig
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
JOB = ROOT / "tests" / "data" / "hard-three-way.toml"


def _can_build() -> bool:
    return (shutil.which("cc") or shutil.which("gcc")) is not None and \
        Path(sysconfig.get_paths()["include"], "Python.h").exists()


if not _can_build():
    if os.environ.get("XO_FIT_REQUIRE_STANDALONE") == "1":
        raise RuntimeError("a C compiler and Python's headers are required (XO_FIT_REQUIRE_STANDALONE=1)")
    pytest.skip("no C compiler or Python headers", allow_module_level=True)

RUN = ("import sys, json; from xo_fit.cli import main; code = main(sys.argv[1:]); "
       "print(json.dumps({'code': code, 'numba': 'numba' in sys.modules}))")


def _fit(cache: Path, out: Path, standalone: str) -> dict:
    env = {**os.environ, "XO_FIT_CACHE": str(cache), "XO_FIT_STANDALONE": standalone}
    r = subprocess.run([sys.executable, "-c", RUN, "-q", "fit", str(JOB), "--out", str(out), "--no-plots",
                        "--budget", "3000"], capture_output=True, text=True, env=env, timeout=300)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout.strip().splitlines()[-1])
    assert info["code"] == 0, r.stderr
    return {**info, "result": json.loads((out / "result.json").read_text())}


def test_a_background_build_makes_later_fits_start_without_numba_and_agree_bit_for_bit(tmp_path):
    cache = tmp_path / "cache"
    first = _fit(cache, tmp_path / "a", "1")  # a topology new to this cache: the JIT, and a build starts
    assert first["numba"]
    kernels = cache / "kernels"  # XO_FIT_CACHE/kernels
    deadline = time.monotonic() + 240
    built = []
    while time.monotonic() < deadline:
        built = list(kernels.glob("xo_standalone_*.so"))
        if built and not list(kernels.glob("xo_standalone_*.building")):
            break
        time.sleep(0.5)
    assert built, sorted(p.name for p in kernels.iterdir())
    assert not list(kernels.glob("*.probe.npz"))  # the build cleans up after itself
    second = _fit(cache, tmp_path / "b", "1")
    assert not second["numba"]  # the standalone kernel: numba never imported
    jit = _fit(cache, tmp_path / "c", "0")  # XO_FIT_STANDALONE=0: the JIT kernel from numba's cache
    assert jit["numba"]
    for run in (second, jit):
        assert run["result"]["cost"] == first["result"]["cost"]  # same seed, same result, bit for bit
        assert run["result"]["parts"] == first["result"]["parts"]


def test_a_damaged_standalone_module_is_ignored(tmp_path):
    from xo_fit.fitting import cost_model
    from xo_fit.io.job import load_job
    from xo_fit.solver import kernels, standalone
    from xo_fit.solver.fused import FusedCost
    from xo_fit.system import load_system

    fc = FusedCost(cost_model(load_system(load_job(JOB)))[0])
    target = standalone.module_path(tmp_path, kernels.kernel_digest(fc.source()))
    target.write_bytes(b"not a shared object")
    os.environ["XO_FIT_STANDALONE"] = "1"
    try:
        assert standalone.load(tmp_path, kernels.kernel_digest(fc.source()), "cost_kernel") is None
    finally:
        os.environ["XO_FIT_STANDALONE"] = "0"


def test_no_build_without_a_compiler_or_when_turned_off(tmp_path, monkeypatch):
    from xo_fit.solver import standalone

    src = tmp_path / "k.py"
    src.write_text("")
    monkeypatch.setenv("XO_FIT_STANDALONE", "1")
    monkeypatch.setattr(standalone.shutil, "which", lambda name: None)
    assert not standalone.start_build(tmp_path, "abc", src, "cost_kernel", standalone.COST_SIGNATURE)
    monkeypatch.setenv("XO_FIT_STANDALONE", "0")
    monkeypatch.undo()
    monkeypatch.setenv("XO_FIT_STANDALONE", "0")
    assert not standalone.start_build(tmp_path, "abc", src, "cost_kernel", standalone.COST_SIGNATURE)
    assert not list(tmp_path.glob("*.building"))
