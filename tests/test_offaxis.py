"""Off-axis responses and the ANSI/CTA-2034-A curves.

Outside references: the sound-power weights, the listening window and the early reflections' groups of
ANSI/CTA-2034-A (2015), typed in below from the standard; the rigid circular piston in an infinite baffle (Kinsler, Frey, Coppens, Sanders,
*Fundamentals of Acoustics*, 4th ed., ch. 7; L. Beranek, *Acoustics*): far-field directivity 2 J1(x)/x with
x = ka sin t, and on-axis directivity factor Q = (ka)^2 / (1 - J1(2ka)/(ka)), so DI = 10 log10 Q tends to
3.01 dB (a half-space radiator) at small ka; an omnidirectional source has DI 0.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
from scipy.special import j1

from xo_fit.model.acoustics import CTA_POSITIONS, curve_weights, directivity
from xo_fit.job.reader import load_job
from xo_fit.job.model import position
from xo_fit.model.system import load_system

from conftest import flat_curve


#: The standard's sound-power weight of a position by its polar angle from the axis, degrees (ANSI/CTA-2034-A,
#: its table of sound-power weights; 100..180 mirror 80..0), typed in from the table [SRC].
CTA_TABLE = {0: 0.000604486, 10: 0.004730189, 20: 0.008955027, 30: 0.012387354, 40: 0.014989611,
             50: 0.016868154, 60: 0.018165962, 70: 0.019006744, 80: 0.019477787, 90: 0.019629373}
#: The listening window and the early reflections' groups as ANSI/CTA-2034-A lists them [SRC]; the rear wall is
#: the whole rear half of the horizontal orbit (the standard's text is ambiguous; its author's public reading).
CTA_LISTENING_WINDOW = ["h0", "h10", "h-10", "h20", "h-20", "h30", "h-30", "v10", "v-10"]
CTA_GROUPS = {
    "floor": ["v-20", "v-30", "v-40"],
    "ceiling": ["v40", "v50", "v60"],
    "front_wall": ["h0", "h10", "h-10", "h20", "h-20", "h30", "h-30"],
    "side_walls": ["h40", "h-40", "h50", "h-50", "h60", "h-60", "h70", "h-70", "h80", "h-80"],
    "rear_wall": ["h90", "h-90", "h100", "h-100", "h110", "h-110", "h120", "h-120", "h130", "h-130", "h140",
                  "h-140", "h150", "h-150", "h160", "h-160", "h170", "h-170", "h180"],
}


def _pos(name):
    return (name[0], int(name[1:]))


def test_the_seventy_positions_carry_the_standards_sound_power_weights():
    """The sound power the package sums (curve_weights over the 70 positions) weighs each position by the
    standard's table divided by the table's total over the 70 positions [SRC: ANSI/CTA-2034-A]."""
    assert len(CTA_POSITIONS) == len(set(CTA_POSITIONS)) == 70
    assert set(CTA_POSITIONS) == ({("h", a) for a in range(-170, 181, 10)}
                                  | {("v", a) for a in range(-170, 171, 10) if a != 0})
    sp = curve_weights(CTA_POSITIONS)["sound_power"]

    def table(t):  # mirrored about 90 degrees [SRC]
        return CTA_TABLE[min(t, 180 - t)]

    # the axis and the rear once, four points at every other polar angle [DER]
    total = 2 * CTA_TABLE[0] + 4 * sum(table(t) for t in range(10, 171, 10))
    assert total == pytest.approx(0.996373088, abs=1e-9)
    for i, (_, a) in enumerate(CTA_POSITIONS):
        assert sp[i] == pytest.approx(table(abs(a)) / total, rel=1e-12), CTA_POSITIONS[i]
    assert sp.sum() == pytest.approx(1.0, abs=1e-12)
    assert sp[CTA_POSITIONS.index(("h", 0))] == pytest.approx(0.00060669, abs=5e-9)  # on axis [DER]


def _pressures(fn):
    """|p|^2 (1, 70, 1) at the 70 positions from fn(polar angle from the axis, rad)."""
    return np.array([[[abs(fn(math.radians(abs(a)))) ** 2] for _, a in CTA_POSITIONS]])


def test_an_omnidirectional_source_has_every_curve_equal():
    p2 = _pressures(lambda t: 1.0)
    curves = directivity(p2, curve_weights(CTA_POSITIONS))
    for name in ("on_axis", "listening_window", "early_reflections", "sound_power", "estimated_in_room"):
        assert curves[name][0, 0] == pytest.approx(1.0, rel=1e-12), name


@pytest.mark.parametrize("ka", [0.05, 0.5, 1.0, 1.5, 2.0])
def test_the_sound_power_of_a_baffled_piston_gives_its_textbook_directivity_index(ka):
    """On-axis level over sound power of a piston in an infinite baffle (silent behind it) against
    Q = (ka)^2 / (1 - J1(2ka)/ka) (Kinsler et al.) [SRC], the 90 degree points measured as they are (the
    piston's own value there). The standard's 10 degree sampling and weights put the DI under the textbook's:
    measured 0.33 dB at small ka (2.68 dB against 3.01 dB) growing to 0.355 dB at ka = 2; the tolerance holds
    that measured figure [MEM], and the small-ka figure is checked on its own."""

    def piston(t):
        if t > math.pi / 2 + 1e-12:
            return 0.0
        x = ka * math.sin(t)
        return 1.0 if x < 1e-9 else 2 * j1(x) / x

    sp = directivity(_pressures(piston), curve_weights(CTA_POSITIONS))["sound_power"][0, 0]
    q = ka**2 / (1 - j1(2 * ka) / ka)
    di = 10 * math.log10(1.0 / sp)
    assert di == pytest.approx(10 * math.log10(q), abs=0.36)
    assert di < 10 * math.log10(q)  # the 10 degree sampling misses the lobe's shoulders
    if ka < 0.1:  # nearly a half-space radiator: 1 in front up to 90 deg, 0 behind; summed from the table [DER]
        front = CTA_TABLE[0] + 4 * sum(CTA_TABLE[t] for t in range(10, 91, 10))
        total = 2 * CTA_TABLE[0] + 8 * sum(CTA_TABLE[t] for t in range(10, 81, 10)) + 4 * CTA_TABLE[90]
        assert di == pytest.approx(10 * math.log10(total / front), abs=0.002)  # 2.68 dB, not 3.01


def test_listening_window_and_early_reflections_are_averages_of_their_groups():
    """A source with a different level at every position: the listening window is the plain mean of its nine
    points; the early reflections the mean of the five group means (each group averaged first); the in-room
    response 0.12 LW + 0.44 ER + 0.44 SP. Groups and mix as ANSI/CTA-2034-A gives them (literals above) [SRC]."""
    positions = CTA_POSITIONS
    rng = np.random.default_rng(3)
    p2 = rng.uniform(0.1, 2.0, (1, len(positions), 1))
    curves = directivity(p2, curve_weights(positions))
    value = {p: p2[0, i, 0] for i, p in enumerate(positions)}
    assert curves["listening_window"][0, 0] == pytest.approx(np.mean([value[_pos(p)] for p in CTA_LISTENING_WINDOW]))
    groups = [np.mean([value[_pos(p)] for p in g]) for g in CTA_GROUPS.values()]
    assert curves["early_reflections"][0, 0] == pytest.approx(np.mean(groups))
    lw, er, sp = (curves[k][0, 0] for k in ("listening_window", "early_reflections", "sound_power"))
    assert curves["estimated_in_room"][0, 0] == pytest.approx(0.12 * lw + 0.44 * er + 0.44 * sp)


def test_positions_name_the_axis_and_the_rear_once():
    assert position("v", 0) == ("h", 0) and position("v", 180) == ("h", 180) == position("h", -180)
    assert position("v", -30) == ("v", -30) and position("h", 190) == ("h", -170)


# ----------------------------------------------------------------------------- jobs with angles

JOB = """
[grid]
f_min = 100
f_max = 10000
points = 40
[driver.w]
response = "w0.txt"
impedance = 8
[driver.w.angles]
horizontal = "w-h{{angle}}.txt"
horizontal_angles = {angles}
mirror = {mirror}
[driver.t]
response = "t0.txt"
impedance = 8
{t_angles}
[[part]]
name = "W"
type = "driver"
driver = "w"
nodes = ["in", "0"]
[[part]]
name = "R1"
type = "R"
nodes = ["in", "t1"]
value = 2
[[part]]
name = "T"
type = "driver"
driver = "t"
nodes = ["t1", "0"]
[target]
reference = "{reference}"
"""


def _files(angles, level=lambda a: 90.0):
    files = {"w0.txt": flat_curve(level=90.0), "t0.txt": flat_curve(level=90.0)}
    for a in angles:
        files[f"w-h{a}.txt"] = flat_curve(level=level(a))
        files[f"t-h{a}.txt"] = flat_curve(level=level(a))
    return files


def _job(write_job, angles=(10, 20, 30), mirror="true", t_angles=None, reference="on_axis", files=None):
    t = t_angles if t_angles is not None else (f'[driver.t.angles]\nhorizontal = "t-h{{angle}}.txt"\n'
                                               f"horizontal_angles = {list(angles)}\nmirror = {mirror}")
    return write_job(JOB.format(angles=list(angles), mirror=mirror, t_angles=t, reference=reference),
                     files if files is not None else _files(angles))


def test_an_off_axis_job_sums_at_every_angle(write_job):
    """Two in-phase drivers, each 6 dB down at 30 deg: the sum at h30 (and at h-30 by mirror) is 6.02 dB
    below the axis, as two equal coherent sources are (20 log10 of the amplitude ratio)."""
    job = _job(write_job, files=_files((10, 20, 30), level=lambda a: 90.0 - a / 5))
    s = load_system(load_job(job))
    assert s.positions[0] == ("h", 0) and set(s.positions) == {("h", a) for a in (0, 10, 20, 30, -10, -20, -30)}
    sim = s.simulate(s.values(), angles=True)
    lv = 20 * np.log10(np.abs(sim.angles[0]))
    i30, im30 = s.positions.index(("h", 30)), s.positions.index(("h", -30))
    np.testing.assert_allclose(lv[i30] - lv[0], -6.0, atol=1e-9)
    np.testing.assert_allclose(lv[im30], lv[i30], atol=1e-12)


@pytest.mark.parametrize("t_angles, message", [
    ("", "has no [driver.t.angles]"),
    ('[driver.t.angles]\nhorizontal = "t-h{angle}.txt"\nhorizontal_angles = [10, 20]\nmirror = true', "other angles"),
    ('[driver.t.angles]\nhorizontal = "t-h.txt"\nhorizontal_angles = [10, 20, 30]', "{angle}"),
    ('[driver.t.angles]\nhorizontal = "t-h{angle}.txt"\nhorizontal_angles = [10, 370]', "whole degrees"),
    ('[driver.t.angles]\nhorizontal = "t-h{angle}.txt"\nhorizontal_angles = [10, 20, 30, 20]', "same position"),
    ('[driver.t.angles]\nhorizontal = "t-h{angle}.txt"', "together"),
    ('[driver.t.angles]\nhorizontal = "t-h{angle}.txt"\nhorizontal_angles = [10, 20, 30]\nmirror = true\nfoo = 1',
     "unknown key 'foo'"),
])
def test_bad_angle_tables_are_one_line_errors(write_job, cli, t_angles, message):
    job = _job(write_job, t_angles=t_angles)
    code, _, err = cli("check", job)
    assert code == 2 and message in err and len(err.strip().splitlines()) == 1, err


@pytest.mark.parametrize("rear_db, warned", [(81.05, False), (81.3, True)])
def test_minus_180_and_180_are_one_position_read_from_the_first_file(write_job, rear_db, warned):
    """A list holding both -180 and 180 (as the job format's own example does) is accepted: one position, the
    rear, whose first listed file is used once [SRC: the job format, corrections to version 2]; a second file
    differing by more than 0.1 dB somewhere gets a one-line warning naming both files."""
    angles = (10, 20, 30, 180, -180)
    job = _job(write_job, angles=angles,
               files=_files(angles, level=lambda a: rear_db if a == -180 else 90.0 - abs(a) / 20))
    s = load_system(load_job(job))
    assert s.positions.count(("h", 180)) == 1 and ("h", -180) not in s.positions
    rear = s.positions.index(("h", 180))
    for d in s.drivers:  # the h180 file (81 dB), listed first, not the h-180 one
        np.testing.assert_allclose(20 * np.log10(np.abs(d.angle_responses[rear]) / 20e-6), 81.0, atol=1e-3)
    twins = [w for w in s.warnings if "same position" in w]
    assert len(twins) == (2 if warned else 0), s.warnings
    if warned:
        assert "h-180" in twins[0] and "w-h-180.txt" in twins[0] and "w-h180.txt" in twins[0]
        assert "0.30 dB" in twins[0] and "\n" not in twins[0]  # 81.3 against 81 dB


def test_a_bad_angle_file_names_the_driver_the_angle_and_the_file(write_job, cli, tmp_path):
    files = _files((10, 20, 30))
    files["t-h20.txt"] = "100 90 0\n200 nonsense 0\n"
    code, _, err = cli("check", _job(write_job, files=files))
    assert code == 2 and "t-h20.txt:2" in err and "[driver.t.angles] h20" in err, err
    files = _files((10, 20, 30))
    files["w-h10.txt"] = flat_curve(f_lo=200.0)  # the grid starts at 100 Hz
    code, _, err = cli("check", _job(write_job, files=files))
    assert code == 2 and "w-h10.txt" in err and "[driver.w.angles] h10" in err and "grid spans" in err, err
    job = _job(write_job)
    (tmp_path / "w-h30.txt").unlink()
    code, _, err = cli("check", job)
    assert code == 2 and "w-h30.txt" in err and "h30" in err, err


def test_a_listening_window_reference_needs_its_positions(write_job, cli):
    code, _, err = cli("check", _job(write_job, mirror="false", reference="listening_window"))
    assert code == 2 and "h-10" in err and "v10" in err and "mirror = true" in err, err
    text = JOB.format(angles="[10]", mirror="true", t_angles="", reference="listening_window")
    text = text.replace('[driver.w.angles]\nhorizontal = "w-h{angle}.txt"\nhorizontal_angles = [10]\nmirror = true\n',
                        "")
    code, _, err = cli("check", write_job(text, _files(())))
    assert code == 2 and "needs off-axis responses" in err, err


def test_the_demo_writes_its_curves_and_the_angles(tmp_path, cli):
    """simulate of the demo (an off-axis job): directivity.csv has every curve and both DIs, angles.csv the
    summed level at every position (mirrored ones included); at low frequency the cabinet is nearly
    omnidirectional (DI within 0.15 dB of 0 below 50 Hz: the woofer's near field takes the baffle's diffraction,
    1/2 of the half space in every direction far below the step, docs/baffle.md), and the DI rises towards the
    top."""
    from xo_fit.demo import write_scenario

    job = write_scenario(tmp_path / "s")
    code, out, err = cli("simulate", job, "--out", tmp_path / "sim", "--no-plots")
    assert code == 0, err
    rows = list(csv.DictReader(open(tmp_path / "sim" / "directivity.csv")))
    assert list(rows[0]) == ["frequency_hz", "on_axis_db", "listening_window_db", "early_reflections_db",
                             "sound_power_db", "estimated_in_room_db", "sound_power_di_db", "early_reflections_di_db"]
    di = np.array([float(r["sound_power_di_db"]) for r in rows])
    f = np.array([float(r["frequency_hz"]) for r in rows])
    assert np.all(np.abs(di[f < 50]) < 0.15) and di[f > 8000].min() > 4.0
    header = open(tmp_path / "sim" / "angles.csv").readline().strip().split(",")
    assert header[:3] == ["frequency_hz", "h-170_db", "h-160_db"] and "h0_db" in header and "v-90_db" in header
    assert len(header) == 71
    import json

    m = json.loads((tmp_path / "sim" / "result.json").read_text())["metrics"]
    assert {"listening_window_rms_db", "sound_power_di_range_db"} <= set(m)


def test_a_pruned_off_axis_job_runs_from_its_own_folder_and_a_batch_sees_its_angle_files(write_job, tmp_path, cli):
    """prune writes a job.toml elsewhere: its angle patterns are rewritten relative to it. A batch's job hash
    covers the angle files, so editing one reruns the job."""
    job = _job(write_job)
    text = job.read_text().replace("value = 2\n", "value = 2\nmin = 0.5\nmax = 8\n")
    job.write_text(text + '[target.way.w]\ntype = "fullrange"\n[target.way.t]\ntype = "fullrange"\n')
    code, out, err = cli("prune", job, "--out", tmp_path / "deep" / "p", "--budget", "300")
    assert code == 0, err
    code, out, err = cli("simulate", tmp_path / "deep" / "p" / "job.toml", "--out", tmp_path / "s", "--no-plots")
    assert code == 0, err
    assert (tmp_path / "s" / "angles.csv").exists() and (tmp_path / "deep" / "p" / "angles.csv").exists()
    from xo_fit.batch.collect import job_hash

    j = load_job(job)
    before = job_hash(j, j.data)
    (tmp_path / "t-h20.txt").write_text(flat_curve(level=85.0))
    assert job_hash(j, j.data) != before


def test_the_api_gives_the_directivity_and_fits_a_driver(tmp_path):
    import xo_fit
    from xo_fit.demo import WOOFER, write_scenario

    job = write_scenario(tmp_path / "s")
    d = xo_fit.simulate(job)
    df = d.directivity
    assert list(df.columns)[:3] == ["frequency_hz", "on_axis_db", "listening_window_db"] and len(df) == 300
    positions, p, curves = d.off_axis()
    assert p.shape == (70, 300) and positions[0] == ("h", 0)
    # on the axis the summed pressure is response.csv's sum
    np.testing.assert_allclose(20 * np.log10(np.abs(p[0]) / 20e-6), d.response["sum_db"], atol=1e-9)
    fit = xo_fit.fit_driver(tmp_path / "s" / "data" / "woofer-impedance.txt", "ts-lossy")
    assert fit.params.fs == pytest.approx(WOOFER.fs, rel=0.02) and fit.rms_error_pct < 10
    assert "[driver.w.impedance]" in fit.toml("w")


def test_a_spread_judges_the_listening_window_when_the_target_does(tmp_path):
    """The demo is referred to its listening window: the spread's "sum" percentiles are of that curve (their
    median within 0.1 dB of the nominal listening window), not of the on-axis sum, which parts from it by more
    than 0.3 dB near the top."""
    import xo_fit
    from xo_fit.demo import write_scenario

    job = write_scenario(tmp_path / "s")
    tol = xo_fit.spread(job, samples=200, seed=1)
    lw = tol.design.directivity["listening_window_db"].to_numpy()
    on = tol.design.response["sum_db"].to_numpy()
    p50 = tol.curves["sum_p50_db"].to_numpy()
    assert np.max(np.abs(p50 - lw)) < 0.1
    assert np.max(np.abs(on - lw)) > 0.3
