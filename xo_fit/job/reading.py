"""Reading one table of a job: line numbers for messages, typed getters, unknown keys refused."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, overload


from xo_fit.errors import JobError
from xo_fit.units import UnitsError, parse_value
from xo_fit.job.model import (DEFAULTS, VOLTS, KEYS)

class Lines:
    """Finds the line of a table or key in the TOML text, for error messages."""

    _HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?")
    _KEY = re.compile(r"^\s*([A-Za-z0-9_\-]+|\"[^\"]*\")\s*=")

    def __init__(self, text: str) -> None:
        self.index: dict[tuple, int] = {}
        table: tuple = ()
        counts: dict[str, int] = {}
        for number, raw in enumerate(text.splitlines(), start=1):
            m = self._HEADER.match(raw)
            if m:
                name = tuple(part.strip().strip('"') for part in m[2].split("."))
                if m[1] == "[[":
                    i = counts.get(m[2], 0)
                    counts[m[2]] = i + 1
                    name = name + (i,)
                table = name
                self.index.setdefault(table, number)
                continue
            k = self._KEY.match(raw)
            if k:
                key = k[1].strip('"')
                self.index.setdefault(table + (key,), number)
                # dotted keys at top level such as `grid.points = 3`
                if "." in key:
                    self.index.setdefault(table + tuple(key.split(".")), number)

    def find(self, table: tuple, key: str | None = None) -> int | None:
        """The 1-based line of ``key`` in ``table`` (a path of table names and array indices), else of the
        nearest enclosing table that has a line; None where nothing is found (a job given as a mapping)."""
        if key is not None:
            for probe in (table + (key,), table[:-1] + (key,) if table else (key,)):
                if probe in self.index:
                    return self.index[probe]
        while table:
            if table in self.index:
                return self.index[table]
            table = table[:-1]
        return None


class Reader:
    """Reads one table of the job: typed getters, then ``done()`` refuses unknown keys."""

    def __init__(self, data: Any, table: tuple, label: str, ctx: Context) -> None:
        self.ctx = ctx
        self.table = table
        self.label = label
        if not isinstance(data, dict):
            raise ctx.error(table, None, f"{label} must be a table, got {kind_of(data)}")
        self.data = data
        self.used: set[str] = set()

    def error(self, key: str | None, message: str) -> JobError:
        """A JobError on ``key`` of this table (or the table itself, key None) with its file and line; a
        "missing" message names an unread key of the table that looks like a typo for ``key``."""
        if key is not None and message.startswith("missing") and key not in self.data:
            typo = close_match(key, [k for k in self.data if k not in self.used and isinstance(k, str)])
            if typo is not None:
                message += f" (the table has an unknown key '{typo}': a typo for '{key}'?)"
        where = f"{self.label} {key}" if key else self.label
        return self.ctx.error(self.table, key, message, where)

    def has(self, key: str) -> bool:
        """Whether the table gives ``key``."""
        return key in self.data

    def raw(self, key: str, default: Any = None) -> Any:
        """The value of ``key`` as TOML gave it, unchecked (``default`` where absent); the key counts as
        read."""
        self.used.add(key)
        return self.data.get(key, default)

    @overload
    def value(self, key: str, unit: str, default: float, *, required: bool = ..., positive: bool = ...,
              allow_zero: bool = ..., limits: tuple[float, float] | None = ...) -> float: ...

    @overload
    def value(self, key: str, unit: str, default: None = ..., *, required: Literal[True], positive: bool = ...,
              allow_zero: bool = ..., limits: tuple[float, float] | None = ...) -> float: ...

    @overload
    def value(self, key: str, unit: str, default: None = ..., *, required: bool = ..., positive: bool = ...,
              allow_zero: bool = ..., limits: tuple[float, float] | None = ...) -> float | None: ...

    def value(self, key: str, unit: str, default: float | None = None, *, required: bool = False,
              positive: bool = True, allow_zero: bool = False, limits: tuple[float, float] | None = None
              ) -> float | None:
        """A value with a unit; ``limits``: the (lowest, highest) value allowed, SI.

        The value is a float when the key is ``required`` or the ``default`` is one; ``None`` only when the key
        is absent and the default is ``None``.
        """
        self.used.add(key)
        if key not in self.data:
            if required:
                raise self.error(key, f"missing; expected {unit_text(unit)}")
            return default
        try:
            v = parse_value(self.data[key], unit, positive=positive, allow_zero=allow_zero)
        except UnitsError as e:
            raise self.error(key, e.message) from None
        if limits is not None and not limits[0] <= v <= limits[1]:
            from xo_fit.units import format_value

            raise self.error(key, f"{format_value(v, unit)} is out of range: expected {format_value(limits[0], unit)} "
                                  f"to {format_value(limits[1], unit)}")
        return v

    def number(self, key: str, default: Any, *, integer: bool = False, minimum: float | None = None,
               maximum: float | None = None) -> Any:
        """A plain number (no unit): ``default`` where the key is absent, else an int (``integer``) or a
        float within ``minimum`` to ``maximum``; a boolean, a text or a non-finite number raises JobError."""
        self.used.add(key)
        if key not in self.data:
            return default
        v = self.data[key]
        ok = isinstance(v, int) if integer else isinstance(v, (int, float))
        if isinstance(v, bool) or not ok:
            raise self.error(key, f"expected {'a whole number' if integer else 'a number'}, got {short(v)}")
        if isinstance(v, float) and not math.isfinite(v):
            raise self.error(key, f"expected a finite number, got {v!r}")
        if isinstance(v, int) and abs(v) > 2**63:
            raise self.error(key, f"{v} is out of range")
        if minimum is not None and v < minimum:
            raise self.error(key, f"must be at least {minimum:g}, got {v!r}")
        if maximum is not None and v > maximum:
            raise self.error(key, f"must be at most {maximum:g}, got {v!r}")
        return int(v) if integer else float(v)

    def choice(self, key: str, options: tuple[str, ...], default: Any) -> Any:
        """One of ``options`` (a text), or ``default`` where the key is absent; anything else raises
        JobError."""
        self.used.add(key)
        if key not in self.data:
            return default
        v = self.data[key]
        if not isinstance(v, str) or v not in options:
            raise self.error(key, f"expected one of {', '.join(repr(o) for o in options)}, got {v!r}")
        return v

    def text(self, key: str, default: Any = None, *, required: bool = False) -> Any:
        """A non-empty text, or ``default`` where the key is absent (JobError if it is ``required``)."""
        self.used.add(key)
        if key not in self.data:
            if required:
                raise self.error(key, "missing; expected a text")
            return default
        v = self.data[key]
        if not isinstance(v, str) or not v.strip():
            raise self.error(key, f"expected a non-empty text, got {v!r}")
        return v

    def boolean(self, key: str, default: bool) -> bool:
        """true or false (``default`` where the key is absent); anything else raises JobError."""
        self.used.add(key)
        v = self.data.get(key, default)
        if not isinstance(v, bool):
            raise self.error(key, f"expected true or false, got {v!r}")
        return v

    def path(self, key: str) -> Path:
        """A required file path, taken relative to the job's folder unless absolute; control characters
        in it raise JobError."""
        v = self.text(key, required=True)
        if re.search(r"[\x00-\x1f\x7f]", v):
            raise self.error(key, f"a file path cannot hold control characters (got {v!r})")
        p = Path(v)
        return p if p.is_absolute() else (self.ctx.folder / p)

    def sub(self, key: str, label: str | None = None) -> Reader:
        """A Reader of the sub-table ``key`` (an empty one where absent), labelled ``label`` or by its
        path (``[driver.woofer.ts]``)."""
        self.used.add(key)
        table = self.table + (key,)
        return Reader(self.data.get(key, {}), table, label or f"[{'.'.join(map(str, table))}]", self.ctx)

    def done(self, allowed_extra: tuple[str, ...] = ()) -> None:
        """Raise JobError on the first key the getters did not read (other than ``allowed_extra``), with a
        close match among the table's known keys where there is one."""
        unknown = [k for k in self.data if k not in self.used and k not in allowed_extra]
        if unknown:
            key = unknown[0]
            known = sorted(self.used | set(allowed_extra) | KEYS.get(table_kind(self.table), frozenset()))
            hint = close_match(key, known)
            raise self.ctx.error(
                self.table, key,
                f"unknown key '{key}'" + (f" (did you mean '{hint}'?)" if hint else "")
                + f"; expected one of: {', '.join(known)}",
                self.label)


@dataclass
class Context:
    """What the reading of one job document shares: its file (None for a mapping) and folder (for
    relative data paths), the line finder, the file's stem, and the warnings gathered so far (one line each)."""
    path: Path | None
    folder: Path
    lines: Lines
    stem: str = "job"
    warnings: list = field(default_factory=list)

    def warn(self, table: tuple, key: str | None, message: str) -> None:
        """Add a one-line warning on ``key`` of ``table``, prefixed with the file and line where known."""
        line = self.lines.find(table, key)
        where = f"{self.path}:{line}: " if self.path and line else (f"{self.path}: " if self.path else "")
        self.warnings.append(where + message)

    def error(self, table: tuple, key: str | None, message: str, where: str | None = None) -> JobError:
        """A JobError on ``key`` of ``table`` with the file and line; ``where`` is the key shown (a table
        or part label)."""
        return JobError(message, path=self.path, line=self.lines.find(table, key), key=where)


def table_kind(table: tuple) -> str:
    """The kind of table a reader reads, from its path in the document."""
    if not table:
        return "top"
    if table[0] == "driver":
        return ({"angles": "angles", "response": "splice", "position": "position", "ts": "ts", "box": "box"}
                .get(table[2], "thiele_small") if len(table) == 3 else "driver")
    if table[0] == "target" and len(table) == 3:
        return "way"
    if table[:2] == ("search", "robust"):
        return "robust"
    return str(table[0])


def kind_of(v: Any) -> str:
    """What a TOML value is, for a message: "a table", "a list", "a text", "a boolean", "a number"."""
    return {dict: "a table", list: "a list", str: "a text", bool: "a boolean",
            int: "a number", float: "a number"}.get(type(v), type(v).__name__)


def short(v: Any) -> str:
    """A value for an error message: its repr, cut short."""
    text = repr(v)
    return text if len(text) <= 60 else text[:57] + "..."


def unit_text(unit: str) -> str:
    """What a value of ``unit`` is, for a message: "a value in Ω" (its symbol), or "a number" without a
    unit."""
    from xo_fit.units import UNIT_SYMBOL
    return f"a value in {UNIT_SYMBOL.get(unit, unit)}" if unit else "a number"


def close_match(key: str, known: list[str]) -> str | None:
    """The entry of ``known`` closest to ``key`` (a likely typo), or None where none is close."""
    import difflib
    m = difflib.get_close_matches(key, known, n=1, cutoff=0.6)
    return m[0] if m else None


def phase_choice(r: Reader, key: str) -> str:
    """A driver's phase key (``"measured"`` or ``"minimum"``; default the driver table's)."""
    return r.choice(key, ("measured", "minimum"), DEFAULTS["driver"][key])


def volts(r: Reader, key: str, default: float) -> float:
    """A voltage in V under ``key`` (``default`` where absent), within the drive levels a job may give (``VOLTS``)."""
    v = r.value(key, "V", default)
    if not VOLTS[0] <= v <= VOLTS[1]:
        raise r.error(key, f"{v:g} V is outside {VOLTS[0]:g} to {VOLTS[1]:g} V")
    return v


def missing(r: Reader, key: str):
    """Raise JobError: ``key`` is missing and a number was expected."""
    raise r.error(key, "missing; expected a number")


def looks_numeric(text: str) -> bool:
    """Whether ``text`` reads as a value in ohm (engineering notation such as ``"0.35"`` or
    ``"350m"``)."""
    try:
        parse_value(text, "ohm")
        return True
    except UnitsError:
        return False


def is_length(text: str) -> bool:
    """Whether ``text`` is a length written with its metre unit (``"1.2mm"``), not ohm."""
    try:
        parse_value(text, "m")
    except UnitsError:
        return False
    return text.strip().endswith("m") and not text.strip().endswith("ohm")


def job_line(job, table: tuple, key: str | None = None) -> int | None:
    """The line of ``table`` (and ``key``) in ``job``'s file, for an error found after reading (None without a
    file, or where the file cannot be read again)."""
    if job.path is None:
        return None
    try:
        return Lines(job.path.read_text(encoding="utf-8")).find(table, key)
    except (OSError, UnicodeDecodeError):
        return None
