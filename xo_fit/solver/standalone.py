"""Standalone kernels: a generated kernel built by the system's C compiler and loaded without numba.

numba compiles the generated kernels well but slowly: the fused cost of a 16-part three-way takes it about
2.5 s (its type inference and lowering run in Python), and every run pays 0.6 s to import numba and set up
its CPU target before the first cached call. The same kernel (one IR, :mod:`xo_fit.solver.ir`), printed as C
by :mod:`xo_fit.solver.ir_c`, builds with ``cc -O3 -march=native`` in about 0.3 s and loads through
ctypes in a millisecond; it runs at least as fast (1.6 ms against 2.0 ms per 512 candidates of that
three-way; benchmarks/startup.py). So when a C compiler is there, a topology seen for the first time is
built in-line, once, into the private kernel cache, and every later run loads the built library.

The flags follow the kernel's fastmath set (what numba's ``@numba.njit`` gets too): ``-ffp-contract=fast`` for
``contract``, and for
``reassoc`` the flags that let the compiler reorder sums (``-fassociative-math -fno-signed-zeros
-fno-trapping-math``) so that reductions over the frequency loop vectorise; ``-fno-math-errno`` always
(``sqrt`` then vectorises), ``-fno-tree-pre`` because gcc's partial redundancy elimination otherwise turns
the impedance sum into a conditional reduction that it cannot vectorise.

A library is keyed by the C text itself, the compiler's identity (what ``cc -v`` reports: version, target,
configuration), the flags and this CPU's feature flags (``-march=native`` code must not run on another CPU
sharing the home folder): a change in the printer or the compiler gives a new key by itself. The
library's size and SHA-256 are in its file name (``xo_c_<key>-<size>-<sha>.so``) and are checked before it
is loaded; a library that fails the check (truncated, damaged) is deleted and built again. Builds are
written to a temporary folder beside the cache, flushed to disk (fsync) and renamed into place.

One machine always takes the same path (a compiler present: C; none, or ``XO_FIT_STANDALONE=0``: numba),
so a seed gives the same result run after run. The two paths agree to about 1e-12 relative, not bit for
bit (the compilers contract and reorder differently). Whatever fails in printing, building or loading
falls back to numba for that kernel and is logged (logger ``"xo_fit"``); :attr:`LazyKernel.backend` says
which ran. Only a compiler that rejects the C (a non-zero exit without a sign of a passing cause such as a
full disk, a lack of memory or a signal) leaves a note, ``xo_c_<key>.failed``: the same C, flags and
compiler would fail again, so later runs take numba for that kernel at once; another compiler or another
C text has another key and is tried. Passing failures leave no note: the next run tries again.
"""

from __future__ import annotations

import ctypes
import functools
import hashlib
import logging
import os
import re
import shutil
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from xo_fit.solver import ir_c
from xo_fit.solver.ir import Array
from xo_fit.solver.ir_kernel import Kernel

_log = logging.getLogger("xo_fit")

BASE_FLAGS = ("-O3", "-march=native", "-funroll-loops", "-fPIC", "-shared", "-fno-math-errno", "-fno-tree-pre",
              "-std=c99")
REASSOC_FLAGS = ("-fassociative-math", "-fno-signed-zeros", "-fno-trapping-math")
#: Words in a compiler's messages that mark a failure as passing (no note is left; the next run tries again).
TRANSIENT = re.compile(r"No space left|Killed|signal|Cannot allocate|out of memory|Resource temporarily|"
                       r"Disk quota|Input/output error|Read-only file system", re.IGNORECASE)
#: Build folders older than this (s) are a killed process's leftovers and are removed.
STALE_BUILD_S = 3600.0
#: Longest a build may take (s) before it counts as failed.
BUILD_TIMEOUT_S = 120.0


def enabled() -> bool:
    """Whether standalone (C) kernels may be built: unless the environment sets ``XO_FIT_STANDALONE=0``."""
    return os.environ.get("XO_FIT_STANDALONE", "1") != "0"


def compiler() -> str | None:
    """The C compiler to use: $CC, else cc, else gcc (a path), or None."""
    for name in (os.environ.get("CC"), "cc", "gcc"):
        if name:
            found = shutil.which(name)
            if found:
                return found
    return None


def dims(kernel: Kernel) -> list[int]:
    """The number of dimensions of each parameter of ``kernel`` (0 for a float), in parameter order."""
    return [p.ndim if isinstance(p, Array) else 0 for p in kernel.function.params]


def flags(fastmath: tuple[str, ...]) -> tuple[str, ...]:
    """The compiler flags matching a kernel's fastmath set (:attr:`xo_fit.solver.ir.Function.fastmath`)."""
    out = BASE_FLAGS + (("-ffp-contract=fast",) if "contract" in fastmath else ("-ffp-contract=off",))
    return out + (REASSOC_FLAGS if "reassoc" in fastmath else ())


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


@functools.lru_cache(maxsize=8)
def compiler_identity(cc: str) -> str | None:
    """What the compiler says of itself (``cc -v``: version with the distribution's patch level, target and
    configuration; gcc prints only the first of ``-dumpfullversion -dumpmachine``), or None when it does not
    answer. Run once per process and compiler (about 4 ms), in the C locale (the same words whatever the
    user's language)."""
    try:
        r = subprocess.run([cc, "-v"], check=False, capture_output=True, text=True, timeout=30,
                           env={**os.environ, "LC_ALL": "C"})
    except (OSError, subprocess.SubprocessError):
        return None
    lines = [ln for ln in (r.stderr + r.stdout).splitlines() if ln.strip() and not ln.startswith("COLLECT_GCC=")]
    if r.returncode != 0 or not any("version" in ln.lower() for ln in lines):
        return None
    return "\n".join(lines)


def key(c_text: str, identity: str, flag_set: tuple[str, ...]) -> str:
    """The cache key of a build: the C text, the compiler's identity, the flags and this CPU's features."""
    ident = f"{identity}\n{flag_set}\n{_cpu()}\n{c_text}"
    return hashlib.sha256(ident.encode()).hexdigest()[:20]


def library_name(k: str, data: bytes) -> str:
    """The file name of the library ``data`` built under key ``k``: its size and SHA-256 prefix in it."""
    return f"xo_c_{k}-{len(data)}-{hashlib.sha256(data).hexdigest()[:32]}.so"


def verified_library(folder: Path, k: str) -> Path | None:
    """The cached library of key ``k`` whose size and hash match its name; any that does not match is deleted
    (a truncated or damaged file is never loaded: it would crash the process). None when there is none."""
    for path in sorted(folder.glob(f"xo_c_{k}-*.so")):
        try:
            data = path.read_bytes()
        except OSError:
            continue
        if library_name(k, data) == path.name:
            return path
        _log.warning("kernel library %s is damaged (%d bytes): removed, built again", path.name, len(data))
        try:
            path.unlink()
        except OSError:
            pass
    return None


def inner_dims(args: tuple, kernel: Kernel) -> dict[str, int]:
    """Every dimension but the first of each array argument of ``kernel``, by ``"name_dK"``: for a kernel's
    arrays these are fixed by the topology, the targets and the grid; the first (the batch) is not."""
    return {f"{p.name}_d{j}": int(a.shape[j]) for a, p in zip(args, kernel.function.params)
            if isinstance(p, Array) for j in range(1, p.ndim)}


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

    Parameters
    ----------
    lib : ctypes.CDLL
        The loaded library.
    entry : str
        The kernel's name; the library's entry point is ``<entry>_packed``.
    dims : list of int
        Each parameter's number of dimensions (:func:`dims`; counts, dimensionless).
    fixed : frozenset
        (parameter index, dimension) pairs built into the library as constants.
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


def open_built(path: Path, kernel: Kernel, fixed: dict[str, int] | None = None) -> CKernel:
    """The kernel in a library built by :func:`build` with these ``fixed`` dimensions (by ``"name_dK"``)."""
    slots = frozenset((i, j) for i, p in enumerate(kernel.function.params) if isinstance(p, Array)
                      for j in range(p.ndim) if f"{p.name}_d{j}" in (fixed or {}))
    return CKernel(ctypes.CDLL(str(path)), kernel.name, dims(kernel), slots)


class LazyKernel:
    """A generated kernel that becomes a C build on its first call: the arrays' inner dimensions are then
    known and are written into the C as constants (with every stride known, gcc sees that the rows of one
    array do not overlap and vectorises without run-time alias checks: the off-axis cost kernel ran 1.3x
    slower with them). Calls with other inner dimensions get a build of their own. Where printing,
    building or loading fails (any exception), ``fallback()`` (numba) gives the kernel and the cause is
    logged. :attr:`backend` says which ran.

    Parameters
    ----------
    folder : Path
        The private kernel cache (:func:`xo_fit.solver.kernels.cache_dir`).
    kernel : Kernel
        The kernel's IR.
    cc : str
        The C compiler's path.
    fallback : callable
        Called with no arguments where a C build fails: returns numba's build of the kernel.
    """

    def __init__(self, folder: Path, kernel: Kernel, cc: str, fallback) -> None:
        self.folder, self.kernel, self.entry, self.cc = folder, kernel, kernel.name, cc
        self.dims = dims(kernel)
        self.multi = [i for i, k in enumerate(self.dims) if k > 1]  # the arguments with inner dimensions
        self.fallback = fallback
        self.builds: dict[tuple, Callable[..., int]] = {}
        self.backends: dict[tuple, str] = {}  # per build: "c" or "numba"

    @property
    def uses_c(self) -> bool:
        """Whether a call ran a C build."""
        return "c" in self.backends.values()

    @property
    def backend(self) -> str | None:
        """``"c"`` when every call so far ran a C build, ``"numba"`` when some ran numba's (a fallback), None
        before the first call."""
        if not self.backends:
            return None
        return "numba" if "numba" in self.backends.values() else "c"

    def __call__(self, *args) -> int:
        token = tuple([args[i].shape[1:] for i in self.multi])
        fn = self.builds.get(token)
        if fn is None:
            fn = self.builds[token] = self._resolve(token, inner_dims(args, self.kernel))
        return fn(*args)

    def _resolve(self, token: tuple, fixed: dict[str, int]):
        try:
            fn = load_built(self.folder, self.kernel, self.cc, fixed)
        except Exception as exc:  # whatever fails here, numba can still run the kernel  # noqa: BLE001
            # a known failure, or one that may pass (an interrupted compiler, a full disk), is no news: INFO
            quiet = isinstance(exc, KnownFailure) or getattr(exc, "transient", False)
            level = logging.INFO if quiet else logging.WARNING
            _log.log(level, "kernel %s runs on numba: the C build failed (%s: %s)", self.entry,
                     type(exc).__name__, exc)
            fn = None
        self.backends[token] = "numba" if fn is None else "c"
        return self.fallback() if fn is None else fn


class BuildError(RuntimeError):
    """The compiler failed; ``transient`` when the cause may pass (a full disk, memory, a signal, a timeout).

    Parameters
    ----------
    message : str
        What failed, in one line (for a failed build: the compiler, its exit status, its first error line).
    transient : bool
        Whether the cause may pass; only a failure that is not leaves a failure note.
    """

    def __init__(self, message: str, transient: bool) -> None:
        super().__init__(message)
        self.transient = transient


class KnownFailure(RuntimeError):
    """A failure note says that this compiler rejects this C text."""


def load(folder: Path, kernel: Kernel, fallback):
    """The kernel as a :class:`LazyKernel` (a C build on its first call), or None when standalone kernels are
    off or there is no compiler (then numba compiles it)."""
    if not enabled():
        return None
    cc = compiler()
    if cc is None:
        return None
    return LazyKernel(folder, kernel, cc, fallback)


def load_built(folder: Path, kernel: Kernel, cc: str, fixed: dict[str, int]) -> CKernel:
    """The C build of ``kernel`` with the ``fixed`` dimensions (by ``"name_dK"``): a verified library from the
    cache, else built now.

    Parameters
    ----------
    folder : Path
        The private kernel cache.
    kernel : Kernel
        The kernel's IR.
    cc : str
        The C compiler's path.
    fixed : dict
        The dimensions to build in as constants, ``"NAME_dK"`` -> size (dimensionless; :func:`inner_dims`).

    Returns
    -------
    CKernel
        The loaded kernel.

    Raises
    ------
    KnownFailure
        A note says that this compiler rejects this C text.
    BuildError
        The compiler gives no version or fails; a rejection (not ``transient``) leaves the note.
    OSError
        The cache cannot be read or written, or the library cannot be loaded.
    """
    identity = compiler_identity(cc)
    if identity is None:
        raise BuildError(f"{cc} -v gives no version: not used", transient=True)
    text = ir_c.text(kernel, fixed)
    fl = flags(kernel.function.fastmath)
    k = key(text, identity, fl)
    path = verified_library(folder, k)
    if path is None:
        note = folder / f"xo_c_{k}.failed"
        if note.exists():
            raise KnownFailure(f"{note.name}: {_first_line(note)}")
        try:
            path = compile_into(folder, text, fl, cc, lambda data: folder / library_name(k, data))
        except BuildError as exc:
            if not exc.transient:
                _write_note(note, f"{exc}\n")
            raise
    return open_built(path, kernel, fixed)


def build(kernel: Kernel, output: Path, cc: str | None = None, fixed: dict[str, int] | None = None) -> Path:
    """Print ``kernel`` as C and build the shared library ``output`` (flushed to disk, then renamed into place).

    Parameters
    ----------
    kernel : Kernel
        The kernel's IR.
    output : Path
        The library's path.
    cc : str or None
        The C compiler's path; None: :func:`compiler`'s.
    fixed : dict or None
        Dimensions written into the C as constants, ``"NAME_dK"`` -> size (dimensionless): the library must
        then be called with arrays of exactly those.

    Returns
    -------
    Path
        ``output``.

    Raises
    ------
    BuildError
        No compiler, or the compiler failed.
    OSError
        The folder cannot be written.
    """
    cc = cc or compiler()
    if cc is None:
        raise BuildError("no C compiler (set CC, or install cc)", transient=False)
    output = Path(output)
    return compile_into(output.parent, ir_c.text(kernel, fixed), flags(kernel.function.fastmath), cc,
                        lambda data: output)


def compile_into(folder: Path, text: str, fl: tuple[str, ...], cc: str, name_of) -> Path:
    """Compile C ``text`` in a temporary folder inside ``folder`` and move the library to ``name_of(bytes)``
    after an fsync (then the folder's too): a crash leaves the old file or the whole new one, never a part.
    The temporary folder goes whatever happens (and a killed process's old ones at the next build)."""
    _sweep(folder)
    with tempfile.TemporaryDirectory(dir=folder, prefix=".xo_c_build_") as tmp:
        c_file = Path(tmp) / "kernel.c"
        c_file.write_text(text)
        lib = Path(tmp) / "kernel.so"
        try:
            r = subprocess.run([cc, *fl, "-o", str(lib), str(c_file), "-lm"], check=False, capture_output=True,
                               text=True, timeout=BUILD_TIMEOUT_S, env={**os.environ, "LC_ALL": "C"})
        except subprocess.TimeoutExpired:
            raise BuildError(f"{Path(cc).name} took over {BUILD_TIMEOUT_S:.0f} s", transient=True) from None
        if r.returncode != 0 or not lib.exists():
            msg = r.stderr.strip().splitlines() or ["no output"]
            first = next((m for m in msg if "error" in m), msg[0])
            raise BuildError(f"{Path(cc).name} failed ({r.returncode}): {first}",
                             transient=r.returncode < 0 or bool(TRANSIENT.search(r.stderr)))
        with open(lib, "rb") as fh:
            data = fh.read()
            os.fsync(fh.fileno())
        output = name_of(data)
        os.replace(lib, output)
    _fsync_dir(output.parent)
    return output


def _sweep(folder: Path) -> None:
    """Remove build folders left by killed processes (older than STALE_BUILD_S)."""
    now = time.time()
    for old in folder.glob(".xo_c_build_*"):
        try:
            if now - old.stat().st_mtime > STALE_BUILD_S:
                shutil.rmtree(old, ignore_errors=True)
        except OSError:
            pass


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _write_note(note: Path, text: str) -> None:
    """Leave a failure note; a note that cannot be written whole is not left (a full disk)."""
    try:
        note.write_text(text)
    except OSError:
        try:
            note.unlink()
        except OSError:
            pass


def _first_line(path: Path) -> str:
    try:
        return (path.read_text().splitlines() or [""])[0]
    except OSError:
        return ""
