"""Tolerance spread: zero and growing spread, first-order propagation (GUM), an independent closed-form Monte Carlo,
reproducibility, the robust fit, and the command."""

from __future__ import annotations

import json

import numpy as np
import pytest

from xo_fit.model.acoustics import spl_db
from xo_fit.grid import band_mask
from xo_fit.search.fitting import run_fit
from xo_fit.job.reader import load_job
from xo_fit.stages.tolerance import draw_factors, part_tolerances, run_spread, sensitivities
from xo_fit.model.system import load_system

from conftest import ladder_job


def lr2(write_job, tol="5%", distribution="uniform", samples=3000, name="LR2"):
    text, _ = ladder_job(name)
    text += f'\n[spread]\nsamples = {samples}\ndistribution = "{distribution}"\n' \
            f'tolerance = {{ R = "{tol}", L = "{tol}", C = "{tol}" }}\n'
    return load_system(load_job(write_job(text)))


def test_zero_tolerance_gives_zero_spread(write_job):
    s = lr2(write_job, tol="0%", samples=200)
    r = run_spread(s, s.values())
    # no spread at all: the percentiles never leave the deviations seen (the two solve paths differ by 1e-14 dB)
    np.testing.assert_allclose(r.p05, r.nominal_db, atol=1e-12)
    np.testing.assert_allclose(r.p95, r.nominal_db, atol=1e-12)
    assert np.max(r.p95 - r.p05) <= 1e-12
    assert r.yield_band == 1.0 and r.worst_deviation_db < 1e-9 and r.pair_p95_db < 1e-9  # two solve paths: 1e-14
    assert r.corners["method"] == "none"


def test_spread_grows_with_tolerance(write_job):
    widths = []
    for tol in ("1%", "5%", "10%"):
        s = lr2(write_job, tol=tol, samples=1500)
        r = run_spread(s, s.values())
        band = band_mask(s.frequencies, s.job.target.band)
        widths.append(float(np.max((r.p95 - r.p05)[0, band])))
    assert widths[0] < widths[1] < widths[2]
    assert widths[2] == pytest.approx(10 * widths[0], rel=0.35)  # roughly linear in the tolerance


def test_small_tolerances_follow_first_order_propagation(write_job):
    """JCGM 100:2008 (GUM), law of propagation of uncertainty: for small tolerances the standard deviation of
    the summed dB equals sqrt(sum (c_i u_i)^2), c_i from the sensitivities, u_i = tolerance / 2 (normal)."""
    s = lr2(write_job, tol="0.5%", distribution="normal", name="BW3")
    nominal = s.values()
    tol = part_tolerances(s.job)
    factors = draw_factors(20000, tol, "normal", np.random.default_rng(5))
    mc = np.std(spl_db(s.simulate(nominal[None, :] * factors).total), axis=0)
    band = band_mask(s.frequencies, s.job.target.band)
    c = sensitivities(s, nominal)  # dB per +1 %
    u_pct = tol / 2 * 100
    first_order = np.sqrt(np.sum((c * u_pct[:, None]) ** 2, axis=0))
    sel = band & (first_order > 1e-3)
    # 20,000 draws estimate a standard deviation to about 1/sqrt(2 N) = 0.5 % (the largest difference seen here);
    # asserted at 2 %, four times that
    np.testing.assert_allclose(mc[sel], first_order[sel], rtol=0.02)


def test_percentiles_match_an_independent_closed_form_monte_carlo(write_job):
    """Second code path: LR2 ladders into 8 ohm in closed form, H_lp = 1/(s^2 LC + s L/R + 1) and
    H_hp = s^2 LC/(s^2 LC + s L/R + 1) (docs/references.md ladder polynomial), tweeter inverted, driven with the same
    draws; the summed level's percentiles agree with the histogram's to 0.01 dB."""
    s = lr2(write_job, tol="5%", samples=4000)
    nominal = s.values()
    r = run_spread(s, nominal)
    tol = part_tolerances(s.job)
    rng = np.random.default_rng(np.random.SeedSequence(s.job.spread.seed))
    fac = draw_factors(4000, tol, "uniform", rng)
    v = nominal[None, :] * fac  # columns: wL0, wC1, tC0, tL1
    w = 2j * np.pi * s.frequencies[None, :]
    R = 8.0
    lp = 1 / (w**2 * v[:, [0]] * v[:, [1]] + w * v[:, [0]] / R + 1)
    hp = w**2 * v[:, [3]] * v[:, [2]] / (w**2 * v[:, [3]] * v[:, [2]] + w * v[:, [3]] / R + 1)
    total_db = 20 * np.log10(np.abs(lp - hp) * 20e-6 * 10 ** (90 / 20) / 20e-6)
    for q, got in ((5, r.p05[0]), (50, r.p50[0]), (95, r.p95[0])):
        np.testing.assert_allclose(got, np.percentile(total_db, q, axis=0), atol=0.012)


def test_same_seed_same_figures(write_job):
    s = lr2(write_job, samples=500)
    a, b = run_spread(s, s.values()), run_spread(s, s.values())
    np.testing.assert_array_equal(a.p95, b.p95)
    assert a.yield_band == b.yield_band and a.pair_p95_db == b.pair_p95_db and a.sensitivity == b.sensitivity
    c = run_spread(s, s.values(), seed=99)
    assert not np.array_equal(a.p95, c.p95)


def test_corners_and_sensitivity_ranking(write_job):
    s = lr2(write_job, tol="5%", samples=200)
    r = run_spread(s, s.values())
    assert r.corners["method"] == "all 16 corners"
    assert r.corners["worst_deviation_db"] >= r.worst_deviation_db - 1e-9  # no draw exceeds the worst corner here
    mags = [abs(x["db_per_pct"]) for x in r.sensitivity]
    assert mags == sorted(mags, reverse=True)
    assert set(r.sensitivity[0]["at_crossover"]) == {"2000"}


PEAK_JOB = '''
[grid]
f_min = 200
f_max = 20000
points = 200
[driver.d]
response = "peak.txt"
impedance = 8
[[part]]
name = "RS"
type = "R"
nodes = ["in", "a"]
value = 3
fixed = true
[[part]]
name = "RN"
type = "R"
nodes = ["a", "n1"]
value = 2
min = 0.1
max = 30
[[part]]
name = "LN"
type = "L"
nodes = ["n1", "n2"]
value = "0.5mH"
min = "0.05mH"
max = "5mH"
[[part]]
name = "CN"
type = "C"
nodes = ["n2", "0"]
value = "12uF"
min = "1uF"
max = "100uF"
[[part]]
name = "D"
type = "driver"
driver = "d"
nodes = ["a", "0"]
[target]
band = [500, 8000]
[target.way.d]
type = "fullrange"
[spread]
samples = 4000
distribution = "normal"
tolerance = { R = "10%", L = "10%", C = "10%" }
'''


def test_robust_fit_has_the_higher_yield(write_job):
    """A notch tuned on a sharp driver peak: the nominal optimum is a narrow notch that 10 % parts detune; the
    fit on the mean cost over fixed tolerance draws picks a design whose builds stay closer to their target."""
    f = np.geomspace(10, 40000, 400)
    s_ = 2j * np.pi * f
    w0, a, q = 2 * np.pi * 2000, 10 ** (8 / 40), 6
    h = (s_**2 + s_ * w0 * a / q + w0**2) / (s_**2 + s_ * w0 / (a * q) + w0**2)
    peak = "\n".join(f"{x:.5f} {90 + 20 * np.log10(abs(y)):.6f} {np.rad2deg(np.angle(y)):.5f}" for x, y in zip(f, h))
    nominal_sys = load_system(load_job(write_job(PEAK_JOB, {"peak.txt": peak}, name="a.toml")))
    robust_sys = load_system(load_job(write_job(PEAK_JOB.replace("[target]", "[search]\nrobust = { samples = 24 }\n[target]"),
                                                name="b.toml")))
    a_fit = run_fit(nominal_sys, budget=6000)
    b_fit = run_fit(robust_sys, budget=6000)
    assert a_fit.scored.cost < b_fit.scored.cost  # nominally the plain fit is better ...
    ya = run_spread(nominal_sys, a_fit.scored.values, seed=3)
    yb = run_spread(nominal_sys, b_fit.scored.values, seed=3)
    assert yb.yield_band > ya.yield_band + 0.02  # ... but its builds stray further
    assert yb.yield_limits > ya.yield_limits


def test_spread_command(write_job, cli, tmp_path):
    text, _ = ladder_job("LR4")
    text += '\n[spread]\nsamples = 400\n'
    code, out, err = cli("spread", write_job(text), "--out", tmp_path / "s", "--seed", "4")
    assert code == 0, err
    r = json.loads((tmp_path / "s" / "result.json").read_text())
    sp = r["spread"]
    assert r["stage"] == "spread" and sp["samples"] == 400 and sp["seed"] == 4
    assert 0 <= sp["yield"]["within_band"] <= 1 and sp["pair_matching"]["p95_db"] >= sp["pair_matching"]["p50_db"]
    assert sp["sensitivity"][0]["part"] in r["parts"]
    import csv

    header = next(csv.reader(open(tmp_path / "s" / "spread.csv")))
    assert header[:4] == ["frequency_hz", "sum_p05_db", "sum_p50_db", "sum_p95_db"]
    assert "woofer_p95_db" in header and "tweeter_p05_db" in header
    assert (tmp_path / "s" / "spread.png").stat().st_size > 10000
    assert "yield" in out and "matching" in out
