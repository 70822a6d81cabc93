"""A batch's jobs: job files and globs read once each, a [sweep] as the plan of its variants, a hash per job.

The coordinator builds no variant and loads no data: each job file is read and
its first variant built once (to check the file and to learn which data files
it reads); every data file is read and hashed once per batch, however many
variants read it. A variant is a name, a hash and its swept values; the worker
that runs it builds it (:mod:`xo_fit.batch.worker`).
"""

from __future__ import annotations

import glob
import hashlib
import itertools
import json
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path

from xo_fit.errors import MAX_USER_FILE, XoFitError

#: Swept paths that may change which files a variant reads: such a sweep's variants are each built in the
#: coordinator to list their files (slower, still correct).
FILE_PATHS = ("driver.", "snap.inventory", "target.curve")


@dataclass
class Item:
    """One job of a batch: its name, its job file, its hash, the swept values that make it (``()`` for a job
    without a [sweep]), a key of the data files it reads (the same for every variant of its file; None where
    the variants may read other files); or, for a job file that cannot be read, the error."""

    name: str
    source: Path
    hash: str
    combo: tuple = ()
    error: str | None = None
    data: str | None = None


@dataclass
class Collection:
    """The jobs of a batch, and what their workers need: per job file, the paths of the files its variants
    read (the job file itself first) and, when asked for (a cluster), their bytes."""

    items: list[Item]
    files: dict[str, list[str]] = field(default_factory=dict)
    data: dict[str, bytes] = field(default_factory=dict)

    def bundle(self, source: Path | str) -> dict[str, bytes]:
        """The bytes of every file the variants of ``source`` read, by path (for :func:`supplied_files`)."""
        return {p: self.data[p] for p in self.files.get(str(source), []) if p in self.data}


def folder_name(name: str) -> str:
    """The job's folder in the batch: its name where that is a plain file name, else a cleaned name with a
    short hash of the real one, so that two names never share a folder ("a b" and "a_b")."""
    safe = re.sub(r"[^A-Za-z0-9_.=-]+", "_", name)[:120]
    if safe == name and name not in (".", ".."):
        return name
    return f"{safe.strip('.') or 'job'}-{hashlib.sha256(name.encode()).hexdigest()[:8]}"


def data_files(job) -> list[Path]:
    """Every file the job reads besides itself: measurements, off-axis sets, the inventory, a target curve."""
    from xo_fit.job.model import FileCurve, SplicedResponse

    files = []
    for d in job.drivers:
        for src in (d.response, d.impedance):
            if isinstance(src, FileCurve):
                files.append(src.path)
            elif isinstance(src, SplicedResponse):
                files += [src.near, src.far]
        if d.angles is not None:
            files += sorted({path for path, _ in d.angles.files().values()})
    if job.snap.inventory is not None:
        files.append(job.snap.inventory)
    curve = job.target.curve
    if curve and ("/" in curve or "." in curve):
        p = Path(curve)
        files.append(p if p.is_absolute() else job.folder / p)
    return files


class Digests:
    """Each file read and hashed once (per batch); its bytes kept when ``keep`` (for a cluster's workers).

    A file that is missing, not a regular file (a FIFO would block) or too large hashes as what it is; the job
    that reads it then fails in its worker with the reason.
    """

    def __init__(self, keep: bool = False) -> None:
        self.keep = keep
        self.digest: dict[str, str] = {}
        self.data: dict[str, bytes] = {}

    def __call__(self, path: str | Path) -> str:
        key = str(path)
        if key not in self.digest:
            self.digest[key] = self._read(key)
        return self.digest[key]

    def _read(self, key: str) -> str:
        try:
            st = os.stat(key)
            if not stat.S_ISREG(st.st_mode):
                return "<not a regular file>"
            if st.st_size > MAX_USER_FILE:
                return f"<too large: {st.st_size}>"
            with open(key, "rb") as fh:
                raw = fh.read(MAX_USER_FILE + 1)
        except (OSError, ValueError) as e:
            return f"<unreadable: {type(e).__name__}>"
        if self.keep:
            self.data[key] = raw
        return hashlib.sha256(raw).hexdigest()


def job_hash(job, document: dict, digests: Digests | None = None) -> str:
    """sha256 of the job's resolved document and of every file it reads (each by its path and its sha256)."""
    digests = digests or Digests()
    h = hashlib.sha256(json.dumps(document, sort_keys=True, default=str).encode())
    for f in data_files(job):
        h.update(f"\0{f}\0{digests(f)}".encode())
    return h.hexdigest()


def job_paths(patterns: list[str]) -> list[Path]:
    """The job files of a batch: files or globs (sorted), each pattern matching at least one."""
    paths: list[Path] = []
    for pat in patterns:
        matches = sorted(glob.glob(pat)) if any(ch in pat for ch in "*?[") else [pat]
        if not matches:
            raise XoFitError(f"no job files match '{pat}'")
        paths += [Path(m) for m in matches]
    return paths


def file_items(path: Path, digests: Digests, files: dict[str, list[str]]) -> list[Item]:
    """The jobs of one job file: a hash each, from one read of the file and one build of its first variant
    (every variant's own build when the sweep may change its files). Raises XoFitError for a bad file."""
    from xo_fit.job.sweep import read_sweep

    sweep = read_sweep(path)
    source = Path(sweep.ctx.path or path)
    digests(source)
    if sweep.touches(FILE_PATHS):
        items, read = [], set()
        for combo in sweep.combos():
            job, doc = sweep.variant(combo)
            read |= {str(f) for f in data_files(job)}
            items.append(Item(job.name, source, job_hash(job, doc, digests), combo))
    else:
        combos = sweep.combos()
        first = next(combos)
        job, _ = sweep.variant(first)  # the file checked, its data files listed
        read = {str(f) for f in data_files(job)}
        files_key = "".join(f"\0{f}\0{digests(f)}" for f in data_files(job)).encode()
        base = hashlib.sha256(json.dumps(sweep.data, sort_keys=True, default=str).encode())
        base.update(files_key)
        data = hashlib.sha256(files_key).hexdigest()
        items = [Item(sweep.name(c), source, _variant_hash(base, c), c, data=data)
                 for c in itertools.chain([first], combos)]
    files[str(source)] = [str(source)] + sorted(read)
    return items


def _variant_hash(base, combo: tuple) -> str:
    h = base.copy()
    h.update(json.dumps(list(combo), default=str).encode())
    return h.hexdigest()


def collect(patterns: list[str], keep_bytes: bool = False) -> Collection:
    """The jobs of a batch: files or globs, a job file with a [sweep] standing for its variants; names must
    be unique. A job file that cannot be read is one failed item named after the file (its error kept)."""
    digests = Digests(keep=keep_bytes)
    files: dict[str, list[str]] = {}
    items: list[Item] = []
    for p in job_paths(patterns):
        try:
            items += file_items(p, digests, files)
        except XoFitError as e:
            if not p.exists():
                raise
            items.append(Item(p.stem, p.resolve(), f"<unreadable {digests(p)}>", error=str(e)))
    seen: dict[str, Path] = {}
    for it in items:
        if it.name in seen:
            raise XoFitError(f"two jobs are named '{it.name}' ({seen[it.name]} and {it.source}); give them distinct "
                             "names", path=it.source)
        seen[it.name] = it.source
    return Collection(items, files, digests.data)
