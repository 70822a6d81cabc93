"""The bill of materials (bom.csv from snap): quantities, the rating each part needs, coil resistance and wire.

The ratings are checked against closed forms of a one-way network into a resistive load (circuit theory: a
series R and C into R_L), at the job's [stress] drive: V_rms = sqrt(P R_rated).
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from xo_fit.output.cautions import round_up

JOB = """
[grid]
f_min = 100
f_max = 10000
points = 61
[source]
voltage = 2.83
[driver.t]
response = 90
impedance = 8
[[part]]
name = "R1"
type = "R"
nodes = ["in", "a"]
value = 3.0
rating = 5
[[part]]
name = "C1"
type = "C"
nodes = ["a", "b"]
value = "10uF"
[[part]]
name = "L1"
type = "L"
nodes = ["b", "t1"]
value = "0.1mH"
dcr = "18awg"
[[part]]
name = "T"
type = "driver"
driver = "t"
nodes = ["t1", "0"]
[target]
band = [200, 8000]
[target.way.t]
type = "highpass"
alignment = "BW"
order = 2
fc = 1000
[stress]
power = 50
rated_impedance = 8
"""


def _rows(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return {r["name"]: r for r in csv.DictReader(fh)}


def test_bom_lists_each_part_with_the_rating_it_needs(write_job, cli, tmp_path):
    job = write_job(JOB)
    code, out, err = cli("snap", job, "--out", tmp_path / "s", "--no-plots", "--speakers", "3")
    assert code == 0, err
    rows = _rows(tmp_path / "s" / "bom.csv")
    assert list(rows) == ["R1", "C1", "L1"]
    assert all(r["quantity"] == "3" for r in rows.values())
    f = np.geomspace(100, 10000, 61)
    band = (f >= 200) & (f <= 8000)
    w = 2 * np.pi * f
    v = math.sqrt(50 * 8)  # V rms at 50 W into the rated 8 ohm
    dcr = float(rows["L1"]["dcr_ohm"])
    r, c, ind = (float(rows[n]["value"]) for n in ("R1", "C1", "L1"))  # the snapped values
    # the series loop: I = V / (R1 + 1/(jwC) + jwL + dcr + 8)   [DER, circuit theory]
    i = v / (r + 1 / (1j * w * c) + 1j * w * ind + dcr + 8.0)
    programme = np.mean((np.abs(i) ** 2 * r)[band])  # equal power per log-spaced point in the band (pink)

    def needed(name):
        return float(rows[name]["rating_needed"].split()[0])

    # resistors at twice their programme power (common practice [CP]), rounded up to three digits
    assert rows["R1"]["rating_needed"].endswith(" W")
    assert 2 * programme * (1 - 1e-3) <= needed("R1") <= 2 * programme * 1.005  # rounded up, three digits
    assert "under" in rows["R1"]["notes"] and rows["R1"]["rating"] == "5 W"
    vc = math.sqrt(2) * np.max(np.abs(i[band]) / (w[band] * c))  # capacitor: sine worst-case peak voltage
    assert vc * (1 - 1e-3) <= needed("C1") <= vc * 1.005 and rows["C1"]["rating_needed"].endswith(" V")
    il = math.sqrt(2) * np.max(np.abs(i[band]))  # coil: peak current
    assert il * (1 - 1e-3) <= needed("L1") <= il * 1.005 and rows["L1"]["rating_needed"].endswith(" A")
    # 18 AWG is 1.024 mm bare copper (ASTM B258, docs/references.md)
    assert rows["L1"]["wire"].startswith("1.02 mm") and "18 AWG" in rows["L1"]["wire"]
    assert 0.01 < dcr < 1.0


def test_round_up_never_goes_below_the_need():
    # the caution once read "rated 10 W, less than 2x its programme power (5.01 W) ...: use at least 10 W"
    assert round_up(10.02) == 10.1
    assert round_up(10.0) == 10.0
    assert round_up(0.012345) == 0.0124
    for x in np.geomspace(1e-3, 1e4, 997):
        assert round_up(x) >= x * (1 - 1e-12)


def test_a_far_snap_says_what_helps(write_job, cli, tmp_path):
    """A drawer of one coil far from the fitted value: the snap warns and suggests --top-up and --combine 2."""
    job = write_job(JOB.replace('value = "0.1mH"', 'value = "0.1mH"\nmin = "0.05mH"\nmax = "0.2mH"'))
    (tmp_path / "drawer.csv").write_text("kind,value,count\nL,0.47mH,2\nR,3,2\nC,10uF,2\n")
    code, out, err = cli("snap", job, "--out", tmp_path / "s", "--no-plots", "--inventory", tmp_path / "drawer.csv")
    assert code == 0, err
    assert "--top-up" in err and "--combine 2" in err and "L1" in err


def test_an_old_coil_from_the_drawer_brings_its_own_dcr(write_job, cli, tmp_path):
    """The drawer's dcr column is the coil's measured resistance: the snapped design is scored with it (a 2 ohm
    coil in series with an 8 ohm load is -1.94 dB at low frequency, 20 log10(8/10) [DER, voltage divider]),
    and bom.csv lists it with the drawer's rating."""
    job = write_job("""
[grid]
f_min = 20
f_max = 20000
points = 61
[driver.w]
response = 90
impedance = 8
[[part]]
name = "L1"
type = "L"
nodes = ["in", "a"]
value = "1mH"
min = "0.5mH"
max = "2mH"
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["a", "0"]
[target]
band = [40, 5000]
[target.way.w]
type = "lowpass"
alignment = "BW"
order = 1
fc = 1273
""")
    (tmp_path / "drawer.csv").write_text("kind,value,count,dcr,esr,rating\nL,1mH,2,2.0,,3\n")
    code, out, err = cli("snap", job, "--out", tmp_path / "s", "--no-plots", "--inventory", tmp_path / "drawer.csv")
    assert code == 0, err
    import pandas as pd

    r = pd.read_csv(tmp_path / "s" / "response.csv")
    low = r.w_db.iloc[0] - (90 + 20 * math.log10(2.83 / 2.83))  # the flat driver's 90 dB at its reference voltage
    assert low == pytest.approx(20 * math.log10(8 / 10), abs=0.02)
    rows = _rows(tmp_path / "s" / "bom.csv")
    assert rows["L1"]["dcr_ohm"] == "2" and rows["L1"]["rating"] == "3 A" and rows["L1"]["source"] == "inventory"
