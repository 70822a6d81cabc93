"""Result files: result.json and response.csv, written atomically; result.json read back.

Formats are specified in ``docs/job-format.md``. Every file is first
written under a temporary name in its own folder, then renamed over the
target, so a crash or Ctrl-C never leaves a half-written result in place of a
finished one.
"""

from __future__ import annotations

import csv
import errno
import json
import math
import os
import stat
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from collections.abc import Iterator

import numpy as np

from xo_fit.errors import DataError, WriteError, XoFitError, read_user_text, shown_path as _shown
from xo_fit.units import format_value

_UMASK = os.umask(0)
os.umask(_UMASK)


def _failed(path: Path, e: OSError) -> WriteError:
    full = " (the disk is full)" if e.errno == errno.ENOSPC else ""
    return WriteError(f"cannot write it: {e.strerror or e}{full}", path=_shown(path))


def check_target(path: str | Path, option: str | None = None) -> None:
    """Refuse an output file where a folder, device, pipe or socket stands, or below a file: a :class:`WriteError`
    naming it (and the ``option`` that gave it). A regular file or a symbolic link is replaced by the rename."""
    path = Path(path)
    key = option
    try:
        mode = os.lstat(path).st_mode
    except (FileNotFoundError, NotADirectoryError):  # nothing there, or a file above it (said below)
        mode = None
    except (OSError, ValueError) as e:
        raise WriteError(f"cannot write it: {getattr(e, 'strerror', None) or e}", path=_shown(path), key=key) from None
    if mode is not None and stat.S_ISDIR(mode):
        raise WriteError("a folder stands there: name a file", path=_shown(path), key=key)
    if mode is not None and not (stat.S_ISREG(mode) or stat.S_ISLNK(mode)):
        raise WriteError("a device, pipe or socket stands there: xo_fit writes only regular files (it never replaces "
                         "such a node)", path=_shown(path), key=key)
    for parent in path.parents:
        if parent.exists() or parent.is_symlink():
            if not parent.is_dir():
                raise WriteError(f"{_shown(parent)} is a file, not a folder", path=_shown(path), key=key)
            break


def check_folder(path: str | Path, option: str | None = None) -> None:
    """Refuse an output folder that is a file, a device or a pipe, or lies below a file (a :class:`WriteError`)."""
    path = Path(path)
    for p in (path, *path.parents):
        if p.exists() or p.is_symlink():
            if not p.is_dir():
                what = "a file" if p.is_file() else "a device, pipe or socket"
                raise WriteError(f"{_shown(p)} is {what}, not a folder", path=_shown(path), key=option)
            return


def make_folder(path: str | Path, option: str | None = None) -> Path:
    """Create the output folder ``path`` (and its parents); a file in the way or a failed mkdir is a WriteError."""
    path = Path(path)
    check_folder(path, option)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise _failed(path, e) from None
    return path


@contextmanager
def atomic_path(path: str | Path, suffix: str = "") -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it over ``path``, else remove it.

    A folder, device or pipe at ``path`` is refused (never replaced); a write that fails (a full disk, no
    permission) is a :class:`WriteError` naming the file, and no temporary file is left behind.
    """
    path = Path(path)
    check_target(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=suffix or path.suffix)
        os.close(fd)
    except OSError as e:
        raise _failed(path, e) from None
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        os.chmod(tmp_path, 0o666 & ~_UMASK)  # mkstemp makes 0600; a result is an ordinary file
        check_target(path)  # again: something may have been put there meanwhile
        os.replace(tmp_path, path)
    except OSError as e:
        raise _failed(path, e) from None
    finally:
        try:
            tmp_path.unlink()
        except FileNotFoundError:
            pass


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


def write_json(path: str | Path, data: dict) -> dict:
    """Write ``data`` to ``path`` as indented UTF-8 JSON, atomically: numpy scalars and arrays as Python
    numbers and lists, non-finite floats as null. Returns the document as written (what reading the file
    back would give), so a caller never needs to read it back."""
    clean = _clean(data)
    write_text(path, json.dumps(clean, indent=2, ensure_ascii=False) + "\n")
    return clean


def part_entries(names: tuple[str, ...], units: tuple[str, ...], values: np.ndarray) -> dict:
    """The ``parts`` section: value in SI, its unit and engineering text, per part."""
    return {n: {"value": float(v), "unit": u, "text": format_value(float(v), u)}
            for n, u, v in zip(names, units, values)}


@dataclass(frozen=True)
class Table:
    """Named float columns of equal length, written as CSV (pandas would cost 0.2 s of import per command)."""

    columns: dict

    def write(self, path: str | Path, fmt: str = "%.6g") -> None:
        """Write the table to ``path`` as CSV, atomically: a header of the column names, then one row per
        index, each number in printf format ``fmt`` (a non-finite one as an empty field)."""
        names = list(self.columns)
        data = np.column_stack([np.asarray(self.columns[n], dtype=float) for n in names])
        with atomic_path(path) as tmp:
            with open(tmp, "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh)
                w.writerow(names)
                for row in data:
                    w.writerow(["" if not math.isfinite(x) else fmt % x for x in row])


def write_csv(path: str | Path, table: Table) -> None:
    """Write ``table`` to ``path`` as CSV, atomically (:meth:`Table.write` with its default format)."""
    table.write(path)


def write_rows(path: str | Path, rows: list[dict], columns: list[str] | None = None) -> None:
    """Write dict rows as CSV, atomically; the columns are ``columns`` or the keys of the first row."""
    with atomic_path(path) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=columns if columns is not None else (list(rows[0]) if rows else []))
            w.writeheader()
            for row in rows:
                w.writerow({k: (f"{v:.6g}" if isinstance(v, float) else v) for k, v in row.items()})


#: The most digits of a whole number in a result (beyond, it is no measurement; float() would overflow).
_MAX_DIGITS = 30


def _number_text(text: str) -> float | int:
    """json's parse_int: a whole number, or inf (refused by :func:`_finite`) when it has too many digits."""
    return int(text) if len(text.lstrip("-")) <= _MAX_DIGITS else math.inf


def _finite(data: Any, path: Path) -> None:
    """Refuse a non-finite number anywhere in a result (Infinity, NaN, 1e999, a 400-digit integer), naming its key.
    Walked without recursion: json.loads has already refused documents nested too deeply for Python."""
    stack: list[tuple[str, Any]] = [("", data)]
    while stack:
        key, x = stack.pop()
        if isinstance(x, dict):
            stack.extend((f"{key}.{k}" if key else str(k), v) for k, v in x.items())
        elif isinstance(x, list):
            stack.extend((f"{key}[{i}]", v) for i, v in enumerate(x))
        elif isinstance(x, float) and not math.isfinite(x):
            raise DataError("not a finite number: JSON holds no Infinity or NaN, and numbers must stay within "
                            f"+-1e308 and {_MAX_DIGITS} digits", path=_shown(path), key=_shown(key[:200]))


def read_result(path: str | Path) -> dict:
    """Read a result.json; raise DataError naming the file (and the key) for anything malformed.

    Beyond valid JSON with a "parts" table of positive values, the sections that the report, the export and
    --from read (stage, source, each part's series and combination, prune, spread, search, snap) must have the
    shapes xo_fit writes (:func:`check_sections`), and every number must be finite.
    """
    path = Path(path)
    if path.is_dir():
        path = path / "result.json"
    text = read_user_text(path, "result file")
    try:
        data = json.loads(text, parse_int=_number_text, parse_constant=float)
    except RecursionError:
        raise DataError("not an xo_fit result: nested too deeply", path=_shown(path)) from None
    except json.JSONDecodeError as e:
        raise DataError(f"not valid JSON: {e.msg}", path=_shown(path), line=e.lineno) from None
    except ValueError as e:  # a number json cannot take
        raise DataError(f"not valid JSON: {e}"[:200], path=_shown(path)) from None
    if not isinstance(data, dict) or not isinstance(data.get("parts"), dict):
        raise DataError("not an xo_fit result: expected an object with a \"parts\" table", path=_shown(path))
    _finite(data, path)
    for name, entry in data["parts"].items():
        if not isinstance(entry, dict) or not isinstance(entry.get("value"), (int, float)) \
                or isinstance(entry.get("value"), bool) or not entry["value"] > 0:
            raise DataError(f"part {_shown(name)[:80]}: expected {{\"value\": <number above 0 in SI units>, ...}}",
                            path=_shown(path), key="parts")
    from xo_fit.io.sections import check_sections

    check_sections(data, path)
    return data


def result_values(data: dict, part_names: tuple[str, ...], path: str | Path) -> dict[str, float]:
    """Values by part name from a result, checked against the job's parts."""
    known = set(part_names)
    unknown = [n for n in data["parts"] if n not in known]
    if unknown:
        raise XoFitError(f"the result names part {unknown[0]}, which the job does not have "
                         f"(job parts: {', '.join(part_names)})", path=path, key="parts")
    return {n: float(e["value"]) for n, e in data["parts"].items()}
