"""Acoustic targets against closed forms, scipy.signal and the facts of docs/references.md."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal as sig

from xo_fit.errors import JobError
from xo_fit.job.settings import WayTarget
from xo_fit.job.reader import load_job
from xo_fit.model.targets import build_targets, polarities, shipped_curves, way_shape

FC = 2000.0
F = np.geomspace(20, 20000, 401)


def way(type_="lowpass", alignment="LR", order=4, polarity="auto", driver="w", **kw):
    if type_ in ("lowpass", "highpass") and "fc" not in kw:
        kw["fc"] = FC
    return WayTarget(driver=driver, type=type_, alignment=alignment, order=order, polarity=polarity, **kw)


@pytest.mark.parametrize("alignment, orders", [("BW", range(1, 9)), ("LR", (2, 4, 6, 8)), ("Bessel", range(1, 9))])
@pytest.mark.parametrize("btype", ["low", "high"])
def test_closed_form_prototypes_match_scipy_signal(alignment, orders, btype):
    """Second code path: the closed-form slopes against scipy.signal's analog prototypes
    (butter; butter squared for LR; bessel with norm="phase")."""
    from xo_fit.model.targets import slope

    for order in orders:
        wc = 2 * np.pi * FC
        if alignment == "BW":
            b, a = sig.butter(order, wc, btype, analog=True)
        elif alignment == "LR":
            b, a = sig.butter(order // 2, wc, btype, analog=True)
            b, a = np.polymul(b, b), np.polymul(a, a)
        else:
            b, a = sig.bessel(order, wc, btype, analog=True, norm="phase")
        ref = sig.freqs(b, a, 2 * np.pi * F)[1]
        np.testing.assert_allclose(slope(alignment, order, btype, FC, F), ref, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("order", [2, 4, 6, 8])
def test_linkwitz_riley_is_squared_butterworth(order):
    """S. Linkwitz, JAES 24(1), 1976: LR of order 2N = Butterworth N squared; closed form |H|^2 = 1/(1+(f/fc)^2N)^2."""
    lp = way_shape(way(order=order), F)
    np.testing.assert_allclose(np.abs(lp), 1 / (1 + (F / FC) ** order), rtol=1e-9)
    b, a = sig.butter(order // 2, 2 * np.pi * FC, "low", analog=True)
    bw = sig.freqs(b, a, 2 * np.pi * F)[1]
    np.testing.assert_allclose(lp, bw**2, rtol=1e-9)


@pytest.mark.parametrize("order, phase", [(1, -45), (2, -90), (3, -135), (4, -180)])
def test_butterworth_phase_at_fc(order, phase):
    """docs/references.md: Butterworth low-pass phase at fc is -45, -90, -135, -180 deg for orders 1-4;
    the LR of order 2N has twice the Butterworth-N phase."""
    at = np.array([FC])
    ph = np.rad2deg(np.unwrap(np.angle(way_shape(way(alignment="BW", order=order), np.geomspace(1, FC, 200)))))[-1]
    assert ph == pytest.approx(phase, abs=1e-6)
    if order <= 4:
        lr = np.rad2deg(np.unwrap(np.angle(way_shape(way(alignment="LR", order=2 * order), np.geomspace(1, FC, 400)))))[-1]
        assert lr == pytest.approx(2 * phase, abs=1e-6)
    assert abs(way_shape(way(alignment="BW", order=order), at)[0]) == pytest.approx(10 ** (-3.0103 / 20), rel=1e-4)


def test_bessel_uses_scipy_phase_normalisation():
    """docs/references.md [DER]: scipy's Bessel norm='phase' is not at the phase midpoint for orders 3 and 4
    (-134.341 and -178.152 deg at fc): assert scipy's own numbers."""
    for order, want in ((2, -90.0), (3, -134.341), (4, -178.152)):
        f = np.geomspace(1, FC, 400)
        ph = np.rad2deg(np.unwrap(np.angle(way_shape(way(alignment="Bessel", order=order), f))))[-1]
        assert ph == pytest.approx(want, abs=2e-3)


@pytest.mark.parametrize("alignment, order", [("BW", 1), ("BW", 3), ("BW", 5), ("LR", 2), ("LR", 4), ("LR", 8)])
def test_slopes_per_octave(alignment, order):
    """Far from fc, an order-N slope falls 6.02 N dB per octave."""
    f = np.array([FC * 64, FC * 128])
    db = 20 * np.log10(np.abs(way_shape(way(alignment=alignment, order=order), f)))
    assert db[0] - db[1] == pytest.approx(6.0206 * order, abs=0.01)
    hp = 20 * np.log10(np.abs(way_shape(way("highpass", alignment, order), f / 4096)))
    assert hp[1] - hp[0] == pytest.approx(6.0206 * order, abs=0.01)


def _pair_sum(alignment, order, **pol):
    ways = (way("lowpass", alignment, order, driver="w", polarity=pol.get("w", "auto")),
            way("highpass", alignment, order, driver="t", polarity=pol.get("t", "auto")))
    p = polarities(ways)
    return p, p["w"] * way_shape(ways[0], F) + p["t"] * way_shape(ways[1], F)


def test_textbook_polarity_makes_pairs_sum_flat():
    """docs/references.md [DER]: LR2 sums flat with the high-pass inverted, LR4 in phase; BW3 flat either way;
    BW2 inverted peaks +3.01 dB at fc."""
    for alignment, order, inverted in (("LR", 2, True), ("LR", 4, False), ("LR", 8, False), ("BW", 3, False)):
        p, total = _pair_sum(alignment, order)
        assert (p["t"] < 0) == inverted
        np.testing.assert_allclose(np.abs(total), 1.0, atol=1e-9)
    p, total = _pair_sum("BW", 2)
    assert p["t"] < 0
    assert 20 * np.log10(abs(_pair_sum("BW", 2)[1][np.argmin(abs(F - FC))])) == pytest.approx(3.01, abs=0.01)


def test_polarity_override_and_three_way_chain():
    p, total = _pair_sum("LR", 2, t="normal")
    assert p["t"] == 1.0 and np.abs(total).min() < 0.01  # the reverse-polarity null (fc lies between grid points)
    ways = (way("lowpass", "LR", 2, driver="w", fc=300.0), way("bandpass", "LR", 2, driver="m", fc_low=300.0,
            fc_high=3000.0), way("highpass", "LR", 2, driver="t", fc=3000.0))
    assert polarities(ways) == {"w": 1.0, "m": -1.0, "t": 1.0}


def test_bandpass_is_highpass_times_lowpass():
    bp = way_shape(way("bandpass", "BW", 2, fc_low=200.0, fc_high=3000.0), F)
    hp = way_shape(way("highpass", "BW", 2, fc=200.0), F)
    lp = way_shape(way("lowpass", "BW", 2, fc=3000.0), F)
    np.testing.assert_allclose(bp, hp * lp, rtol=1e-12)


JOB = '''\
[grid]
f_min = 20
f_max = 20000
points = 100
[driver.w]
response = 90
impedance = 8
[[part]]
name = "R"
type = "R"
nodes = ["in", "a"]
value = 1
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["a", "0"]
[target]
curve = "{curve}"
[target.way.w]
type = "fullrange"
'''


def test_shipped_curves(write_job):
    assert set(shipped_curves()) >= {"flat", "tilt-1db-decade", "tilt-2db-decade"}
    job = load_job(write_job(JOB.format(curve="tilt-1db-decade")))
    t = build_targets(job, job.grid.frequencies)
    db = 20 * np.log10(np.abs(t.system))
    f = job.grid.frequencies
    slope = np.polyfit(np.log10(f), db, 1)[0]
    assert slope == pytest.approx(-1.0, abs=1e-3)
    flat = build_targets(load_job(write_job(JOB.format(curve="flat"))), f)
    np.testing.assert_allclose(np.abs(flat.system), 1.0)


def test_unknown_curve_is_a_clear_error(write_job):
    job = load_job(write_job(JOB.format(curve="bright")))
    with pytest.raises(JobError, match="no target curve 'bright'.*flat"):
        build_targets(job, job.grid.frequencies)


def test_shipped_shaping_curves_are_defined_on_any_grid(write_job):
    """flat and the tilts are formulas: a grid from 5 Hz to 30 kHz (beyond the files' 10 Hz-40 kHz) works, and the
    formulas agree with the shipped files where both are defined (-k log10(f / 1 kHz))."""
    from xo_fit.io.measure import read_curve
    from xo_fit.model.targets import load_curve
    import importlib.resources

    from conftest import ladder_job

    text, _ = ladder_job("LR2")
    job = load_job(write_job(text.replace("f_min = 20", "f_min = 5")))
    f = np.geomspace(5, 30000, 200)
    assert np.all(load_curve("flat", job, f) == 0.0)
    for name, k in (("tilt-1db-decade", 1.0), ("tilt-2db-decade", 2.0)):
        got = load_curve(name, job, f)
        np.testing.assert_allclose(got, -k * np.log10(f / 1000), atol=1e-12)
        with importlib.resources.as_file(shipped_curves()[name]) as path:
            c = read_curve(path, "response")
        inside = (f >= c.frequency[0]) & (f <= c.frequency[-1])
        np.testing.assert_allclose(got[inside], np.interp(np.log(f[inside]), np.log(c.frequency), c.magnitude),
                                   atol=0.01)
