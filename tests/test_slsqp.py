"""The polish's SLSQP driver against scipy.optimize.minimize(method="SLSQP") (reference library).

xo_fit.search.slsqp runs scipy's compiled routine without importing scipy.optimize; it must give scipy's own
iterates: the same end point and value bit for bit, and the same evaluations in the same order. Both run with one
BLAS thread, as the polish does (a threaded BLAS rounds the routine's products differently in the last bit).
"""

import numpy as np
import pytest
from scipy.optimize import minimize, rosen, rosen_der

from xo_fit.search import slsqp
from xo_fit.search.lbfgsb import one_blas_thread

PROBLEMS = [
    # (f and its gradient, c >= 0 and its Jacobian, start, lower, upper)
    # Rosenbrock inside a ball: the constraint active at the end
    (lambda x: (rosen(x), rosen_der(x)), lambda x: (np.array([1.5 - x @ x]), -2 * x[None]),
     np.array([-1.2, 1.0, 0.3]), np.full(3, -2.0), np.full(3, 2.0)),
    # a separable function under two constraints, one of them nonlinear, in the unit cube
    (lambda x: (float(np.sum(np.cos(3 * x) + x ** 2)), -3 * np.sin(3 * x) + 2 * x),
     lambda x: (np.array([x[0] + x[1] - 0.7, 1 - x[2] * x[3]]),
                np.array([[1.0, 1.0, 0, 0, 0], [0, 0, -x[3], -x[2], 0]])),
     np.full(5, 0.5), np.zeros(5), np.ones(5)),
]


@pytest.mark.skipif(slsqp._slsqp() is None, reason="scipy < 1.16: the driver calls scipy.optimize.minimize itself")
@pytest.mark.parametrize("k", range(len(PROBLEMS)))
def test_same_iterates_as_scipy_minimize(k):
    f, c, x0, lo, hi = PROBLEMS[k]
    seen_mine: list = []
    seen_ref: list = []

    def values(x):
        seen_mine.append(x.copy())
        return f(x)[0], c(x)[0]

    def fun(x):
        seen_ref.append(x.copy())
        return f(x)[0]

    x, fx = slsqp.minimize_slsqp(values, lambda x: (f(x)[1], c(x)[1], c(x)[0]), x0, lo, hi, ftol=1e-10,
                                 maxiter=100)
    with one_blas_thread():
        res = minimize(fun, x0, jac=lambda x: f(x)[1], method="SLSQP", bounds=list(zip(lo, hi)),
                       constraints=[{"type": "ineq", "fun": lambda x: c(x)[0], "jac": lambda x: c(x)[1]}],
                       options={"ftol": 1e-10, "maxiter": 100})
    assert res.success
    assert np.array_equal(x, res.x) and fx == res.fun
    assert len(seen_mine) == len(seen_ref)
    assert all(np.array_equal(a, b) for a, b in zip(seen_mine, seen_ref))


def test_the_constrained_minimum_of_a_quadratic():
    """min (x - 2)^2 + (y - 1)^2 subject to x + y <= 2 in [0, 3]^2: the projection of (2, 1) onto the line,
    (1.5, 0.5), value 0.5 (closed form [DER])."""
    x, fx = slsqp.minimize_slsqp(lambda x: (float((x[0] - 2) ** 2 + (x[1] - 1) ** 2), np.array([2 - x[0] - x[1]])),
                                 lambda x: (np.array([2 * (x[0] - 2), 2 * (x[1] - 1)]), np.array([[-1.0, -1.0]]),
                                            np.array([2 - x[0] - x[1]])),
                                 np.zeros(2), np.zeros(2), np.full(2, 3.0), ftol=1e-12, maxiter=100)
    np.testing.assert_allclose(x, [1.5, 0.5], atol=1e-8)
    assert fx == pytest.approx(0.5, abs=1e-10)


def test_falls_back_to_scipy_minimize(monkeypatch):
    monkeypatch.setattr(slsqp, "_slsqp", lambda: None)
    f, c, x0, lo, hi = PROBLEMS[0]
    x, fx = slsqp.minimize_slsqp(lambda x: (f(x)[0], c(x)[0]), lambda x: (f(x)[1], c(x)[1], c(x)[0]), x0, lo, hi,
                                 ftol=1e-10, maxiter=100)
    assert x @ x == pytest.approx(1.5, rel=1e-6) and fx == pytest.approx(rosen(x))
