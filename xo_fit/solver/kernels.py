"""Compiling and caching generated kernels (IR: :mod:`xo_fit.solver.ir`) in a private cache folder: printed as C
and built by the C compiler where there is one (:mod:`xo_fit.solver.standalone`), else printed as Python and
compiled by numba.

Kernels are keyed by a hash of their text (with the kernel version, and the compiler or numba's version), so
a second run of a topology starts without compiling.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import stat
import sys
import tempfile
from pathlib import Path

from xo_fit.solver.ir_kernel import Kernel
from xo_fit.solver.ir_python import text as python_text
from xo_fit.solver.vectors import prefer_wide_vectors

#: Bump when the generated code changes meaning, so stale caches are not reused.
KERNEL_VERSION = 2


def _private(folder: Path) -> bool:
    """True when ``folder`` (created 0700 if missing) is a real folder owned by this user that nobody else can
    write: only then may code found in it be run."""
    try:
        folder.mkdir(parents=True, exist_ok=True, mode=0o700)
        probe = folder / f".probe{os.getpid()}"
        probe.write_text("")
        probe.unlink()
        for f in (folder, folder.parent):
            st = f.lstat()
            if not stat.S_ISDIR(st.st_mode):
                return False  # a link or a file: someone else may decide where it points
            if hasattr(os, "getuid") and st.st_uid != os.getuid():
                return False
            if f == folder and st.st_mode & 0o022:
                return False
    except OSError:
        return False
    return True


_SESSION: list[Path] = []


def cache_dir() -> Path:
    """Folder for generated kernels and numba's compiled objects: $XO_FIT_CACHE, else ~/.cache/xo_fit/kernels.

    The folder must be private (owned by this user, not writable by others), since the kernels in it are run.
    When the usual folder is not writable, ``<tmp>/xo_fit-<uid>/kernels`` is used if it is private; else a fresh
    private folder for this process only (nothing is then reused across runs, and nothing planted is run).

    Returns
    -------
    Path
        The folder (created 0700 where it was missing).
    """
    env = os.environ.get("XO_FIT_CACHE")
    base = Path(env) if env else Path(os.environ.get("XDG_CACHE_HOME", Path.home() / ".cache")) / "xo_fit"
    uid = os.getuid() if hasattr(os, "getuid") else "u"
    for folder in (base / "kernels", Path(tempfile.gettempdir()) / f"xo_fit-{uid}" / "kernels"):
        if _private(folder):
            return folder
    if not _SESSION:
        _SESSION.append(Path(tempfile.mkdtemp(prefix="xo_fit-kernels-")))
    return _SESSION[0]


_LOADED: dict[str, object] = {}


def _numba_version() -> str:
    """numba's version, read from its installed metadata (importing numba costs 0.2 s)."""
    if "numba" in sys.modules:
        return sys.modules["numba"].__version__
    from importlib.metadata import version

    return version("numba")


def kernel_digest(source: str) -> str:
    """The cache key of a kernel's text (with the kernel version and numba's).

    Parameters
    ----------
    source : str
        The kernel's Python text (:func:`xo_fit.solver.ir_python.text`).

    Returns
    -------
    str
        20 hexadecimal digits of a SHA-256.
    """
    return hashlib.sha256(f"{KERNEL_VERSION}\n{_numba_version()}\n{source}".encode()).hexdigest()[:20]


def load_kernel(kernel: Kernel, *, standalone: bool = True):
    """``kernel``'s function, compiled (once per kernel text, cached on disk).

    With ``standalone`` the kernel becomes a C library on its first call (:mod:`xo_fit.solver.standalone`:
    printed as C, built by the system's compiler, loaded without numba). Without, or when that is not
    possible, numba compiles it: its Python text is written to the cache (atomically) and imported.
    Within a process each kernel text is loaded once.

    Parameters
    ----------
    kernel : Kernel
        The kernel's IR (:class:`~xo_fit.solver.ir_kernel.Kernel`).
    standalone : bool
        Try the C build first (off: numba at once).

    Returns
    -------
    callable
        The kernel, called with its parameters in order (C-contiguous float64 arrays and floats), returning an
        int: a :class:`~xo_fit.solver.standalone.LazyKernel`, or numba's compiled function.
    """
    source, entry = python_text(kernel), kernel.name
    text_key = hashlib.sha256(f"{entry}\n{standalone}\n{source}".encode()).hexdigest()
    if text_key in _LOADED:
        return _LOADED[text_key]
    folder = cache_dir()
    if standalone:
        from xo_fit.solver.standalone import load

        fn = load(folder, kernel, fallback=lambda: _numba_kernel(folder, source, entry))
        if fn is not None:
            _LOADED[text_key] = fn
            return fn
    _LOADED[text_key] = _numba_kernel(folder, source, entry)
    return _LOADED[text_key]


def _numba_kernel(folder: Path, source: str, entry: str):
    """numba's build of a kernel text: written to the cache (atomically), imported, compiled on first call."""
    digest = kernel_digest(source)
    prefer_wide_vectors()
    path = source_path(folder, digest)
    if not path.exists() or path.read_text() != source:
        fd, tmp = tempfile.mkstemp(dir=folder, suffix=".tmp")
        try:
            with os.fdopen(fd, "w") as fh:
                fh.write(source)
            os.replace(tmp, path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)  # a full disk leaves no temporary file behind
            raise
    name = f"xo_fit_kernels.k_{digest}"
    spec = importlib.util.spec_from_file_location(name, path)
    assert spec is not None and spec.loader is not None  # a .py path always has a source loader
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return getattr(module, entry)


def source_path(folder: Path, digest: str) -> Path:
    """Where a kernel's generated text lives in the cache: ``folder/xo_kernel_<digest>.py``."""
    return folder / f"xo_kernel_{digest}.py"


def kernel_backend(fn) -> str | None:
    """Which compiler's build ran the kernel ``fn`` (as returned by :func:`load_kernel`): ``"c"`` (a standalone
    C library, :mod:`xo_fit.solver.standalone`) or ``"numba"`` (numba's, also where a C build failed and
    numba took over); None for a kernel that becomes C on its first call and has not been called yet."""
    backend = getattr(fn, "backend", "numba")
    return backend if backend in ("c", "numba", None) else "numba"
