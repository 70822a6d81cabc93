"""Standalone kernels: the generated kernels printed as C and built by the C compiler (xo_fit.solver.standalone)
against the same IR printed as Python and compiled by numba (a second, independent compiler of the same code),
and the fallbacks.

Needs a C compiler; a missing one skips locally, while CI sets XO_FIT_REQUIRE_STANDALONE=1, which turns the
skip into a failure.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from xo_fit.solver import ir, standalone
from xo_fit.solver.ir import Array, Function, Return, f8, i8, let, loop, update
from xo_fit.solver.ir_kernel import Kernel
from xo_fit.solver.ir_python import text as python_text

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
    # result.json says which build ran the search's cost (results differ between them by ~1e-6)
    assert first["result"]["search"]["kernel"] == "c" and jit["result"]["search"]["kernel"] == "numba"
    # the kernels agree to ~1e-12, the searches then part in the last digits and the polish ends each within
    # its tolerance: the same basin, costs within 1e-6
    assert jit["result"]["cost"] == pytest.approx(first["result"]["cost"], rel=1e-6)


def _kernel_args(job: Path, batch: int = 256):
    from xo_fit.search.fitting import cost_model
    from xo_fit.job.reader import load_job
    from xo_fit.search.space import make_space
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
    src, kern = fc.text(), fc.ir()
    fixed = standalone.inner_dims(args(), kern)  # as a run builds it
    lib = standalone.build(kern, tmp_path / "k.so", fixed=fixed)
    ck = standalone.open_built(lib, kern, fixed)
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


def _row_sums(repeat: int = 1, comment: str = "") -> Kernel:
    """``k(a, out)``: each row's sum (``repeat`` times over) into ``out[:, 0]``; returns the number of rows."""
    a, out = Array("a", 2), Array("out", 2)
    n, m, i, j, r, s = i8("n"), i8("m"), i8("i"), i8("j"), i8("r"), f8("s")
    inner = loop(j, None, m, [update(s, a[i, j])])
    body = [let(n, a.shape(0)), let(m, a.shape(1)),
            loop(i, None, n, [let(s, 0.0), loop(r, None, repeat, [inner]) if repeat > 1 else inner,
                              out.store((i, 0), s)]),
            Return(n)]
    return Kernel(Function("k", (a, out), tuple(body)), comments=(comment,) if comment else ())


SUM = _row_sums()


def _sum_call(k) -> None:
    a = np.arange(12.0).reshape(3, 4)
    out = np.zeros((3, 1))
    assert k(a, out) in (3, -1)
    return out[:, 0]


def _fake_cc(path: Path, version: str, compile_part: str) -> str:
    """A compiler script: answers -v like gcc with ``version``, runs ``compile_part`` for a build."""
    path.write_text(f"#!/bin/sh\nif [ \"$1\" = -v ]; then echo 'gcc version {version} (fake)' >&2; "
                    f"echo 'Target: x86_64-linux-gnu' >&2; exit 0; fi\n{compile_part}\n")
    path.chmod(0o755)
    return str(path)


def test_a_compiler_s_rejection_leaves_a_note_for_that_key_and_compiler_only(tmp_path, monkeypatch, caplog):
    calls, fallback = _fallback_probe()
    bad = _fake_cc(tmp_path / "bad-cc", "99.0", "echo 'kernel.c:3:1: error: broken' >&2\nexit 3")
    monkeypatch.setenv("CC", bad)
    with caplog.at_level(logging.INFO, logger="xo_fit"):
        k = standalone.load(tmp_path, SUM, fallback)
        _sum_call(k)
    assert calls == [1] and k.backend == "numba"
    assert "bad-cc failed (3): kernel.c:3:1: error: broken" in caplog.text  # logged, not raised
    notes = sorted(p.name for p in tmp_path.glob("xo_c_*"))
    assert len(notes) == 1 and notes[0].endswith(".failed")
    assert not list(tmp_path.glob(".xo_c_build_*")) and not list(tmp_path.glob("*tmp*"))
    # the same C and the same compiler: numba at once, no build
    monkeypatch.setattr(standalone, "compile_into", lambda *a, **k: pytest.fail("built again after a rejection"))
    _sum_call(standalone.load(tmp_path, SUM, fallback))
    assert calls == [1, 1]
    monkeypatch.undo()
    # another version of the compiler (its -v says so) is tried; the note does not stop another kernel either
    monkeypatch.setenv("CC", _fake_cc(tmp_path / "bad-cc", "99.1", "exit 4"))
    standalone.compiler_identity.cache_clear()
    _sum_call(standalone.load(tmp_path, SUM, fallback))
    assert len(list(tmp_path.glob("xo_c_*.failed"))) == 2
    monkeypatch.delenv("CC")
    k = standalone.load(tmp_path, SUM, fallback)
    np.testing.assert_array_equal(_sum_call(k), [6.0, 22.0, 38.0])
    assert k.backend == "c" and calls == [1, 1, 1]


@pytest.mark.parametrize("compile_part", ["echo 'cc1: fatal error: No space left on device' >&2\nexit 1",
                                          "kill -9 $$", ("echo 'cc: fatal error: Killed signal terminated "
                                                         "program cc1' >&2\nexit 1")])
def test_a_passing_failure_leaves_no_note(tmp_path, monkeypatch, compile_part):
    calls, fallback = _fallback_probe()
    monkeypatch.setenv("CC", _fake_cc(tmp_path / "cc", "99.2", compile_part))
    standalone.compiler_identity.cache_clear()
    for _ in range(2):  # each run tries again
        k = standalone.load(tmp_path, SUM, fallback)
        _sum_call(k)
        assert k.backend == "numba"
    assert calls == [1, 1]
    assert not [p for p in tmp_path.iterdir() if p.name != "cc"]  # no note, no temporary folder or file


def test_the_key_is_the_c_text_and_the_compiler_s_identity(tmp_path, monkeypatch):
    # a wrapper around the real compiler: a new mtime is no new compiler, a kernel that gives the same C reuses
    # the library, another compiler version builds its own
    real = standalone.compiler()
    wrap = tmp_path / "bin" / "cc"
    wrap.parent.mkdir()
    wrap.write_text(f'#!/bin/sh\nif [ "$1" = -v ]; then echo "gcc version 77 (wrapped)" >&2; exit 0; fi\n'
                    f'exec {real} "$@"\n')
    wrap.chmod(0o755)
    monkeypatch.setenv("CC", str(wrap))
    standalone.compiler_identity.cache_clear()
    cache = tmp_path / "cache"
    cache.mkdir()
    calls, fallback = _fallback_probe()
    assert _sum_call(standalone.load(cache, SUM, fallback)).tolist() == [6.0, 22.0, 38.0]
    built = list(cache.glob("xo_c_*.so"))
    assert len(built) == 1
    os.utime(wrap, (1e9, 1e9))
    standalone.compiler_identity.cache_clear()
    monkeypatch.setattr(standalone, "compile_into", lambda *a, **k: pytest.fail("built again"))
    for text in (SUM, _row_sums(comment="another comment")):  # another Python text, the same C
        k = standalone.load(cache, text, fallback)
        assert _sum_call(k).tolist() == [6.0, 22.0, 38.0] and k.backend == "c"
    monkeypatch.undo()
    monkeypatch.setenv("CC", str(wrap))
    wrap.write_text(wrap.read_text().replace("gcc version 77", "gcc version 78"))
    standalone.compiler_identity.cache_clear()
    assert standalone.load(cache, SUM, fallback)(np.ones((2, 4)), np.zeros((2, 1))) == 2
    assert len(list(cache.glob("xo_c_*.so"))) == 2 and not calls


RUN_SUM = ("import sys, json, numpy as np; from pathlib import Path; from xo_fit.solver import standalone\n"
           "sys.path.insert(0, sys.argv[2]); from test_standalone import SUM\n"
           "def fallback(): raise SystemExit('fell back to numba')\n"
           "k = standalone.load(Path(sys.argv[1]), SUM, fallback)\n"
           "a = np.arange(12.0).reshape(3, 4); out = np.zeros((3, 1)); n = k(a, out)\n"
           "print(json.dumps({'n': n, 'sums': out[:, 0].tolist(), 'backend': k.backend}))\n")


def _run_sum(cache: Path) -> dict:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    r = subprocess.run([sys.executable, "-c", RUN_SUM, str(cache), str(ROOT / "tests")], check=False,
                       capture_output=True, text=True, env=env, timeout=120)
    assert r.returncode == 0, r.stderr  # a damaged library loaded would crash here (SIGBUS, SIGSEGV)
    return json.loads(r.stdout)


@pytest.mark.parametrize("damage", ["truncate", "flip"])
def test_a_damaged_library_is_rebuilt_not_loaded(tmp_path, damage):
    cache = tmp_path / "cache"
    cache.mkdir()
    assert _run_sum(cache) == {"n": 3, "sums": [6.0, 22.0, 38.0], "backend": "c"}
    (lib,) = cache.glob("xo_c_*.so")
    data = lib.read_bytes()
    size, digest = lib.name[:-3].split("-")[1:]  # the size and hash are in the name
    assert int(size) == len(data) and hashlib.sha256(data).hexdigest().startswith(digest)
    if damage == "truncate":
        lib.write_bytes(data[:len(data) // 2])
    else:
        lib.write_bytes(data[:4000] + bytes(b ^ 0xFF for b in data[4000:4400]) + data[4400:])
    assert _run_sum(cache) == {"n": 3, "sums": [6.0, 22.0, 38.0], "backend": "c"}
    (again,) = cache.glob("xo_c_*.so")
    assert standalone.library_name(again.name[5:25], again.read_bytes()) == again.name  # whole again
    assert sorted(p.name for p in cache.iterdir()) == [again.name]  # nothing else left: no temporary files


def test_which_backend_ran_a_kernel_is_known(tmp_path, monkeypatch):
    from xo_fit.solver import kernels

    monkeypatch.setenv("XO_FIT_CACHE", str(tmp_path))
    kern = _row_sums(comment="backend test")
    k = kernels.load_kernel(kern)
    assert kernels.kernel_backend(k) is None  # built on its first call
    _sum_call(k)
    assert kernels.kernel_backend(k) == "c"
    jit = kernels.load_kernel(kern, standalone=False)  # numba's
    assert kernels.kernel_backend(jit) == "numba"


def test_a_failure_to_print_or_build_runs_on_numba_and_is_logged(tmp_path, monkeypatch, caplog):
    # any exception on the C path (here the printer's) hands the kernel to numba, logged on "xo_fit"
    def broken(*a, **k):
        raise RecursionError("maximum recursion depth exceeded")

    monkeypatch.setattr(standalone.ir_c, "text", broken)
    calls, fallback = _fallback_probe()
    k = standalone.load(tmp_path, SUM, fallback)
    with caplog.at_level(logging.WARNING, logger="xo_fit"):
        assert k(np.ones((3, 4)), np.zeros((3, 1))) == -1
    assert calls == [1] and k.backend == "numba"
    assert any("runs on numba" in r.getMessage() and "RecursionError" in r.getMessage() for r in caplog.records)
    assert not list(tmp_path.iterdir())  # nothing built, no note, no temporary file


def test_a_sum_of_thousands_of_terms_prints_and_builds(tmp_path):
    # the printers walk chains of + without recursion: 3,000 terms (Python's own parser gives up on such a
    # text; the C compiler does not)
    a, out = Array("a", 1), Array("out", 1)
    kern = Kernel(Function("k", (a, out), (out.store(0, ir.total([a[i % 3] for i in range(3000)])),
                                           Return(ir.Const(1)))))
    assert len(python_text(kern)) > 3000 * 6
    fn = standalone.open_built(standalone.build(kern, tmp_path / "deep.so"), kern)
    got = np.zeros(1)
    assert fn(np.array([1.0, 2.0, 4.0]), got) == 1 and got[0] == 7000.0


def test_other_inner_dimensions_get_a_build_of_their_own(tmp_path):
    # the arrays' inner dimensions are constants in the C: another batch size reuses the build, another
    # number of parts (vals' second dimension) does not and is built again
    calls, fallback = _fallback_probe()
    k = standalone.load(tmp_path, SUM, fallback)
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
    assert standalone.load(tmp_path, fc.ir(), fallback) is None
    monkeypatch.undo()
    monkeypatch.setenv("XO_FIT_STANDALONE", "0")
    assert standalone.load(tmp_path, fc.ir(), fallback) is None
    assert not list(tmp_path.iterdir())


def _elementwise(name: str, body, params, constants=()) -> Kernel:
    """``name(params)``: for i in range(first array's length): body(i); returns the length."""
    n, i = i8("n"), i8("i")
    return Kernel(Function(name, params, (let(n, params[0].shape(0)), loop(i, None, n, body(i)), Return(n)),
                           fastmath=("contract", "reassoc")), constants=constants)


def test_the_c_printer_keeps_python_semantics(tmp_path):
    # Python's max keeps a NaN in its first argument, / is true division, ** is pow, a module constant is its
    # value, a conditional picks as Python's does
    import ctypes

    a, x, out = Array("a", 1), f8("x"), Array("out", 2)
    kconst = ir.Named("K", 2.5)
    kern = _elementwise("k", lambda i: [
        out.store((i, 0), ir.maximum(a[i], 0.0)), out.store((i, 1), x ** 2 + kconst),
        out.store((i, 2), ir.Const(7) / 2.0),
        out.store((i, 3), ir.select(a[i] < 0.0, ir.absolute(a[i]), ir.sqrt(a[i])))], (a, x, out), (kconst,))
    lib = standalone.build(kern, tmp_path / "t.so")
    fn = standalone.CKernel(ctypes.CDLL(str(lib)), "k", [1, 0, 2])
    a_ = np.array([np.nan, -4.0, 9.0])
    got = np.zeros((3, 4))
    assert fn(a_, 3.0, got) == 3
    assert np.isnan(got[0, 0]) and got[1, 0] == 0.0 and got[2, 0] == 9.0  # max(nan, 0.0) is nan in Python
    assert np.all(got[:, 1] == 11.5) and np.all(got[:, 2] == 3.5)
    assert got[1, 3] == 4.0 and got[2, 3] == 3.0
    with pytest.raises(TypeError):
        fn(a_.astype(np.float32), 3.0, got)


def test_the_c_logarithm_is_libm_s_to_a_few_ulp(tmp_path):
    # the kernels' ln in C (ir_c.LN_C, the same steps as vecmath.ln) against numpy's log (libm)
    import ctypes

    xs, out = Array("x", 1), Array("out", 1)
    kern = _elementwise("k", lambda i: [out.store(i, ir.ln(xs[i]))], (xs, out))
    lib = standalone.build(kern, tmp_path / "ln.so")
    fn = standalone.CKernel(ctypes.CDLL(str(lib)), "k", [1, 1])
    x = np.concatenate([np.geomspace(1e-300, 1e300, 200_001), 1.0 + np.linspace(-0.3, 0.3, 20_001),
                        [1.0, 2.0, np.sqrt(2.0), 0.5], np.geomspace(5e-324, 2.2e-308, 1001)])
    got = np.empty_like(x)
    fn(x, got)
    ref = np.log(x)
    assert got[x == 1.0][0] == 0.0
    assert np.max(np.abs(got - ref) / np.maximum(np.abs(ref), 1.0)) < 4 * np.finfo(float).eps  # as test_vecmath
    # IEEE 754 log of special values [SRC: IEEE 754-2008 9.2; C99 F.9.3.7]: NaN -> NaN, +inf -> +inf,
    # +-0 -> -inf, negative -> NaN (the kernels once gave ln(NaN) = 710 and ln(inf) = 709.8)
    special = np.array([np.nan, np.inf, 0.0, -0.0, -1.0, -np.inf, -5e-324])
    sp = np.empty_like(special)
    fn(special, sp)
    assert np.isnan(sp[0]) and sp[1] == np.inf and sp[2] == sp[3] == -np.inf and np.all(np.isnan(sp[4:]))
    # ln_floored: the same on normal input, NaN and +inf passed through
    kern = _elementwise("k", lambda i: [out.store(i, ir.ln_floored(xs[i]))], (xs, out))
    lib = standalone.build(kern, tmp_path / "lnf.so")
    fn = standalone.CKernel(ctypes.CDLL(str(lib)), "k", [1, 1])
    normal = x[x >= 2.2250738585072014e-308]
    got = np.empty_like(normal)
    fn(normal, got)
    assert np.max(np.abs(got - np.log(normal)) / np.maximum(np.abs(np.log(normal)), 1.0)) < 4 * np.finfo(float).eps
    fn(special[:2].copy(), sp[:2])
    assert np.isnan(sp[0]) and sp[1] == np.inf


def test_calls_from_several_threads_keep_their_own_arguments(tmp_path):
    # the packed arguments live per thread: threads calling one kernel at once each get their own sums
    import threading

    calls, fallback = _fallback_probe()
    k = standalone.load(tmp_path, _row_sums(repeat=2500), fallback)
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


def test_a_full_cache_leaves_no_temporary_file(tmp_path, monkeypatch):
    # numba's kernel text is written to a temporary file and renamed: when that fails (a full disk), the
    # temporary file goes too
    import errno

    from xo_fit.solver import kernels

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(kernels.os, "replace", full)
    with pytest.raises(OSError):
        kernels._numba_kernel(tmp_path, python_text(_row_sums(comment="full disk")), "k")
    assert not list(tmp_path.iterdir())


def test_a_killed_build_s_leftovers_are_swept(tmp_path):
    # a process killed mid-build leaves its temporary folder; the next build removes it once it is an hour old
    old = tmp_path / ".xo_c_build_abc123"
    old.mkdir()
    (old / "kernel.c").write_text("int x;")
    fresh = tmp_path / ".xo_c_build_def456"  # another process's build, now
    fresh.mkdir()
    t = os.stat(old).st_mtime - standalone.STALE_BUILD_S - 10
    os.utime(old, (t, t))
    calls, fallback = _fallback_probe()
    _sum_call(standalone.load(tmp_path, SUM, fallback))
    assert not old.exists() and fresh.exists() and not calls
