"""Driver models fitted to measured impedances (`xo-fit driver`).

The synthetic measurements are built here from the electrical equivalent circuit, element by element, not
from xo_fit's own formula: Re in series with Le and the motional Res || Lces || Cmes, where Res = Re Qms/Qes,
Lces = Res / (Qms ws), Cmes = Qms / (Res ws) (R. H. Small, "Direct-radiator loudspeaker system analysis",
JAES 20(5), 1972); the lossy voice coil adds L2 || R2 in series (W. M. Leach, JAES 50(6), 2002;
J. R. Wright, JAES 38(10), 1990). The fit must give back the elements it was made from.
"""

from __future__ import annotations

import numpy as np
import pytest

from xo_fit.demo import woofer_response
from xo_fit.errors import DataError
from xo_fit.physics.impedance_fit import fit_impedance
from xo_fit.physics.thiele_small import small_signal_impedance
from xo_fit.job.reader import load_job
from xo_fit.io.measure import read_curve


def circuit(f, re, le, fs, qms, qes, l2=0.0, r2=0.0):
    """Impedance (ohm) of the equivalent circuit: series Re, Le, (L2 || R2), then Res || Lces || Cmes."""
    w = 2 * np.pi * np.asarray(f)
    ws = 2 * np.pi * fs
    res = re * qms / qes
    lces, cmes = res / (qms * ws), qms / (res * ws)
    z = re + 1j * w * le + 1.0 / (1.0 / res + 1.0 / (1j * w * lces) + 1j * w * cmes)
    if l2:
        z = z + 1.0 / (1.0 / r2 + 1.0 / (1j * w * l2))
    return z


def write_file(path, f, z, phase=True, noise=0.0, seed=0):
    """An impedance file (Hz, ohm, deg) of ``z``, with complex noise of relative rms ``noise``."""
    rng = np.random.default_rng(seed)
    z = z * (1 + noise * (rng.standard_normal(f.size) + 1j * rng.standard_normal(f.size)) / np.sqrt(2))
    rows = [f"{a:.6g}\t{abs(b):.6g}" + (f"\t{np.degrees(np.angle(b)):.5g}" if phase else "") for a, b in zip(f, z)]
    path.write_text("Freq\tOhm" + ("\tDeg" if phase else "") + "\n" + "\n".join(rows) + "\n")
    return path


WOOFER = dict(re=5.8, le=0.45e-3, fs=41.0, qms=4.2, qes=0.38)
F = np.geomspace(10, 20000, 400)
FR = np.geomspace(20, 20000, 300)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_small_model_parameters_come_back_from_a_noisy_measurement(tmp_path, seed):
    """1 % complex noise: Re and fs within 0.5 %, Qms, Qes and Le within 3 % (tolerances of this project)."""
    path = write_file(tmp_path / "w.txt", F, circuit(F, **WOOFER), noise=0.01, seed=seed)
    fit = fit_impedance(read_curve(path, "impedance"), "ts")
    p = fit.params
    assert p.re == pytest.approx(WOOFER["re"], rel=0.005)
    assert p.fs == pytest.approx(WOOFER["fs"], rel=0.005)
    for k in ("qms", "qes", "le"):
        assert getattr(p, k) == pytest.approx(WOOFER[k], rel=0.03), k
    assert 0.5 < fit.rms_error_pct < 1.5  # the noise itself, about 1 %
    assert fit.qts == pytest.approx(4.2 * 0.38 / 4.58, rel=0.03)
    assert fit.used_phase and not fit.warnings


def test_magnitude_alone_still_gives_the_parameters(tmp_path):
    """A file without phase is fitted on |Z|: noise-free, every parameter within 1 %."""
    path = write_file(tmp_path / "w.txt", F, circuit(F, **WOOFER), phase=False)
    fit = fit_impedance(read_curve(path, "impedance"), "ts")
    assert not fit.used_phase
    for k, v in WOOFER.items():
        assert getattr(fit.params, k) == pytest.approx(v, rel=0.01), k


def test_the_lossy_coil_is_recovered_and_the_plain_model_is_warned_about(tmp_path):
    """Semi-inductance data (Le 0.3 mH, then 0.8 mH with 6 ohm across it; Leach 2002, Wright 1990): ts-lossy
    gives back every element within 2 %; the plain model cannot follow it and says so."""
    lossy = dict(WOOFER, le=0.3e-3, l2=0.8e-3, r2=6.0)
    path = write_file(tmp_path / "w.txt", F, circuit(F, **lossy), noise=0.002)
    curve = read_curve(path, "impedance")
    fit = fit_impedance(curve, "ts-lossy")
    for k, v in lossy.items():
        assert getattr(fit.params, k) == pytest.approx(v, rel=0.02), k
    assert fit.rms_error_pct < 0.5
    plain = fit_impedance(curve, "ts")
    assert plain.rms_error_pct > 10 and any("try --model ts-lossy" in w for w in plain.warnings)


def test_the_command_prints_parameters_error_and_toml_that_loads_back(tmp_path, cli, write_job):
    lossy = dict(WOOFER, le=0.3e-3, l2=0.8e-3, r2=6.0)
    path = write_file(tmp_path / "bass.txt", F, circuit(F, **lossy))
    code, out, err = cli("driver", path, "--model", "ts-lossy")
    assert code == 0, err
    for text in ("Re ", "Qts", "L2", "fit error: 0.0", "% rms of |Z|", "[driver.bass.impedance]"):
        assert text in out, text
    toml = out.split("[driver.bass.impedance]", 1)[1]
    job = write_job(f"""
[grid]
f_min = 20
f_max = 20000
points = 50
[driver.bass]
response = 88
[driver.bass.impedance]
{toml}
[[part]]
name = "D"
type = "driver"
driver = "bass"
nodes = ["in", "0"]
""")
    ts = load_job(job).drivers[0].impedance
    f = np.geomspace(20, 20000, 50)
    # printed to 4 significant figures: the pasted model is the measurement to well under 0.5 %
    np.testing.assert_allclose(small_signal_impedance(ts, f), circuit(f, **lossy), rtol=5e-3)


def test_a_vented_box_is_refused_with_the_reason(tmp_path):
    """Two impedance peaks (a vented box): Small's closed-box model cannot fit it, and the error says why. The box
    is its electrical analogue (A. N. Thiele, "Loudspeakers in vented boxes", JAES 1971; R. H. Small, JAES 1973):
    box compliance Lceb = Lces / alpha in series with port mass Cmep = 1 / (wb^2 Lceb), across the motional
    branch; alpha = 1.5, fb = fs."""
    d = WOOFER
    w = 2 * np.pi * F
    ws = 2 * np.pi * d["fs"]
    res = d["re"] * d["qms"] / d["qes"]
    lces, cmes = res / (d["qms"] * ws), d["qms"] / (res * ws)
    lceb = lces / 1.5
    cmep = 1 / (ws**2 * lceb)
    y = 1 / res + 1 / (1j * w * lces) + 1j * w * cmes + 1 / (1j * w * lceb + 1 / (1j * w * cmep))
    z = d["re"] + 1j * w * d["le"] + 1 / y
    with pytest.raises(DataError, match="no ts model fits .* more peaks than one .* vented") as e:
        fit_impedance(read_curve(write_file(tmp_path / "v.txt", F, z), "impedance"), "ts")
    assert "v.txt" in str(e.value)


@pytest.mark.parametrize("content, message", [
    ("".join(f"{f:g} 8.0 0\n" for f in np.geomspace(20, 20000, 50)), "no resonance peak"),
    ("20 8\n30 8\n", "too few to fit"),
    ("20 8 0\n30 x 0\n", ":2:"),
    ("20 8\n10 8\n", ":2:"),
    # a response file (dB SPL) given as an impedance: its breakup peak is no driver resonance
    ("".join(f"{f:g} {20 * np.log10(abs(p) / 20e-6):.3f} 0\n" for f, p in zip(FR, woofer_response(FR))),
     "no ts model fits"),
])
def test_bad_files_get_one_line_errors(tmp_path, cli, content, message):
    (tmp_path / "z.txt").write_text(content)
    code, out, err = cli("driver", tmp_path / "z.txt")
    assert code == 2 and "Traceback" not in err
    assert message in err and "z.txt" in err and len(err.strip().splitlines()) == 1, err


def test_bad_options_and_missing_files(tmp_path, cli):
    code, _, err = cli("driver", tmp_path / "none.txt")
    assert code == 2 and "none.txt" in err
    path = write_file(tmp_path / "w.txt", F, circuit(F, **WOOFER))
    code, _, err = cli("driver", path, "--model", "tss")
    assert code == 2 and "--model" in err and "ts-lossy" in err
    code, _, err = cli("driver", path, "--name", "a]b")
    assert code == 2 and "--name" in err


def test_lossy_coil_keys_in_a_job(write_job):
    """l2 and r2 go together; the model's impedance adds L2 || R2 (the same circuit as above)."""
    base = """
[grid]
f_min = 20
f_max = 20000
points = 40
[driver.w]
response = 88
impedance = {{ re = 5.8, le = "0.3mH", fs = 41, qms = 4.2, qes = 0.38{extra} }}
[[part]]
name = "D"
type = "driver"
driver = "w"
nodes = ["in", "0"]
"""
    from xo_fit.errors import JobError

    ts = load_job(write_job(base.format(extra=', l2 = "0.8mH", r2 = 6'))).drivers[0].impedance
    f = np.geomspace(20, 20000, 40)
    np.testing.assert_allclose(small_signal_impedance(ts, f), circuit(f, **dict(WOOFER, le=0.3e-3, l2=0.8e-3, r2=6.0)),
                               rtol=1e-12)
    with pytest.raises(JobError, match="l2 .* and r2"):
        load_job(write_job(base.format(extra=', l2 = "0.8mH"')))
