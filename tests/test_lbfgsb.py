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
