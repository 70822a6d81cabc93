"""Elementary functions for the compiled kernels that LLVM can vectorise.

numba calls libm for ``math.log``, one scalar call per element, which stops
the frequency loop from vectorising (and this llvmlite has no SVML). The
natural logarithm here splits the IEEE-754 exponent off with a bit cast
(an LLVM ``bitcast``, vectorisable) and evaluates the mantissa m in
[sqrt(1/2), sqrt(2)) through ln m = 2 atanh(z), z = (m - 1)/(m + 1), whose odd
series in z (|z| < 0.172) is summed to 1e-17: the result agrees with libm to a
few ulp for positive normal numbers (tests/test_vecmath.py). Zero, negative,
non-finite and subnormal inputs are not handled: callers floor their argument.
"""

from __future__ import annotations

import math

import numba
from llvmlite import ir
from numba import types
from numba.extending import intrinsic

from ..constants import DB10

__all__ = ["DB10", "ln"]  # what the generated kernels import (DB10 lives in constants)

LN2 = math.log(2.0)
SQRT2 = math.sqrt(2.0)
_MANTISSA = (1 << 52) - 1
_ONE = 1023 << 52


@intrinsic
def f64_bits(typingctx, x):
    """The bits of a float64 as an int64 (LLVM bitcast)."""
    sig = types.int64(types.float64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.IntType(64))

    return sig, codegen


@intrinsic
def bits_f64(typingctx, n):
    """An int64's bits as a float64 (LLVM bitcast)."""
    sig = types.float64(types.int64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.DoubleType())

    return sig, codegen


@numba.njit(inline="always", error_model="numpy", fastmath={"contract"}, cache=True)
def ln(x):
    """Natural logarithm of a positive normal float64, vectorisable."""
    bits = f64_bits(x)
    e = (bits >> 52) - 1023
    m = bits_f64((bits & _MANTISSA) | _ONE)  # in [1, 2)
    big = m > SQRT2
    m = m * 0.5 if big else m
    ef = float(e + 1) if big else float(e)
    z = (m - 1.0) / (m + 1.0)
    z2 = z * z
    # 2 atanh z = 2 (z + z^3/3 + z^5/5 + ...), |z| <= 0.1716: 11 terms reach 1e-17
    p = 1.0 / 23.0
    p = p * z2 + 1.0 / 21.0
    p = p * z2 + 1.0 / 19.0
    p = p * z2 + 1.0 / 17.0
    p = p * z2 + 1.0 / 15.0
    p = p * z2 + 1.0 / 13.0
    p = p * z2 + 1.0 / 11.0
    p = p * z2 + 1.0 / 9.0
    p = p * z2 + 1.0 / 7.0
    p = p * z2 + 1.0 / 5.0
    p = p * z2 + 1.0 / 3.0
    p = p * z2 + 1.0
    return ef * LN2 + 2.0 * z * p
