"""Cross-check against scikit-rf (a general-purpose RF network library): cascade a crossover ladder as
two-port ABCD matrices and compare the voltage transfer and input impedance into a resistive load."""

from __future__ import annotations

import numpy as np

from conftest import need  # noqa: E402

skrf = need("skrf")

from conftest import net_of  # noqa: E402


def test_ladder_against_scikit_rf_abcd():
    f = np.geomspace(20, 20000, 201)
    freq = skrf.Frequency.from_f(f, unit="Hz")
    media = skrf.media.DefinedGammaZ0(frequency=freq, z0=50)
    # third-order low-pass with lossy coils (DCR in series) and a lossy capacitor, into 8 ohm
    l1, r1, c1, esr, l2, r2, load = 0.95e-3, 0.35, 8.2e-6, 0.04, 0.33e-3, 0.2, 8.0
    two_port = (media.resistor(r1) ** media.inductor(l1)
                ** (media.shunt_capacitor(c1) if esr == 0 else
                    media.shunt(media.resistor(esr) ** media.capacitor(c1) ** media.short()))
                ** media.resistor(r2) ** media.inductor(l2))
    abcd = two_port.a  # (F, 2, 2)
    a, b, c, d = abcd[:, 0, 0], abcd[:, 0, 1], abcd[:, 1, 0], abcd[:, 1, 1]
    transfer = 1 / (a + b / load)  # V2 / V1 with I2 = V2 / load
    z_in = (a * load + b) / (c * load + d)

    net = net_of([("L1", "L", "in", "x", r1), ("C1", "C", "x", "0", esr), ("L2", "L", "x", "y", r2),
                  ("LOAD", "D", "y", "0", 0)], [load], f)
    sol = net.solve(np.array([l1, c1, l2]))
    np.testing.assert_allclose(sol.voltages[0, 0], transfer, rtol=1e-9)
    np.testing.assert_allclose(sol.impedance[0], z_in, rtol=1e-9)
