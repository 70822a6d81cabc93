"""Extending a driver's data beyond its file: a high-pass model at the low end, the edge slope at either end."""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.physics.extension import extend_curve
from xo_fit.io.measure import read_curve


def _bw_hp_db(f, fc, order):
    """Butterworth high-pass magnitude, dB: |H|^2 = x^2N / (1 + x^2N), x = f / fc [DER, scipy.signal.butter]."""
    x2 = (f / fc) ** (2 * order)
    return 10 * np.log10(x2 / (1 + x2))


@pytest.mark.parametrize("order", [2, 4])
def test_a_highpass_cut_at_its_corner_is_continued(tmp_path, order):
    """A measured response that starts at the corner (100 Hz) of an order-N Butterworth high-pass, extended down to
    20 Hz by the fitted model, follows the analytic curve there (within 0.3 dB; -28/-56 dB at 20 Hz)."""
    f = np.geomspace(100, 20000, 300)
    p = tmp_path / "r.txt"
    p.write_text("".join(f"{x:.6f} {88 + _bw_hp_db(x, 100.0, order):.6f}\n" for x in f))
    grid = np.geomspace(20, 20000, 200)
    ext = extend_curve(read_curve(p, "response"), grid, "response", low=f"order{order}")
    assert ext.frequency[0] <= 20 and ext.phase_deg is None
    want = 88 + _bw_hp_db(ext.frequency, 100.0, order)
    below = ext.frequency < 100
    np.testing.assert_allclose(ext.magnitude[below], want[below], atol=0.3)
    # joined without a step at the file's first point
    i = int(np.argmax(~below))
    assert abs(ext.magnitude[i] - ext.magnitude[i - 1]) < 0.5


def test_slopes_continue_at_the_fitted_rate(tmp_path):
    """A response falling 12 dB per octave over its top octave, and rising 6 dB per octave at its bottom: the
    "slope" extension continues both rates to the grid's ends."""
    f = np.geomspace(200, 10000, 200)
    db = np.where(f > 5000, 90 - 12 * np.log2(f / 5000), 90.0) + np.where(f < 400, -6 * np.log2(400 / f), 0.0)
    p = tmp_path / "r.txt"
    p.write_text("".join(f"{x:.6f} {y:.6f}\n" for x, y in zip(f, db)))
    ext = extend_curve(read_curve(p, "response"), np.geomspace(50, 40000, 100), "response", "slope", "slope")
    top = ext.frequency > 10000
    np.testing.assert_allclose(ext.magnitude[top], db[-1] - 12 * np.log2(ext.frequency[top] / 10000), atol=0.05)
    bottom = ext.frequency < 200
    np.testing.assert_allclose(ext.magnitude[bottom], db[0] - 6 * np.log2(200 / ext.frequency[bottom]), atol=0.05)


def test_an_extended_response_runs_and_needs_minimum_phase(write_job, cli, tmp_path):
    from conftest import ladder_job

    f = np.geomspace(300, 25000, 150)
    curve = "".join(f"{x:.3f} {90 + _bw_hp_db(x, 400.0, 2):.4f} 0\n" for x in f)
    text, _ = ladder_job("LR2")
    ext = '[driver.tweeter]\nresponse = "t.txt"\nphase = "minimum"\nextend_low = "order2"\nextend_high = "slope"'
    job = write_job(text.replace('[driver.tweeter]\nresponse = 90', ext), {"t.txt": curve})
    code, out, err = cli("simulate", job, "--out", tmp_path / "s", "--no-plots")
    assert code == 0, err
    code, out, err = cli("check", job)
    assert code == 0, err
    assert "measured 300 Hz to 25 kHz" in out
    grid_lo = text.split("f_min = ")[1].split()[0]
    assert f"extended below to {grid_lo} Hz (order2)" in out
    bad = write_job(text.replace('[driver.tweeter]\nresponse = 90', ext.replace('phase = "minimum"\n', "")),
                    {"t.txt": curve}, name="bad.toml")
    code, _, err = cli("check", bad)
    assert code == 2 and 'must use phase = "minimum"' in err


# ----------------------------------------------------------------------------- near field + far field

def _hp2_db(f, fc, q):
    """|H| in dB of the second-order high-pass s^2 / (s^2 + s w0/Q + w0^2) (closed form, scipy.signal.freqs's)."""
    x = f / fc
    return 20 * np.log10(x**2 / np.sqrt((1 - x**2) ** 2 + (x / q) ** 2))


def test_a_near_field_is_level_matched_and_spliced_to_the_far_field(tmp_path):
    """A sealed woofer (2nd-order high-pass at 60 Hz, Q 0.7): the near field reads 22 dB hotter and its top is
    wrong (a made-up 6 dB/octave fall above 800 Hz), the far field is gated from 250 Hz. Spliced at 400 Hz,
    the joined curve is the far field's level everywhere: the near field's level matched (gain -22 dB to
    0.01 dB) and its shape below the splice kept, within 0.02 dB of the analytic curve below 300 Hz."""
    from scipy import signal

    from xo_fit.physics.extension import splice_curves

    fn = np.geomspace(10, 2000, 300)
    near = 88 + 22 + _hp2_db(fn, 60, 0.7) - np.where(fn > 800, 6 * np.log2(fn / 800), 0.0)
    ff = np.geomspace(250, 20000, 300)
    far = 88 + _hp2_db(ff, 60, 0.7)
    (tmp_path / "n.txt").write_text("".join(f"{a:.6f} {b:.6f}\n" for a, b in zip(fn, near)))
    (tmp_path / "f.txt").write_text("".join(f"{a:.6f} {b:.6f}\n" for a, b in zip(ff, far)))
    s = splice_curves(read_curve(tmp_path / "n.txt", "response"), read_curve(tmp_path / "f.txt", "response"), 400)
    assert s.gain_db == pytest.approx(-22.0, abs=0.01)
    f = s.curve.frequency
    # the reference: scipy.signal.freqs of the same analogue high-pass
    w0 = 2 * np.pi * 60
    _, h = signal.freqs([1, 0, 0], [1, w0 / 0.7, w0**2], 2 * np.pi * f)
    want = 88 + 20 * np.log10(np.abs(h))
    below, above = f < 300, f > 460
    np.testing.assert_allclose(s.curve.magnitude[below], want[below], atol=0.02)
    np.testing.assert_allclose(s.curve.magnitude[above], want[above], atol=0.02)
    assert f[0] == pytest.approx(10) and f[-1] == pytest.approx(20000) and s.curve.phase_deg is None
    # no step anywhere, the join included: point to point it moves as the analytic curve does
    assert np.max(np.abs(np.diff(s.curve.magnitude) - np.diff(want))) < 0.01


def test_a_spliced_response_in_a_job(write_job, cli, tmp_path):
    from conftest import ladder_job

    fn = np.geomspace(10, 2000, 200)
    ff = np.geomspace(250, 30000, 200)
    files = {"n.txt": "".join(f"{a:.4f} {110 + _hp2_db(a, 60, 0.7):.4f}\n" for a in fn),
             "f.txt": "".join(f"{a:.4f} {88 + _hp2_db(a, 60, 0.7):.4f}\n" for a in ff)}
    text, _ = ladder_job("LR2")
    spliced = ('[driver.woofer]\nresponse = { near = "n.txt", far = "f.txt", splice_hz = 400 }\n'
               'phase = "minimum"')
    assert "[driver.woofer]\nresponse = 90" in text
    job = write_job(text.replace("[driver.woofer]\nresponse = 90", spliced), files)
    code, out, err = cli("check", job)
    assert code == 0, err
    assert "spliced at 400 Hz" in out and "-22.00 dB" in out
    code, out, err = cli("simulate", job, "--out", tmp_path / "s", "--no-plots")
    assert code == 0, err
    # the phase must be derived; the splice must lie inside both files; the table takes only its keys
    for bad, message in ((spliced.replace('phase = "minimum"', ""), 'must use phase = "minimum"'),
                         (spliced.replace("splice_hz = 400", "splice_hz = 2000"), "near-field file covers"),
                         (spliced.replace("splice_hz = 400", "splice_hz = 400, gain = 1"), "unknown key 'gain'"),
                         (spliced.replace(", splice_hz = 400", ""), "splice_hz: missing")):
        job = write_job(text.replace("[driver.woofer]\nresponse = 90", bad), files, name="bad.toml")
        code, out, err = cli("check", job)
        assert code == 2 and message in err and len(err.strip().splitlines()) == 1, (message, err)
