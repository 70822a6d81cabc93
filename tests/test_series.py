"""Preferred-number series against IEC 60063 (as listed in docs/references.md) and log-nearest semantics."""

from __future__ import annotations

import math

import numpy as np
import pytest

from xo_fit.series import SERIES, nearest, neighbours

# IEC 60063:2015 (docs/references.md [SRC via published value lists])
IEC_E12 = [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2]
IEC_E24_EXTRA = [1.1, 1.3, 1.6, 2.0, 2.4, 3.0, 3.6, 4.3, 5.1, 6.2, 7.5, 9.1]


def test_e3_e6_e12_e24_tables():
    assert list(SERIES["E12"]) == IEC_E12
    assert list(SERIES["E24"]) == sorted(IEC_E12 + IEC_E24_EXTRA)
    assert list(SERIES["E6"]) == IEC_E12[::2]  # every second E12 value
    assert list(SERIES["E3"]) == [1.0, 2.2, 4.7]


def test_the_eight_e24_values_the_rounding_formula_gets_wrong():
    """docs/references.md: E24 has eight values that differ from round(10^(i/24), 1): 2.7 3.0 3.3 3.6 3.9 4.3 4.7 8.2."""
    formula = [round(10 ** (i / 24), 1) for i in range(24)]
    differ = [v for v, f in zip(SERIES["E24"], formula) if v != f]
    assert differ == [2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2]


# IEC 60063:2015 E48 and E96, typed out as the standard's tables list them (docs/references.md [SRC via the
# published value lists; typed here from memory of those lists, MEM]), not computed from the formula the code uses
E48 = """1.00 1.05 1.10 1.15 1.21 1.27 1.33 1.40 1.47 1.54 1.62 1.69 1.78 1.87 1.96 2.05 2.15 2.26 2.37 2.49 2.61 2.74
2.87 3.01 3.16 3.32 3.48 3.65 3.83 4.02 4.22 4.42 4.64 4.87 5.11 5.36 5.62 5.90 6.19 6.49 6.81 7.15 7.50 7.87 8.25
8.66 9.09 9.53"""
E96 = """1.00 1.02 1.05 1.07 1.10 1.13 1.15 1.18 1.21 1.24 1.27 1.30 1.33 1.37 1.40 1.43 1.47 1.50 1.54 1.58 1.62 1.65
1.69 1.74 1.78 1.82 1.87 1.91 1.96 2.00 2.05 2.10 2.15 2.21 2.26 2.32 2.37 2.43 2.49 2.55 2.61 2.67 2.74 2.80 2.87
2.94 3.01 3.09 3.16 3.24 3.32 3.40 3.48 3.57 3.65 3.74 3.83 3.92 4.02 4.12 4.22 4.32 4.42 4.53 4.64 4.75 4.87 4.99
5.11 5.23 5.36 5.49 5.62 5.76 5.90 6.04 6.19 6.34 6.49 6.65 6.81 6.98 7.15 7.32 7.50 7.68 7.87 8.06 8.25 8.45 8.66
8.87 9.09 9.31 9.53 9.76"""


def test_e48_e96_e192():
    """IEC 60063: the E48 and E96 tables as published; E192 differs from the rounded formula at one value, 9.20."""
    assert list(SERIES["E48"]) == [float(x) for x in E48.split()]
    assert list(SERIES["E96"]) == [float(x) for x in E96.split()]
    formula = [round(10 ** (i / 192), 2) for i in range(192)]
    differ = [(f, v) for v, f in zip(SERIES["E192"], formula) if v != f]
    assert differ == [(9.19, 9.2)]


def test_widest_adjacent_steps():
    """docs/references.md [DER]: widest adjacent step E12 1.25, E24 1.154."""
    for name, want in (("E12", 1.25), ("E24", 1.154)):
        v = list(SERIES[name]) + [10.0]
        assert max(b / a for a, b in zip(v, v[1:])) == pytest.approx(want, abs=5e-4)


def test_log_nearest_at_the_geometric_midpoint():
    """docs/references.md: snap in LOG distance; the geometric midpoint of 1.0 and 1.2 is 1.0954 (1.099 -> 1.2 in E12)."""
    assert math.sqrt(1.2) == pytest.approx(1.0954, abs=1e-4)
    assert nearest(1.099, "E12") == 1.2
    assert nearest(1.095, "E12") == 1.0
    assert nearest(1.099e-6, "E12") == pytest.approx(1.2e-6)
    assert nearest(9.6, "E12") == pytest.approx(10.0)  # across the decade
    assert nearest(4.7e3, "E24") == pytest.approx(4.7e3)


def test_neighbours_and_ranges():
    assert neighbours(4.61e-3, "E12", 2) == pytest.approx([3.3e-3, 3.9e-3, 4.7e-3, 5.6e-3, 6.8e-3])
    assert neighbours(4.61e-3, "E12", 2, lo=4.0e-3, hi=6.0e-3) == pytest.approx([4.7e-3, 5.6e-3])
    assert neighbours(1.0, "E12", 1) == pytest.approx([0.82, 1.0, 1.2])


def test_trap_moved_opposite_e12_steps_keeps_its_centre():
    """Common practice (docs/references.md [CP]): moving L and C of a series LC the same number of E12 steps in opposite
    directions keeps f0 within a few percent: 1 mH with 5.6 uF -> 1.8 mH with 3.3 uF: 2127 Hz -> 2065 Hz."""
    f0 = lambda l, c: 1 / (2 * np.pi * np.sqrt(l * c))  # noqa: E731
    assert f0(1e-3, 5.6e-6) == pytest.approx(2127, abs=1)
    assert f0(1.8e-3, 3.3e-6) == pytest.approx(2065, abs=1)
    e12 = list(SERIES["E12"]) * 1
    vals = np.concatenate([np.array(e12) * 10.0**k for k in range(-1, 3)])
    for i in range(12, 36):
        for steps in (1, 2, 3):
            ratio = f0(vals[i + steps], vals[i - steps]) / f0(vals[i], vals[i])
            assert abs(ratio - 1) < 0.05
