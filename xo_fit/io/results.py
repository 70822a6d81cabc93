"""Result files: result.json and response.csv, written atomically; result.json read back.

Formats are specified in ``docs/job-format.md``. Every file is first
written under a temporary name in its own folder, then renamed over the
target, so a crash or Ctrl-C never leaves a half-written result in place of a
finished one.
"""

from __future__ import annotations

import csv
import json
import math
import os
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from xo_fit.errors import DataError, XoFitError, read_user_text
from xo_fit.units import format_value

_UMASK = os.umask(0)
os.umask(_UMASK)


@contextmanager
def atomic_path(path: str | Path, suffix: str = "") -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it over ``path``, else remove it."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=suffix or path.suffix)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        os.chmod(tmp_path, 0o666 & ~_UMASK)  # mkstemp makes 0600; a result is an ordinary file
        os.replace(tmp_path, path)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def write_text(path: str | Path, text: str) -> None:
    """Write ``text`` to ``path`` atomically (UTF-8)."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def _clean(x: Any) -> Any:
    """JSON-safe copy: numpy scalars to Python, non-finite floats to None."""
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, np.ndarray):
        return _clean(x.tolist())
    if isinstance(x, (np.floating, float)):
        f = float(x)
        return f if math.isfinite(f) else None
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    return x


def write_json(path: str | Path, data: dict) -> None:
    write_text(path, json.dumps(_clean(data), indent=2, ensure_ascii=False) + "\n")


def part_entries(names: tuple[str, ...], units: tuple[str, ...], values: np.ndarray) -> dict:
    """The ``parts`` section: value in SI, its unit and engineering text, per part."""
    return {n: {"value": float(v), "unit": u, "text": format_value(float(v), u)}
            for n, u, v in zip(names, units, values)}


@dataclass(frozen=True)
class Table:
    """Named float columns of equal length, written as CSV (pandas would cost 0.2 s of import per command)."""

    columns: dict

    def write(self, path: str | Path, fmt: str = "%.6g") -> None:
        names = list(self.columns)
        data = np.column_stack([np.asarray(self.columns[n], dtype=float) for n in names])
        with atomic_path(path) as tmp:
            with open(tmp, "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh)
                w.writerow(names)
                for row in data:
                    w.writerow(["" if not math.isfinite(x) else fmt % x for x in row])


def write_csv(path: str | Path, table: Table) -> None:
    table.write(path)


def write_rows(path: str | Path, rows: list[dict], columns: list[str] | None = None) -> None:
    """Write dict rows as CSV, atomically; the columns are ``columns`` or the keys of the first row."""
    with atomic_path(path) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=columns if columns is not None else (list(rows[0]) if rows else []))
            w.writeheader()
            for row in rows:
                w.writerow({k: (f"{v:.6g}" if isinstance(v, float) else v) for k, v in row.items()})


def read_result(path: str | Path) -> dict:
    """Read a result.json; raise DataError naming the file for anything malformed."""
    path = Path(path)
    if path.is_dir():
        path = path / "result.json"
    text = read_user_text(path, "result file")
    try:
        data = json.loads(text)
    except RecursionError:
        raise DataError("not an xo_fit result: nested too deeply", path=path) from None
    except json.JSONDecodeError as e:
        raise DataError(f"not valid JSON: {e.msg}", path=path, line=e.lineno) from None
    if not isinstance(data, dict) or not isinstance(data.get("parts"), dict):
        raise DataError("not an xo_fit result: expected an object with a \"parts\" table", path=path)
    for name, entry in data["parts"].items():
        if not isinstance(entry, dict) or not isinstance(entry.get("value"), (int, float)) \
                or isinstance(entry.get("value"), bool) or not entry["value"] > 0:
            raise DataError(f"part {name}: expected {{\"value\": <number above 0 in SI units>, ...}}", path=path,
                            key="parts")
    return data


def result_values(data: dict, part_names: tuple[str, ...], path: str | Path) -> dict[str, float]:
    """Values by part name from a result, checked against the job's parts."""
    known = set(part_names)
    unknown = [n for n in data["parts"] if n not in known]
    if unknown:
        raise XoFitError(f"the result names part {unknown[0]}, which the job does not have "
                         f"(job parts: {', '.join(part_names)})", path=path, key="parts")
    return {n: float(e["value"]) for n, e in data["parts"].items()}
