"""The vectorisable logarithm against the C library's (math.log)."""

from __future__ import annotations

import math

import numba
import numpy as np

from xo_fit.solver.vecmath import ln, ln_floored


@numba.njit
def _ln_all(x, out):
    for i in range(x.shape[0]):
        out[i] = ln(x[i])


@numba.njit
def _ln_floored_all(x, out):
    for i in range(x.shape[0]):
        out[i] = ln_floored(x[i])


def test_ln_matches_libm_to_a_few_ulp():
    rng = np.random.default_rng(0)
    x = np.concatenate([np.exp(rng.uniform(-700, 700, 20000)), [1.0, 2.0, 0.5, math.sqrt(2), math.nextafter(math.sqrt(2), 2),
                                                               math.nextafter(math.sqrt(2), 0), 1e-300, 1e300, 3.0, 10.0]])
    out = np.empty_like(x)
    _ln_all(x, out)
    ref = np.log(x)
    assert np.max(np.abs(out - ref) / np.maximum(np.abs(ref), 1.0)) < 4 * np.finfo(float).eps
    assert out[-10] == 0.0


def test_ln_of_non_finite_zero_negative_and_subnormal_input_is_libm_s():
    # IEEE 754 log: log(NaN) = NaN, log(+inf) = +inf, log(+-0) = -inf, log(x < 0) = NaN [SRC: IEEE 754-2008 9.2;
    # C99 F.9.3.7]; subnormals to a few ulp of libm's (numpy's log)
    sub = np.array([5e-324, 1e-320, 2.2250738585072009e-308, 1e-310, 3e-315])
    x = np.concatenate([[np.nan, -np.nan, np.inf, 0.0, -0.0, -1.0, -np.inf, -1e-300, -5e-324], sub])
    out = np.empty_like(x)
    _ln_all(x, out)
    assert np.isnan(out[0]) and np.isnan(out[1])
    assert out[2] == np.inf
    assert out[3] == -np.inf and out[4] == -np.inf
    assert np.all(np.isnan(out[5:9]))
    ref = np.log(sub)
    assert np.max(np.abs(out[9:] - ref) / np.abs(ref)) < 4 * np.finfo(float).eps


def test_ln_floored_is_libm_s_on_normal_input_and_passes_nan_and_inf():
    # the cheaper logarithm for floored arguments: libm's to a few ulp from the smallest normal up
    # [SRC: IEEE 754-2008 9.2 for log(NaN) = NaN, log(+inf) = +inf]
    rng = np.random.default_rng(1)
    x = np.concatenate([np.exp(rng.uniform(-708, 709, 20000)), [2.2250738585072014e-308, 1.0, 1.7976931348623157e308]])
    out = np.empty_like(x)
    _ln_floored_all(x, out)
    ref = np.log(x)
    assert np.max(np.abs(out - ref) / np.maximum(np.abs(ref), 1.0)) < 4 * np.finfo(float).eps
    special = np.array([np.nan, np.inf])
    got = np.empty_like(special)
    _ln_floored_all(special, got)
    assert np.isnan(got[0]) and got[1] == np.inf
