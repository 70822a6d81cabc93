"""Thiele-Small parameter sets, closed and vented boxes, cone excursion and the vented-box impedance fit.

Sources (tags of docs/references.md): R. H. Small, "Direct-radiator loudspeaker system analysis", JAES 20(5),
1972 and "Closed-box loudspeaker systems, Part I", JAES 20(10), 1972; R. H. Small, "Vented-box loudspeaker
systems, Part I", JAES 21(5), 1973; A. N. Thiele, "Loudspeakers in vented boxes", JAES 19, 1971. Every model
value is compared with an implementation written here from those equations by another route (the mechanical
circuit with the box's air as an acoustic load, rather than the package's electrical analogue).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from xo_fit.errors import DataError, XoFitError
from xo_fit.physics import box as bx
from xo_fit.physics.thiele_small import C_AIR, RHO_AIR, ThieleSmallSet, complete
from xo_fit.physics.vented_fit import fit_vented

# an invented woofer (the contract's example) and an invented tweeter, SI units
WOOFER = {"re": 5.6, "le": 0.45e-3, "fs": 30.0, "qms": 4.5, "qes": 0.40, "vas": 0.060, "sd": 0.0220,
          "xmax": 0.006, "power": 100.0}
TWEETER = {"re": 5.2, "fs": 800.0, "qms": 2.0, "qes": 0.9, "vas": 0.05e-3, "sd": 8e-4, "xmax": 0.3e-3}


def _air():
    """rho, c of dry air at 20 C, 101.325 kPa from the ideal-gas law (R = 287.05 J/(kg K), gamma = 1.4)."""
    t, r = 293.15, 287.05
    return 101325.0 / (r * t), math.sqrt(1.4 * r * t)


def _mechanical(p: dict) -> dict:
    """Small 1972's mechanical set from re, fs, qms, qes, vas, sd, written here independently."""
    rho, c = RHO_AIR, C_AIR
    ws = 2 * math.pi * p["fs"]
    cms = p["vas"] / (rho * c * c * p["sd"] ** 2)            # Cms = Vas / (rho c^2 Sd^2)
    mms = 1.0 / (ws * ws * cms)                               # ws^2 = 1 / (Mms Cms)
    bl = math.sqrt(p["re"] * ws * mms / p["qes"])             # Qes = ws Mms Re / Bl^2
    rms = ws * mms / p["qms"]                                 # Qms = ws Mms / Rms
    return {"cms": cms, "mms": mms, "bl": bl, "rms": rms, "qts": p["qms"] * p["qes"] / (p["qms"] + p["qes"])}


def _z_mech(p: dict, m: dict, f, zbox):
    """Input impedance by the mechanical circuit: Re + j w Le + Bl^2 / Zm, with Zm = Rms + j w Mms +
    1/(j w Cms) + Zbox (the box's acoustic load as a mechanical impedance, Sd^2 Z_acoustic)."""
    s = 2j * np.pi * f
    zm = m["rms"] + s * m["mms"] + 1.0 / (s * m["cms"]) + zbox
    return p["re"] + s * p.get("le", 0.0) + m["bl"] ** 2 / zm, zm


def _zbox_closed(p, vb, f):
    cab = vb / (RHO_AIR * C_AIR ** 2)                         # box compliance Cab = Vb / (rho c^2)
    return p["sd"] ** 2 / (2j * np.pi * f * cab)


def _zbox_vented(p, vb, fb, ql, f):
    """Small 1973: Cab = Vb/(rho c^2), the port mass Map = 1/(wb^2 Cab), the leak RaL = QL/(wb Cab), all three
    in parallel (one pressure in the box); times Sd^2 as a load on the cone."""
    s, wb = 2j * np.pi * f, 2 * np.pi * fb
    cab = vb / (RHO_AIR * C_AIR ** 2)
    map_, ral = 1.0 / (wb * wb * cab), ql / (wb * cab)
    return p["sd"] ** 2 / (s * cab + 1.0 / ral + 1.0 / (s * map_))


# ---- the parameter set ----------------------------------------------------------------------------------


def test_air_constants_ideal_gas():
    rho, c = _air()
    assert RHO_AIR == pytest.approx(rho, rel=1e-3)  # [DER] ideal-gas law, dry air 20 C, 101.325 kPa
    assert C_AIR == pytest.approx(c, rel=1e-3)  # [DER] c = sqrt(gamma R T)


def test_completion_follows_small_1972():
    ts = complete(WOOFER)
    m = _mechanical(WOOFER)
    for k in ("cms", "mms", "bl", "rms", "qts"):
        assert getattr(ts, k) == pytest.approx(m[k], rel=1e-12), k  # [SRC] Small 1972's relations
    assert ts.res == pytest.approx(5.6 * 4.5 / 0.40)  # [SRC] Res = Re Qms / Qes (Small 1972)
    d = ts.derived()
    assert set(d) >= {"qts", "cms", "mms", "bl", "rms", "res", "vd", "eta0"} and "fs" not in d
    assert d["vd"] == pytest.approx(0.022 * 0.006)  # Vd = Sd Xmax [CP]
    eta0 = 4 * math.pi ** 2 / C_AIR ** 3 * 30.0 ** 3 * 0.060 / 0.40
    assert d["eta0"] == pytest.approx(eta0, rel=1e-12)  # [SRC] eta0 = (4 pi^2/c^3) fs^3 Vas / Qes (Small 1972)
    assert d["spl_1w1m"] == pytest.approx(112.1 + 10 * math.log10(eta0), abs=0.1)  # [SRC] 112.1 + 10 log eta0


@pytest.mark.parametrize("keys", [
    ("re", "fs", "qts", "qes", "cms", "sd"),
    ("re", "bl", "mms", "cms", "sd", "qms"),
    ("re", "qes", "bl", "mms", "rms", "sd"),
    ("re", "bl", "qes", "cms", "sd", "qms"),     # fs and mms only together (two relations, two unknowns)
    ("re", "fs", "qts", "qms", "vas", "sd", "mms"),  # over-determined but consistent
])
def test_completion_round_trips(keys):
    full = dict(WOOFER, **_mechanical(WOOFER))
    ts = complete({k: full[k] for k in keys})
    for k in ("re", "fs", "qms", "qes", "qts", "vas", "sd", "bl", "mms", "cms", "rms"):
        assert getattr(ts, k) == pytest.approx(full[k], rel=1e-9), k  # [DER] the same relations read backwards


def test_impedance_only_set_and_what_it_lacks():
    ts = complete({k: WOOFER[k] for k in ("re", "le", "fs", "qms", "qes", "vas")})
    assert ts.bl is None and ts.sd is None and ts.vas == 0.060
    with pytest.raises(XoFitError, match=r"excursion needs bl, mms.*give sd"):
        bx.excursion(ts, bx.Box(), np.array([50.0]), key="[driver.w.ts]")
    bare = complete({k: WOOFER[k] for k in ("re", "fs", "qms", "qes")})
    with pytest.raises(XoFitError, match=r"closed box needs vas.*give vas"):
        bx.impedance(bare, bx.make_box("closed", 0.04), np.array([50.0]))


def test_errors_name_the_keys():
    with pytest.raises(XoFitError, match=r"\[driver.w.ts\]: qms, qes not determined.*qts with qes"):
        complete({"re": 5.6, "fs": 30, "qts": 0.37}, key="[driver.w.ts]")
    with pytest.raises(XoFitError, match="unknown Thiele-Small key colour"):
        complete(dict(WOOFER, colour=1))
    with pytest.raises(XoFitError, match="both l2 and r2"):
        complete(dict(WOOFER, l2=1e-3))
    with pytest.raises(XoFitError, match="qts .* must be below"):
        complete({"re": 5.6, "fs": 30, "qms": 0.3, "qts": 0.4})
    m = _mechanical(WOOFER)
    # Mms 3 % off the Vas, Sd, fs it is given with: Vas = rho c^2 Sd^2 Cms misses by 3 % with Cms from fs, Mms
    with pytest.raises(XoFitError, match=r"inconsistent.*vas.*sd, cms \(from fs, mms\)"):
        complete(dict(WOOFER, mms=m["mms"] * 1.03))
    complete(dict(WOOFER, mms=m["mms"] * 1.005))  # 0.5 %: within the 1 % tolerance
    with pytest.raises(XoFitError, match=r"inconsistent.*qts.*qms, qes"):
        complete(dict(WOOFER, qts=0.40))


# ---- closed box -----------------------------------------------------------------------------------------


def test_closed_box_fc_qtc():
    ts = complete(dict(WOOFER, le=0.0))
    vb = 0.025
    a = 0.060 / vb
    fc, qtc = 30.0 * math.sqrt(1 + a), ts.qts * math.sqrt(1 + a)  # [SRC] Small 1972 (closed box)
    assert bx.closed_box(ts, vb) == pytest.approx((fc, qtc), rel=1e-12)
    box = bx.make_box("closed", vb)
    f = np.geomspace(fc / 1.2, fc * 1.2, 20001)
    z = np.abs(bx.impedance(ts, box, f))
    assert f[np.argmax(z)] == pytest.approx(fc, rel=1e-4)  # [DER] the motional peak lies at fc
    h = bx.pressure(ts, box, np.array([fc]))[0]
    assert abs(h) == pytest.approx(qtc, rel=1e-9)  # [DER] a 2nd-order high-pass has |H(f0)| = Q (Small 1972)
    # f3 of Small's s^2/(s^2 + s wc/Qtc + wc^2): (f3/fc)^2 = (u + sqrt(u^2 + 4))/2, u = 1/Qtc^2 - 2  [DER]
    u = 1 / qtc ** 2 - 2
    assert bx.f3(ts, box) == pytest.approx(fc * math.sqrt((u + math.sqrt(u * u + 4)) / 2), rel=1e-6)


def test_closed_box_impedance_against_mechanical_circuit():
    ts = complete(WOOFER)
    m = _mechanical(WOOFER)
    f = np.geomspace(5, 20000, 300)
    for vb in (0.010, 0.040, 0.200):
        ref, _ = _z_mech(WOOFER, m, f, _zbox_closed(WOOFER, vb, f))  # [SRC] Small 1972's closed-box circuit
        got = bx.impedance(ts, bx.make_box("closed", vb), f)
        assert np.max(np.abs(got / ref - 1)) < 1e-9
    ref, _ = _z_mech(WOOFER, m, f, 0.0)  # infinite baffle: no box load
    assert np.max(np.abs(bx.impedance(ts, bx.Box(), f) / ref - 1)) < 1e-9


def test_lossy_coil_adds_its_section():
    ts = complete(dict(WOOFER, l2=1.2e-3, r2=7.0))
    f = np.array([1e3, 1e4])
    plain = bx.impedance(complete(WOOFER), bx.Box(), f)
    s = 2j * np.pi * f
    assert np.allclose(bx.impedance(ts, bx.Box(), f) - plain, s * 1.2e-3 * 7.0 / (7.0 + s * 1.2e-3))  # [SRC] Leach 2002


# ---- vented box ------------------------------------------------------------------------------------------


def _peaks(ts, box, lo, hi):
    from scipy.signal import find_peaks

    f = np.geomspace(lo, hi, 200001)
    z = np.abs(bx.impedance(ts, box, f))
    return f[find_peaks(z)[0]], f, z


def test_vented_peaks_and_minimum_small_1973():
    ts = complete(dict(WOOFER, le=0.0))
    vb, fb = 0.040, 32.0
    a = 0.060 / vb
    lossless = bx.Box("vented", vb, fb, 1e9)
    peaks, f, z = _peaks(ts, lossless, 5, 300)
    assert peaks.size == 2
    # [DER from Small 1973's circuit] the peaks are the roots of w^4 - w^2 (ws^2 (1 + alpha) + wb^2) + ws^2 wb^2
    sum_, prod = 30.0 ** 2 * (1 + a) + fb ** 2, 30.0 ** 2 * fb ** 2
    roots = np.sqrt([(sum_ - math.sqrt(sum_ ** 2 - 4 * prod)) / 2, (sum_ + math.sqrt(sum_ ** 2 - 4 * prod)) / 2])
    assert peaks == pytest.approx(roots, rel=1e-4)
    fl, fh = peaks
    assert fl * fh / fb == pytest.approx(30.0, rel=2e-4)  # [SRC] Small 1973: fs = fL fH / fB
    assert (fh ** 2 - fb ** 2) * (fb ** 2 - fl ** 2) / (fh ** 2 * fl ** 2) == pytest.approx(a, rel=1e-3)  # [SRC] alpha
    between = (f > fl) & (f < fh)
    assert f[between][np.argmin(z[between])] == pytest.approx(fb, rel=1e-4)  # [SRC] the minimum at fB
    assert z[between].min() == pytest.approx(5.6, rel=1e-6)  # [DER] lossless: |Z| = Re at fB
    lossy = bx.make_box("vented", vb, fb)  # QL 7: the figures move a little (under 1 % here)
    p7, f, z = _peaks(ts, lossy, 5, 300)
    assert p7 == pytest.approx(roots, rel=0.01)
    between = (f > p7[0]) & (f < p7[1])
    assert f[between][np.argmin(z[between])] == pytest.approx(fb, rel=0.01)


def test_vented_impedance_against_acoustic_circuit():
    ts = complete(WOOFER)
    m = _mechanical(WOOFER)
    f = np.geomspace(5, 20000, 300)
    for vb, fb, ql in ((0.040, 32.0, 7.0), (0.020, 45.0, 15.0), (0.100, 22.0, 4.0)):
        ref, _ = _z_mech(WOOFER, m, f, _zbox_vented(WOOFER, vb, fb, ql, f))  # [SRC] Small 1973's circuit
        got = bx.impedance(ts, bx.make_box("vented", vb, fb, ql), f)
        assert np.max(np.abs(got / ref - 1)) < 1e-9


def test_vented_response_small_1973_polynomial():
    ts = complete(dict(WOOFER, le=0.0))
    vb, fb, ql = 0.040, 32.0, 7.0
    a, qt, h = 0.060 / vb, ts.qts, fb / 30.0
    # [SRC] Small 1973, eq. for G(s) with leakage QL [MEM for the printed form of a1..a3; re-derived here]
    a1 = (ql + h * qt) / (math.sqrt(h) * ql * qt)
    a2 = (h + (a + 1 + h * h) * qt * ql) / (h * ql * qt)
    a3 = (h * ql + qt) / (math.sqrt(h) * ql * qt)
    f = np.geomspace(3, 3000, 200)
    s = 2j * np.pi * f / (2 * np.pi * math.sqrt(30.0 * fb))
    g = s ** 4 / (s ** 4 + a1 * s ** 3 + a2 * s ** 2 + a3 * s + 1)
    assert np.max(np.abs(bx.pressure(ts, bx.make_box("vented", vb, fb, ql), f) / g - 1)) < 1e-9


def test_thiele_b4_alignment_f3():
    # [MEM] Thiele 1971, table of alignments, B4: Qt = 0.383, alpha = 1.414, fB/fs = 1.000, f3/fs = 1.000 (QL
    # infinite); [DER] the 4th-order Butterworth: Qt = 1/sqrt(4 + 2 sqrt 2), alpha = sqrt 2
    qts = 0.383
    ts = complete({"re": 6.0, "fs": 40.0, "qms": 200.0, "qts": qts, "vas": 0.050})
    box = bx.Box("vented", 0.050 / 1.414, 40.0, 1e9)
    assert bx.f3(ts, box) == pytest.approx(40.0, rel=0.005)  # the tabulated f3/fs within 0.5 %
    f = np.array([20.0, 40.0, 80.0])
    hb = 1 / np.sqrt(1 + (40.0 / f) ** 8)  # [DER] maximally flat: |H|^2 = 1/(1 + (f3/f)^8)
    assert np.abs(bx.pressure(ts, box, f)) == pytest.approx(hb, abs=0.01)


# ---- excursion -------------------------------------------------------------------------------------------


def test_excursion_closed_form():
    ts = complete(WOOFER)
    m = _mechanical(WOOFER)
    vb, f0 = 0.040, 40.0
    w = 2 * math.pi * f0
    ze = 5.6 + 1j * w * 0.45e-3
    k = 1 / m["cms"] + WOOFER["sd"] ** 2 * RHO_AIR * C_AIR ** 2 / vb  # suspension + box air stiffness
    # [DER] x = F/(K - w^2 M + j w R) with F = Bl i, i = (V - Bl u)/Ze: the coil's damping joins R
    x = (m["bl"] / ze) / (k - w * w * m["mms"] + 1j * w * (m["rms"] + m["bl"] ** 2 / ze))
    assert bx.excursion(ts, bx.make_box("closed", vb), np.array([f0]))[0] == pytest.approx(x, rel=1e-9)
    low = bx.excursion(ts, bx.Box(), np.array([0.3]))[0]
    assert abs(low) == pytest.approx(m["bl"] * m["cms"] / 5.6, rel=1e-3)  # [DER] static: x = Bl (V/Re) Cms


def test_excursion_vented_acoustic_load_and_dip_at_fb():
    ts = complete(WOOFER)
    m = _mechanical(WOOFER)
    vb, fb, ql = 0.040, 32.0, 7.0
    f = np.geomspace(5, 500, 301)
    z, zm = _z_mech(WOOFER, m, f, _zbox_vented(WOOFER, vb, fb, ql, f))
    x = m["bl"] / z / (2j * np.pi * f * zm)  # [DER] u = F / Zm, F = Bl V / Z, x = u / (j w)
    got = bx.excursion(ts, bx.make_box("vented", vb, fb, ql), f)
    assert np.max(np.abs(got / x - 1)) < 1e-9
    f = np.geomspace(15, 80, 20001)
    xa = np.abs(bx.excursion(ts, bx.make_box("vented", vb, fb, ql), f))
    assert f[np.argmin(xa)] == pytest.approx(fb, rel=0.01)  # [SRC] Small 1973: the port unloads the cone at fB


def test_series_capacitor_is_a_first_order_high_pass_below_fs():
    ts = complete(TWEETER)
    re, fs = TWEETER["re"], TWEETER["fs"]
    c = 1 / (2 * math.pi * re * 2 * fs)  # corner 2 fs with Re
    f = np.geomspace(fs / 40, fs, 400)
    z = bx.impedance(ts, bx.Box(), f)
    x = bx.excursion(ts, bx.Box(), f)
    xc = x * z / (z + 1 / (2j * np.pi * f * c))  # the plain voltage divider
    assert np.all(np.abs(xc) < np.abs(x))
    wcr = 2 * np.pi * f * c * re
    hp = wcr / np.sqrt(1 + wcr ** 2)  # [DER] first-order high-pass with R = Re: |Z| -> Re well below fs
    low = f <= fs / 10
    assert np.abs(xc[low]) / np.abs(x[low]) == pytest.approx(hp[low], rel=0.02)
    i, j = np.searchsorted(f, [fs / 40, fs / 20])
    slope = 20 * math.log10(abs(xc[j]) / abs(xc[i])) - 20 * math.log10(abs(x[j]) / abs(x[i]))
    assert slope == pytest.approx(6.02, abs=0.2)  # [DER] 6 dB per octave more than the bare driver's


def test_peak_excursion_of_a_sine():
    f = np.array([20.0, 30.0, 40.0])
    x = np.array([1e-3, 2e-3 + 1e-4j, 5e-4])
    volts = math.sqrt(100.0 * 8.0)  # 100 W into 8 ohm [SRC] P = V^2/R
    peak, at = bx.peak_excursion(f, x, volts)
    assert peak == pytest.approx(math.sqrt(2) * volts * abs(x[1])) and at == 30.0  # [DER] peak = sqrt 2 RMS


def test_box_errors():
    for args, text in ((("round", 0.04), "box type"), (("closed",), "needs its volume"),
                       (("vented", 0.04), "needs its tuning"), (("closed", 0.04, 30.0), "closed box takes no"),
                       (("vented", -1.0, 30.0), "above zero")):
        with pytest.raises(XoFitError, match=text):
            bx.make_box(*args, key="[driver.w.box]")
    assert bx.make_box("vented", 0.04, 32.0).ql == 7.0
    s = bx.summary(complete(WOOFER), bx.make_box("vented", 0.04, 32.0))
    assert s["alpha"] == pytest.approx(1.5) and s["h"] == pytest.approx(32 / 30) and 20 < s["f3"] < 60


# ---- the vented fit --------------------------------------------------------------------------------------


def _noisy(z, seed):
    rng = np.random.default_rng(seed)
    return z * (1 + 0.01 * (rng.standard_normal(z.size) + 1j * rng.standard_normal(z.size)) / math.sqrt(2))


@pytest.mark.parametrize("lossy,phase", [(False, True), (False, False), (True, True)])
def test_vented_fit_recovers_the_box(lossy, phase):
    extra = {"l2": 1.0e-3, "r2": 8.0} if lossy else {}
    ts = complete(dict(WOOFER, **extra))
    f = np.geomspace(10, 20000, 400)
    z = _noisy(bx.impedance(ts, bx.make_box("vented", 0.040, 32.0, 7.0), f), seed=27)
    r = fit_vented(f, z if phase else np.abs(z), lossy=lossy, volume=0.040)
    assert r.fb == pytest.approx(32.0, rel=0.02)  # [CP] the tolerances at 1 % noise
    assert r.fs == pytest.approx(30.0, rel=0.05)
    assert r.qts == pytest.approx(ts.qts, rel=0.05)
    assert r.vas == pytest.approx(0.060, rel=0.10) and r.rms_error_pct < 2.0
    assert f[0] <= r.max_error_hz <= f[-1] and r.max_error_pct >= r.rms_error_pct
    text = r.toml("woofer")
    assert "[driver.woofer.ts]" in text and 'type = "vented"' in text and "tuning" in text


def test_vented_fit_refuses_one_peak_and_none():
    f = np.geomspace(10, 20000, 300)
    free = bx.impedance(complete(WOOFER), bx.Box(), f)
    with pytest.raises(DataError, match="one impedance peak.*not the two of a vented box"):
        fit_vented(f, free, path="free.txt")
    with pytest.raises(DataError, match="no resonance peak"):
        fit_vented(f, 5.6 + 2j * np.pi * f * 0.45e-3)
    with pytest.raises(DataError, match="too few"):
        fit_vented(f[:5], free[:5])


@pytest.mark.parametrize("points", [400, 5000])  # 5000: resampled to 24 per octave first
def test_fitted_model_gives_back_the_impedance(points):
    ts = complete(WOOFER)
    f = np.geomspace(10, 20000, points)
    z = bx.impedance(ts, bx.make_box("vented", 0.040, 32.0, 7.0), f)
    r = fit_vented(f, z)
    assert r.vas is None and r.alpha == pytest.approx(1.5, rel=1e-3)
    model, box = r.model()
    assert isinstance(model, ThieleSmallSet)
    assert np.max(np.abs(bx.impedance(model, box, f) / z - 1)) < 1e-3  # noiseless: exact
    assert r.rms_error_pct < 0.1
