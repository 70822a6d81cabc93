"""Standalone kernels: a generated kernel built by the system's C compiler and loaded without numba.

numba compiles the generated kernels well but slowly: the fused cost of a 16-part three-way takes it about
2.5 s (its type inference and lowering run in Python), and every run pays 0.6 s to import numba and set up
its CPU target before the first cached call. The same kernel text, written out as C by
:mod:`xo_fit.solver.ctranslate`, builds with ``cc -O3 -march=native`` in about 0.3 s and loads through
ctypes in a millisecond; it runs at least as fast (1.6 ms against 2.0 ms per 512 candidates of that
three-way; benchmarks/startup.py). So when a C compiler is there, a topology seen for the first time is
built in-line, once, into the private kernel cache, and every later run loads the built library.

The flags follow the kernel's own ``@numba.njit`` line: ``-ffp-contract=fast`` for ``contract``, and for
``reassoc`` the flags that let the compiler reorder sums (``-fassociative-math -fno-signed-zeros
-fno-trapping-math``) so that reductions over the frequency loop vectorise; ``-fno-math-errno`` always
(``sqrt`` then vectorises), ``-fno-tree-pre`` because gcc's partial redundancy elimination otherwise turns
the impedance sum into a conditional reduction that it cannot vectorise. A library is keyed by the kernel's
text, the translator's version, the compiler (path, size, time) and flags, and this CPU's feature flags
(``-march=native`` code must not run on another CPU sharing the home folder).

One machine always takes the same path (a compiler present: C; none, or ``XO_FIT_STANDALONE=0``: numba),
so a seed gives the same result run after run. The two paths agree to about 1e-12 relative, not bit for
bit (the compilers contract and reorder differently). A build that fails leaves a note
(``xo_c_<key>.failed``) so that runs in the next day go straight to numba.
"""

from __future__ import annotations

import ast
import ctypes
import functools
import hashlib
import os
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from .ctranslate import VERSION as TRANSLATOR_VERSION
from .ctranslate import to_c

#: numba type signature of the fused cost kernel (xo_fit.solver.fused.FusedCost.source): values (B, P),
#: r_coef (P,), r_exp (P,), fin (K, F), vs, rs, tau2, tgt (R, F), ang (A, 2D, F), angw (A, 3), scratch (S, F),
#: out (B, 10) -> the number of flagged candidates.
COST_SIGNATURE = ("i8(f8[:,::1], f8[::1], f8[::1], f8[:,::1], f8, f8, f8, f8[:,::1], f8[:,:,::1], f8[:,::1], "
                  "f8[:,::1], f8[:,::1])")
#: The network solve kernel (xo_fit.solver.codegen.generate_kernel_source): values (B, P), r_coef, r_exp,
#: fin (K, F), vs, rs, tau2, scratch (2D + 3, F), out (B, D + 1, 2F), out_bad (B, F) -> flagged points.
SOLVE_SIGNATURE = "i8(f8[:,::1], f8[::1], f8[::1], f8[:,::1], f8, f8, f8, f8[:,::1], f8[:,:,::1], f8[:,::1])"

BASE_FLAGS = ("-O3", "-march=native", "-funroll-loops", "-fPIC", "-shared", "-fno-math-errno", "-fno-tree-pre",
              "-std=c99")
REASSOC_FLAGS = ("-fassociative-math", "-fno-signed-zeros", "-fno-trapping-math")
#: A failed build is tried again after this long (s): the failure may have been passing (a full disk).
FAILED_RETRY_S = 86400.0
#: Longest a build may take (s) before it counts as failed.
BUILD_TIMEOUT_S = 120.0


def enabled() -> bool:
    return os.environ.get("XO_FIT_STANDALONE", "1") != "0"


def compiler() -> str | None:
    """The C compiler to use: $CC, else cc, else gcc (a path), or None."""
    for name in (os.environ.get("CC"), "cc", "gcc"):
        if name:
            found = shutil.which(name)
            if found:
                return found
    return None


def ndims(signature: str) -> list[int]:
    """The number of dimensions of each argument of a numba signature (0 for a scalar)."""
    inner = signature[signature.index("(") + 1:signature.rindex(")")]
    out, depth, cur = [], 0, ""
    for ch in inner + ",":
        if ch == "," and depth == 0:
            cur = cur.strip()
            out.append(cur.count(",") + 1 if "[" in cur else 0)
            cur = ""
            continue
        depth += ch == "["
        depth -= ch == "]"
        cur += ch
    return out


def flags(source: str) -> tuple[str, ...]:
    """The compiler flags matching the fastmath set of the kernel's ``@numba.njit`` line."""
    fast: set[str] = set()
    for line in source.splitlines():
        if line.startswith("@numba.njit") and "fastmath=" in line:
            fast = set(ast.literal_eval(line.split("fastmath=", 1)[1].split("}", 1)[0] + "}"))
    out = BASE_FLAGS + (("-ffp-contract=fast",) if "contract" in fast else ("-ffp-contract=off",))
    return out + (REASSOC_FLAGS if "reassoc" in fast else ())


@functools.lru_cache(maxsize=1)
def _cpu() -> str:
    """This CPU's identity for the cache key: its feature flags (Linux), else what platform says."""
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith(("flags", "Features")):
                    return line
    except OSError:
        pass
    import platform

    return platform.machine() + platform.processor()


def key(source: str, cc: str, fixed: dict[str, int] | None = None) -> str:
    """The cache key of the C build of ``source`` with compiler ``cc`` and the ``fixed`` dimensions."""
    st = os.stat(cc)
    ident = (f"{TRANSLATOR_VERSION}\n{cc}\n{st.st_size}\n{st.st_mtime_ns}\n{flags(source)}\n{_cpu()}\n"
             f"{sorted((fixed or {}).items())}\n{source}")
    return hashlib.sha256(ident.encode()).hexdigest()[:20]


def library_path(folder: Path, k: str) -> Path:
    return folder / f"xo_c_{k}.so"


def inner_dims(args: tuple, names: list[str], dims: list[int]) -> dict[str, int]:
    """Every dimension but the first of each array argument, by ``"name_dK"``: for a kernel's arrays these are
    fixed by the topology, the targets and the grid; the first (the batch) is not."""
    return {f"{n}_d{j}": int(a.shape[j]) for a, n, k in zip(args, names, dims) for j in range(1, k)}


class CKernel:
    """A built kernel called like the numba one: C-contiguous float64 arrays and floats in, an int out.

    dims: each argument's number of dimensions (0: a float); ``fixed``: the (argument, dimension) pairs built
    in as constants, which are not passed (the arrays must have those sizes: :class:`LazyKernel` picks the
    build by them). The library's packed entry takes every address and dimension in one int64 array and the
    floats in one double array, kept per thread and updated in place, so a call converts two arguments (a
    call with one ctypes argument per address and dimension cost 25 us more than numba's dispatch). An
    argument that is the same array object as in the previous call keeps its address (the arguments are kept
    referenced, so no other array can take that identity). ctypes releases the GIL for the call, as the JIT
    kernel's ``nogil`` does.
    """

    def __init__(self, lib: ctypes.CDLL, entry: str, dims: list[int], fixed: frozenset = frozenset()) -> None:
        self.lib = lib
        self.fn = getattr(lib, f"{entry}_packed")
        self.fn.restype = ctypes.c_longlong
        self.fn.argtypes = [ctypes.c_void_p, ctypes.c_void_p]
        self.dims = dims
        self.layout: list[tuple[int, int, tuple[tuple[int, int], ...]]] = []  # (ndim, slot, ((dim, slot), ...))
        ip = ip_s = 0
        for i, k in enumerate(dims):
            if k == 0:
                self.layout.append((0, ip_s, ()))
                ip_s += 1
                continue
            slot, ip = ip, ip + 1
            passed = []
            for j in range(k):
                if (i, j) not in fixed:
                    passed.append((j, ip))
                    ip += 1
            self.layout.append((k, slot, tuple(passed)))
        self._sizes = (max(ip, 1), max(ip_s, 1))
        self._local = threading.local()  # the packed arrays per thread: calls from threads run side by side

    def _buffers(self) -> tuple:
        st = getattr(self._local, "st", None)
        if st is None:
            p = np.zeros(self._sizes[0], dtype=np.int64)
            s = np.zeros(self._sizes[1], dtype=np.float64)
            st = self._local.st = (p, s, [None] * len(self.dims), p.ctypes.data, s.ctypes.data)
        return st

    def __call__(self, *args) -> int:
        if len(args) != len(self.dims):
            raise TypeError(f"the kernel takes {len(self.dims)} arguments, got {len(args)}")
        p, s, last, pp, sp = self._buffers()
        for i, (a, (k, slot, passed)) in enumerate(zip(args, self.layout)):
            if k == 0:
                s[slot] = a
                continue
            if a is not last[i]:
                if not (isinstance(a, np.ndarray) and a.dtype == np.float64 and a.ndim == k
                        and a.flags.c_contiguous):
                    raise TypeError(f"kernel argument must be a C-contiguous float64 array of {k} dimensions")
                last[i] = a
                p[slot] = a.ctypes.data
            for j, at in passed:
                p[at] = a.shape[j]
        return int(self.fn(pp, sp))


def open_built(path: Path, source: str, entry: str, signature: str, fixed: dict[str, int] | None = None) -> CKernel:
    """The kernel in a library built by :func:`build` with these ``fixed`` dimensions (by ``"name_dK"``)."""
    dims = ndims(signature)
    slots = frozenset((i, j) for i, (n, k) in enumerate(zip(_parameters(source, entry), dims)) for j in range(k)
                      if f"{n}_d{j}" in (fixed or {}))
    return CKernel(ctypes.CDLL(str(path)), entry, dims, slots)


class LazyKernel:
    """A generated kernel that becomes a C build on its first call: the arrays' inner dimensions are then
    known and are written into the C as constants (with every stride known, gcc sees that the rows of one
    array do not overlap and vectorises without run-time alias checks: the off-axis cost kernel ran 1.3x
    slower with them). Calls with other inner dimensions get a build of their own. Where a build fails,
    ``fallback()`` (numba) gives the kernel."""

    def __init__(self, folder: Path, source: str, entry: str, signature: str, cc: str, fallback) -> None:
        self.folder, self.source, self.entry, self.signature, self.cc = folder, source, entry, signature, cc
        self.dims = ndims(signature)
        self.names = _parameters(source, entry)
        self.multi = [i for i, k in enumerate(self.dims) if k > 1]  # the arguments with inner dimensions
        self.fallback = fallback
        self.builds: dict[tuple, object] = {}
        self.uses_c = False  # whether a call ran a C build

    def __call__(self, *args) -> int:
        token = tuple([args[i].shape[1:] for i in self.multi])
        fn = self.builds.get(token)
        if fn is None:
            fn = self.builds[token] = self._resolve(inner_dims(args, self.names, self.dims))
        return fn(*args)

    def _resolve(self, fixed: dict[str, int]):
        fn = load_built(self.folder, self.source, self.entry, self.signature, self.cc, fixed)
        if fn is None:
            return self.fallback()
        self.uses_c = True
        return fn


def load(folder: Path, source: str, entry: str, signature: str, fallback):
    """The kernel as a :class:`LazyKernel` (a C build on its first call), or None when standalone kernels are
    off or there is no compiler (then numba compiles it)."""
    if not enabled():
        return None
    cc = compiler()
    if cc is None:
        return None
    return LazyKernel(folder, source, entry, signature, cc, fallback)


def load_built(folder: Path, source: str, entry: str, signature: str, cc: str, fixed: dict[str, int]):
    """The C build of ``entry`` with the ``fixed`` dimensions (by ``"name_dK"``), from the cache or built now;
    None when the kernel is outside the translator's subset, the build failed (a note is left so that later
    runs do not try again) or the library does not load."""
    k = key(source, cc, fixed)
    path = library_path(folder, k)
    failed = folder / f"xo_c_{k}.failed"
    if not path.exists():
        try:
            if time.time() - failed.stat().st_mtime < FAILED_RETRY_S:
                return None
        except OSError:
            pass  # no note: build
        try:
            build(source, entry, signature, path, cc, fixed)
        except (OSError, ValueError, RuntimeError, subprocess.SubprocessError) as exc:
            try:
                failed.write_text(f"{type(exc).__name__}: {exc}\n")
            except OSError:
                pass
            return None
    try:
        return open_built(path, source, entry, signature, fixed)
    except (OSError, AttributeError):
        return None  # a damaged library: numba does the work


def build(source: str, entry: str, signature: str, output: Path, cc: str | None = None,
          fixed: dict[str, int] | None = None) -> Path:
    """Translate ``entry`` of the generated ``source`` to C (``fixed`` dimensions as constants: the library
    must then be called with arrays of exactly those) and build the shared library ``output`` (atomically).
    Raises ValueError (outside the subset), RuntimeError (the compiler failed) or OSError."""
    cc = cc or compiler()
    if cc is None:
        raise RuntimeError("no C compiler (set CC, or install cc)")
    names = _parameters(source, entry)
    dims = ndims(signature)
    if len(names) != len(dims):
        raise ValueError(f"the signature has {len(dims)} arguments, the kernel {len(names)}")
    text = to_c(source, entry, list(zip(names, dims)), fixed)
    output = Path(output)
    with tempfile.TemporaryDirectory(dir=output.parent, prefix=".xo_c_build_") as tmp:
        c_file = Path(tmp) / "kernel.c"
        c_file.write_text(text)
        lib = Path(tmp) / "kernel.so"
        r = subprocess.run([cc, *flags(source), "-o", str(lib), str(c_file), "-lm"], capture_output=True, text=True,
                           timeout=BUILD_TIMEOUT_S)
        if r.returncode != 0 or not lib.exists():
            first = (r.stderr.strip().splitlines() or ["no output"])[0]
            raise RuntimeError(f"{Path(cc).name} failed ({r.returncode}): {first}")
        os.replace(lib, output)
    return output


def _parameters(source: str, entry: str) -> list[str]:
    """The parameter names of ``entry``: read off its one-line ``def`` (parsing a kernel's text costs ~9 ms, on
    every warm start); other layouts are parsed. :func:`to_c` checks the names against its own parse."""
    m = re.search(rf"^def {re.escape(entry)}\(([\w, ]*)\):", source, re.M)
    if m:
        return [n.strip() for n in m.group(1).split(",") if n.strip()]
    for node in ast.parse(source).body:
        if isinstance(node, ast.FunctionDef) and node.name == entry:
            return [a.arg for a in node.args.args]
    raise ValueError(f"no function '{entry}' in the kernel")


def _main(argv: list[str]) -> int:
    """``python -m xo_fit.solver.standalone SOURCE.py ENTRY``: print the C text of a generated kernel."""
    source = Path(argv[0]).read_text()
    sig = COST_SIGNATURE if argv[1] == "cost_kernel" else SOLVE_SIGNATURE
    print(to_c(source, argv[1], list(zip(_parameters(source, argv[1]), ndims(sig)))))
    return 0


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
