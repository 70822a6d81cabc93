"""[sweep]: a job file as the variants it stands for."""

from __future__ import annotations

import copy
import dataclasses
import itertools
import math
import re
from pathlib import Path
from typing import Any
from collections.abc import Iterator

from xo_fit.errors import XoFitError
from xo_fit.job.model import Job
from xo_fit.job.settings import FrozenMap
from xo_fit.job.reading import Context
from xo_fit.job.reader import read_document, build_job

#: The most variants one [sweep] may stand for (the product of its lists' lengths); more is refused up front.
MAX_VARIANTS = 100_000


def has_sweep(path: str | Path) -> bool:
    """True when the job file has a [sweep] table; False also when it cannot be read (load_job then says why)."""
    try:
        data, _ = read_document(path)
    except XoFitError:
        return False
    return "sweep" in data


@dataclasses.dataclass(frozen=True)
class Sweep:
    """A job file read once, as the plan of its variants (none built yet).

    ``data`` is the document without its [sweep]; ``axes`` holds (key, paths, values) per [sweep] entry, in the
    file's order; a variant is a combination, one value per axis (``()`` for a file without a [sweep]).
    """

    data: dict
    ctx: Context
    base_name: str
    axes: tuple

    @property
    def swept(self) -> bool:
        """Whether the file has a [sweep] (at least one axis)."""
        return bool(self.axes)

    def __len__(self) -> int:
        return math.prod(len(a[2]) for a in self.axes)

    def combos(self) -> Iterator[tuple]:
        """Every variant's values, in the order the variants are named and run."""
        return itertools.product(*[a[2] for a in self.axes])

    def labels(self) -> list[str]:
        """Each axis's label: the shortest end of its (first) path that no other axis's path ends with, so that
        ``target.way.woofer.fc`` and ``target.way.tweeter.fc`` read ``woofer.fc`` and ``tweeter.fc`` (the last
        segment alone once named both "fc", and the woofer's value was lost from summary.csv)."""
        return distinguishing_labels([paths[0] for _, paths, _ in self.axes])

    def name(self, combo: tuple) -> str:
        """The variant's name: ``<name>-<label><value>-...`` (the name itself without a [sweep]); a label's dots
        become underscores, so that the name is a file name."""
        if not self.axes:
            return self.base_name
        return f"{self.base_name}-" + "-".join(f"{label.replace('.', '_')}{variant_label(value)}"
                                               for label, value in zip(self.labels(), combo))

    def values(self, combo: tuple) -> dict:
        """The swept values by their axis's label (the keys of ``Job.swept``)."""
        return dict(zip(self.labels(), combo))

    def touches(self, prefixes: tuple[str, ...]) -> bool:
        """True when some swept path begins with one of ``prefixes`` (dotted, e.g. ``"driver."``)."""
        return any(p == pre.rstrip(".") or p.startswith(pre) for _, paths, _ in self.axes for p in paths
                   for pre in prefixes)

    def variant(self, combo: tuple) -> tuple[Job, dict]:
        """The variant built and checked: (job, its resolved document)."""
        variant = copy.deepcopy(self.data)
        if not self.axes:
            return build_job(variant, self.ctx), variant
        for (key, paths, _), value in zip(self.axes, combo):
            for p in paths:
                assign_path(variant, p, value, self.ctx, key)
        variant["name"] = self.name(combo)
        job = build_job(variant, self.ctx)
        return dataclasses.replace(job, swept=FrozenMap(self.values(combo))), variant


def read_sweep(path: str | Path) -> Sweep:
    """Read a job file as its :class:`Sweep`, checking the [sweep] table's form and size (no variant built).

    Raises
    ------
    JobError
        The file cannot be read, the [sweep] is not a table of non-empty lists, or it stands for more than
        :data:`MAX_VARIANTS` variants.
    """
    data, ctx = read_document(path)
    name = data.get("name")
    base_name = name if isinstance(name, str) else ctx.stem
    sweep = data.pop("sweep", None)
    if sweep is None:
        return Sweep(data, ctx, base_name, ())
    if not isinstance(sweep, dict) or not sweep:
        raise ctx.error(("sweep",), None, "expected a table of dotted paths to lists of values", "[sweep]")
    axes = []
    for key, values in sweep.items():
        if not isinstance(values, list) or not values:
            raise ctx.error(("sweep",), key, f"expected a non-empty list of values, got {values!r}", f"[sweep] {key}")
        paths = [p.strip() for p in key.split(",") if p.strip()]
        axes.append((key, tuple(paths), tuple(values)))
    count = math.prod(len(a[2]) for a in axes)
    if count > MAX_VARIANTS:
        sizes = " x ".join(str(len(a[2])) for a in axes)
        raise ctx.error(("sweep",), None, f"stands for {count:,} variants ({sizes}); at most {MAX_VARIANTS:,} are "
                        "allowed: split the sweep over several job files or shorten its lists", "[sweep]")
    return Sweep(data, ctx, base_name, tuple(axes))


def expand_job(path: str | Path) -> list[tuple[Job, dict]]:
    """A job file as the list of jobs it stands for: itself, or one per variant of its [sweep].

    [sweep] maps dotted paths to lists of values; every combination of the lists
    is a variant (a cartesian product). A path names a key in the job's tables
    (``"target.way.woofer.fc"``, ``"search.seed"``) or in a part by its name
    (``"part.L1.max"``); a key holding several comma-separated paths sets all of
    them to each value together (``"target.way.woofer.fc, target.way.tweeter.fc"``).
    Variants are named ``<name>-<key><value>-...`` after the last segment of
    each path; at most :data:`MAX_VARIANTS` of them. Returns (job, its resolved document) pairs.
    """
    sweep = read_sweep(path)
    return [sweep.variant(combo) for combo in sweep.combos()]


def distinguishing_labels(paths: list[str]) -> list[str]:
    """For dotted ``paths``, the shortest end of each (whole segments) that is unique among them."""
    segs = [p.split(".") for p in paths]
    out = []
    for i, s in enumerate(segs):
        for k in range(1, len(s) + 1):
            end = s[-k:]
            if all(o[-k:] != end for j, o in enumerate(segs) if j != i):
                break
        out.append(".".join(end))
    return out


def variant_label(value: Any) -> str:
    """A swept value as it appears in a variant's name: safe in a file name."""
    return re.sub(r"[^\w.=+-]+", "_", str(value))[:40]


def assign_path(data: dict, path: str, value: Any, ctx: Context, key: str) -> None:
    """Set the dotted ``path`` in document ``data`` to ``value`` for a variant, making the tables on the
    way; ``part.NAME.key`` addresses the ``[[part]]`` named NAME. A path that names no part or runs into a value
    raises JobError on the [sweep] entry ``key``."""
    segs = path.split(".")
    node: Any = data
    for i, seg in enumerate(segs[:-1]):
        if seg == "part" and isinstance(node, dict) and isinstance(node.get("part"), list) and i + 1 < len(segs) - 1:
            parts = node["part"]
            name = segs[i + 1]
            match = [p for p in parts if isinstance(p, dict) and p.get("name") == name]
            if not match:
                raise ctx.error(("sweep",), key, f"no part named '{name}' for the path '{path}'", f"[sweep] {key}")
            node = match[0]
            rest = segs[i + 2:]
            for r in rest[:-1]:
                node = node.setdefault(r, {})
            node[rest[-1]] = value
            return
        if not isinstance(node, dict):
            raise ctx.error(("sweep",), key, f"the path '{path}' runs into a value at '{seg}'", f"[sweep] {key}")
        node = node.setdefault(seg, {})
    if not isinstance(node, dict):
        raise ctx.error(("sweep",), key, f"the path '{path}' runs into a value", f"[sweep] {key}")
    node[segs[-1]] = value
