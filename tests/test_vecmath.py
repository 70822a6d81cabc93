"""The vectorisable logarithm against the C library's (math.log)."""

from __future__ import annotations

import math

import numba
import numpy as np

from xo_fit.solver.vecmath import ln


@numba.njit
def _ln_all(x, out):
    for i in range(x.shape[0]):
        out[i] = ln(x[i])


def test_ln_matches_libm_to_a_few_ulp():
    rng = np.random.default_rng(0)
    x = np.concatenate([np.exp(rng.uniform(-700, 700, 20000)), [1.0, 2.0, 0.5, math.sqrt(2), math.nextafter(math.sqrt(2), 2),
                                                               math.nextafter(math.sqrt(2), 0), 1e-300, 1e300, 3.0, 10.0]])
    out = np.empty_like(x)
    _ln_all(x, out)
    ref = np.log(x)
    assert np.max(np.abs(out - ref) / np.maximum(np.abs(ref), 1.0)) < 4 * np.finfo(float).eps
    assert out[-10] == 0.0
