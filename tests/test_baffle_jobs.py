"""The baffle's diffraction in whole jobs: [baffle], radius, baffle = true on a file and on a splice's near field.

Outside references: a source small against the wavelength radiates into the whole space (4 pi) below the baffle
step and into the half space in front of the baffle (2 pi) far above it, twice the pressure: 20 log10 2 =
6.02 dB [DER]; the splice's level shift is the job format's definition (the mean dB difference over the third
of an octave centred on the splice, over log frequency) [CP], recomputed here. The diffraction response itself
is xo_fit.physics.baffle's, held to its own sources in tests/test_baffle.py (closed forms, a boundary-element
solution); here it is used as the known factor that the job must apply, by hand, where the job format says.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from xo_fit.errors import JobError
from xo_fit.job.reader import load_job
from xo_fit.model.system import load_system
from xo_fit.physics.baffle import diffraction, rectangle
from xo_fit.physics.geometry import directions

EDGES = ((-0.15, 0.15), (-0.35, 0.12))  # an invented front, 300 x 470 mm
WOOFER = (0.03, -0.1)  # m, off the centre
FILES_F = np.geomspace(1.0, 40000.0, 700)


def text(db, phase=None):
    phase = np.zeros_like(db) if phase is None else phase
    return "".join(f"{float(x)!r} {float(m)!r} {float(p)!r}\n" for x, m, p in zip(FILES_F, db, phase))


def halfspace_job(tmp_path, *, response='{ file = "hs.txt", baffle = true }', angles=False, extra="", baffle=None,
                  driver_extra='radius = "50mm"'):
    """A one-driver job, the driver wired straight across a source of no resistance (its terminals see the
    source voltage, Kirchhoff's voltage law), its half-space file flat at 90 dB SPL."""
    (tmp_path / "hs.txt").write_text(text(np.full(FILES_F.size, 90.0)))
    for a in (30, 90, 180):
        (tmp_path / f"hs-h{a}.txt").write_text(text(np.full(FILES_F.size, 90.0 - a / 30)))
    baffle = baffle if baffle is not None else f"[baffle]\nx = {list(EDGES[0])}\ny = {list(EDGES[1])}\n"
    lines = ["[grid]", "f_min = 2", "f_max = 20000", "points = 240", extra, baffle,
             "[driver.w]", f"response = {response}", "impedance = 8",
             f"position = {{ x = {WOOFER[0]}, y = {WOOFER[1]} }}", driver_extra]
    if angles:
        lines += ["[driver.w.angles]", 'horizontal = "hs-h{angle}.txt"', "horizontal_angles = [30, 90, 180]"]
    lines += ['[[part]]\nname = "W"\ntype = "driver"\ndriver = "w"\nnodes = ["in", "0"]',
              '[[part]]\nname = "RL"\ntype = "R"\nnodes = ["in", "0"]\nvalue = 8']
    job = tmp_path / "job.toml"
    job.write_text("\n".join(lines) + "\n")
    return job


def levels(job):
    """dB SPL of the sum at each position (the axis alone for an on-axis job), by position; and the system."""
    system = load_system(load_job(job))
    sim = system.simulate(system.values(), angles=bool(system.positions))
    p = sim.angles[0] if system.positions else sim.total
    positions = system.positions or (("h", 0),)
    return {pos: 20 * np.log10(np.abs(x) / 20e-6) for pos, x in zip(positions, p)}, system


def power_mean_db(db, sel):
    return 10 * np.log10(np.mean(10 ** (db[sel] / 10)))


@pytest.mark.parametrize("angles", [False, True])
def test_a_half_space_curve_on_the_baffle_loses_6_02_db_below_the_step(tmp_path, angles):
    # [DER] far below the step the driver radiates into 4 pi, far above (in front) into the half space 2 pi in
    # front of the baffle: its level there is 20 log10 2 = 6.02 dB below its level far above, and the half-space
    # curve's own level is the one far above (smoothed over the edge ripple, 8-20 kHz, within 0.3 dB); off the
    # axis each angle file takes the same 6.02 dB below the step
    got, system = levels(halfspace_job(tmp_path, angles=angles))
    f = system.frequencies
    low, high = f < 4.0, f > 8000.0
    axis = got[("h", 0)]
    assert np.max(np.abs(axis[low] - (90.0 - 20 * math.log10(2)))) < 0.02
    assert abs(power_mean_db(axis, high) - 90.0) < 0.3
    if angles:
        for a in (30, 90, 180):
            assert np.max(np.abs(got[("h", a)][low] - (90.0 - a / 30 - 20 * math.log10(2)))) < 0.02, a
        assert abs(power_mean_db(got[("h", 30)], high) - (90.0 - 1.0)) < 0.3
        # [DER] behind the baffle only diffracted sound arrives: far above the step it lies well below the file's
        assert power_mean_db(got[("h", 180)], high) < 90.0 - 6.0 - 6.0


def test_the_half_space_curve_is_multiplied_by_the_complex_diffraction(tmp_path):
    # the job format: the on-axis curve times D on the axis, complex (D's phase is the computed pressure's);
    # each angle file (which holds the driver's own directivity) times D of a point source at its position
    job = halfspace_job(tmp_path, angles=True)
    system = load_system(load_job(job))
    f = system.frequencies
    p90 = 20e-6 * 10 ** (90 / 20)
    d = diffraction(f, WOOFER, directions(system.positions), rectangle(*EDGES))  # a point source
    assert np.allclose(system.drivers[0].response, p90 * d[0], rtol=1e-9)
    for i, pos in enumerate(system.positions[1:], start=1):
        assert np.allclose(system.drivers[0].angle_responses[i], p90 * 10 ** (-pos[1] / 600) * d[i], rtol=1e-9)
    # on-axis only, the radius (50 mm) enters D
    (tmp_path / "axis").mkdir()
    job = halfspace_job(tmp_path / "axis")
    system = load_system(load_job(job))
    d_piston = diffraction(f, WOOFER, directions([("h", 0)]), rectangle(*EDGES), radius=0.05)[0]
    assert np.allclose(system.drivers[0].response, p90 * d_piston, rtol=1e-9)
    assert np.max(np.abs(d_piston - d[0])) > 0.05  # and it is not the point source's


def spliced_job(tmp_path, baffle=True, distance=None, table=True):
    """A near field (a 2nd-order roll-off at 40 Hz, 104 dB) and gated far fields on the axis, at h60 and at h150
    (invented), spliced at 400 Hz, the near field marked baffle = true."""
    near = 104.0 - 10 * np.log10(1 + (40.0 / FILES_F) ** 4)

    def far(drop):
        return 88.0 - drop - 3 * (FILES_F < 250) * (1 + np.sin(FILES_F / 20)) - 10 * np.log10(1 + (FILES_F / 9e3) ** 2)

    files = {"near.txt": near, "far-h0.txt": far(0.0), "far-h60.txt": far(2.0), "far-h150.txt": far(9.0)}
    for rel, db in files.items():
        (tmp_path / rel).write_text("".join(f"{float(x)!r} {float(m)!r}\n" for x, m in zip(FILES_F, db)))
    flag = ", baffle = true" if baffle else ""
    job = tmp_path / "job.toml"
    job.write_text("\n".join([
        "[grid]", "f_min = 5", "f_max = 16000", "points = 220",
        "[acoustics]", f"distance = {distance}" if distance else "",
        f"[baffle]\nx = {list(EDGES[0])}\ny = {list(EDGES[1])}\ndepth = \"300mm\"" if table else "",
        "[driver.w]", f'response = {{ near = "near.txt", far = "far-h0.txt", splice_hz = 400{flag} }}',
        'phase = "minimum"', "impedance = 8", f"position = {{ x = {WOOFER[0]}, y = {WOOFER[1]} }}",
        'radius = "60mm"' if table else "",
        "[driver.w.angles]", 'horizontal = "far-h{angle}.txt"', "horizontal_angles = [60, 150]",
        '[[part]]\nname = "W"\ntype = "driver"\ndriver = "w"\nnodes = ["in", "0"]']) + "\n")
    return job, near, far


@pytest.mark.parametrize("distance", [None, 2.5])
def test_a_spliced_near_field_takes_the_diffraction_at_each_position_before_the_splice(tmp_path, distance):
    # the job format: the near field times D at each position (the piston's directivity in D), spliced with that
    # position's far field at the axis's level shift [CP]; far fields as measured. By hand: the near field's dB
    # plus 20 log10 |D| at its own frequencies, the shift recomputed over the third of an octave around 400 Hz
    job, near, far = spliced_job(tmp_path, distance=distance)
    system = load_system(load_job(job))
    d = system.drivers[0]
    dist = math.inf if distance is None else distance
    dn = diffraction(FILES_F, WOOFER, directions(system.positions), rectangle(*EDGES), radius=0.06,
                     distance=dist)
    near_d = near + 20 * np.log10(np.abs(dn))  # (A, N)
    u = np.linspace(math.log(400) - math.log(2) / 6, math.log(400) + math.log(2) / 6, 33)
    uf = np.log(FILES_F)
    gain = np.mean(np.interp(u, uf, far(0.0)) - np.interp(u, uf, near_d[0]))
    assert d.splice.gain_db == pytest.approx(gain, abs=1e-9)
    g = system.frequencies
    below = g < 400 * 2 ** (-1 / 6) * 0.999
    above = g > 400 * 2 ** (1 / 6) * 1.001
    for i, (pos, drop) in enumerate(zip(system.positions, (0.0, 2.0, 9.0))):
        level = 20 * np.log10(np.abs(d.angle_responses[i]) / 20e-6)
        want = np.interp(np.log(g[below]), uf, near_d[i]) + gain
        assert np.max(np.abs(level[below] - want)) < 0.01, pos
        assert np.max(np.abs(level[above] - np.interp(np.log(g[above]), uf, far(drop)))) < 0.01, pos
    # [DER] in the far field the near field lies 6.02 dB lower far below the step than without the baffle flag
    # (4 pi vs 2 pi), at every position (at a finite distance the baffle's static dipole layer still adds a
    # little there: not a limit to test)
    if distance is not None:
        return
    (tmp_path / "plain").mkdir()
    plain = load_system(load_job(spliced_job(tmp_path / "plain", baffle=False, distance=distance)[0])).drivers[0]
    lowest = g < 6.0
    for i in range(len(system.positions)):
        diff = (20 * np.log10(np.abs(d.angle_responses[i][lowest]) / np.abs(plain.angle_responses[i][lowest]))
                - (d.splice.gain_db - plain.splice.gain_db))
        assert np.max(np.abs(diff + 20 * math.log10(2))) < 0.02, system.positions[i]


def test_xo_fit_baffle_writes_each_drivers_diffraction(tmp_path, cli):
    # baffle.csv: frequency_hz, <driver>_db and _deg on the axis, then <driver>_<pos>_db/_deg at the job's
    # angles: the module's D for the driver's position, radius and the job's distance, at 6 significant digits
    job, _, _ = spliced_job(tmp_path, distance=2.5)
    code, out, err = cli("baffle", job, "--out", tmp_path / "out")
    assert code == 0, err
    assert "applied to its near field at every position before the splice" in out
    rows = list(csv.reader((tmp_path / "out" / "baffle.csv").open()))
    head, data = rows[0], np.array(rows[1:], dtype=float)
    assert head == ["frequency_hz", "w_db", "w_deg", "w_h60_db", "w_h60_deg", "w_h150_db", "w_h150_deg"]
    f = load_job(job).grid.frequencies
    assert np.allclose(data[:, 0], f, rtol=1e-5)
    d = diffraction(f, WOOFER, directions([("h", 0), ("h", 60), ("h", 150)]), rectangle(*EDGES),
                    radius=0.06, distance=2.5)
    for i, tag in enumerate(("w", "w_h60", "w_h150")):
        assert np.allclose(data[:, head.index(f"{tag}_db")], 20 * np.log10(np.abs(d[i])), atol=1e-4, rtol=1e-5)
        deg = np.degrees(np.angle(d[i]))
        wrapped = (data[:, head.index(f"{tag}_deg")] - deg + 180) % 360 - 180
        assert np.max(np.abs(wrapped)) < 1e-3
    assert (tmp_path / "out" / "baffle.png").stat().st_size > 10000
    # a job without [baffle] has nothing to show: one line, exit 2
    job.write_text(job.read_text().replace(", baffle = true", "").replace("[baffle]", "[ignored]"))
    code, _, err = cli("baffle", job, "--out", tmp_path / "out2")
    assert code == 2 and "unknown key" in err


def test_check_says_which_curves_take_the_diffraction(tmp_path, cli):
    job, _, _ = spliced_job(tmp_path)
    code, out, err = cli("check", job)
    assert code == 0, err
    assert "baffle   x -150 mm to 150 mm, y -350 mm to 120 mm" in out
    assert "depth 300 mm (not used: the model takes a thin baffle)" in out
    assert "w          diffraction applied to its near field at every position before the splice" in out


def test_a_job_without_baffle_true_is_unchanged_by_a_baffle_table(tmp_path):
    # the diffraction multiplies only what baffle = true marks: the same splice without the flag, with or
    # without [baffle], gives the same data bit for bit
    with_table = load_system(load_job(spliced_job(tmp_path, baffle=False)[0])).drivers[0]
    (tmp_path / "none").mkdir()
    without = load_system(load_job(spliced_job(tmp_path / "none", baffle=False, table=False)[0])).drivers[0]
    assert np.array_equal(with_table.angle_responses, without.angle_responses)
    assert with_table.baffle is None


@pytest.mark.parametrize("baffle, response, extra, message", [
    ("[baffle]\nx = [-0.1]\ny = [-0.3, 0.1]\n", None, "", r"\[baffle\] x: expected two edges"),
    ("[baffle]\nx = [0.1, -0.1]\ny = [-0.3, 0.1]\n", None, "", r"\[baffle\] x: expected \[left, right\] with"),
    ("[baffle]\nx = [-0.1, 0.1]\n", None, "", r"\[baffle\] y: missing"),
    ('[baffle]\nx = ["-10cm", 0.1]\ny = [-0.3, 0.1]\n', None, "", r"\[baffle\] x"),
    ("[baffle]\nx = [-0.1, 0.1]\ny = [-0.3, 0.1]\nwidth = 0.2\n", None, "", "unknown key 'width'"),
    ("[baffle]\nx = [-0.1, 0.1]\ny = [-0.05, 0.1]\n", None, "", r"driver 'w' at \(30, -100\) mm lies outside"),
    ("", None, "", r"\[driver.w.response\] baffle: baffle = true needs the cabinet's front"),
    (None, '{ file = "hs.txt", baffle = "yes" }', "", "expected true or false"),
    (None, '{ file = "hs.txt", near = "hs.txt", baffle = true }', "", "give file .* not both"),
    (None, "{ baffle = true }", "", "expected file = PATH"),
    (None, None, "[acoustics]\ndistance = 0.3", r"\[acoustics\] distance: 0.3 m does not lie beyond the baffle's"),
])
def test_bad_baffle_input_is_a_job_error_naming_table_and_key(tmp_path, baffle, response, extra, message):
    kw = {k: v for k, v in (("baffle", baffle), ("response", response)) if v is not None}
    with pytest.raises(JobError, match=message):
        load_job(halfspace_job(tmp_path, extra=extra, **kw))


def test_doubtful_radii_are_warnings(tmp_path):
    assert any("radius = 66 is 66000 mm" in w for w in
               load_job(halfspace_job(tmp_path, driver_extra="radius = 66")).warnings)
    assert any("reaches past the baffle's nearest edge" in w for w in
               load_job(halfspace_job(tmp_path, driver_extra='radius = "200mm"')).warnings)
    assert any("radius is used only with a [baffle] table" in w for w in
               load_job(halfspace_job(tmp_path, response='"hs.txt"', baffle="")).warnings)
