"""The coil model that gives a fitted inductor its copper resistance."""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.physics.coils import K_BROOKS, RHO_COPPER, coil_dcr
from xo_fit.units import awg_diameter


def test_dcr_at_1mh_against_references():
    """docs/references.md [DER from Brooks proportions]: at 1 mH roughly 0.47, 0.32, 0.22, 0.15 ohm for 18/16/14/12 AWG."""
    for gauge, ohm in ((18, 0.47), (16, 0.32), (14, 0.22), (12, 0.15)):
        assert float(coil_dcr(1e-3, awg_diameter(gauge))) == pytest.approx(ohm, rel=0.05)


def test_dcr_grows_as_l_to_the_0_6():
    d = awg_diameter(18)
    assert float(coil_dcr(4e-3, d) / coil_dcr(1e-3, d)) == pytest.approx(4**0.6, rel=1e-12)


def test_model_is_wheeler_on_brooks_proportions():
    """Second code path: wind the coil explicitly and apply Wheeler's multilayer formula
    (Proc. IRE 16(10), 1928: L[uH] = 0.8 a^2 N^2 / (6a + 9b + 10c), inches) to the geometry."""
    d = awg_diameter(16)
    c = 0.02  # m: winding depth = length; inner diameter 2c
    n = c**2 / d**2
    a_in, c_in = 1.5 * c / 0.0254, c / 0.0254
    l_wheeler = 0.8 * a_in**2 * n**2 / (6 * a_in + 9 * c_in + 10 * c_in) * 1e-6
    assert l_wheeler == pytest.approx(K_BROOKS * c * n**2, rel=1e-12)
    length = 2 * np.pi * 1.5 * c * n
    r = RHO_COPPER * length / (np.pi * d**2 / 4)
    assert float(coil_dcr(l_wheeler, d)) == pytest.approx(r, rel=1e-9)
