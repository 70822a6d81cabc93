"""Where the drivers are, in whole jobs: positions, listening distance, ``about``, per-angle splicing.

Outside references: the simple (point) source, p = (A / r) exp(j(w t - k r)), pressure falling as 1/r and
lagging by r/c, and the rigid circular piston in a baffle, far-field directivity 2 J1(ka sin t) / (ka sin t)
(Kinsler, Frey, Coppens, Sanders, *Fundamentals of Acoustics*, 4th ed., ch. 7) [SRC]. Each reference sum below
is re-derived here from them [DER]: far away in direction t the path from a source at (x, y, z) is shorter than
from the reference point by its projection on the direction (x sin t + z cos t on the horizontal orbit,
y sin t + z cos t on the vertical one, z = -offset); at a finite distance D the listening point is the axis
point (0, 0, D) rotated about the vertical (horizontal orbit) or horizontal (vertical orbit) axis, and each
source's pressure is scaled by D/r and delayed by (r - D)/c. With every driver wired straight across a
source of no resistance, each driver's terminals see the source voltage (Kirchhoff's voltage law) [DER], so
the sum at each position is the drivers' responses times their placement alone. The sign conventions (x to
the right facing the front, y up, horizontal angles positive towards the listener's right, vertical ones
upwards) are the job format's. The splice's level shift is the job format's definition (the mean dB
difference over the third of an octave centred on the splice, over log frequency) [CP], recomputed here.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.special import j1

from xo_fit.errors import JobError
from xo_fit.job.reader import load_job
from xo_fit.model.system import load_system

C = 343.0  # m/s, the job's default speed of sound
F = np.geomspace(100.0, 20000.0, 120)  # the jobs' grid: f_min 100, f_max 20000, 120 points (log-spaced)
ANGLES = [a for a in range(-90, 91, 10) if a != 0]
# the pair: a woofer 150 mm below and 20 mm right of the reference point, 18 mm deeper; a tweeter 12 mm left of it,
# 4 mm deeper (invented)
PAIR = {"woofer": dict(x=0.02, y=-0.15, offset=0.018, radius=0.05),
        "tweeter": dict(x=-0.012, y=0.0, offset=0.004, radius=0.013)}


def axis_response(name, f):
    """Invented on-axis responses (Pa at 2.83 V, 1 m): second-order low- and high-pass at 2.5 kHz, 90 dB."""
    s = 1j * f / 2500.0
    h = 1 / (1 + math.sqrt(2) * s + s * s) if name == "woofer" else s * s / (1 + math.sqrt(2) * s + s * s)
    return 20e-6 * 10 ** (90 / 20) * h


def piston(ka_sin):
    """2 J1(x) / x, 1 at x = 0 (Kinsler et al. ch. 7)."""
    x = np.asarray(ka_sin, dtype=float)
    safe = np.where(x < 1e-9, 1.0, x)
    return np.where(x < 1e-9, 1.0, 2 * j1(safe) / safe)


def directivity(name, angle, f, pistons):
    if not pistons:
        return np.ones(f.size)
    return piston(2 * np.pi * f / C * PAIR[name]["radius"] * abs(math.sin(math.radians(angle))))


def far_path(name, orbit, angle):
    """The extra path (m) of a driver towards a far point in direction ``angle``: minus its projection."""
    d, t = PAIR[name], math.radians(angle)
    across = d["x"] if orbit == "h" else d["y"]
    return -(across * math.sin(t) + (-d["offset"]) * math.cos(t))


def listening_point(orbit, angle, distance):
    """The axis point (0, 0, D) rotated about y by +t ("h": +90 lands on +x) or about x ("v": +90 on +y)."""
    t = math.radians(angle)
    c, s = math.cos(t), math.sin(t)
    rot = (np.array([[c, 0, s], [0, 1, 0], [-s, 0, c]]) if orbit == "h"  # (0, 0, D) -> (D s, 0, D c)
           else np.array([[1, 0, 0], [0, c, s], [0, -s, c]]))  # (0, 0, D) -> (0, D s, D c)
    return rot @ np.array([0.0, 0.0, distance])


def reference_sum(orbit, angle, *, pistons=True, distance=math.inf, flat_tweeter=False):
    """The pair's summed pressure at one position, complex Pa (F,), from the sources above [DER]; flat_tweeter:
    the tweeter a flat 90 dB point source."""
    k = 2 * np.pi * F / C
    total = np.zeros(F.size, dtype=complex)
    for name, d in PAIR.items():
        h = axis_response(name, F) * directivity(name, angle, F, pistons)
        if flat_tweeter and name == "tweeter":
            h = np.full(F.size, 20e-6 * 10 ** (90 / 20), dtype=complex)
        if math.isinf(distance):
            total += h * np.exp(-1j * k * far_path(name, orbit, angle))
        else:
            r = float(np.linalg.norm(listening_point(orbit, angle, distance) - [d["x"], d["y"], -d["offset"]]))
            total += h * distance / r * np.exp(-1j * k * (r - distance))
    return total


def curve_text(f, p):
    """A measurement file: frequency (exact), dB SPL, phase deg, at many digits (no rounding in the check)."""
    db = 20 * np.log10(np.abs(p) / 20e-6)
    return "".join(f"{float(x)!r} {m:.12f} {a:.12f}\n" for x, m, a in zip(f, db, np.degrees(np.angle(p))))


def write_pair(tmp_path, *, about="driver", pistons=True, positions=True, distance=None, geometry_in_files=False,
               tweeter_phase="measured", extra=""):
    """A two-way job whose drivers are wired straight across the source; every file on the job's grid.

    geometry_in_files: each file holds the driver's far-field path to its position (measured about the
    reference point), the job then gives no offsets; otherwise the files hold the response about the driver.
    """
    files = {}
    for name in PAIR:
        for orbit in ("h", "v"):
            for a in [0] + ANGLES:
                p = axis_response(name, F) * directivity(name, a, F, pistons)
                if name == "tweeter" and tweeter_phase == "minimum":
                    p = np.full(F.size, 20e-6 * 10 ** (90 / 20), dtype=complex)  # a flat point source
                if geometry_in_files:
                    p = p * np.exp(-1j * 2 * np.pi * F / C * far_path(name, orbit, a))
                files[f"{name}-{orbit}{a}.txt"] = curve_text(F, p)
    lines = ['name = "pair"', "[grid]", "f_min = 100", "f_max = 20000", "points = 120", "[acoustics]"]
    if distance is not None:
        lines.append(f"distance = {distance!r}")
    for name, d in PAIR.items():
        lines += [f"[driver.{name}]", f'response = "{name}-h0.txt"', "impedance = 8"]
        if name == "tweeter" and tweeter_phase == "minimum":
            lines.append('phase = "minimum"')
        if not geometry_in_files:
            lines.append(f"offset = {d['offset']!r}")
        if positions:
            lines.append(f"position = {{ x = {d['x']!r}, y = {d['y']!r} }}")
        angles = ", ".join(str(a) for a in ANGLES)
        lines += [f"[driver.{name}.angles]", f'horizontal = "{name}-h{{angle}}.txt"', f"horizontal_angles = [{angles}]",
                  f'vertical = "{name}-v{{angle}}.txt"', f"vertical_angles = [{angles}]"]
        if about is not None:
            lines.append(f'about = "{about}"')
    lines += ['[[part]]\nname = "W"\ntype = "driver"\ndriver = "woofer"\nnodes = ["in", "0"]',
              '[[part]]\nname = "T"\ntype = "driver"\ndriver = "tweeter"\nnodes = ["in", "0"]',
              '[[part]]\nname = "RL"\ntype = "R"\nnodes = ["in", "0"]\nvalue = 8', extra]
    for rel, text in files.items():
        (tmp_path / rel).write_text(text)
    job = tmp_path / "job.toml"
    job.write_text("\n".join(lines) + "\n")
    return job


def sums(job_path):
    """The job's summed pressure at each position (complex Pa, (A, F)), by position."""
    system = load_system(load_job(job_path))
    sim = system.simulate(system.values(), angles=True)
    return system, dict(zip(system.positions, sim.angles[0]))


def db(p):
    return 20 * np.log10(np.abs(p))


def check_orbits(got, **kw):
    for orbit in ("h", "v"):
        for a in [0] + ANGLES:
            pos = ("h", 0) if a == 0 else (orbit, a)
            ref = reference_sum(orbit, a, **kw)
            assert np.max(np.abs(db(got[pos]) - db(ref))) < 0.01, (pos, np.max(np.abs(db(got[pos]) - db(ref))))
            assert np.allclose(got[pos], ref, rtol=1e-6, atol=1e-9), pos


@pytest.mark.parametrize("pistons, tweeter_phase", [(True, "measured"), (False, "minimum")])
def test_positioned_drivers_sum_as_sources_at_their_places_in_the_far_field(tmp_path, cli, pistons, tweeter_phase):
    # [SRC + DER] baffled pistons measured about their own centres (about = "driver"), and point sources with one
    # driver's phase derived from a flat file: both orbits equal the far-field path-difference sum to 0.01 dB
    job = write_pair(tmp_path, pistons=pistons, tweeter_phase=tweeter_phase)
    _, got = sums(job)
    flat = tweeter_phase == "minimum"
    check_orbits(got, pistons=pistons, flat_tweeter=flat)
    # and angles.csv, as the user reads it, says the same (dB SPL re 20 uPa)
    code, _, err = cli("simulate", job, "--out", tmp_path / "out", "--no-plots")
    assert code == 0, err
    table = pd.read_csv(tmp_path / "out" / "angles.csv")
    for col, orbit, a in (("v-30_db", "v", -30), ("v20_db", "v", 20), ("h60_db", "h", 60), ("h-90_db", "h", -90)):
        ref = 20 * np.log10(np.abs(reference_sum(orbit, a, pistons=pistons, flat_tweeter=flat)) / 20e-6)
        assert np.max(np.abs(table[col].to_numpy() - ref)) < 0.01, col


def test_at_a_finite_distance_the_sums_follow_the_exact_distances_and_their_levels(tmp_path):
    # [SRC + DER] each source scaled by 20 log10(D/r) and delayed by (r - D)/c, D = 1.5 m
    system, got = sums(write_pair(tmp_path, distance=1.5))
    check_orbits(got, distance=1.5)
    # the axis itself moves at a finite distance: by hand the woofer is r = sqrt(0.02^2 + 0.15^2 + 1.518^2) =
    # 1.52553 m from the axis point at 1.5 m, so 20 log10(1.5 / 1.52553) = -0.1466 dB on the axis
    level = 20 * np.log10(np.abs(system.factors[0]) / np.abs(system.drivers[0].response / 2.83))
    assert np.allclose(level, -0.1466, atol=1e-4)


def test_files_that_carry_the_geometry_give_the_same_orbits_as_the_positioned_job(tmp_path):
    # [DER] the same pair described twice: files measured about the reference point (each holds its path, the
    # job has no offsets; about = "reference") or about each driver plus position and offset: the same sums
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    _, carried = sums(write_pair(tmp_path / "a", about="reference", positions=False, geometry_in_files=True))
    _, placed = sums(write_pair(tmp_path / "b", about="driver"))
    assert carried.keys() == placed.keys()
    for pos in carried:
        assert np.allclose(carried[pos], placed[pos], rtol=1e-9, atol=1e-12), pos
    check_orbits(carried)  # and both are the sources' sum
    # left out, about means "reference" for measured phase: the same numbers; with the positions given they are for
    # information only (the files hold the paths already)
    (tmp_path / "c").mkdir()
    _, default = sums(write_pair(tmp_path / "c", about=None, positions=True, geometry_in_files=True))
    for pos in carried:
        assert np.array_equal(default[pos], carried[pos]), pos


def test_the_files_of_a_positioned_job_without_about_are_taken_about_the_reference(tmp_path):
    # [DER] measured phase without about carries the geometry: files without path terms then give the drivers
    # as if both sat at the reference point (their depths as a delay on every position): no vertical lobing
    _, got = sums(write_pair(tmp_path, about=None))
    k = 2 * np.pi * F / C
    ref = sum(axis_response(n, F) * directivity(n, 40, F, True) * np.exp(-1j * k * PAIR[n]["offset"]) for n in PAIR)
    assert np.allclose(got[("v", 40)], ref, rtol=1e-6, atol=1e-9)


def test_on_axis_job_about_the_driver_at_a_finite_distance(tmp_path, write_job):
    # [DER] an on-axis job gives about in [driver.NAME]: a file measured about the driver at y = -0.2 m, heard on
    # the axis at D = 2 m: r = sqrt(2^2 + 0.2^2) = 2.00998 m, level 2/r (-0.0432 dB), delay (r - 2)/c
    resp = curve_text(F, axis_response("woofer", F))
    text = f"""
        [grid]
        f_min = 100
        f_max = 20000
        points = 120
        [acoustics]
        distance = "2000mm"
        [driver.woofer]
        response = "w.txt"
        impedance = 8
        position = {{ y = "-200mm" }}
        about = "{{about}}"
        [[part]]
        name = "W"
        type = "driver"
        driver = "woofer"
        nodes = ["in", "0"]
        """
    r = math.hypot(2.0, 0.2)
    assert 20 * math.log10(2 / r) == pytest.approx(-0.0432, abs=1e-4)
    for about, ref in (("driver", axis_response("woofer", F) * 2 / r * np.exp(-2j * np.pi * F / C * (r - 2))),
                       ("reference", axis_response("woofer", F))):
        job = write_job(text.replace("{about}", about), {"w.txt": resp})
        system = load_system(load_job(job))
        total = system.simulate(system.values()).total[0]
        assert np.allclose(total, ref, rtol=1e-9, atol=1e-12), about


def test_far_field_positions_leave_the_axis_as_before(tmp_path):
    # [DER] far away on the axis u = (0, 0, 1): u.p = -offset whatever x and y, so the on-axis factors are the
    # offset delay exp(-j w offset / c) alone, bit for bit as the package wrote it before positions existed
    system = load_system(load_job(write_pair(tmp_path)))
    w = 2 * np.pi * F
    for i, name in enumerate(PAIR):
        before = system.drivers[i].response / 2.83 * np.exp(-1j * w * PAIR[name]["offset"] / C)
        assert np.array_equal(system.factors[i], before)


# ----------------------------------------------------------------------------- per-angle splicing


def spliced_files(tmp_path):
    """A near field (valid below 400 Hz) and gated far fields on the axis and at h30, h60 (invented, dB SPL):
    the far fields read 3 dB low and wavy below 250 Hz (the gate), the h60 one is 2 dB down around the splice."""
    f = np.geomspace(20.0, 20000.0, 400)
    near = 104.0 - 10 * np.log10(1 + (40.0 / f) ** 4)  # a 2nd-order roll-off at 40 Hz, 104 dB above
    def far(drop):
        return 92.0 - drop - 3 * (f < 250) * (1 + np.sin(f / 20)) - 10 * np.log10(1 + (f / 9000.0) ** 2)
    def text(db):
        return "".join(f"{float(x)!r} {float(m)!r}\n" for x, m in zip(f, db))
    files = {"near.txt": text(near), "far-h0.txt": text(far(0.0)), "far-h30.txt": text(far(0.5)),
             "far-h60.txt": text(far(2.0) - 4 * np.clip(np.log2(f / 400.0), 0, None))}
    for rel, t in files.items():
        (tmp_path / rel).write_text(t)
    return f, near, far


def test_each_angle_file_is_spliced_with_the_same_near_field(tmp_path, write_job):
    f, near, far = spliced_files(tmp_path)
    job = write_job("""
        [grid]
        f_min = 50
        f_max = 16000
        points = 200
        [driver.woofer]
        response = { near = "near.txt", far = "far-h0.txt", splice_hz = 400 }
        phase = "minimum"
        impedance = 8
        [driver.woofer.angles]
        horizontal = "far-h{angle}.txt"
        horizontal_angles = [30, 60]
        [[part]]
        name = "W"
        type = "driver"
        driver = "woofer"
        nodes = ["in", "0"]
        """)
    system = load_system(load_job(job))
    d = system.drivers[0]
    from xo_fit.output.describe import describe

    assert any("each a far field spliced with the near field at 400 Hz" in line for line in describe(system))
    # [CP] the level shift: the mean dB difference far - near over the third of an octave around 400 Hz
    u = np.linspace(math.log(400) - math.log(2) / 6, math.log(400) + math.log(2) / 6, 33)
    gain = np.mean(np.interp(u, np.log(f), far(0.0)) - np.interp(u, np.log(f), near))
    assert d.splice.gain_db == pytest.approx(gain, abs=1e-9)
    level = {pos: 20 * np.log10(np.abs(p) / 20e-6) for pos, p in zip(system.positions, d.angle_responses)}
    g = system.frequencies
    below = g < 400 * 2 ** (-1 / 6) * 0.999
    above = g > 400 * 2 ** (1 / 6) * 1.001
    want_below = np.interp(np.log(g[below]), np.log(f), near) + gain
    for pos in (("h", 0), ("h", 30), ("h", 60)):
        # below the splice every angle is the near field with the axis's shift (omnidirectional there): the 2 dB
        # that h60's far field lies lower around the splice does not move it
        assert np.max(np.abs(level[pos][below] - want_below)) < 0.01, pos
    for pos, drop, extra in ((("h", 30), 0.5, 0), (("h", 60), 2.0, 4)):
        want = np.interp(np.log(g[above]), np.log(f), far(drop) - extra * np.clip(np.log2(f / 400.0), 0, None))
        assert np.max(np.abs(level[pos][above] - want)) < 0.01, pos  # above it, each angle's own far field


def test_an_angle_file_that_misses_the_splice_is_an_error_naming_the_position(tmp_path, write_job, cli):
    f, near, far = spliced_files(tmp_path)
    short = f[f > 600]
    (tmp_path / "far-h30.txt").write_text("".join(f"{float(x)!r} 90.0\n" for x in short))
    job = write_job("""
        [grid]
        f_min = 50
        f_max = 16000
        points = 200
        [driver.woofer]
        response = { near = "near.txt", far = "far-h0.txt", splice_hz = 400 }
        phase = "minimum"
        impedance = 8
        [driver.woofer.angles]
        horizontal = "far-h{angle}.txt"
        horizontal_angles = [30, 60]
        [[part]]
        name = "W"
        type = "driver"
        driver = "woofer"
        nodes = ["in", "0"]
        """)
    code, _, err = cli("check", job)
    assert code == 2 and "far-field file covers" in err and "h30" in err


# ----------------------------------------------------------------------------- check, warnings, errors


def test_check_prints_each_drivers_place_and_how_its_geometry_enters(tmp_path, cli):
    code, out, _ = cli("check", write_pair(tmp_path, distance=1.5))
    assert code == 0
    assert "placement listening distance 1.5 m from the reference point" in out
    assert "driver woofer: x 20 mm, y -150 mm, offset 18 mm" in out
    assert 'measured phase about the driver (about = "driver"): the path from its acoustic centre is added' in out


def test_warnings_where_geometry_is_missing_or_dropped(tmp_path, cli):
    # the tweeter's phase derived from a file that holds measured phase, and no position while the woofer has one
    job = write_pair(tmp_path, about=None, tweeter_phase="measured")
    text = job.read_text()
    tweeter = text.index("[driver.tweeter]")
    head, tail = text[:tweeter], text[tweeter:]
    tail = tail.replace("position = { x = -0.012, y = 0.0 }\n", 'phase = "minimum"\n', 1)
    job.write_text(head + tail)
    code, _, err = cli("check", job)
    assert code == 0
    assert 'tweeter: phase = "minimum" drops the measured phase of its files' in err
    assert "driver tweeter needs its geometry added but has no position while woofer has one" in err
    # the same job with the position given: only the first warning stays
    job.write_text(head + tail.replace('phase = "minimum"\n', 'phase = "minimum"\nposition = { x = -0.012 }\n'))
    code, _, err = cli("check", job)
    assert "drops the measured phase" in err and "has no position" not in err


@pytest.mark.parametrize("extra, message", [
    ('distance = "2m"', "reads as milli"),
    ("distance = 0.1", "does not lie beyond driver woofer's acoustic centre"),
    ('distance = "Far"', 'write "far"'),
])
def test_bad_distances_are_job_errors(tmp_path, extra, message):
    job = write_pair(tmp_path)
    job.write_text(job.read_text().replace("[acoustics]\n", f"[acoustics]\n{extra}\n"))
    with pytest.raises(JobError, match=message):
        load_job(job)


def test_bad_positions_and_abouts_are_job_errors(tmp_path):
    job = write_pair(tmp_path)
    text = job.read_text()
    for old, new, message in (
            ("position = { x = 0.02, y = -0.15 }", "position = { x = 0.02, z = 0.1 }", "unknown key 'z'"),
            ("position = { x = 0.02, y = -0.15 }", "position = {}", "expected x and/or y"),
            ("offset = 0.018\n", 'offset = 0.018\nabout = "driver"\n', "give about once"),
            ('about = "driver"', 'about = "centre"', "expected one of 'reference', 'driver'")):
        job.write_text(text.replace(old, new, 1))
        with pytest.raises(JobError, match=message):
            load_job(job)
    job.write_text(text.replace("y = -0.15 }", 'y = "-0.15m" }', 1))
    assert any("reads as -0.15 mm" in w for w in load_job(job).warnings)


def test_the_demo_places_its_woofer_below_the_tweeter(tmp_path):
    # [DER] the demo's files are about each driver; its job puts the woofer 150 mm below the tweeter (the
    # reference point) and 18 mm deeper, so at v+a far away the woofer's factor is its file's response times
    # exp(-j k (0.15 sin a + 0.018 cos a)) (the projection of (0, -0.15, -0.018) on (0, sin a, cos a), negated)
    from xo_fit.demo import WOOFER_DEPTH, WOOFER_HEIGHT, write_scenario

    system = load_system(load_job(write_scenario(tmp_path)))
    k = 2 * np.pi * system.frequencies / C
    woofer = system.drivers[0]
    for pos in (("v", 30), ("v", -20), ("h", 40)):
        i = system.positions.index(pos)
        t = math.radians(pos[1])
        up = (WOOFER_HEIGHT * math.sin(t) if pos[0] == "v" else 0.0) - WOOFER_DEPTH * math.cos(t)
        want = woofer.angle_responses[i] / 2.83 * np.exp(1j * k * up)
        assert np.allclose(system.angle_factors[i, 0], want, rtol=1e-12, atol=0), pos
