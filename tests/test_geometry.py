"""Where the drivers are: orbit directions and the propagation from each acoustic centre (xo_fit.physics.geometry).

Outside references: the simple (point) source, p(r, t) = (A / r) exp(j(w t - k r)): pressure falling as 1/r
and lagging by r/c (Kinsler, Frey, Coppens, Sanders, *Fundamentals of Acoustics*, 4th ed., ch. 7) [SRC].
From it, each check below re-derives its reference in the test [DER]: the far-field path difference of a
source at p towards direction u (the projection of p on u), the exact distance to a listening point built by
rotating the axis point (0, 0, D) about the vertical or the horizontal axis, the first null of two in-phase
sources a distance d apart (path difference d sin t = half a wavelength), and mirror symmetry. The sign
conventions (x to the right facing the front, y up, horizontal angles positive towards the listener's right,
vertical ones upwards, offset behind the reference plane) are the job format's.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from xo_fit.errors import XoFitError
from xo_fit.physics.geometry import (Placement, acoustic_centres, carries_geometry, delays_and_levels, direction,
                                     directions, placement_factors, placement_line, placement_warnings,
                                     propagation)

C = 343.0  # m/s, the job's default speed of sound (any positive value serves these checks)
F = np.geomspace(20.0, 20000.0, 160)
ANGLES = list(range(-180, 181, 10))
# two drivers at invented positions (m): a woofer below and right of the reference point, a tweeter above and
# left, at different depths behind the reference plane
X, Y, OFFSET = np.array([0.02, -0.015]), np.array([-0.16, 0.05]), np.array([0.018, 0.004])


def responses(f):
    """Invented complex responses of the pair (2, F): second-order low- and high-pass at 2 kHz (Pa per V)."""
    s = 1j * f / 2000.0
    return np.stack([1 / (1 + math.sqrt(2) * s + s * s), s * s / (1 + math.sqrt(2) * s + s * s)])


def db(p):
    return 20 * np.log10(np.abs(p))


def modelled_sums(orbit, distance=math.inf):
    """The pair's summed pressure along one orbit through the module, (A, F): files without geometry."""
    pos = [(orbit, a) for a in ANGLES]
    g = placement_factors(pos, acoustic_centres(X, Y, OFFSET), [True, True], F, speed_of_sound=C, distance=distance)
    return np.einsum("df,adf->af", responses(F), g)


def test_the_orbits_equal_a_far_field_sum_with_the_path_difference():
    # [DER from the point source, Kinsler et al. ch. 7] far away in direction t on the horizontal orbit the
    # path from a source at (x, y, z) is shorter than from the reference point by its projection on the
    # direction, x sin t + z cos t (vertical orbit: y sin t + z cos t); z = -offset. Delay = -projection / c.
    h = responses(F)
    k = 2 * np.pi * F / C
    for orbit, across in (("h", X), ("v", Y)):
        ref = np.empty((len(ANGLES), F.size), dtype=complex)
        for i, a in enumerate(ANGLES):
            t = math.radians(a)
            shorter = across * math.sin(t) + (-OFFSET) * math.cos(t)  # (2,) m
            ref[i] = sum(h[d] * np.exp(1j * k * shorter[d]) for d in range(2))
        got = modelled_sums(orbit)
        assert np.max(np.abs(db(got) - db(ref))) < 0.01  # 0.01 dB, as the issue asks
        assert np.allclose(got, ref, rtol=1e-9, atol=1e-12)


def rotated_point(orbit, a_deg, distance):
    """The listening point: the axis point (0, 0, D) rotated about the vertical axis (y) by a for "h", so that
    +90 lands on +x (the listener's right); about the horizontal axis (x) for "v", so that +90 lands on +y."""
    t = math.radians(a_deg)
    c, s = math.cos(t), math.sin(t)
    if orbit == "h":
        rot = np.array([[c, 0, s], [0, 1, 0], [-s, 0, c]])  # rotation about y by +t
    else:
        rot = np.array([[1, 0, 0], [0, c, -s], [0, s, c]]).T  # rotation about x by -t (z towards +y)
    return rot @ np.array([0.0, 0.0, distance])


def test_the_orbits_at_a_finite_distance_equal_the_exact_distance_model():
    # [DER from the point source] a source at p heard at point q: level 1/r, delay r/c with r = |q - p|;
    # relative to a source at the reference point (distance D): D/r and (r - D)/c, i.e. 20 log10(D/r) dB
    distance = 2.0
    h = responses(F)
    k = 2 * np.pi * F / C
    p = np.stack([X, Y, -OFFSET], axis=1)
    for orbit in ("h", "v"):
        ref = np.empty((len(ANGLES), F.size), dtype=complex)
        for i, a in enumerate(ANGLES):
            q = rotated_point(orbit, a, distance)
            r = np.linalg.norm(q[None, :] - p, axis=1)
            ref[i] = sum(h[d] * distance / r[d] * np.exp(-1j * k * (r[d] - distance)) for d in range(2))
        got = modelled_sums(orbit, distance)
        assert np.max(np.abs(db(got) - db(ref))) < 0.01  # 0.01 dB
        assert np.allclose(got, ref, rtol=1e-9, atol=1e-12)


def test_a_source_above_heard_from_straight_above_at_one_metre():
    # [DER] a source 0.3 m above the reference point, the listening point 1 m straight up (v90): r = 0.7 m,
    # so +20 log10(1/0.7) = +3.098 dB and 0.3 m less path: 0.3/c earlier
    delay, level = delays_and_levels(directions([("v", 90)]), acoustic_centres([0.0], [0.3], [0.0]),
                                     speed_of_sound=C, distance=1.0)
    assert 20 * math.log10(level[0, 0]) == pytest.approx(20 * math.log10(1 / 0.7), abs=1e-9)
    assert delay[0, 0] == pytest.approx(-0.3 / C, rel=1e-12)


def test_the_orbits_turn_towards_the_listeners_right_and_upwards():
    # the job format: horizontal angles positive towards the listener's right (x > 0), vertical upwards (y > 0);
    # 180 on either orbit is the one point behind
    assert np.allclose(direction("h", 90), [1, 0, 0]) and np.allclose(direction("v", 90), [0, 1, 0])
    assert np.allclose(direction("h", -90), [-1, 0, 0]) and np.allclose(direction("v", -90), [0, -1, 0])
    for orbit in ("h", "v"):
        assert np.array_equal(direction(orbit, 0), [0, 0, 1])
        assert np.array_equal(direction(orbit, 180), [0, 0, -1]) and np.array_equal(direction(orbit, -180),
                                                                                     direction("h", 180))
    # a driver on the listener's right is nearer h+30 than h-30 [DER]: heard earlier there
    delay, _ = delays_and_levels(directions([("h", 30), ("h", -30)]), acoustic_centres([0.1], [0.0], [0.0]),
                                 speed_of_sound=C)
    assert delay[0, 0] < 0 < delay[1, 0]


@pytest.mark.parametrize("d, f", [(0.16, 3000.0), (0.4, 1200.0)])
def test_two_in_phase_sources_have_their_first_vertical_null_where_the_paths_differ_by_half_a_wavelength(d, f):
    # [DER from the path difference] two equal sources at y = +-d/2: far away at angle t their paths differ by
    # d sin t; the first null is at d sin t = c / (2 f), i.e. sin t = c / (2 d f)
    t_null = math.degrees(math.asin(C / (2 * d * f)))
    fine = np.round(np.arange(0.0, 2 * t_null, 0.01), 2)
    g = placement_factors([("v", a) for a in fine], acoustic_centres([0, 0], [d / 2, -d / 2], [0, 0]), [True, True],
                          np.array([f]), speed_of_sound=C)
    level = db(g.sum(axis=1)[:, 0] / 2)  # relative to the axis (two sources in phase: 2)
    assert fine[np.argmin(level)] == pytest.approx(t_null, abs=0.01)
    at_null = placement_factors([("v", t_null)], acoustic_centres([0, 0], [d / 2, -d / 2], [0, 0]), [True, True],
                                np.array([f]), speed_of_sound=C).sum(axis=1)[0, 0]
    assert abs(at_null) < 1e-9  # cos(pi d f sin t / c) = cos(pi / 2) = 0
    # the horizontal orbit lies in the plane that bisects them: equal paths, no lobing [DER]
    flat = placement_factors([("h", a) for a in ANGLES], acoustic_centres([0, 0], [d / 2, -d / 2], [0, 0]),
                             [True, True], np.array([f]), speed_of_sound=C).sum(axis=1)
    assert np.allclose(np.abs(flat), 2.0, rtol=1e-12)


@pytest.mark.parametrize("distance", [math.inf, 1.5])
def test_mirror_symmetry_about_the_vertical_plane(distance):
    # [DER] reflecting the speaker and the orbit in the plane x = 0 maps h+a onto h-a: a driver at x = 0 gives
    # h-a = h+a, and a driver at x gives at h-a what its mirror image at -x gives at h+a
    pos = [("h", a) for a in range(0, 181, 10)]
    neg = [("h", -a) for a in range(0, 181, 10)]
    on_line = acoustic_centres([0.0], [-0.15], [0.02])
    kw = dict(speed_of_sound=C, distance=distance)
    assert np.allclose(placement_factors(pos, on_line, [True], F, **kw),
                       placement_factors(neg, on_line, [True], F, **kw), rtol=1e-12, atol=1e-15)
    assert np.allclose(placement_factors(neg, acoustic_centres([0.07], [0.1], [0.01]), [True], F, **kw),
                       placement_factors(pos, acoustic_centres([-0.07], [0.1], [0.01]), [True], F, **kw),
                       rtol=1e-12, atol=1e-15)


def test_on_axis_the_reference_point_gives_one_and_depth_gives_the_old_offset_delay():
    # [DER] on the axis a source at the reference point is the reference itself: factor 1, far or near
    for distance in (math.inf, 3.0):
        g = propagation(directions([("h", 0)]), acoustic_centres([0.0], [0.0], [0.0]), F, speed_of_sound=C,
                        distance=distance)
        assert np.allclose(g, 1.0, rtol=0, atol=1e-15)
    # far away on the axis a driver's depth alone is its delay offset / c (exp(-j w offset / c)): the offset
    # delay of the on-axis sum before, so a driver takes one or the other, not both
    deep = placement_factors([("h", 0)], acoustic_centres([0.05, 0.05], [-0.2, -0.2], [0.03, 0.03]),
                             [True, False], F, speed_of_sound=C)
    assert np.allclose(deep[0, 0], np.exp(-2j * np.pi * F * 0.03 / C), rtol=1e-12)
    assert np.allclose(deep[0, 0], deep[0, 1], rtol=1e-12)
    # and bit for bit the delay the on-axis sum applied before positions existed (exp(-j w offset / c) written
    # as the package wrote it): a job without positions sums on the axis exactly as before
    offset = np.array([0.018, -0.004, 0.0])
    before = np.exp(-1j * (2 * np.pi * F)[None, :] * offset[:, None] / C)
    for adds in ([True] * 3, [False] * 3):
        now = placement_factors([("h", 0)], acoustic_centres([0, 0, 0], [0, 0, 0], offset), adds, F,
                                speed_of_sound=C)[0]
        assert np.array_equal(now, before)
    # a driver whose files carry the geometry keeps the same offset delay at every position, no level change
    around = placement_factors([("v", a) for a in ANGLES], acoustic_centres([0.05], [-0.2], [0.03]), [False], F,
                               speed_of_sound=C, distance=2.0)
    assert np.allclose(around, deep[0, 1][None, None, :], rtol=1e-12)


def test_the_finite_distance_tends_to_the_far_field():
    # [DER] r - D = (|p|^2 - 2 D u.p) / (r + D) -> -u.p as D grows (the binomial expansion of r); D/r -> 1
    u, p = directions([("h", a) for a in ANGLES]), acoustic_centres(X, Y, OFFSET)
    far_delay, _ = delays_and_levels(u, p, speed_of_sound=C)
    near_delay, level = delays_and_levels(u, p, speed_of_sound=C, distance=1e9)
    assert np.allclose(near_delay, far_delay, rtol=0, atol=1e-13) and np.allclose(level, 1.0, atol=1e-9)
    # the error of the far-field model at 2 m stays inside the expansion's next term, |p|^2 / (2 D c)
    near2, _ = delays_and_levels(u, p, speed_of_sound=C, distance=2.0)
    bound = np.sum(p * p, axis=1) / (2 * 2.0 * C)
    assert np.all(np.abs(near2 - far_delay) <= bound[None, :] * 1.001)


def test_a_listening_point_among_the_drivers_is_a_user_error():
    with pytest.raises(XoFitError, match="listening distance"):
        delays_and_levels(directions([("h", 0)]), acoustic_centres([0.0], [-0.5], [0.0]), speed_of_sound=C,
                          distance=0.3)


def test_which_drivers_carry_the_geometry():
    # the job format, version 3: only measured phase about the reference point carries the geometry; derived
    # phase (minimum, extended, spliced) is always taken about the driver itself
    assert carries_geometry("measured") and carries_geometry("measured", "reference")
    assert not carries_geometry("measured", "driver")
    for phase in ("minimum", "ideal"):
        for about in (None, "reference", "driver"):
            assert not carries_geometry(phase, about)
    with pytest.raises(ValueError):
        carries_geometry("measure")


def test_check_lines_and_warnings():
    woofer = Placement("woofer", 0.0, -0.15, 0.018, True, "minimum", phase_in_files=True)
    tweeter = Placement("tweeter", 0.0, 0.0, 0.0, False, "minimum")
    mid = Placement("mid", 0.0, 0.1, 0.0, True, "measured", about="reference")
    assert "x 0 m, y -150 mm, offset 18 mm" in placement_line(woofer)
    assert "added to every sum (far field)" in placement_line(woofer)
    assert "carry the geometry" in placement_line(mid) and "information only" in placement_line(mid)
    assert "at 2 m" in placement_line(tweeter, 2.0) and "no position" in placement_line(tweeter)
    w = placement_warnings([woofer, tweeter, mid], off_axis=True)
    assert any("woofer" in s and "drops the measured phase" in s for s in w)
    assert any(s.startswith("driver tweeter needs its geometry added but has no position") for s in w)
    assert len(w) == 2
    unplaced = [Placement(n, 0.0, 0.0, 0.0, False, "minimum") for n in ("woofer", "tweeter")]
    assert placement_warnings(unplaced, off_axis=False) == []  # far field on axis: only depth matters
    assert any("no driver has a position" in s for s in placement_warnings(unplaced, off_axis=True))
    odd = Placement("woofer", 0.0, 0.0, 0.0, True, "minimum", about="reference")
    assert any('about = "reference" cannot hold' in s for s in placement_warnings([odd], off_axis=True))
