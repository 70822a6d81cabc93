"""The vector width LLVM compiles xo_fit's kernels for (read by numba when it is first imported)."""

from __future__ import annotations

import os
import sys


def prefer_wide_vectors() -> None:
    """On AVX-512 hosts let LLVM use 512-bit vectors (it prefers 256 by default).

    Measured on the reference network here: 18-30 % more sweeps per second. Only
    done when numba has not been imported yet and the user has not set
    NUMBA_CPU_FEATURES; XO_FIT_VECTOR_WIDTH=256 turns it off.
    """
    if "numba" in sys.modules or "NUMBA_CPU_FEATURES" in os.environ:
        return
    if os.environ.get("XO_FIT_VECTOR_WIDTH", "512") == "256":
        return
    try:
        import llvmlite.binding as llvm

        features = llvm.get_host_cpu_features().flatten()
    except Exception:  # pragma: no cover - no llvmlite host query: leave numba's defaults
        return
    if "+avx512f" in features.split(","):
        os.environ["NUMBA_CPU_FEATURES"] = features + ",-prefer-256-bit"
