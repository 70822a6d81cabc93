"""Standalone copies of generated kernels: compiled ahead of time into an extension module that loads without numba.

A warm run of ``xo-fit fit`` spends most of its start-up in numba itself: importing it (0.2 s here) and
setting up its CPU target on the first cached call (0.3-0.45 s), before a single candidate is scored. The
same generated kernel compiled ahead of time (numba's ``pycc``, with the JIT's flags: error_model numpy,
fastmath contract + reassoc, this host's CPU, C-contiguous arrays) is an ordinary extension module: it
imports in about a millisecond, numba unloaded, and computes the same numbers bit for bit at the same speed
(measured: 2.5 ms against 2.95 ms per 512 candidates of the 16-part three-way; no difference in any output).
A build is installed only when it gives the JIT kernel's outputs bit for bit on a probe batch of the run
that asked for it (so a seed gives the same result whichever copy runs).

Building one takes several seconds and a C compiler, so it never delays a run: the first run of a topology
uses the JIT kernel as before and starts a detached background build (one at a time per kernel, guarded by a
lock file); later runs find the module in the private kernel cache and use it. ``XO_FIT_STANDALONE=0``
turns the whole mechanism off (the test suite does, but for the test of this module). Without a C compiler,
or a numba without ``pycc``, nothing is built and the JIT kernel is used as always.

Run as ``python -m xo_fit.solver.standalone SOURCE ENTRY SIGNATURE OUTPUT`` (what the background build does).
"""

from __future__ import annotations

import importlib.machinery
import importlib.util
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

#: numba type signature of the fused cost kernel (xo_fit.solver.fused.FusedCost.source): values (B, P),
#: r_coef (P,), r_exp (P,), fin (K, F), vs, rs, tau2, tgt (R, F), ang (A, 2D, F), angw (A, 3), scratch (S, F),
#: out (B, 10) -> the number of flagged candidates.
COST_SIGNATURE = ("i8(f8[:,::1], f8[::1], f8[::1], f8[:,::1], f8, f8, f8, f8[:,::1], f8[:,:,::1], f8[:,::1], "
                  "f8[:,::1], f8[:,::1])")
#: A build lock older than this (s) is taken to be left by a build that died.
STALE_LOCK_S = 600.0


def enabled() -> bool:
    return os.environ.get("XO_FIT_STANDALONE", "1") != "0"


def module_path(folder: Path, digest: str) -> Path:
    """Where the standalone module of kernel ``digest`` lives in the cache folder."""
    suffix = importlib.machinery.EXTENSION_SUFFIXES[0]
    return folder / f"xo_standalone_{digest}{suffix}"


def load(folder: Path, digest: str, entry: str):
    """The function ``entry`` of the standalone module of kernel ``digest``, or None when there is none (or it
    does not load: a module built by another Python or numba is simply rebuilt)."""
    path = module_path(folder, digest)
    if not enabled() or not path.exists():
        return None
    name = f"xo_standalone_{digest}"
    try:
        spec = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        return getattr(module, entry)
    except Exception:  # a damaged or foreign module: ignore it, the JIT kernel does the work
        return None


def start_build(folder: Path, digest: str, source_path: Path, entry: str, signature: str,
                probe: tuple | None = None) -> bool:
    """Start a detached background build of the standalone module (returns whether one was started): not when
    turned off, without a C compiler, when the module exists, or while another build of it runs."""
    if not enabled() or module_path(folder, digest).exists():
        return False
    if shutil.which(os.environ.get("CC", "cc")) is None and shutil.which("gcc") is None:
        return False
    lock = folder / f"xo_standalone_{digest}.building"
    try:
        if lock.exists() and time.time() - lock.stat().st_mtime > STALE_LOCK_S:
            lock.unlink()
        fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
        os.close(fd)
    except OSError:
        return False
    probe_path = folder / f"xo_standalone_{digest}.probe.npz"
    if probe is not None:
        import numpy as np

        with open(probe_path, "wb") as fh:
            np.savez(fh, *probe)
    cmd = [sys.executable, "-m", "xo_fit.solver.standalone", str(source_path), entry, signature,
           str(module_path(folder, digest)), str(lock), str(probe_path) if probe is not None else ""]
    try:
        subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                         start_new_session=True, env={**os.environ, "XO_FIT_STANDALONE": "0"})
    except OSError:
        lock.unlink(missing_ok=True)
        return False
    return True


def build(source: str, entry: str, signature: str, output: Path, probe: tuple | None = None) -> Path:
    """Compile ``entry`` of the generated ``source`` ahead of time into the extension module ``output``
    (written atomically). With ``probe`` (the kernel's arguments; every array argument written to is copied),
    the module is installed only if its outputs equal the JIT kernel's bit for bit. Raises on any failure (no
    compiler, no pycc, a compile error, a mismatch)."""
    from .vectors import prefer_wide_vectors

    prefer_wide_vectors()  # the JIT's vector width, before numba reads its configuration
    import numba
    import numba.core.codegen as codegen
    import numba.pycc.compiler as pycc_compiler
    from numba.core.compiler import Flags
    from numba.core.cpu import FastMathOptions
    from numba.pycc import CC

    # this host's CPU features as the JIT takes them (NUMBA_CPU_FEATURES included), not the generic model's
    codegen.AOTCPUCodegen._customize_tm_features = codegen.JITCPUCodegen._customize_tm_features

    class _JitFlags(Flags):  # the flags the JIT kernel is compiled with (see the njit line of the source)
        def __init__(self, *args, **kwargs) -> None:
            super().__init__(*args, **kwargs)
            self.fastmath = FastMathOptions({"contract", "reassoc"})
            self.error_model = "numpy"

    pycc_compiler.Flags = _JitFlags
    text = "\n".join(line for line in source.splitlines() if not line.startswith("@numba.njit"))
    namespace: dict = {}
    exec(compile(text, f"<standalone {output.name}>", "exec"), namespace)
    output = Path(output)
    with tempfile.TemporaryDirectory(dir=output.parent) as tmp:
        name = output.name.split(".")[0]
        cc = CC(name)
        cc.output_dir = tmp
        cc.target_cpu = "host"
        cc.verbose = False
        cc.export(entry, signature)(namespace[entry])
        cc.compile()
        built = next(Path(tmp).glob(f"{name}*"))
        if probe is not None:
            import numpy as np

            spec = importlib.util.spec_from_file_location(name, built)
            module = importlib.util.module_from_spec(spec)
            spec.loader.exec_module(module)
            jit = numba.njit(error_model="numpy", fastmath={"contract", "reassoc"})(namespace[entry])
            a = [x.copy() if isinstance(x, np.ndarray) else x for x in probe]
            b = [x.copy() if isinstance(x, np.ndarray) else x for x in probe]
            ra, rb = getattr(module, entry)(*a), jit(*b)
            same = ra == rb and all(np.array_equal(x, y, equal_nan=True) for x, y in zip(a, b)
                                    if isinstance(x, np.ndarray))
            if not same:
                raise RuntimeError("the standalone kernel does not give the JIT kernel's numbers bit for bit")
        os.replace(built, output)
    return output


def _main(argv: list[str]) -> int:
    source_path, entry, signature, output = argv[:4]
    lock = Path(argv[4]) if len(argv) > 4 and argv[4] else None
    probe_path = Path(argv[5]) if len(argv) > 5 and argv[5] else None
    try:
        probe = None
        if probe_path is not None:
            import numpy as np

            with np.load(probe_path) as z:
                probe = tuple(z[f"arr_{i}"] if z[f"arr_{i}"].ndim else z[f"arr_{i}"].item() for i in range(len(z.files)))
        build(Path(source_path).read_text(), entry, signature, Path(output), probe)
        return 0
    except Exception:
        return 1
    finally:
        if lock is not None:
            lock.unlink(missing_ok=True)
        if probe_path is not None:
            probe_path.unlink(missing_ok=True)


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
