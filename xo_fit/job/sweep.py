"""[sweep]: a job file as the variants it stands for."""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path
from typing import Any


from xo_fit.errors import XoFitError
from xo_fit.job.model import (FrozenMap, Job)
from xo_fit.job.reading import (Context)
from xo_fit.job.reader import (read_document, build_job)

def has_sweep(path: str | Path) -> bool:
    """True when the job file has a [sweep] table; False also when it cannot be read (load_job then says why)."""
    try:
        data, _ = read_document(path)
    except XoFitError:
        return False
    return "sweep" in data


def expand_job(path: str | Path) -> list[tuple["Job", dict]]:
    """A job file as the list of jobs it stands for: itself, or one per variant of its [sweep].

    [sweep] maps dotted paths to lists of values; every combination of the lists
    is a variant (a cartesian product). A path names a key in the job's tables
    (``"target.way.woofer.fc"``, ``"search.seed"``) or in a part by its name
    (``"part.L1.max"``); a key holding several comma-separated paths sets all of
    them to each value together (``"target.way.woofer.fc, target.way.tweeter.fc"``).
    Variants are named ``<name>-<key><value>-...`` after the last segment of
    each path. Returns (job, its resolved document) pairs; the document feeds
    the batch store's hash.
    """
    import copy
    import itertools

    data, ctx = read_document(path)
    base_name = data.get("name") if isinstance(data.get("name"), str) else ctx.stem
    sweep = data.pop("sweep", None)
    if sweep is None:
        return [(build_job(data, ctx), data)]
    if not isinstance(sweep, dict) or not sweep:
        raise ctx.error(("sweep",), None, "expected a table of dotted paths to lists of values", "[sweep]")
    axes = []
    for key, values in sweep.items():
        if not isinstance(values, list) or not values:
            raise ctx.error(("sweep",), key, f"expected a non-empty list of values, got {values!r}", f"[sweep] {key}")
        paths = [p.strip() for p in key.split(",") if p.strip()]
        axes.append((key, paths, values))
    out = []
    for combo in itertools.product(*[a[2] for a in axes]):
        variant = copy.deepcopy(data)
        label = []
        for (key, paths, _), value in zip(axes, combo):
            for p in paths:
                assign_path(variant, p, value, ctx, key)
            label.append(f"{paths[0].split('.')[-1]}{variant_label(value)}")
        variant["name"] = f"{base_name}-" + "-".join(label)
        swept = FrozenMap({paths[0].split(".")[-1]: value for (key, paths, _), value in zip(axes, combo)})
        out.append((dataclasses.replace(build_job(variant, ctx), swept=swept), variant))
    return out


def variant_label(value: Any) -> str:
    """A swept value as it appears in a variant's name: safe in a file name."""
    return re.sub(r"[^\w.=+-]+", "_", str(value))[:40]


def assign_path(data: dict, path: str, value: Any, ctx: "Context", key: str) -> None:
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
