"""Driver voltage to pressure: reference voltage, offset delay, polarity from node order, complex summation."""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.model import acoustics
from xo_fit.job.reader import load_job
from xo_fit.model.system import load_system

JOB = '''\
[grid]
f_min = 100
f_max = 10000
points = 41
[source]
voltage = {voltage}
[driver.a]
response = 90
impedance = 8
reference_voltage = 2.83
offset = "{offset_a}"
[driver.b]
response = 90
impedance = 8
reference_voltage = 2.83
offset = "{offset_b}"
[[part]]
name = "RA"
type = "R"
nodes = ["in", "x"]
value = 1e-6
fixed = true
[[part]]
name = "A"
type = "driver"
driver = "a"
nodes = ["x", "0"]
[[part]]
name = "B"
type = "driver"
driver = "b"
nodes = {nodes_b}
'''


def system(write_job, voltage=2.83, offset_a="0mm", offset_b="0mm", nodes_b='["in", "0"]'):
    text = JOB.format(voltage=voltage, offset_a=offset_a, offset_b=offset_b, nodes_b=nodes_b)
    return load_system(load_job(write_job(text)))


def test_two_equal_drivers_in_phase_sum_to_plus_6_02_db(write_job):
    """docs/references.md [DER]: two equal signals in phase sum to +6.02 dB."""
    s = system(write_job)
    sim = s.simulate(s.values())
    np.testing.assert_allclose(acoustics.spl_db(sim.pressure[0, 0]), 90.0, atol=1e-5)
    np.testing.assert_allclose(acoustics.spl_db(sim.total[0]), 90 + 20 * np.log10(2), atol=1e-5)


def test_inverted_driver_cancels(write_job):
    s = system(write_job, nodes_b='["0", "in"]')
    sim = s.simulate(s.values())
    np.testing.assert_allclose(sim.pressure[0, 1], -sim.pressure[0, 0], rtol=1e-5)
    assert np.all(np.abs(sim.total[0]) < 1e-5 * np.abs(sim.pressure[0, 0]))


def test_reference_voltage_scales_the_level(write_job):
    s = system(write_job, voltage=1.0)
    sim = s.simulate(s.values())
    np.testing.assert_allclose(acoustics.spl_db(sim.pressure[0, 1]), 90 + 20 * np.log10(1 / 2.83), atol=1e-9)


def test_offset_is_a_pure_delay_and_quadrature_sums_plus_3_01_db(write_job):
    """exp(-j w d / c): an offset of a quarter wavelength at f puts the drivers in quadrature: +3.01 dB
    (docs/references.md [DER])."""
    f0 = 1000.0
    d = 343.0 / f0 / 4
    s = system(write_job, offset_b=f"{d * 1000!r}mm")
    sim = s.simulate(s.values())
    f = s.frequencies
    ratio = sim.pressure[0, 1] / sim.pressure[0, 0]
    np.testing.assert_allclose(ratio, np.exp(-2j * np.pi * f * d / 343.0), rtol=1e-5)
    i = np.argmin(np.abs(f - f0))
    assert f[i] == pytest.approx(f0)
    assert acoustics.spl_db(sim.total[0, i]) - 90 == pytest.approx(20 * np.log10(np.sqrt(2)), abs=1e-4)
