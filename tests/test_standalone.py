"""Standalone kernels: the generated kernels built by the C compiler (xo_fit.solver.standalone) against the same
text compiled by numba (a second, independent compiler of the same code), and the fallbacks.

Needs a C compiler; a missing one skips locally, while CI sets XO_FIT_REQUIRE_STANDALONE=1, which turns the
skip into a failure.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from xo_fit.solver import ctranslate, standalone

ROOT = Path(__file__).resolve().parents[1]
JOB = ROOT / "tests" / "data" / "hard-three-way.toml"

if standalone.compiler() is None:
    if os.environ.get("XO_FIT_REQUIRE_STANDALONE") == "1":
        raise RuntimeError("a C compiler is required (XO_FIT_REQUIRE_STANDALONE=1)")
    pytest.skip("no C compiler", allow_module_level=True)

RUN = ("import sys, json; from xo_fit.cli.app import main; code = main(sys.argv[1:]); "
       "print(json.dumps({'code': code, 'numba': 'numba' in sys.modules}))")


def _fit(cache: Path, out: Path, use_c: str, job: Path = JOB) -> dict:
    env = {**os.environ, "XO_FIT_CACHE": str(cache), "XO_FIT_STANDALONE": use_c}
    r = subprocess.run([sys.executable, "-c", RUN, "-q", "fit", str(job), "--out", str(out), "--no-plots",
                        "--budget", "3000"], capture_output=True, text=True, env=env, timeout=300)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout.strip().splitlines()[-1])
    assert info["code"] == 0, r.stderr
    return {**info, "result": json.loads((out / "result.json").read_text())}


def test_a_new_topology_is_built_once_and_fits_without_numba(tmp_path):
    cache = tmp_path / "cache"
    first = _fit(cache, tmp_path / "a", "1")
    assert not first["numba"]  # built by cc in-line: numba never imported, even for a topology new to the cache
    built = sorted((cache / "kernels").glob("xo_c_*.so"))
    assert len(built) == 1
    stamp = built[0].stat().st_mtime_ns
    second = _fit(cache, tmp_path / "b", "1")
    assert not second["numba"] and built[0].stat().st_mtime_ns == stamp  # loaded, not built again
    for key in ("cost", "parts"):
        assert second["result"][key] == first["result"][key]  # same seed, same result, bit for bit
    jit = _fit(cache, tmp_path / "c", "0")  # XO_FIT_STANDALONE=0: numba compiles the same text
    assert jit["numba"]
    # the kernels agree to ~1e-12, the searches then part in the last digits and the polish ends each within
    # its tolerance: the same basin, costs within 1e-6
    assert jit["result"]["cost"] == pytest.approx(first["result"]["cost"], rel=1e-6)


def _kernel_args(job: Path, batch: int = 256):
    from xo_fit.search.fitting import cost_model
    from xo_fit.job.reader import load_job
    from xo_fit.search.engines import make_space
    from xo_fit.model.fused import FusedCost
    from xo_fit.model.system import load_system

    s = load_system(load_job(job))
    fc = FusedCost(cost_model(s)[0])
    space = make_space(s.job)
    v = space.values(np.random.default_rng(7).random((batch, len(space.u0))))
    return s, fc, lambda: fc.kernel_args(v)


@pytest.mark.parametrize("job", ["hard-three-way.toml", "three-way-lr4.toml", "demo"])
def test_the_c_build_computes_what_numba_computes(tmp_path, job):
    from xo_fit.model.fused import FLAG

    if job == "demo":  # off axis: the listening window as reference, 9 positions summed
        from xo_fit.demo import write_scenario

        path = write_scenario(tmp_path / "s")
    else:
        path = ROOT / "tests" / "data" / job
    s, fc, args = _kernel_args(path)
    src = fc.text()
    fixed = standalone.inner_dims(args(), standalone._parameters(src, "cost_kernel"),
                                  standalone.ndims(standalone.COST_SIGNATURE))  # as a run builds it
    lib = standalone.build(src, "cost_kernel", standalone.COST_SIGNATURE, tmp_path / "k.so", fixed=fixed)

    ck = standalone.open_built(lib, src, "cost_kernel", standalone.COST_SIGNATURE, fixed)
    ns: dict = {}
    exec(compile(src.replace("cache=True, ", ""), "<kernel>", "exec"), ns)
    a, b = args(), args()
    n_c, n_jit = ck(*a), ns["cost_kernel"](*b)
    assert n_c == n_jit
    out_c, out_jit = a[-1], b[-1]
    ok = out_jit[:, FLAG] <= 0.0
    assert ok.sum() > 200
    np.testing.assert_allclose(out_c[ok, :FLAG], out_jit[ok, :FLAG], rtol=1e-10, atol=1e-12)


def test_the_solve_kernel_agrees_with_the_dense_reference():
    # the network's own kernel, built in C, against solve_dense (numpy.linalg.solve of the full nodal matrix)
    s, fc, _ = _kernel_args(JOB)
    v = s.values()[None] * np.linspace(0.7, 1.3, 5)[:, None]
    sol = s.network.solve_compiled(v)
    ref = s.network.solve_reference(v)
    assert s.network.kernel().uses_c  # built in C, not by numba
    np.testing.assert_allclose(sol.voltages, ref.voltages, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(sol.impedance, ref.impedance, rtol=1e-9)


def _fallback_probe():
    calls = []

    def fallback():
        calls.append(1)
        return lambda *args: -1  # stands for numba's kernel

    return calls, fallback


def test_a_damaged_library_or_a_failed_build_falls_back_to_numba(tmp_path, monkeypatch):
    _, fc, args = _kernel_args(JOB, batch=4)
    src, sig = fc.text(), standalone.COST_SIGNATURE
    cc = standalone.compiler()
    names, dims = standalone._parameters(src, "cost_kernel"), standalone.ndims(sig)
    key = standalone.key(src, cc, standalone.inner_dims(args(), names, dims))
    standalone.library_path(tmp_path, key).write_bytes(b"not a shared object")
    calls, fallback = _fallback_probe()
    k = standalone.load(tmp_path, src, "cost_kernel", sig, fallback)
    assert k(*args()) == -1 and calls == [1] and not k.uses_c
    # a compiler that fails: a note is left, and the next run does not try again
    standalone.library_path(tmp_path, key).unlink()
    bad = tmp_path / "bad-cc"
    bad.write_text("#!/bin/sh\necho 'bad-cc: broken' >&2\nexit 3\n")
    bad.chmod(0o755)
    monkeypatch.setenv("CC", str(bad))
    key = standalone.key(src, str(bad), standalone.inner_dims(args(), names, dims))
    k = standalone.load(tmp_path, src, "cost_kernel", sig, fallback)
    assert k(*args()) == -1 and calls == [1, 1]
    notes = list(tmp_path.glob("*.failed"))
    assert [n.name for n in notes] == [f"xo_c_{key}.failed"]
    assert "bad-cc failed (3): bad-cc: broken" in notes[0].read_text()
    monkeypatch.setattr(standalone, "build", lambda *a, **k: pytest.fail("built again after a failure"))
    assert standalone.load(tmp_path, src, "cost_kernel", sig, fallback)(*args()) == -1
    # a day later it is tried again
    old = notes[0].stat().st_mtime - standalone.FAILED_RETRY_S - 1
    os.utime(notes[0], (old, old))
    tried = []

    def failing_build(*a, **k):
        tried.append(1)
        raise OSError("disk full")

    monkeypatch.setattr(standalone, "build", failing_build)
    assert standalone.load(tmp_path, src, "cost_kernel", sig, fallback)(*args()) == -1 and tried == [1]


def test_other_inner_dimensions_get_a_build_of_their_own(tmp_path):
    # the arrays' inner dimensions are constants in the C: another batch size reuses the build, another
    # number of parts (vals' second dimension) does not and is built again
    src = """
import numba


@numba.njit(fastmath={"contract"})
def k(a, out):
    n = a.shape[0]
    m = a.shape[1]
    for i in range(n):
        s = 0.0
        for j in range(m):
            s += a[i, j]
        out[i, 0] = s
    return n
"""
    calls, fallback = _fallback_probe()
    k = standalone.load(tmp_path, src, "k", "i8(f8[:,::1], f8[:,::1])", fallback)
    for rows, cols in ((3, 4), (5, 4), (2, 7)):
        a = np.arange(rows * cols, dtype=float).reshape(rows, cols)
        out = np.zeros((rows, 1))
        assert k(a, out) == rows
        np.testing.assert_array_equal(out[:, 0], a.sum(axis=1))
    assert k.uses_c and not calls
    assert len(list(tmp_path.glob("xo_c_*.so"))) == 2


def test_no_compiler_or_turned_off_means_numba(tmp_path, monkeypatch):
    _, fc, _ = _kernel_args(JOB, batch=4)
    calls, fallback = _fallback_probe()
    monkeypatch.setattr(standalone.shutil, "which", lambda name: None)
    assert standalone.compiler() is None
    assert standalone.load(tmp_path, fc.text(), "cost_kernel", standalone.COST_SIGNATURE, fallback) is None
    monkeypatch.undo()
    monkeypatch.setenv("XO_FIT_STANDALONE", "0")
    assert standalone.load(tmp_path, fc.text(), "cost_kernel", standalone.COST_SIGNATURE, fallback) is None
    assert not list(tmp_path.iterdir())


def test_the_translator_keeps_python_semantics(tmp_path):
    # Python's max keeps a NaN in its first argument, / is true division, ** is pow, ints index
    src = '''
import numba
K = 2.5


@numba.njit(fastmath={"contract"})
def k(a, x, out):
    n = a.shape[0]
    for i in range(n):
        out[i, 0] = max(a[i], 0.0)
        out[i, 1] = x ** 2 + K
        out[i, 2] = 7 / 2
        out[i, 3] = abs(a[i]) if a[i] < 0.0 else sqrt(a[i])
    return n
'''
    lib = standalone.build(src, "k", "i8(f8[::1], f8, f8[:,::1])", tmp_path / "t.so")
    import ctypes

    fn = standalone.CKernel(ctypes.CDLL(str(lib)), "k", [1, 0, 2])
    a = np.array([np.nan, -4.0, 9.0])
    out = np.zeros((3, 4))
    assert fn(a, 3.0, out) == 3
    assert np.isnan(out[0, 0]) and out[1, 0] == 0.0 and out[2, 0] == 9.0  # max(nan, 0.0) is nan in Python
    assert np.all(out[:, 1] == 11.5) and np.all(out[:, 2] == 3.5)
    assert out[1, 3] == 4.0 and out[2, 3] == 3.0
    with pytest.raises(TypeError):
        fn(a.astype(np.float32), 3.0, out)
    for bad in ("def k(a, x, out):\n    return a.sum()\n", "def k(a, x, out):\n    while True:\n        pass\n",
                "import os\nos.system('x')\ndef k(a, x, out):\n    return 0\n"):
        with pytest.raises(ValueError):
            ctranslate.to_c(bad, "k", [("a", 1), ("x", 0), ("out", 2)])


def test_the_c_logarithm_is_libm_s_to_a_few_ulp(tmp_path):
    # the kernels' ln in C (ctranslate.LN_C, the same steps as vecmath.ln) against numpy's log (libm)
    src = '''
import numba


@numba.njit(fastmath={"contract", "reassoc"})
def k(x, out):
    n = x.shape[0]
    for i in range(n):
        out[i] = ln(x[i])
    return n
'''
    lib = standalone.build(src, "k", "i8(f8[::1], f8[::1])", tmp_path / "ln.so")
    import ctypes

    fn = standalone.CKernel(ctypes.CDLL(str(lib)), "k", [1, 1])
    x = np.concatenate([np.geomspace(1e-300, 1e300, 200_001), 1.0 + np.linspace(-0.3, 0.3, 20_001),
                        [1.0, 2.0, np.sqrt(2.0), 0.5]])
    out = np.empty_like(x)
    fn(x, out)
    ref = np.log(x)
    assert out[x == 1.0][0] == 0.0
    assert np.max(np.abs(out - ref) / np.maximum(np.abs(ref), 1.0)) < 4 * np.finfo(float).eps  # as test_vecmath


def test_calls_from_several_threads_keep_their_own_arguments(tmp_path):
    # the packed arguments live per thread: threads calling one kernel at once each get their own sums
    import threading

    src = """
import numba


@numba.njit(fastmath={"contract"})
def k(a, out):
    n = a.shape[0]
    for i in range(n):
        s = 0.0
        for r in range(2500):
            for j in range(8):
                s += a[i, j]
        out[i, 0] = s
    return n
"""
    calls, fallback = _fallback_probe()
    k = standalone.load(tmp_path, src, "k", "i8(f8[:,::1], f8[:,::1])", fallback)
    errors = []

    def work(seed):
        rng = np.random.default_rng(seed)
        for _ in range(200):
            a = rng.random((3, 8))
            out = np.zeros((3, 1))
            k(a, out)
            if not np.allclose(out[:, 0], 2500 * a.sum(axis=1)):
                errors.append(seed)

    threads = [threading.Thread(target=work, args=(s,)) for s in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert k.uses_c and not calls and not errors
