"""Engineering notation, the IEC 60062 letter code, percentages and wire gauges."""

from __future__ import annotations

import pytest

from xo_fit.units import UnitsError, awg_diameter, format_value, parse_percent, parse_value, parse_wire


@pytest.mark.parametrize("text, unit, want", [
    (4.7, "ohm", 4.7), (2200, "Hz", 2200.0), ("1e-3", "H", 1e-3),
    ("1.2mH", "H", 1.2e-3), ("1.2m", "H", 1.2e-3), ("1.5 mH", "H", 1.5e-3), ("6.8uF", "F", 6.8e-6),
    ("2.2µF", "F", 2.2e-6), ("2.2μF", "F", 2.2e-6), ("470n", "F", 470e-9), ("12mm", "m", 0.012),
    ("10 ohm", "ohm", 10.0), ("10Ω", "ohm", 10.0), ("4.7k", "ohm", 4700.0), ("2.2kHz", "Hz", 2200.0),
    ("2.83V", "V", 2.83),
    # IEC 60062 letter code: the letter stands for the decimal point
    ("6u8", "F", 6.8e-6), ("6u8F", "F", 6.8e-6), ("2k2", "ohm", 2200.0), ("4K7", "ohm", 4700.0),
    ("1m5", "H", 1.5e-3), ("2M2", "ohm", 2.2e6), ("3R3", "ohm", 3.3), ("0R22", "ohm", 0.22),
    ("R47", "ohm", 0.47), ("10R", "ohm", 10.0), ("2k2Hz", "Hz", 2200.0), ("4n7", "F", 4.7e-9),
])
def test_parse_value(text, unit, want):
    assert parse_value(text, unit) == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize("text, unit, message", [
    ("6.8uF", "H", "is not a value in H"),
    ("3R3", "F", "R as the decimal point is for resistances"),
    ("abc", "ohm", "cannot read"),
    ("", "ohm", "empty"),
    ("-1mH", "H", "above zero"),
    ("0", "H", "above zero"),
    ("1.2 kg", "H", "is not a value in H"),
    (True, "ohm", "expected"),
    ([1], "ohm", "expected"),
])
def test_parse_value_errors(text, unit, message):
    with pytest.raises(UnitsError, match=message):
        parse_value(text, unit)


def test_negative_allowed_where_asked():
    assert parse_value("-18mm", "m", positive=False) == pytest.approx(-0.018)
    assert parse_value(0, "ohm", allow_zero=True) == 0.0


@pytest.mark.parametrize("text, want", [("5%", 0.05), ("2.5 %", 0.025), (0.05, 0.05), ("10%", 0.1)])
def test_percent(text, want):
    assert parse_percent(text) == pytest.approx(want)


@pytest.mark.parametrize("text", ["5", 5, "five%", "-5%"])
def test_percent_errors(text):
    with pytest.raises(UnitsError):
        parse_percent(text)


def test_format_value():
    assert format_value(0.00147, "H") == "1.47 mH"
    assert format_value(6.8e-6, "F") == "6.8 µF"
    assert format_value(3.3, "ohm") == "3.3 Ω"
    assert format_value(2200.0, "Hz") == "2.2 kHz"


def test_awg_diameters_against_astm_b258():
    """ASTM B258 (docs/references.md): 18 AWG 1.024 mm, 16 AWG 1.291 mm, 14 AWG 1.628 mm."""
    for gauge, mm in ((18, 1.024), (16, 1.291), (14, 1.628)):
        assert awg_diameter(gauge) * 1e3 == pytest.approx(mm, abs=0.0006)
    assert parse_wire("18awg") == awg_diameter(18)
    assert parse_wire("AWG 16") == awg_diameter(16)
    assert parse_wire("1.2mH") is None
    with pytest.raises(UnitsError):
        parse_wire("99awg")
