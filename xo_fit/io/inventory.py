"""Parts on hand: a drawer CSV of kind, value [, count [, dcr [, esr [, rating]]]] lines, read into counts per kind.

The optional columns describe the part actually in the drawer: an old coil's measured DC resistance (ohm), a
capacitor's ESR (ohm), and the rating it is sold for (W for a resistor, V for a capacitor, A for a coil). The
snap scores a design built from drawer parts with them (:mod:`xo_fit.stages.snapping`).
"""

from __future__ import annotations

import csv
from dataclasses import dataclass, field
from pathlib import Path

from xo_fit.constants import PART_UNIT
from xo_fit.errors import DataError, read_user_text
from xo_fit.units import UnitsError, parse_value



@dataclass(frozen=True)
class Inventory:
    """Parts on hand: for each kind (R, L, C) a tuple of (value SI, count)."""

    path: Path
    parts: dict
    extras: dict = field(default_factory=dict)  # (kind, value) -> {"dcr": ohm, "esr": ohm, "rating": W/V/A}

    def values(self, kind: str) -> list[tuple[float, int]]:
        """The drawer's parts of ``kind`` (``"R"``, ``"L"`` or ``"C"``): (value in ohm, H or F, count) pairs;
        empty where it has none."""
        return list(self.parts.get(kind, ()))

    def extra(self, kind: str, value: float) -> dict:
        """What the drawer says of its part of ``kind`` and ``value`` beyond the value: dcr, esr, rating (SI)."""
        return dict(self.extras.get((kind, float(f"{value:.6g}")), {}))


def read_inventory(path: str | Path) -> Inventory:
    """Read a CSV of kind, value [, count [, dcr [, esr [, rating]]]] (one drawer entry a line; count defaults to 1).

    Values are in engineering notation ("4.7uF", "2R2"). Repeated values add up.
    Lines whose first field is not R, L or C (a header, a comment) are skipped;
    anything else that is malformed is a DataError naming the file and line.
    """
    path = Path(path)
    text = read_user_text(path, "inventory file")
    units = PART_UNIT
    counts: dict[str, dict[float, int]] = {"R": {}, "L": {}, "C": {}}
    extras: dict[tuple[str, float], dict] = {}
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
        if len(fields) < 2 or len(fields) > 6:
            raise DataError("expected kind, value [, count [, dcr [, esr [, rating]]]]", path=path, line=number)
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
        extra = _extras(fields[3:], kind, delim, path, number)
        if extra:
            if (kind, key) in extras and extras[(kind, key)] != extra:
                raise DataError(f"{kind} {fields[1]} is listed before with other dcr/esr/rating: give each value's "
                                "parts one line, or the same figures", path=path, line=number)
            extras[(kind, key)] = extra
    parts = {k: tuple(sorted(v.items())) for k, v in counts.items() if v}
    if not parts:
        raise DataError("no parts in the inventory: expected lines of kind, value [, count]", path=path)
    return Inventory(path=path, parts=parts, extras=extras)


#: The optional columns after the count, in order, with their units.
EXTRA_COLUMNS = (("dcr", "ohm"), ("esr", "ohm"), ("rating", None))
#: Which optional columns each kind may fill (a resistor has no DCR or ESR of its own).
EXTRA_KINDS = {"dcr": "L", "esr": "C", "rating": "RLC"}


def _extras(fields: list[str], kind: str, delim: str, path: Path, number: int) -> dict:
    """The optional dcr, esr and rating columns of one drawer line, SI; empty fields are left out."""
    from xo_fit.constants import RATING_UNIT

    out = {}
    for (name, unit), text in zip(EXTRA_COLUMNS, fields):
        if not text:
            continue
        if kind not in EXTRA_KINDS[name]:
            raise DataError(f"a {kind} part has no {name} (dcr is a coil's, esr a capacitor's)", path=path,
                            line=number)
        unit = unit or RATING_UNIT[kind]
        try:
            value = parse_value(text.replace(",", ".") if delim == ";" else text, unit)
        except UnitsError as e:
            raise DataError(f"{name}: {e.message}", path=path, line=number) from None
        if not value > 0 and not (name != "rating" and value == 0):
            raise DataError(f"{name} must be above 0, got {text}", path=path, line=number)
        out[name] = value
    return out
