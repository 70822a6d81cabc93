"""Drivers in boxes in the SPICE deck, run through ngspice (a general-purpose circuit simulator).

A driver given by its Thiele-Small set in a vented box (impedance = "model") becomes the electrical analogue of
R. H. Small (JAES 20(5), 1972; vented box: JAES 21(5), 1973); a measured twin-peak impedance becomes the vented
circuit fitted to it; where no circuit fits within 10 % rms of |Z| in the band, the deck and the console say so.
Missing ngspice is a skip locally; CI sets XO_FIT_REQUIRE_NGSPICE=1, which makes it a failure.
"""

from __future__ import annotations

import math
import os
import re
import shutil
import subprocess

import numpy as np
import pytest

from xo_fit.job.reader import load_job
from xo_fit.model.system import load_system
from xo_fit.output.spice import build_deck

from test_driver_tables import WOOFER_TS, VENTED, _twin_peaks


def _ngspice() -> str:
    ngspice = shutil.which("ngspice")
    if ngspice is None:
        if os.environ.get("XO_FIT_REQUIRE_NGSPICE") == "1":
            raise RuntimeError("ngspice is required (XO_FIT_REQUIRE_NGSPICE=1)")
        pytest.skip("ngspice not installed")
    return ngspice


def _run(deck: str, folder) -> np.ndarray:
    """Run the deck as exported (its own control block); frequency, then re, im of each driver voltage and of the
    input current."""
    (folder / "x.cir").write_text(deck)
    run = subprocess.run([_ngspice(), "-b", "x.cir"], cwd=folder, capture_output=True, text=True, timeout=120)
    assert run.returncode == 0 and "Error" not in run.stdout + run.stderr, run.stdout + run.stderr
    return np.loadtxt(folder / re.search(r"^wrdata (\S+)", deck, re.M)[1], skiprows=1)


def _job(impedance: str, tables: str = "") -> str:
    return f'''
name = "vented"
[grid]
f_min = 10
f_max = 20000
points = 400
[source]
voltage = 2.83
resistance = 0.1
[driver.woofer]
response = 88
impedance = {impedance}
{tables}
[[part]]
name = "L1"
type = "L"
nodes = ["in", "w1"]
value = "1.5mH"
dcr = 0.3
[[part]]
name = "C1"
type = "C"
nodes = ["w1", "0"]
value = "47uF"
[[part]]
name = "W"
type = "driver"
driver = "woofer"
nodes = ["w1", "0"]
[target]
band = [20, 2000]
'''


def test_a_vented_model_driver_is_its_equivalent_circuit_in_ngspice(write_job, tmp_path):
    """impedance = "model" in a vented box: the deck's circuit (Small's analogue, the box's Lceb, Rel, Cmep in
    series across the motional branch) gives xo_fit's driver voltage and input current to 1e-6."""
    s = load_system(load_job(write_job(_job('"model"', WOOFER_TS + VENTED))))
    deck = build_deck(s, s.values(), "vented model")
    assert re.search(r"^LCEB n3 b1 ", deck.text, re.M) and re.search(r"^CMEP b2 neg ", deck.text, re.M)
    assert not deck.warnings and "vented box" in deck.notes[0]
    data = _run(deck.text, tmp_path)
    np.testing.assert_allclose(data[:, 0], s.frequencies, rtol=1e-9)
    spice = data[:, 1::2] + 1j * data[:, 2::2]
    sol = s.network.solve_reference(s.values())
    np.testing.assert_allclose(spice[:, 0], sol.voltages[0, 0], rtol=1e-6)
    np.testing.assert_allclose(spice[:, 1], 2.83 / (sol.impedance[0] + 0.1), rtol=1e-6)


def test_a_measured_twin_peak_driver_exports_as_the_vented_circuit(write_job, tmp_path, cli):
    """A measured vented woofer (the synthesised twin peaks, 1 % noise): the deck fits the vented circuit and
    states its error; through ngspice the driver's voltage is within that error of xo_fit's (rms over the grid),
    and the input current within the largest error stated. No warning: it fits within 10 %."""
    path, _, _ = _twin_peaks(tmp_path)
    job = write_job(_job(f'"{path.name}"'))
    code, _, err = cli("simulate", job, "--out", tmp_path / "sim", "--no-plots")
    assert code == 0, err
    code, out, err = cli("export", tmp_path / "sim", "--spice", tmp_path / "x.cir")
    assert code == 0, err
    deck = (tmp_path / "x.cir").read_text()
    assert "a vented-box circuit" in deck and "PLACEHOLDER" not in deck and "WARNING" not in deck + err
    rms, worst = (float(x) for x in re.search(r"^\* fit error ([\d.]+) % rms of \|Z\|, at most ([\d.]+) %",
                                               deck, re.M).groups())
    assert rms < 2.0
    data = _run(deck, tmp_path)
    s = load_system(load_job(job))
    sol = s.network.solve_reference(s.values())
    spice = data[:, 1::2] + 1j * data[:, 2::2]
    e = np.abs(spice[:, 0] - sol.voltages[0, 0]) / np.abs(sol.voltages[0, 0])
    assert 100 * np.sqrt(np.mean(e ** 2)) <= rms
    current = 2.83 / (sol.impedance[0] + 0.1)
    assert 100 * np.max(np.abs(spice[:, 1] - current) / np.abs(current)) <= worst


def test_no_circuit_within_ten_percent_is_a_warning(write_job, tmp_path, cli):
    """The twin peaks with a third, strong resonance at 250 Hz (a cabinet mode: a parallel RLC of 20 ohm, Q 8, in
    series) that neither circuit has: the deck keeps the closer one and both the deck and the console warn,
    naming the largest error in the band and where."""
    path, f, z = _twin_peaks(tmp_path, noise=0.0)
    s_ = 2j * np.pi * f
    w0, q, r = 2 * np.pi * 250.0, 8.0, 20.0
    z = z + r / (1 + q * (s_ / w0 + w0 / s_))
    path.write_text("".join(f"{a:.6g} {abs(b):.6g} {math.degrees(np.angle(b)):.5g}\n" for a, b in zip(f, z)))
    job = write_job(_job(f'"{path.name}"'))
    code, _, err = cli("simulate", job, "--out", tmp_path / "sim", "--no-plots")
    assert code == 0, err
    code, out, err = cli("export", tmp_path / "sim", "--spice", tmp_path / "x.cir")
    assert code == 0, err
    deck = (tmp_path / "x.cir").read_text()
    m = re.search(r"^\* WARNING: woofer: no model fits .* within 10 % rms of \|Z\| in the band 20-\d+ Hz; the closest, "
                  r".*, misses by ([\d.]+) % rms and (\d+) % at (\d+) Hz", deck, re.M)
    assert m, deck
    assert float(m[1]) > 10 and 150 < float(m[3]) < 400  # the mode at 250 Hz is where it misses most
    assert "warning: woofer: no model fits" in err
    _run(deck, tmp_path)  # the deck still runs
