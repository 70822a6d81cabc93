"""Extending a driver's data beyond its file: a high-pass model at the low end, the edge slope at either end."""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.io.measure import extend_curve, read_curve


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
