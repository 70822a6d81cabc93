"""Parts on hand: a drawer CSV of kind, value [, count] lines, read into counts per kind."""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

from xo_fit.constants import PART_UNIT
from xo_fit.errors import DataError, read_user_text
from xo_fit.units import UnitsError, parse_value



@dataclass(frozen=True)
class Inventory:
    """Parts on hand: for each kind (R, L, C) a tuple of (value SI, count)."""

    path: Path
    parts: dict

    def values(self, kind: str) -> list[tuple[float, int]]:
        return list(self.parts.get(kind, ()))


def read_inventory(path: str | Path) -> Inventory:
    """Read a CSV of kind, value [, count] (one drawer entry a line; count defaults to 1).

    Values are in engineering notation ("4.7uF", "2R2"). Repeated values add up.
    Lines whose first field is not R, L or C (a header, a comment) are skipped;
    anything else that is malformed is a DataError naming the file and line.
    """
    path = Path(path)
    text = read_user_text(path, "inventory file")
    units = PART_UNIT
    counts: dict[str, dict[float, int]] = {"R": {}, "L": {}, "C": {}}
    delim = ";" if text.count(";") > text.count(",") else ","
    for number, row in enumerate(csv.reader(text.splitlines(), delimiter=delim), start=1):
        fields = [f.strip() for f in row]
        if not fields or not fields[0] or fields[0].startswith("#"):
            continue
        kind = fields[0].upper()
        if kind not in units:
            if number == 1 or not any(ch.isdigit() for ch in "".join(fields)):
                continue  # a header line
            raise DataError(f"expected a part kind R, L or C in the first column, got '{fields[0]}'",
                            path=path, line=number)
        if len(fields) < 2 or len(fields) > 3:
            raise DataError("expected kind, value [, count]", path=path, line=number)
        text_value = fields[1].replace(",", ".") if delim == ";" else fields[1]  # "4,7uF": a decimal comma
        try:
            value = parse_value(text_value, units[kind])
        except UnitsError as e:
            raise DataError(e.message, path=path, line=number) from None
        count = 1
        if len(fields) == 3 and fields[2]:
            try:
                count = int(fields[2])
            except ValueError:
                raise DataError(f"count '{fields[2]}' is not a whole number", path=path, line=number) from None
            if count < 1:
                raise DataError(f"count must be at least 1, got {count}", path=path, line=number)
        key = float(f"{value:.6g}")
        counts[kind][key] = counts[kind].get(key, 0) + count
    parts = {k: tuple(sorted(v.items())) for k, v in counts.items() if v}
    if not parts:
        raise DataError("no parts in the inventory: expected lines of kind, value [, count]", path=path)
    return Inventory(path=path, parts=parts)
