"""Engineering notation in and out: the only place values are parsed or printed.

Accepted forms (everything else is an error naming the text):

* a plain number in the base unit: ``4.7``, ``1e-3``;
* SI prefix and optional unit (read by quantiphy): ``"1.2mH"``, ``"1.5 mH"``,
  ``"6.8uF"``, ``"2.2µF"``, ``"470n"``, ``"12mm"``, ``"10 ohm"``, ``"10Ω"``;
* the IEC 60062 letter code printed on parts, where the prefix letter stands
  for the decimal point: ``"6u8"`` (6.8 u), ``"2k2"`` (2.2 k), ``"4K7"``,
  ``"1m5"``; for resistances also ``R`` as the point: ``"3R3"``, ``"0R22"``,
  ``"R47"``, ``"10R"``.

Prefixes are p, n, u (or µ), m, k (or K), M and G; any other letter is an
error, and so is a comma (write the decimal point: "4.2mH", not "4,2mH").
A bare prefix letter is a scale, not a unit: ``"1m"`` is 0.001 of the base
unit, so write lengths as ``"1000mm"`` or as the number ``1.0``. The unit, when
written, must be the one the key expects (``"6.8uF"`` where a value in henry is
expected is an error): common engineering-notation libraries accept the letter
code silently wrong (``"2k2"`` read as 2) or take a bare ``u`` as an atomic mass
unit, hence the pre-pass and the whitelist here.
"""

from __future__ import annotations

import math
import re

from quantiphy import Quantity

from xo_fit.errors import XoFitError

#: Unit spellings accepted for each base unit. An empty unit is always accepted.
UNIT_SPELLINGS: dict[str, frozenset[str]] = {
    "ohm": frozenset({"ohm", "ohms", "Ohm", "Ohms", "Ω"}),  # U+03A9 and U+2126
    "H": frozenset({"H"}),
    "F": frozenset({"F"}),
    "Hz": frozenset({"Hz"}),
    "m": frozenset({"m"}),
    "V": frozenset({"V"}),
    "s": frozenset({"s"}),
    "W": frozenset({"W"}),
    "A": frozenset({"A"}),
    "m/s": frozenset({"m/s"}),
    "m/N": frozenset({"m/N"}),  # a suspension's compliance: "0.8mm/N"
    "": frozenset(),
}

#: Units written in a form of their own, with its factor to the base unit; no prefix is taken on these (a
#: volume, an area: "cm2" is 1e-4 m^2, which no prefix rule gives), except that "L" and "g" take p..G as
#: any unit does ("500mL"). Driver data sheets quote volumes in litres, areas in cm^2, masses in grams.
UNIT_FORMS: dict[str, dict[str, float]] = {
    "m3": {"m3": 1.0, "m^3": 1.0, "m³": 1.0, "L": 1e-3, "l": 1e-3, "dm3": 1e-3, "cm3": 1e-6},
    "m2": {"m2": 1.0, "m^2": 1.0, "m²": 1.0, "cm2": 1e-4, "cm^2": 1e-4, "cm²": 1e-4, "mm2": 1e-6,
           "mm^2": 1e-6, "mm²": 1e-6},
    "kg": {"kg": 1.0, "g": 1e-3},
    "T m": {"T m": 1.0, "Tm": 1.0, "T*m": 1.0, "T·m": 1.0, "N/A": 1.0},
    "kg/s": {"kg/s": 1.0, "N s/m": 1.0, "Ns/m": 1.0},
}
#: The forms of UNIT_FORMS that take an SI prefix ("mL", "mg").
_PREFIXED_FORMS = {"L", "l", "g"}

#: How each base unit is printed.
UNIT_SYMBOL = {"ohm": "Ω", "H": "H", "F": "F", "Hz": "Hz", "m": "m", "V": "V", "s": "s", "W": "W", "A": "A",
               "m/s": "m/s", "m/N": "m/N", "m3": "m³", "m2": "m²", "kg": "kg", "T m": "T m", "kg/s": "kg/s",
               "": ""}
#: The other form named in messages, for the units that have one.
_ALSO = {"m3": "L", "m2": "cm2", "kg": "g", "T m": "N/A", "kg/s": "N s/m"}

_PREFIX = {"p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "μ": 1e-6, "m": 1e-3,
           "k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9}

# IEC 60062 letter code: digits, a prefix letter (or R) in place of the decimal
# point, optional digits, then an optional unit.
_LETTER_CODE = re.compile(
    r"^(?P<sign>[+-]?)(?P<int>\d*)(?P<mark>[pnuµμmkKMGR])(?P<frac>\d*)\s*(?P<unit>[A-Za-zΩΩ/]*)$"
)
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


class UnitsError(XoFitError):
    """A value that cannot be read in the expected unit."""


def _describe(unit: str) -> str:
    if not unit:
        return "a plain number"
    return f"a value in {UNIT_SYMBOL.get(unit, unit)}" + (f" (or {_ALSO[unit]})" if unit in _ALSO else "")


def _times(number: str, factor: float) -> float:
    """``number`` (decimal text, or a float) times a form's factor, rounded once: "220" cm2 is exactly 0.022."""
    from decimal import Decimal

    return float(Decimal(number) * Decimal(repr(factor))) if factor != 1.0 else float(number)


def _letter_code(text: str, unit: str) -> float | None:
    """Read the IEC 60062 letter-code form, or return None if ``text`` is not one."""
    m = _LETTER_CODE.match(text)
    if not m or (not m["int"] and not m["frac"]):
        return None
    mark = m["mark"]
    if not m["frac"] and mark != "R":
        return None  # "4.7k", "470n": ordinary prefix notation, quantiphy's job
    if not m["int"] and mark != "R":
        return None
    if mark == "R" and unit != "ohm":
        raise UnitsError(f"'{text}': the letter code with R as the decimal point is for resistances; "
                         f"expected {_describe(unit)}")
    _check_unit(text, m["unit"], unit)
    number = f"{m['sign']}{m['int'] or '0'}.{m['frac'] or '0'}"
    factor = UNIT_FORMS.get(unit, {}).get(m["unit"], 1.0)  # "1k5g": 1.5 kg
    return float(number) if mark == "R" else _times(repr(_scale(number, mark)), factor)


def _scale(number: str, prefix: str) -> float:
    """``number`` (decimal text) times the prefix, rounded once: "6.8" and "u" give exactly 6.8e-06."""
    from decimal import Decimal

    exponent = {"p": -12, "n": -9, "u": -6, "µ": -6, "μ": -6, "m": -3, "k": 3, "K": 3, "M": 6, "G": 9}[prefix]
    return float(Decimal(number).scaleb(exponent))


_SCALED = re.compile(r"^(?P<num>[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?)\s*(?P<rest>\S(?:.*\S)?)$")


def _scaled(text: str, unit: str) -> float:
    """A number with an SI prefix and/or the unit: "1.2mH", "1.5 mH", "470n", "10 ohm", "2.2kΩ"."""
    m = _SCALED.match(text)
    if not m:
        raise UnitsError(f"cannot read '{text}' as {_describe(unit)}")
    number, rest = m["num"], m["rest"]
    spellings = UNIT_SPELLINGS.get(unit, frozenset())
    if rest in _PREFIX:  # a bare prefix is a scale, never a unit ("1m" is 0.001 of the base unit)
        return _scale(number, rest)
    if rest in spellings:
        return float(number)
    forms = UNIT_FORMS.get(unit, {})
    if rest in forms:
        return _times(number, forms[rest])
    if rest[0] in _PREFIX and rest[1:] in forms and rest[1:] in _PREFIXED_FORMS:
        return _times(repr(_scale(number, rest[0])), forms[rest[1:]])
    if " " in rest:
        raise UnitsError(f"'{text}' is not {_describe(unit)}")
    if rest[0] in _PREFIX and rest[1:] in spellings:
        return _scale(number, rest[0])
    if rest[0] in _PREFIX or (len(rest) > 1 and rest[1:] in spellings):
        raise UnitsError(f"'{text}' is not {_describe(unit)}" if rest[0] in _PREFIX else
                         f"'{text}': unknown prefix '{rest[0]}' (use p, n, u, µ, m, k, M or G)")
    raise UnitsError(f"'{text}' is not {_describe(unit)}")


def _check_unit(text: str, written: str, unit: str) -> None:
    if written and written not in UNIT_SPELLINGS.get(unit, frozenset()) and written not in UNIT_FORMS.get(unit, {}):
        raise UnitsError(f"'{text}' is not {_describe(unit)}")


def parse_value(value: object, unit: str, *, positive: bool = True, allow_zero: bool = False) -> float:
    """Read a number or an engineering-notation string as a float in SI units.

    Parameters
    ----------
    value : int, float or str
        A TOML number (already in the base unit) or a string in engineering notation (``"4.7uF"``).
    unit : str
        The base unit expected: one of the keys of :data:`UNIT_SPELLINGS`.
    positive : bool
        Require a value above zero (``allow_zero`` admits zero too).
    allow_zero : bool
        With ``positive``, admit zero as well.

    Returns
    -------
    float
        The value in the base SI unit.

    Raises
    ------
    UnitsError
        With a message that quotes the text and names the expected unit.
    """
    if isinstance(value, bool):
        raise UnitsError(f"expected {_describe(unit)}, got {value!r}")
    if isinstance(value, (int, float)):
        result = float(value)
        text = repr(value)
    elif isinstance(value, str):
        text = value.strip()
        if not text:
            raise UnitsError(f"empty text, expected {_describe(unit)}")
        if "," in text:
            raise UnitsError(f"'{text}': a comma in a value; write a decimal point (\"4.2mH\", not \"4,2mH\") "
                             "and no thousands separator")
        code = _letter_code(text, unit)
        if code is not None:
            result = code
        elif _NUMBER.match(text):
            result = float(text)
        else:
            result = _scaled(text, unit)
    else:
        raise UnitsError(f"expected {_describe(unit)}, got {type(value).__name__} {value!r}")
    if not math.isfinite(result):
        raise UnitsError(f"'{text}' is not a finite number")
    if positive and (result < 0 or (result == 0 and not allow_zero)):
        bound = "zero or more" if allow_zero else "above zero"
        raise UnitsError(f"'{text}' must be {bound}")
    return result


def parse_percent(value: object, below: float | None = None) -> float:
    """Read ``"5%"`` (or a plain fraction such as 0.05) as a fraction: 0.05.

    A bare number above 1 is refused as ambiguous; write ``"5%"``.

    Parameters
    ----------
    value : str, int or float
        ``"N%"``, or a fraction 0..1.
    below : float, optional
        A fraction the value must stay under (dimensionless; 1.0 for a tolerance: a part 100 % low would have no
        value at all).

    Returns
    -------
    float
        The fraction (dimensionless).

    Raises
    ------
    UnitsError
        For anything else, or a value not under ``below``.
    """
    if isinstance(value, bool):
        raise UnitsError(f"expected a percentage such as \"5%\", got {value!r}")
    if isinstance(value, (int, float)):
        if not 0 <= value <= 1:
            raise UnitsError(f"{value!r}: write a percentage as a string such as \"5%\", or a fraction 0..1")
        out = float(value)
    elif isinstance(value, str):
        text = value.strip()
        m = re.fullmatch(r"([+]?(\d+\.?\d*|\.\d+))\s*%", text)
        if not m:
            raise UnitsError(f"cannot read '{text[:60]}' as a percentage; expected a form such as \"5%\"")
        out = float(m[1]) / 100.0
    else:
        raise UnitsError(f"expected a percentage such as \"5%\", got {value!r}"[:200])
    if below is not None and not out < below:
        raise UnitsError(f"{out * 100:g} % is too much: a tolerance must stay below {below * 100:g} % "
                         "(a part that far off would have no value)")
    return out


def format_value(value: float, unit: str, prec: int = 3) -> str:
    """``value`` in engineering notation with its unit's symbol: ``format_value(0.00147, "H") == "1.47 mH"``.

    Parameters
    ----------
    value : float
        The value in SI units (in ``unit``).
    unit : str
        The unit's name (``"ohm"``, ``"H"``, ``"F"``, ``"Hz"``, ...), shown by its symbol.
    prec : int
        Digits after the first (dimensionless).

    Returns
    -------
    str
        The text (micro written as µ); a non-finite value as ``"inf Ω"`` and the like.
    """
    if not math.isfinite(value):
        return f"{value} {UNIT_SYMBOL.get(unit, unit)}".strip()
    text = Quantity(value, UNIT_SYMBOL.get(unit, unit)).render(prec=prec)
    return re.sub(r"(\d) ?u(?=[A-Za-zΩ]|$)", r"\1 µ", text)


def awg_diameter(gauge: int) -> float:
    """The bare diameter of an American Wire Gauge (ASTM B258: d = 0.127 mm x 92^((36-n)/39)).

    Parameters
    ----------
    gauge : int
        The gauge n (dimensionless).

    Returns
    -------
    float
        The diameter, in m.
    """
    return 0.127e-3 * 92.0 ** ((36 - gauge) / 39.0)


_WIRE = re.compile(r"^\s*(?:awg\s*(\d+)|(\d+)\s*awg)\s*$", re.IGNORECASE)


def parse_wire(value: str) -> float | None:
    """Read a wire gauge such as ``"18awg"`` or ``"AWG 16"``.

    Parameters
    ----------
    value : str
        The text.

    Returns
    -------
    float or None
        The bare diameter in m, or None when the text is no wire gauge.

    Raises
    ------
    UnitsError
        For a gauge outside 0 to 40 AWG.
    """
    m = _WIRE.match(value)
    if not m:
        return None
    gauge = int(m[1] or m[2])
    if not 0 <= gauge <= 40:
        raise UnitsError(f"'{value}': wire gauge must be between 0 and 40 AWG")
    return awg_diameter(gauge)
