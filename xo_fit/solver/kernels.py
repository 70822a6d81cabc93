"""Compiling and caching generated kernels: written once to a private cache folder, compiled by numba.

Kernels are keyed by a hash of their text (with the kernel version and
numba's), so a second run of a topology starts without compiling.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import stat
import sys
import tempfile
from pathlib import Path

from .vectors import prefer_wide_vectors

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
    """The cache key of a kernel's text (with the kernel version and numba's)."""
    return hashlib.sha256(f"{KERNEL_VERSION}\n{_numba_version()}\n{source}".encode()).hexdigest()[:20]


#: Digests whose kernel was loaded from a standalone module (no numba involved).
STANDALONE: set[str] = set()


def load_kernel(source: str, entry: str = "kernel", *, standalone: bool = False):
    """Write ``source`` to the cache (once, atomically), import it and return its function ``entry``.

    standalone: first look for a standalone (ahead-of-time compiled) copy of the kernel in the cache
    (:mod:`xo_fit.solver.standalone`), which loads without numba; its digest is then in ``STANDALONE``.
    """
    digest = kernel_digest(source)
    if digest in _LOADED:
        return _LOADED[digest]
    folder = cache_dir()
    if standalone:
        from .standalone import load

        fn = load(folder, digest, entry)
        if fn is not None:
            STANDALONE.add(digest)
            _LOADED[digest] = fn
            return fn
    prefer_wide_vectors()
    path = source_path(folder, digest)
    if not path.exists() or path.read_text() != source:
        fd, tmp = tempfile.mkstemp(dir=folder, suffix=".tmp")
        with os.fdopen(fd, "w") as fh:
            fh.write(source)
        os.replace(tmp, path)
    name = f"xo_fit_kernels.k_{digest}"
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    _LOADED[digest] = getattr(module, entry)
    return _LOADED[digest]


def source_path(folder: Path, digest: str) -> Path:
    """Where a kernel's generated text lives in the cache."""
    return folder / f"xo_kernel_{digest}.py"


def request_standalone(source: str, entry: str, signature: str, probe: tuple) -> bool:
    """Ask for a standalone copy of a kernel loaded through the JIT (a background build, for later runs);
    ``probe`` is one call's arguments, to check the copy against. Returns whether a build started."""
    digest = kernel_digest(source)
    if digest in STANDALONE:
        return False
    from .standalone import start_build

    folder = cache_dir()
    return start_build(folder, digest, source_path(folder, digest), entry, signature, probe)
