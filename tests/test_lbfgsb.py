"""The polish's L-BFGS-B driver against scipy.optimize.minimize(method="L-BFGS-B") (reference library).

xo_fit.search.lbfgsb runs scipy's compiled routine without importing scipy.optimize; it must give scipy's own
iterates: the same end point and value bit for bit, and the same evaluations in the same order.
"""

import numpy as np
import pytest
from scipy.optimize import minimize, rosen, rosen_der

from xo_fit.search import lbfgsb


def _recorded(fun):
    seen = []

    def f(x):
        seen.append(x.copy())
        return fun(x)

    return f, seen


PROBLEMS = [
    # (function with gradient, start, lower, upper): an interior minimum, one pinned on a bound, a flat start
    (lambda x: (rosen(x), rosen_der(x)), np.array([-1.2, 1.0, 0.3, 0.8]), np.full(4, -2.0), np.full(4, 2.0)),
    (lambda x: (rosen(x), rosen_der(x)), np.array([0.1, 0.2, 0.3]), np.full(3, 0.0), np.array([0.5, 2.0, 2.0])),
    (lambda x: (float(np.sum(np.cos(3 * x) + x ** 2)), -3 * np.sin(3 * x) + 2 * x), np.full(6, 0.5),
     np.zeros(6), np.ones(6)),
]


@pytest.mark.parametrize("k", range(len(PROBLEMS)))
def test_same_iterates_as_scipy_minimize(k):
    fun, x0, lo, hi = PROBLEMS[k]
    mine, seen_mine = _recorded(fun)
    ref, seen_ref = _recorded(fun)
    x, f = lbfgsb.minimize_box(mine, x0, lo, hi, ftol=1e-10, gtol=1e-8, maxiter=10_000)
    res = minimize(ref, x0, jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                   options={"maxiter": 10_000, "ftol": 1e-10, "gtol": 1e-8})
    assert res.success
    assert np.array_equal(x, res.x) and f == res.fun
    assert len(seen_mine) == len(seen_ref) == res.nfev
    assert all(np.array_equal(a, b) for a, b in zip(seen_mine, seen_ref))


def test_iteration_limit_as_scipy():
    fun, x0, lo, hi = PROBLEMS[0]
    x, f = lbfgsb.minimize_box(fun, x0, lo, hi, ftol=1e-12, gtol=1e-12, maxiter=5)
    res = minimize(fun, x0, jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                   options={"maxiter": 5, "ftol": 1e-12, "gtol": 1e-12})
    assert res.nit == 5 and np.array_equal(x, res.x) and f == res.fun


def test_falls_back_to_scipy_minimize(monkeypatch):
    monkeypatch.setattr(lbfgsb, "_setulb", lambda: None)
    fun, x0, lo, hi = PROBLEMS[1]
    x, f = lbfgsb.minimize_box(fun, x0, lo, hi, ftol=1e-10, gtol=1e-8, maxiter=10_000)
    assert x[0] == 0.5 and f == pytest.approx(rosen(x))  # the first variable ends on its upper bound


def test_the_fit_path_does_not_import_scipy_optimize():
    import subprocess
    import sys

    code = ("import sys, numpy as np; from xo_fit.search import lbfgsb;"
            "x, f = lbfgsb.minimize_box(lambda x: (float(x @ x), 2 * x), np.ones(3), -np.ones(3), np.ones(3),"
            " ftol=1e-10, gtol=1e-8, maxiter=100);"
            "print(int('scipy.optimize' in sys.modules), float(abs(x).max()))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert out[0] == "0" and float(out[1]) < 1e-6


def _threads_after_polish(inherit: bool) -> tuple[int, int]:
    """(threads, BLAS threads reported) in a process forked inside one_blas_thread_for_forks, after a polish there
    (with ``inherit``: as an island of fit --workers does)."""
    import os

    with lbfgsb.one_blas_thread_for_forks() as one:
        assert one
        read, write = os.pipe()
        pid = os.fork()
        if pid == 0:  # the child: report and end, whatever happens
            try:
                if inherit:
                    lbfgsb.inherit_one_blas_thread()
                fun, x0, lo, hi = PROBLEMS[2]
                lbfgsb.minimize_box(fun, x0, lo, hi, ftol=1e-10, gtol=1e-8, maxiter=10_000)
                blas = [lib["num_threads"] for lib in lbfgsb._controller[0][1].info() if lib["user_api"] == "blas"]
                os.write(write, f"{len(os.listdir('/proc/self/task'))} {max(blas)}".encode())
            finally:
                os._exit(0)
        os.close(write)
        out = os.read(read, 100).split()
        os.waitpid(pid, 0)
        os.close(read)
    return int(out[0]), int(out[1])


def test_a_process_forked_with_one_blas_thread_starts_none():
    """[CP] A fork stops OpenBLAS's threads, and setting their number in the child starts them again, each spinning
    ~0.1 s of CPU (an island's polish 26 against 8 ms). An island forked inside one_blas_thread_for_forks keeps
    one BLAS thread without setting it: after its polish it is still one thread, and BLAS reports one."""
    import os
    from pathlib import Path

    pytest.importorskip("threadpoolctl")
    if not Path("/proc/self/task").exists() or not hasattr(os, "fork"):
        pytest.skip("forks and reads /proc")
    with lbfgsb.one_blas_thread():
        pass
    libs = [lib for lib in lbfgsb._controller[0][1].info() if lib["user_api"] == "blas"]
    if not libs or max(lib["num_threads"] for lib in libs) < 2:
        pytest.skip("no BLAS with threads here")
    # the cause, where this BLAS shows it: without, the child's polish sets the number and threads start
    threads, _ = _threads_after_polish(inherit=False)
    if threads == 1:
        pytest.skip("this BLAS starts no threads when their number is set after a fork")
    assert _threads_after_polish(inherit=True) == (1, 1)


def test_one_blas_thread_covers_a_blas_loaded_after_the_first_limit():
    """[CP] The BLAS limit looks the libraries up once; a compiled routine loaded later brings its own BLAS, which
    a stale look-up left on several threads (scipy's SLSQP then ran its linear algebra on two threads and a fit
    under limits ended elsewhere). The look-up is renewed once something was loaded since."""
    pytest.importorskip("threadpoolctl")
    with lbfgsb.one_blas_thread():
        pass
    before = lbfgsb._controller[0]
    lbfgsb._routines["test.loaded"] = False  # as a routine loaded since
    try:
        with lbfgsb.one_blas_thread():
            pass
        assert lbfgsb._controller[0] is not before
        with lbfgsb.one_blas_thread():
            pass
        assert lbfgsb._controller[0][0] == (len(__import__("sys").modules), len(lbfgsb._routines))
    finally:
        del lbfgsb._routines["test.loaded"]
