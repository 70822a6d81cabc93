"""Protection of the drivers at the [stress] drive: cone excursion against xmax, programme power against the rating.

Sources (docs/references.md): R. H. Small, "Direct-radiator loudspeaker system analysis", JAES 20(5), 1972 (the
parameter relations and the mechanical circuit); circuit theory (a series capacitor into a driver is a voltage
divider; P = |V|^2 Re(1/Z)); the drive V = sqrt(P R) as amplifier power is quoted (docs/references.md, stress).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from xo_fit.errors import JobError
from xo_fit.job.reader import load_job
from xo_fit.model.protection import protection_model
from xo_fit.model.system import load_system
from xo_fit.output.design import Design
from xo_fit.search.fitting import cost_function, cost_model, run_fit, score

RHO, C = 1.204, 343.0  # kg/m^3 (dry air, 20 C) and the job's default speed of sound, m/s

# an invented dome tweeter (SI): fs 800 Hz, Qms 2.0, Qes 0.9, Vas 0.05 L, Sd 8 cm^2, xmax 0.3 mm
TWEETER = dict(re=5.2, fs=800.0, qms=2.0, qes=0.9, vas=0.05e-3, sd=8e-4)


def _mechanical(p: dict) -> dict:
    """Small 1972's mechanical set, written here from his relations: Cms = Vas/(rho c^2 Sd^2), ws^2 = 1/(Mms Cms),
    Qes = ws Mms Re / Bl^2, Qms = ws Mms / Rms."""
    ws = 2 * math.pi * p["fs"]
    cms = p["vas"] / (RHO * C * C * p["sd"] ** 2)
    mms = 1 / (ws * ws * cms)
    return {"cms": cms, "mms": mms, "bl": math.sqrt(ws * mms * p["re"] / p["qes"]), "rms": ws * mms / p["qms"]}


def _job(parts: str, *, xmax="0.3mm", power=1000, band="[200, 20000]", cost="", fc=3000) -> str:
    return f'''
name = "tweeter"
[grid]
f_min = 100
f_max = 10000
points = 201
[driver.t]
response = 90
impedance = "model"
[driver.t.ts]
re = 5.2
fs = 800
qms = 2.0
qes = 0.9
vas = "0.05L"
sd = "8cm2"
xmax = "{xmax}"
power = {power}
{parts}
[[part]]
name = "T"
type = "driver"
driver = "t"
nodes = ["a", "0"]
[target]
band = {band}
[target.way.t]
type = "highpass"
order = 2
fc = {fc}
{cost}
[stress]
power = 60
rated_impedance = 8
'''


def _part(name, kind, a, b, value, lo=None, hi=None) -> str:
    rng = f'\nmin = "{lo}"\nmax = "{hi}"' if lo else ""
    return f'[[part]]\nname = "{name}"\ntype = "{kind}"\nnodes = ["{a}", "{b}"]\nvalue = "{value}"{rng}\n'


def test_excursion_behind_a_series_capacitor_follows_the_closed_form(write_job):
    """A 10 uF capacitor in series with the tweeter (infinite baffle) at 60 W into 8 ohm: at 1 kHz (a grid point) the
    excursion is sqrt(2) |x|, x = Bl i / (1/Cms - w^2 Mms + j w Rms) with i = V/(Zd + 1/(j w C)) and
    Zd = Re + Bl^2 / (Rms + j w Mms + 1/(j w Cms)) (Small 1972's mechanical circuit, circuit theory); the reported
    peak is the largest of that over the band, and where."""
    s = load_system(load_job(write_job(_job(_part("C1", "C", "in", "a", "10uF"), band="[300, 10000]"))))
    m = _mechanical(TWEETER)
    f = s.frequencies
    k = int(np.argmin(np.abs(f - 1000.0)))
    assert f[k] == pytest.approx(1000.0, rel=1e-12)
    w = 2 * np.pi * f
    zm = m["rms"] + 1j * w * m["mms"] + 1 / (1j * w * m["cms"])
    zd = TWEETER["re"] + m["bl"] ** 2 / zm
    v = math.sqrt(60 * 8)  # V RMS at the input
    i = v / (zd + 1 / (1j * w * 10e-6))
    x = math.sqrt(2) * np.abs(m["bl"] * i / (1 / m["cms"] - w ** 2 * m["mms"] + 1j * w * m["rms"]))
    prot = protection_model(s)
    sim = s.simulate(s.values(), dense=True)
    mine = prot.excursion(sim.voltages)[0, 0]
    assert mine[k] == pytest.approx(x[k], rel=1e-9)
    band = (f >= 300) & (f <= 10000)
    fig = prot.figures(sim.voltages)["t"]
    assert fig["excursion_mm"] == pytest.approx(1e3 * x[band].max(), rel=1e-9)
    assert fig["at_hz"] == pytest.approx(f[band][np.argmax(x[band])], rel=1e-12)
    # the capacitor: a first-order high-pass of the current, so the excursion below fs falls under the bare driver's
    bare = math.sqrt(2) * np.abs(m["bl"] * v / zd / (1 / m["cms"] - w ** 2 * m["mms"] + 1j * w * m["rms"]))
    assert np.all(mine[f < 800] < bare[f < 800])


def test_programme_power_is_ohms_law_and_over_power_is_found(write_job):
    """A resistive 8 ohm driver straight across the input at 60 W into 8 ohm takes V^2/R = 60 W at every frequency
    (circuit theory), so its programme power is 60 W; rated 40 W it is over, rated 100 W within."""
    for rating, over in ((40, True), (100, False)):
        text = _job(_part("R0", "R", "in", "a", "1u"), power=rating).replace('impedance = "model"', "impedance = 8")
        s = load_system(load_job(write_job(text.replace('xmax = "0.3mm"\n', ""))))
        d = Design(system=s, scored=score(s, s.values()), stage="simulate")
        p = d.protection["t"]
        assert p["power_w"] == pytest.approx(60.0, rel=1e-5)
        assert p["excursion_mm"] is not None and p["xmax_mm"] is None  # the motion is known; no xmax to judge it
        assert p["within"] is (not over)
        kinds = [x["kind"] for x in d.findings]
        assert ("over_power" in kinds) is over and "over_excursion" not in kinds
        assert "protection" in d.to_json()


def test_a_tweeter_crossed_too_low_is_over_its_xmax(write_job):
    """The tweeter (fs 800 Hz, xmax 0.3 mm) behind a 2nd-order high-pass (C series, L across) at its fs moves
    3.2 mm at 60 W into 8 ohm: over_excursion, a caution and within false; the same high-pass at 4 kHz keeps it
    within (0.16 mm). The excursion near fs is Small's mechanical circuit (test above); the figures are what it
    gives for these two networks."""
    low = _part("C1", "C", "in", "a", "27.1uF") + _part("L1", "L", "a", "0", "0.38mH")
    high = _part("C1", "C", "in", "a", "5.4uF") + _part("L1", "L", "a", "0", "0.19mH")
    found = {}
    for label, parts in (("low", low), ("high", high)):
        s = load_system(load_job(write_job(_job(parts))))
        d = Design(system=s, scored=score(s, s.values()), stage="simulate")
        found[label] = (d.protection["t"], [x for x in d.findings if x["kind"] == "over_excursion"])
    p, over = found["low"]
    assert not p["within"] and p["excursion_mm"] > 10 * p["xmax_mm"] and 700 < p["at_hz"] < 1500
    assert len(over) == 1 and over[0]["driver"] == "t" and "xmax of 0.30 mm" in over[0]["text"]
    p, over = found["high"]
    assert p["within"] and p["excursion_mm"] < p["xmax_mm"] and not over


def test_the_protection_term_keeps_the_tweeter_within_xmax(write_job):
    """[cost] protection: a fit to a high-pass at 1.5 kHz (below what the tweeter's xmax allows at 60 W) leaves it
    over xmax without the term and within it with the term, which the numpy reference cost carries (the fused
    kernel has none: the fit falls back to the reference)."""
    parts = _part("C1", "C", "in", "a", "10uF", "1uF", "60uF") + _part("L1", "L", "a", "0", "0.5mH", "0.05mH", "5mH")
    results = {}
    for weight in (0, 100):
        s = load_system(load_job(write_job(_job(parts, fc=1500, cost=f"[cost]\nprotection = {weight}"))))
        cm, _ = cost_model(s)
        assert cm.needs_reference is (weight > 0)
        assert type(cost_function(cm)).__name__ == ("function" if weight else "FusedCost")
        out = run_fit(s, budget=3000, seed=1).scored
        results[weight] = (protection_model(s).figures(out.sim.voltages)["t"], out.terms)
    assert not results[0][0]["within"] and "protection" not in results[0][1]
    assert results[100][0]["within"] and results[100][1]["protection"] < 1e-3
    assert results[100][0]["excursion_mm"] < results[0][0]["excursion_mm"] / 2


def test_protection_weight_needs_the_drive(write_job):
    text = _job(_part("C1", "C", "in", "a", "10uF"), cost="[cost]\nprotection = 1")
    with pytest.raises(JobError, match=r"protection weight needs the drive") as e:
        load_job(write_job(text.replace("[stress]\npower = 60\nrated_impedance = 8\n", "")))
    assert "[cost] protection" in str(e.value)


@pytest.mark.slow
def test_the_demo_reports_its_woofers_excursion(demo_run):
    """The demo's woofer has a data sheet and a box: check prints the closed box's fc (Small 1972: 33.49 Hz
    sqrt(1 + 24/12) = 58.01 Hz), result.json and the report carry its excursion and power at 60 W into 4 ohm."""
    import json

    demo, run = demo_run
    assert "closed, 12 L: alpha 2, fc 58.01 Hz" in run.stdout and "derived: qts" in run.stdout
    p = json.loads((demo / "snap" / "result.json").read_text())["protection"]["woofer"]
    assert p["xmax_mm"] == pytest.approx(4.0) and p["rating_w"] == pytest.approx(50.0) and p["within"]
    assert 150 <= p["at_hz"] <= 16000 and 0 < p["excursion_mm"] < 4 and 0 < p["power_w"] < 50
    page = (demo / "report" / "report.html").read_text()
    assert "Driver protection" in page and f"<td>woofer</td><td>{p['excursion_mm']:.3g}</td>" in page
