"""Measurement files: every separator and malformed case; interpolation; minimum phase."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal as sig

from xo_fit.errors import DataError
from xo_fit.physics.minimum_phase import minimum_phase
from xo_fit.physics.curves import on_grid
from xo_fit.io.measure import read_curve


def write(tmp_path, text, name="m.txt"):
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.mark.parametrize("text", [
    "100 85.5 10\n200 86 -5\n",
    "100\t85.5\t10\n200\t86\t-5\n",
    "100,85.5,10\n200,86,-5\n",
    "100, 85.5, 10\n200, 86, -5\n",
    "100;85,5;10\n200;86;-5\n",
    "100 85,5 10\n200 86 -5\n",
    "100\t85,5\t10\r\n200\t86\t-5\r\n",
    '"Freq","SPL","Phase"\n* measured 2026\n\n100 85.5 10\n# comment\n200 86 -5\n',
    "\ufeff100 85.5 10\n200 86 -5\n",
    "1e2 8.55E1 1e1\n2e2 86 -5\n",
])
def test_separators_and_headers(tmp_path, text):
    c = read_curve(write(tmp_path, text), "response")
    np.testing.assert_allclose(c.frequency, [100, 200])
    np.testing.assert_allclose(c.magnitude, [85.5, 86])
    np.testing.assert_allclose(c.phase_deg, [10, -5])


def test_phase_is_optional_and_extension_does_not_matter(tmp_path):
    c = read_curve(write(tmp_path, "10 8\n20 8.5\n", "woofer impedance.measurement.dat"), "impedance")
    assert c.phase_deg is None
    np.testing.assert_allclose(c.magnitude, [8, 8.5])


def test_utf16_file(tmp_path):
    p = tmp_path / "u.txt"
    p.write_bytes("Freq SPL\n100 85\n200 86\n".encode("utf-16"))
    assert read_curve(p, "response").frequency.tolist() == [100, 200]


@pytest.mark.parametrize("text, line, message", [
    ("100 85\n100 86\n", 2, "rise strictly"),
    ("100 85\n90 86\n", 2, "rise strictly"),
    ("100 85 1\n200 86\n", 2, "columns where the lines above have 3"),
    ("100 85 1 2\n", 1, "expected 2 or 3 columns"),
    ("100\n", 1, "expected 2 or 3 columns"),
    ("header\n100 85\n200 x\n", 3, "'x' is not a number"),
    ("0 85\n100 86\n", 1, "above 0 Hz"),
    ("-5 85\n100 86\n", 1, "above 0 Hz"),
    ("100 85\n", 1, "at least two points"),
    ("100 85\n200 nan\n", 2, "finite"),
])
def test_malformed_lines(tmp_path, text, line, message):
    p = write(tmp_path, text)
    with pytest.raises(DataError, match=message) as e:
        read_curve(p, "response")
    assert e.value.path == str(p) and e.value.line == line
    assert str(e.value).startswith(f"{p}:{line}: ")


def test_impedance_must_be_positive(tmp_path):
    p = write(tmp_path, "100 8\n200 0\n")
    with pytest.raises(DataError, match="above 0 ohm") as e:
        read_curve(p, "impedance")
    assert e.value.line == 2


def test_missing_and_empty_files(tmp_path):
    with pytest.raises(DataError, match="not found"):
        read_curve(tmp_path / "none.txt", "response")
    with pytest.raises(DataError, match="no data lines"):
        read_curve(write(tmp_path, "just a header\n"), "response")


def test_grid_beyond_range_names_file_and_ranges(tmp_path):
    c = read_curve(write(tmp_path, "100 85 0\n10000 86 0\n"), "response")
    with pytest.raises(DataError, match=r"covers 100-10000 Hz but the job's grid spans 20-20000 Hz") as e:
        on_grid(c, np.geomspace(20, 20000, 10), "response")
    assert e.value.path.endswith("m.txt")


def test_interpolation_is_linear_in_db_and_phase_over_log_frequency(tmp_path):
    c = read_curve(write(tmp_path, "100 80 -100\n10000 100 110\n"), "response")  # unwraps to -250
    g = np.array([100.0, 1000.0, 10000.0])
    p, _ = on_grid(c, g, "response")
    np.testing.assert_allclose(20 * np.log10(np.abs(p) / 20e-6), [80, 90, 100], atol=1e-12)
    np.testing.assert_allclose(np.rad2deg(np.angle(p)), [-100, -175, -250 + 360], atol=1e-9)


def test_missing_phase_column_needs_minimum(tmp_path):
    c = read_curve(write(tmp_path, "100 85\n200 86\n"), "response")
    with pytest.raises(DataError, match='phase = "minimum"'):
        on_grid(c, np.array([100.0, 200.0]), "response")


def test_fast_phase_steps_are_warned_about(tmp_path):
    f = np.geomspace(100, 20000, 60)
    ph = -360 * f * 3e-3  # a 3 ms time of flight left in the file
    text = "\n".join(f"{a} 85 {b}" for a, b in zip(f, (ph + 180) % 360 - 180))
    c = read_curve(write(tmp_path, text), "response")
    _, warnings = on_grid(c, f, "response")
    assert warnings and "time-of-flight" in warnings[0]


def _bw2_highpass(f, fc=1000.0):
    b, a = sig.butter(2, 2 * np.pi * fc, "high", analog=True)
    return sig.freqs(b, a, 2 * np.pi * f)[1]


def test_minimum_phase_of_butterworth2_highpass():
    """docs/references.md [DER]: a BW2 high-pass at 1 kHz given as magnitude only (20 Hz-20 kHz) returns its analytic
    phase (90 deg at 1 kHz, 136.7 deg at 500 Hz) within 0.5 deg over 100 Hz-10 kHz. Analytic phase: scipy.signal."""
    f = np.geomspace(20, 20000, 200)
    h = _bw2_highpass(f)
    ph = np.rad2deg(minimum_phase(f, 20 * np.log10(np.abs(h)), f))
    band = (f >= 100) & (f <= 10000)
    np.testing.assert_allclose(ph[band], np.rad2deg(np.unwrap(np.angle(h)))[band], atol=0.5)
    at = np.rad2deg(minimum_phase(f, 20 * np.log10(np.abs(h)), np.array([500.0, 1000.0])))
    assert at[0] == pytest.approx(136.7, abs=0.1)
    assert at[1] == pytest.approx(90.0, abs=0.1)


def test_minimum_phase_of_higher_order_and_bandpass_responses():
    """Second path: scipy.signal's analog prototypes (all minimum phase) of a LR4 low-pass and a BW2 band-pass."""
    f = np.geomspace(20, 20000, 300)
    b, a = sig.butter(2, 2 * np.pi * 2000, "low", analog=True)
    b, a = np.polymul(b, b), np.polymul(a, a)
    b2, a2 = sig.butter(2, [2 * np.pi * 200, 2 * np.pi * 3000], "bandpass", analog=True)
    band = (f >= 100) & (f <= 10000)
    for bb, aa in ((b, a), (b2, a2)):
        h = sig.freqs(bb, aa, 2 * np.pi * f)[1]
        ph = np.rad2deg(minimum_phase(f, 20 * np.log10(np.abs(h)), f))
        want = np.rad2deg(np.unwrap(np.angle(h)))
        want += 360 * np.round((ph[band][0] - want[band][0]) / 360)
        np.testing.assert_allclose(ph[band], want[band], atol=0.5)


def test_minimum_phase_through_on_grid(tmp_path):
    f = np.geomspace(20, 20000, 200)
    h = _bw2_highpass(f)
    text = "\n".join(f"{a:.6f} {b:.6f}" for a, b in zip(f, 20 * np.log10(np.abs(h) / 20e-6)))
    c = read_curve(write(tmp_path, text), "response")
    g = np.geomspace(100, 10000, 50)
    p, _ = on_grid(c, g, "response", phase="minimum")
    np.testing.assert_allclose(np.rad2deg(np.angle(p)), np.rad2deg(np.angle(_bw2_highpass(g))), atol=0.5)


def test_a_khz_file_is_called_kHz(tmp_path):
    """A file written in kHz (0.02-20) once got the advice to narrow the grid; it says what is wrong."""
    p = tmp_path / "k.txt"
    p.write_text("".join(f"{f:g} 90 0\n" for f in np.geomspace(0.02, 20, 30)))
    with pytest.raises(DataError, match="look like kHz"):
        on_grid(read_curve(p, "response"), np.geomspace(20, 20000, 10), "response")


def test_swapped_columns_get_a_hint(tmp_path):
    """Impedance written as |Z|, f: the 'frequencies' fall while the second column rises: say so."""
    p = tmp_path / "z.txt"
    p.write_text("".join(f"{z:g} {f:g}\n" for f, z in zip(np.geomspace(20, 20000, 30), np.linspace(40, 6, 30))))
    with pytest.raises(DataError, match="swapped"):
        read_curve(p, "impedance")


def test_phase_steps_at_a_null_or_off_the_grid_are_not_warned_about(tmp_path):
    """A rigid piston's off-axis null turns the phase by 180 degrees (Kinsler et al.: 2 J1(x)/x changes sign at
    its zeros), and points outside the grid are not used: neither is a sign of an unremoved time of flight."""
    from scipy.special import j1

    f = np.geomspace(100, 40000, 400)
    x = 2 * np.pi * f / 343.0 * 0.1 * np.sin(np.deg2rad(60))  # ka sin(t), a = 10 cm, 60 degrees off axis
    d = 2 * j1(x) / x
    db = 90 + 20 * np.log10(np.abs(d) + 1e-9)
    ph = np.where(d < 0, 180.0, 0.0)
    p = tmp_path / "null.txt"
    p.write_text("".join(f"{a:g} {b:.4f} {c:g}\n" for a, b, c in zip(f, db, ph)))
    _, warnings = on_grid(read_curve(p, "response"), np.geomspace(200, 20000, 100), "response")
    assert warnings == []
    # a real step away from any null still warns
    ph2 = np.where(f > 5000, 170.0, 0.0)
    p.write_text("".join(f"{a:g} 90 {c:g}\n" for a, c in zip(f, ph2)))
    _, warnings = on_grid(read_curve(p, "response"), np.geomspace(200, 20000, 100), "response")
    assert len(warnings) == 1
    # ... but not when the step lies outside the grid
    _, warnings = on_grid(read_curve(p, "response"), np.geomspace(200, 4000, 100), "response")
    assert warnings == []


def test_a_european_drawer_reads(tmp_path):
    """Semicolons between fields and decimal commas in values, as measurement files in that style are read."""
    from xo_fit.io.inventory import read_inventory

    p = tmp_path / "drawer.csv"
    p.write_text("kind;value;count\nC;4,7uF;2\nR;2,2;1\nL;0,33mH;3\n")
    inv = read_inventory(p)
    assert inv.values("C") == [(4.7e-6, 2)] and inv.values("R") == [(2.2, 1)] and inv.values("L") == [(3.3e-4, 3)]
