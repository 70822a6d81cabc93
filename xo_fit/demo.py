"""The invented demo scenario: a two-way stand-mount, synthesised from published driver models.

Scenario (invented; no real product): the "Wren" stand-mount, a 19 cm wide
sealed cabinet with a 6.5-inch class woofer and a 1-inch class dome tweeter,
crossed near 2.2 kHz. The measurement files are made here from models, the
way a designer's own in-cabinet measurements would look:

* woofer impedance: Thiele-Small (R. H. Small, JAES 1972) at the in-box
  resonance, with a lossy voice-coil inductance Z = K (j w)^n (W. M. Leach,
  JAES 50(6), 2002); the job gives its data sheet too ([driver.woofer.ts] and .box,
  descriptive: the measured impedance file stays the one the network uses):
  the free-air set that this in-box model is in its 12 L sealed box, by
  Small's closed-box relations fc = fs sqrt(1 + alpha), Qmc = Qms sqrt(1 +
  alpha), Qec = Qes sqrt(1 + alpha) with alpha = Vas/Vb = 2, and Sd the
  cone's radiating area (pi a^2, a = WOOFER_RADIUS);
* woofer response: the sealed-box 2nd-order high-pass, the current roll-off of
  the voice-coil inductance, a cone breakup peak and the cone's own low-pass,
  on an infinite baffle (the half space); in the cabinet, times the diffraction
  of its 190 x 330 mm front (xo_fit.physics.baffle, docs/baffle.md: the baffle
  step and the edge ripple) at every position, the piston's directivity
  included. Its files are a near field (the half-space response, 10-800 Hz,
  louder for the close microphone) and far fields gated from 300 Hz, which the
  job splices at 400 Hz with ``baffle = true``, so xo_fit puts the cabinet's
  diffraction back into the near field;
* tweeter: its own 2nd-order roll-off at resonance, a dome peak, and a top-end
  roll-off; the woofer's acoustic centre sits 18 mm behind the tweeter's; its
  response file is gated and starts at 300 Hz (the job extends it below);
* a little measurement ripple (+-0.25 dB) on both responses;
* off-axis responses on both orbits in 10 degree steps: the woofer's from the
  diffraction model above; the tweeter a rigid
  circular piston, directivity 2 J1(ka sin t) / (ka sin t) in front (Kinsler,
  Frey, Coppens and Sanders, *Fundamentals of Acoustics*; L. Beranek,
  *Acoustics*), its 90 degree value behind, fading with frequency as the
  cabinet's shadow deepens (an invented first-order fall above the baffle
  step), measured about each driver's own centre (no path term in the files);
* the drivers' places are in the job: the tweeter's centre is the reference
  point, the woofer's 150 mm below it (``position``) and 18 mm deeper
  (``offset``), and the angle files say ``about = "driver"``, so xo_fit adds
  each driver's path to every position and the vertical lobing comes from the
  geometry.

All phases are minimum phase of the model (time of flight removed, as after
gating). Everything is deterministic.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from xo_fit.constants import SPEED_OF_SOUND  # the scenario's air: the job's [acoustics] default
from xo_fit.job.model import ThieleSmall
from xo_fit.physics.thiele_small import small_signal_impedance
from xo_fit.io.results import write_text

#: Baffle width of the demo cabinet, m.
BAFFLE_WIDTH = 0.19
#: The cabinet's front from the reference point (the tweeter's centre), m: (left, right), (bottom, top).
BAFFLE_EDGES = ((-BAFFLE_WIDTH / 2, BAFFLE_WIDTH / 2), (-0.26, 0.07))

#: Radiating radii of the demo drivers (m): a 6.5-inch class cone and a 1-inch class dome.
WOOFER_RADIUS = 0.066
TWEETER_RADIUS = 0.013
#: The woofer's centre relative to the tweeter's (the reference point): height (m, up positive), depth (m).
WOOFER_HEIGHT = -0.15
WOOFER_DEPTH = 0.018
#: The angles of the demo's off-axis files (deg): horizontal 10..180 (mirrored), vertical -170..170.
H_ANGLES = tuple(range(10, 181, 10))
V_ANGLES = tuple(a for a in range(-170, 171, 10) if a != 0)

#: The tweeter's gated measurement starts here (Hz): a 3.3 ms reflection-free window.
TWEETER_GATE_HZ = 300.0
#: The woofer's far fields are gated alike; its near field is valid up to about ka = 1 (Hz).
WOOFER_GATE_HZ = 300.0
NEAR_FIELD_TOP_HZ = 800.0

WOOFER = ThieleSmall(re=5.4, le=0.6e-3, fs=58.0, qms=3.4, qes=0.62, le_exponent=0.72)
TWEETER = ThieleSmall(re=4.7, le=0.06e-3, fs=780.0, qms=1.6, qes=1.3, le_exponent=0.85)


def _hp2(s: np.ndarray, f0: float, q: float) -> np.ndarray:
    w0 = 2 * np.pi * f0
    return s**2 / (s**2 + s * w0 / q + w0**2)


def _lp2(s: np.ndarray, f0: float, q: float) -> np.ndarray:
    w0 = 2 * np.pi * f0
    return w0**2 / (s**2 + s * w0 / q + w0**2)


def _peak(s: np.ndarray, f0: float, q: float, gain_db: float) -> np.ndarray:
    """A minimum-phase resonant peak (biquad bell) of gain_db at f0."""
    w0 = 2 * np.pi * f0
    a = 10 ** (gain_db / 40.0)
    return (s**2 + s * w0 * a / q + w0**2) / (s**2 + s * w0 / (a * q) + w0**2)


def _ripple(f: np.ndarray, depth_db: float, period_oct: float, phase: float) -> np.ndarray:
    return 10 ** (depth_db * np.sin(2 * np.pi * np.log2(f) / period_oct + phase) / 20.0)


def woofer_halfspace(f: np.ndarray) -> np.ndarray:
    """Complex pressure (Pa at 2.83 V, 1 m) of the demo woofer on an infinite baffle (the half space)."""
    s = 2j * np.pi * f
    inductive = WOOFER.re / (WOOFER.re + _le(WOOFER, f))  # current roll-off of the voice coil
    h = _hp2(s, 62.0, 0.78) * inductive * _peak(s, 5400.0, 4.5, 9.0) * _lp2(s, 4300.0, 0.62)
    return 20e-6 * 10 ** (88.0 / 20) * h


def woofer_diffraction(f: np.ndarray, positions) -> np.ndarray:
    """The demo cabinet's diffraction response of the woofer, complex (A, F) at ("h"|"v", deg) positions."""
    from xo_fit.physics.baffle import diffraction, rectangle
    from xo_fit.physics.geometry import directions

    return diffraction(f, (0.0, WOOFER_HEIGHT), directions(positions), rectangle(*BAFFLE_EDGES),
                       radius=WOOFER_RADIUS, speed_of_sound=SPEED_OF_SOUND)


def woofer_response(f: np.ndarray) -> np.ndarray:
    """Complex pressure (Pa at 2.83 V, 1 m) of the demo woofer in its cabinet, on the axis."""
    return woofer_halfspace(f) * woofer_diffraction(f, [("h", 0)])[0] * _ripple(f, 0.25, 1.7, 0.3)


def _le(ts: ThieleSmall, f: np.ndarray) -> np.ndarray:
    s = 2j * np.pi * f
    w_ref = 2 * np.pi * 1000.0
    return ts.le * s**ts.le_exponent * w_ref ** (1 - ts.le_exponent)


def tweeter_response(f: np.ndarray) -> np.ndarray:
    """Complex pressure (Pa at 2.83 V, 1 m) of the demo tweeter."""
    s = 2j * np.pi * f
    h = _hp2(s, 820.0, 0.9) * _peak(s, 13500.0, 2.0, 2.5) * _lp2(s, 27000.0, 0.7)
    level = 20e-6 * 10 ** (91.0 / 20)
    return level * h * _ripple(f, 0.25, 1.3, 1.1)


def piston_directivity(ka: np.ndarray, angle_deg: float, f: np.ndarray) -> np.ndarray:
    """Pressure relative to the axis of a driver at ``angle_deg`` from it (F,): 2 J1(x)/x with x = ka sin t in
    front (a rigid piston in a baffle; Kinsler et al.); behind the baffle plane its 90 degree value, times
    a shadow that deepens above the baffle step by up to a first-order fall (invented for the demo)."""
    from scipy.special import j1

    t = np.radians(min(abs(angle_deg), 90.0))
    x = ka * np.sin(t)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.where(x < 1e-6, 1.0, 2 * j1(x) / np.where(x < 1e-6, 1.0, x))
    if abs(angle_deg) > 90:
        f_step = 115.0 / BAFFLE_WIDTH
        shadow = 1.0 / np.sqrt(1.0 + (f / f_step) ** 2)
        d = d * shadow ** ((abs(angle_deg) - 90.0) / 90.0)
    return d


def off_axis(f: np.ndarray, axis: np.ndarray, radius: float, angle: float) -> np.ndarray:
    """A driver's response at ``angle`` from its axis (either orbit: a round piston), complex Pa (F,), measured
    about the driver's own centre: its on-axis response times the piston directivity, no path term (the job's
    ``position`` and ``offset`` give each driver its path to every position)."""
    k = 2 * np.pi * f / SPEED_OF_SOUND
    # |2 J1(x)/x|: past the first null the lobes' sign is dropped (they lie 17 dB down and more), so the files'
    # phase stays smooth enough to interpolate, as a real cone's imperfect nulls keep it
    return axis * np.abs(piston_directivity(k * radius, angle, f))


def _curve_text(f: np.ndarray, z: np.ndarray, kind: str, title: str) -> str:
    lines = [f"* {title}", f"* invented demo data synthesised by xo_fit.demo; frequency Hz, "
             f"{'SPL dB' if kind == 'response' else 'impedance ohm'}, phase deg"]
    if kind == "response":
        mag = 20 * np.log10(np.abs(z) / 20e-6)
    else:
        mag = np.abs(z)
    ph = np.rad2deg(np.angle(z))
    lines += [f"{fi:.4f}\t{m:.4f}\t{p:.3f}" for fi, m, p in zip(f, mag, ph)]
    return "\n".join(lines) + "\n"


JOB_TEXT = """\
# The "Wren" stand-mount (invented demo scenario): 6.5-inch class woofer and
# 1-inch class dome tweeter in a 19 cm wide sealed cabinet, crossed at 2.2 kHz.
# The start values are the textbook third-order Butterworth ladders into the
# drivers' nominal 6 ohm (docs/references.md coefficients), a Zobel from Re and Le,
# a notch on the breakup and a 3 dB L-pad: the kind of hand design the fit
# then improves.
name = "wren-2way"

[grid]
f_min = 40
f_max = 20000
points = 300

[source]
voltage = 2.83
resistance = 0.05

# the cabinet's front, from the tweeter's centre (the reference point): 190 mm wide, 330 mm high
[baffle]
x = ["-95mm", "95mm"]
y = ["-260mm", "70mm"]
depth = "240mm"

# the woofer: a near field (below 400 Hz; it holds no baffle step) spliced with the far fields gated from
# 300 Hz; baffle = true multiplies the near field by this cabinet's diffraction at every position first
[driver.woofer]
response = { near = "data/woofer-near.txt", far = "data/woofer-response.txt", splice_hz = 400, baffle = true }
impedance = "data/woofer-impedance.txt"
reference_voltage = 2.83
offset = "18mm"                       # 18 mm behind the tweeter's acoustic centre
position = { x = 0, y = "-150mm" }    # 150 mm below it (the tweeter's centre is the reference point)
phase = "minimum"                     # a splice takes its phase from the joined magnitude
radius = "66mm"                       # the cone's effective radius: its directivity in the diffraction

# off axis: both orbits in 10 degree steps; the horizontal one is symmetric. The files are measured about
# the driver's own centre (time of flight removed), so xo_fit adds its path to every position
[driver.woofer.angles]
about = "driver"
horizontal = "data/polar/woofer-h{angle}.txt"
vertical = "data/polar/woofer-v{angle}.txt"
horizontal_angles = [10, 20, 30, 40, 50, 60, 70, 80, 90, 100, 110, 120, 130, 140, 150, 160, 170, 180]
vertical_angles = [-170, -160, -150, -140, -130, -120, -110, -100, -90, -80, -70, -60, -50, -40, -30, -20, -10,
                   10, 20, 30, 40, 50, 60, 70, 80, 90, 100, 110, 120, 130, 140, 150, 160, 170]
mirror = true

# the woofer's data sheet (free air) and its sealed box: the measured impedance above is the
# in-box one, fc = fs sqrt(1 + Vas/Vb) = 58 Hz; check prints what follows, the report the excursion
[driver.woofer.ts]
re = 5.4
le = "0.6mH"
fs = 33.49
qms = 1.963
qes = 0.358
vas = "24L"
sd = "137cm2"
xmax = "4mm"                     # linear one-way excursion
power = 50                       # W, programme rating

[driver.woofer.box]
type = "closed"
volume = "12L"

# gated from 300 Hz: the data below are a 2nd-order high-pass fitted to its
# lowest octave, and the phase is derived from the extended magnitude
[driver.tweeter]
response = "data/tweeter-response.txt"
impedance = "data/tweeter-impedance.txt"
reference_voltage = 2.83
extend_low = "order2"
phase = "minimum"
position = { x = 0, y = 0 }

[driver.tweeter.angles]
about = "driver"
horizontal = "data/polar/tweeter-h{angle}.txt"
vertical = "data/polar/tweeter-v{angle}.txt"
horizontal_angles = [10, 20, 30, 40, 50, 60, 70, 80, 90, 100, 110, 120, 130, 140, 150, 160, 170, 180]
vertical_angles = [-170, -160, -150, -140, -130, -120, -110, -100, -90, -80, -70, -60, -50, -40, -30, -20, -10,
                   10, 20, 30, 40, 50, 60, 70, 80, 90, 100, 110, 120, 130, 140, 150, 160, 170]
mirror = true

# woofer low-pass: L1, C1, L2 (Butterworth 3 at 2.2 kHz into 6 ohm)
[[part]]
name = "L1"
type = "L"
nodes = ["in", "w1"]
value = "0.65mH"
min = "0.1mH"
max = "3mH"
dcr = "18awg"

[[part]]
name = "C1"
type = "C"
nodes = ["w1", "0"]
value = "16uF"
min = "1uF"
max = "60uF"

[[part]]
name = "L2"
type = "L"
nodes = ["w1", "w2"]
value = "0.22mH"
min = "0.05mH"
max = "2mH"
dcr = "18awg"

[[part]]
name = "WOOFER"
type = "driver"
driver = "woofer"
nodes = ["w2", "0"]

# Zobel across the woofer: Rz = 1.25 Re, Cz = Le / Re^2
[[part]]
name = "RZ"
type = "R"
nodes = ["w2", "z1"]
value = "6.8"
min = "3"
max = "15"

[[part]]
name = "CZ"
type = "C"
nodes = ["z1", "0"]
value = "22uF"
min = "2uF"
max = "60uF"

# notch on the cone breakup near 5.4 kHz
[[part]]
name = "RN"
type = "R"
nodes = ["w2", "n1"]
value = "3.3"
min = "0.5"
max = "20"

[[part]]
name = "LN"
type = "L"
nodes = ["n1", "n2"]
value = "0.25mH"
min = "0.05mH"
max = "1.5mH"
dcr = "20awg"

[[part]]
name = "CN"
type = "C"
nodes = ["n2", "0"]
value = "3.3uF"
min = "0.5uF"
max = "15uF"

# tweeter high-pass: C3, L3, C4 (Butterworth 3 at 2.2 kHz into 6 ohm), then a 3 dB L-pad
[[part]]
name = "C3"
type = "C"
nodes = ["in", "t1"]
value = "8.2uF"
min = "1uF"
max = "30uF"

[[part]]
name = "L3"
type = "L"
nodes = ["t1", "0"]
value = "0.33mH"
min = "0.05mH"
max = "2mH"
dcr = "20awg"

[[part]]
name = "C4"
type = "C"
nodes = ["t1", "t2"]
value = "24uF"
min = "2uF"
max = "60uF"

[[part]]
name = "R1"
type = "R"
nodes = ["t2", "t3"]
value = "1.8"
min = "0.1"
max = "10"
rating = "10W"

[[part]]
name = "R2"
type = "R"
nodes = ["t3", "0"]
value = "15"
min = "2"
max = "50"

[[part]]
name = "TWEETER"
type = "driver"
driver = "tweeter"
nodes = ["t3", "0"]

# the system target applies to the listening window (ANSI/CTA-2034-A), not to one axis
[target]
band = [150, 16000]
level = "auto"
curve = "flat"
reference = "listening_window"

[target.way.woofer]
type = "lowpass"
alignment = "LR"
order = 4
fc = 2200

[target.way.tweeter]
type = "highpass"
alignment = "LR"
order = 4
fc = 2200

[cost]
impedance_min = 3.2

[stress]
power = 60                       # W into the rated impedance
rated_impedance = 4
"""


def write_scenario(folder: str | Path) -> Path:
    """Write the demo's measurement files and job into ``folder``; return the job's path."""
    folder = Path(folder)
    data = folder / "data"
    f = np.geomspace(10.0, 40000.0, 545)  # 1/48 octave
    # the woofer: a near field (no cabinet edges in it, the close microphone 22 dB up) and gated far fields
    fn = f[f <= NEAR_FIELD_TOP_HZ]
    near = woofer_halfspace(fn) * 10 ** (22 / 20) * _ripple(fn, 0.1, 1.1, 0.7)
    write_text(data / "woofer-near.txt", _curve_text(fn, near, "response",
                                                      "Wren woofer, near field (close to the cone), 2.83 V"))
    fw = f[f >= WOOFER_GATE_HZ]
    positions = [("h", 0)] + [("h", a) for a in H_ANGLES] + [("v", a) for a in V_ANGLES]
    woofer = woofer_halfspace(fw) * _ripple(fw, 0.25, 1.7, 0.3) * woofer_diffraction(fw, positions)  # (A, F)
    write_text(data / "woofer-response.txt", _curve_text(fw, woofer[0], "response",
                                                          "Wren woofer, in cabinet, 2.83 V, 1 m, gated (from 300 Hz)"))
    for (orbit, a), p in zip(positions[1:], woofer[1:]):
        write_text(data / "polar" / f"woofer-{orbit}{a}.txt",
                   _curve_text(fw, p, "response", f"Wren woofer, {'horizontal' if orbit == 'h' else 'vertical'} {a} "
                               "deg, 2.83 V, 1 m, gated (from 300 Hz); about the driver's centre"))
    write_text(data / "woofer-impedance.txt", _curve_text(f, small_signal_impedance(WOOFER, f), "impedance",
                                                           "Wren woofer, in cabinet"))
    # the tweeter's gate leaves nothing below 300 Hz: the job extends it (extend_low = "order2")
    ft = f[f >= TWEETER_GATE_HZ]
    write_text(data / "tweeter-response.txt",
               _curve_text(ft, tweeter_response(ft), "response",
                           "Wren tweeter, in cabinet, 2.83 V, 1 m, gated (from 300 Hz)"))
    write_text(data / "tweeter-impedance.txt", _curve_text(f, small_signal_impedance(TWEETER, f), "impedance",
                                                            "Wren tweeter, in cabinet"))
    for name, resp, radius, lo in (("tweeter", tweeter_response, TWEETER_RADIUS, TWEETER_GATE_HZ),):
        fd = f[f >= lo]
        axis = resp(fd)
        for orbit, angles in (("h", H_ANGLES), ("v", V_ANGLES)):
            for a in angles:
                write_text(data / "polar" / f"{name}-{orbit}{a}.txt",
                           _curve_text(fd, off_axis(fd, axis, radius, a), "response",
                                       f"Wren {name}, {'horizontal' if orbit == 'h' else 'vertical'} {a} deg, "
                                       "2.83 V, 1 m, gated; about the driver's centre (time of flight removed)"))
    job = folder / "job.toml"
    write_text(job, JOB_TEXT)
    return job
