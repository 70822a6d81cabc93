"""SPICE netlist export of a design, so that any circuit simulator can check the values.

The netlist has the source (an AC voltage behind the job's source resistance,
then a zero-volt ammeter), every part (a coil's DCR and a capacitor's ESR as
separate resistors in series), and one subcircuit per driver:

* a driver given by Thiele-Small parameters becomes its electrical
  equivalent: Re in series with Le (and L2 || R2 when given), then
  Res || Lces || Cmes with Res = Re Qms/Qes, Lces = Res/(Qms ws),
  Cmes = Qms/(Res ws) (R. H. Small, JAES 1972);
* a driver given by its ``[driver.NAME.ts]`` set (``impedance = "model"``) becomes the electrical analogue
  of :mod:`xo_fit.physics.box`: the same, with the box across the motional branch (closed: Lceb = Lces/alpha;
  vented: Lceb in series with the leakage Rel and the port's Cmep; Small 1972, 1973);
* a lossy voice coil given as a power law (le_exponent < 1) has no RLC
  equivalent: the lossy-coil circuit (Le, L2 || R2) fitted to its impedance on
  the job's grid stands in for it, its fit error stated in a comment;
* a measured driver becomes the same fitted circuit, fitted to its measured
  impedance on the grid (:mod:`xo_fit.physics.impedance_fit`), with the fit error in a
  comment; where that circuit misses by more than 10 % rms of |Z| in the target band, the vented-box circuit
  (lossy coil) fitted to it (:mod:`xo_fit.physics.vented_fit`: a driver in a vented box, two peaks) is tried
  and the closer one kept; where neither is within 10 %, a warning (a deck comment, and ``Deck.warnings``
  for the console) names the largest error and where; where no model fits at all (no resonance peak on the
  grid), a resistor of its lowest |Z| in the band, marked as a placeholder;
* a resistive stand-in becomes that resistor.

An ``.ac`` analysis over the job's grid and a control block close the deck:
``ngspice -b deck.cir`` runs it, prints each driver's voltage (dB re 1 V and
degrees) and the input impedance, and writes the complex driver voltages and
input current to a data file beside it (``wrdata``: frequency, then real and
imaginary part of each vector). Node names are the job's; the driver
subcircuits are named X<part>.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from xo_fit.grid import band_mask

from dataclasses import dataclass

from xo_fit.job.model import ModelImpedance, Resistive, ThieleSmall
from xo_fit.io.results import write_text

#: Node and element names the deck itself uses; a job's node of the same name is renamed.
_RESERVED = ("src", "src_a", "0", "in", "gnd")  # ngspice takes a node "gnd" (any case) as ground


@dataclass(frozen=True)
class Deck:
    """A SPICE deck: its ``text``, the ``data_file`` its control block writes (a bare file name, written in
    the simulator's working folder), and one ``notes`` line per driver saying how it is modelled."""

    text: str
    data_file: str
    notes: tuple[str, ...]
    warnings: tuple[str, ...] = ()


def _n(x: float) -> str:
    return repr(float(x))


def comment(text: str) -> str:
    """One SPICE comment line holding ``text``: control characters (a newline above all) become spaces, so that
    no text a user wrote (a job name, a file path) can end the comment and reach the deck as a statement."""
    return "* " + re.sub(r"[\x00-\x1f\x7f\u2028\u2029\x85]", " ", str(text))


def spice_names(names: list[str], keep: tuple[str, ...] = (), reserved: tuple[str, ...] = ()) -> dict[str, str]:
    """SPICE names for node or part names: SPICE reads names without regard to case and stops at some
    characters, so a name is kept only when it is plain (letters, digits, _) and no other name equals it
    ignoring case; the others get a plain form and a number ("W1" beside "w1" becomes "W1_2"). ``keep`` names
    map to themselves; no other name may take a ``reserved`` one."""
    out: dict[str, str] = {n: n for n in keep}
    taken = {n.lower() for n in (*keep, *reserved)}
    unique = set(names)
    folded = [n.lower() for n in unique]
    for k, n in enumerate(sorted(unique - set(keep)), start=1):
        plain = re.sub(r"[^A-Za-z0-9_]", "_", n)
        if plain != n or plain.lower() in taken or folded.count(n.lower()) > 1 or not plain:
            plain = f"{plain}_{k}"
            while plain.lower() in taken:
                plain += "x"
        out[n] = plain
        taken.add(plain.lower())
    return out


def netlist(system, values: np.ndarray, title: str, data_file: str = "xo_fit_deck.data") -> str:
    """The SPICE deck (text) of design ``values`` (P,) of ``system``."""
    return build_deck(system, values, title, data_file).text


def build_deck(system, values: np.ndarray, title: str, data_file: str = "xo_fit_deck.data") -> Deck:
    """The SPICE deck of design ``values`` (P,) of ``system``; its control block writes ``data_file``
    (made a plain file name: letters, digits, ``_ . -``)."""
    job = system.job
    net = system.network
    data_file = re.sub(r"[^A-Za-z0-9_.-]", "_", data_file).lstrip(".-") or "xo_fit_deck.data"
    nodes = sorted({n for p in job.parts for n in p.nodes})
    node = spice_names(nodes, keep=("0", "in"), reserved=_RESERVED)
    part = spice_names([p.name for p in job.parts], reserved=("SRC", "IN"))
    lines = [comment(title), "* exported by xo_fit; values in SI units", "*"]
    lines += [comment(f"node {a} is {b} here") for a, b in node.items() if a != b]
    lines += [comment(f"part {a} is {b} here") for a, b in part.items() if a != b]
    lines.append(f"VSRC src 0 DC 0 AC {_n(job.source_voltage)}")
    if job.source_resistance > 0:
        lines += [f"RSRC src src_a {_n(job.source_resistance)}", "VIN src_a in DC 0"]
    else:
        lines.append("VIN src in DC 0")
    lines[-1] += "  ; ammeter: i(vin) is the current into the network"
    r = net.series_resistance(np.asarray(values)[None])[0]
    subckts: list[str] = []
    notes: list[str] = []
    warnings: list[str] = []
    probes: list[str] = []
    modelled: set[str] = set()  # drivers whose subcircuit is written
    col = 0
    for p in job.parts:
        if p.type == "driver":
            drv = job.driver(p.driver)
            i = [d.name for d in job.drivers].index(p.driver)
            a, b = node[p.nodes[0]], node[p.nodes[1]]
            lines.append(f"X{part[p.name]} {a} {b} DRV_{drv.name}")
            probes.append(f"v({a},{b})" if a != "0" and b != "0" else f"v({a})" if a != "0" else f"(-v({b}))")
            if drv.name not in modelled:
                modelled.add(drv.name)
                sub, note, warn = _driver_subckt(drv, system.drivers[i], system)
                subckts += sub
                notes.append(note)
                warnings += warn
            continue
        v, rr = float(values[col]), float(r[col])
        col += 1
        a, b = node[p.nodes[0]], node[p.nodes[1]]
        name = part[p.name]
        if p.type == "R":
            lines.append(f"R{name} {a} {b} {_n(v)}")
            continue
        mid = f"{name}_s" if rr > 0 else b
        lines.append(f"{p.type}{name} {a} {mid} {_n(v)}")
        if rr > 0:
            lines.append(f"R{name}_{'dcr' if p.type == 'L' else 'esr'} {mid} {b} {_n(rr)}")
    f = system.frequencies
    per_decade = max(1, round((f.size - 1) / math.log10(f[-1] / f[0])))
    prints = " ".join(f"db({x}) ph({x})" for x in probes)
    control = [".control", "set wr_vecnames", "set wr_singlescale", "set units=degrees", "set width=200",
               "set height=100000", "option numdgt=10", "run",
               "* the complex driver voltages (V) and input current (A): frequency, then re, im of each",
               f"wrdata {data_file} " + " ".join(probes) + " i(vin)",
               "* each driver's voltage in dB re 1 V and degrees, and the input impedance in ohm",
               f"print {prints}", "print mag(v(in)/i(vin)) ph(v(in)/i(vin))", "quit", ".endc"]
    lines += ["", *subckts, "", f".ac dec {per_decade} {_n(f[0])} {_n(f[-1])}", *control, ".end"]
    return Deck("\n".join(lines) + "\n", data_file, tuple(notes), tuple(warnings))


def _rlc(imp: ThieleSmall) -> list[str]:
    """The subcircuit body of a Thiele-Small model with an ideal Le (and L2 || R2 when given)."""
    ws = 2 * math.pi * imp.fs
    res = imp.re * imp.qms / imp.qes
    out = [f"RE pos n1 {_n(imp.re)}", f"LE n1 n2 {_n(imp.le)}" if imp.le > 0 else "VLE n1 n2 DC 0"]
    if imp.l2 > 0 and imp.r2 > 0:
        out += [f"L2 n2 n3 {_n(imp.l2)}", f"R2 n2 n3 {_n(imp.r2)}"]
    else:
        out.append("VL2 n2 n3 DC 0")
    return out + [f"RES n3 neg {_n(res)}", f"LCES n3 neg {_n(res / (imp.qms * ws))}",
                  f"CMES n3 neg {_n(imp.qms / (res * ws))}"]


def _describe(imp: ThieleSmall) -> str:
    text = f"Re {imp.re:.4g}, Le {imp.le:.4g}, fs {imp.fs:.4g}, Qms {imp.qms:.4g}, Qes {imp.qes:.4g}"
    return text + (f", L2 {imp.l2:.4g}, R2 {imp.r2:.4g}" if imp.l2 > 0 and imp.r2 > 0 else "")


def _box_lines(el: dict) -> list[str]:
    """The subcircuit body of the electrical analogue :func:`xo_fit.physics.box.circuit` gives (element values)."""
    out = [f"RE pos n1 {_n(el['re'])}", f"LE n1 n2 {_n(el['le'])}" if el["le"] > 0 else "VLE n1 n2 DC 0"]
    if el["l2"] > 0 and el["r2"] > 0:
        out += [f"L2 n2 n3 {_n(el['l2'])}", f"R2 n2 n3 {_n(el['r2'])}"]
    else:
        out.append("VL2 n2 n3 DC 0")
    out += [f"RES n3 neg {_n(el['res'])}", f"LCES n3 neg {_n(el['lces'])}", f"CMES n3 neg {_n(el['cmes'])}"]
    if "cmep" in el:  # vented: the box's compliance, the leakage and the port's air mass in series
        out += [f"LCEB n3 b1 {_n(el['lceb'])}", f"REL b1 b2 {_n(el['rel'])}", f"CMEP b2 neg {_n(el['cmep'])}"]
    elif "lceb" in el:
        out.append(f"LCEB n3 neg {_n(el['lceb'])}")
    return out


#: A fitted circuit further than this from the impedance in the band (% rms of |Z|) is warned about.
BAND_WARN_PCT = 10.0


def _band_error(f: np.ndarray, z: np.ndarray, zm: np.ndarray, band: np.ndarray) -> tuple[float, float, float]:
    """The model's error in the band: rms and largest |Zm - Z| / |Z| (%), and where the largest lies (Hz)."""
    e = np.abs(zm[band] - z[band]) / np.abs(z[band])
    i = int(np.argmax(e))
    return 100 * float(np.sqrt(np.mean(e ** 2))), 100 * float(e[i]), float(f[band][i])


def _peaks(z: np.ndarray) -> int:
    """How many resonance peaks |Z| shows (rising 1.3x above its surroundings, as the fits read them)."""
    from scipy.signal import find_peaks

    from xo_fit.physics.vented_fit import MIN_PEAK_RATIO

    return int(find_peaks(np.log(np.abs(z)), prominence=np.log(MIN_PEAK_RATIO))[0].size)


def _fit(kind: str, f: np.ndarray, z: np.ndarray, band: np.ndarray) -> tuple:
    """One circuit fitted to ``z``: (label, fit, subcircuit lines, band error, description); XoFitError when none
    fits. "vented" tries the plain coil first and the lossy one only where that misses the band by over 2 %."""
    from xo_fit.physics.box import circuit, impedance
    from xo_fit.physics.impedance_fit import fit_on_grid
    from xo_fit.physics.thiele_small import small_signal_impedance
    from xo_fit.physics.vented_fit import fit_vented

    if kind == "ts-lossy":
        fit = fit_on_grid(f, z, "ts-lossy")
        return ("a lossy-coil Thiele-Small circuit", fit, _rlc(fit.params),
                _band_error(f, z, small_signal_impedance(fit.params, f), band), _describe(fit.params))
    best = None
    for lossy in (False, True):
        vf = fit_vented(f, z, lossy=lossy)
        ts, bx = vf.model()
        c = ("a vented-box circuit (Small 1973" + (", lossy coil)" if lossy else ")"), vf,
             _box_lines(circuit(ts, bx)), _band_error(f, z, impedance(ts, bx, f), band), _describe_vented(vf))
        best = c if best is None or c[3][0] < best[3][0] else best
        if best[3][0] <= 2.0:
            break
    assert best is not None, "the loop fits at least the plain coil"
    return best


def _fits(f: np.ndarray, z: np.ndarray, band: np.ndarray) -> tuple[list[tuple], str | None]:
    """Circuits fitted to impedance ``z`` (ohm, (F,)) on ``f`` (Hz), closest in the band first (see :func:`_fit`):
    the vented box first where |Z| shows two peaks, else the lossy-coil circuit; the other only where the first
    misses the band by more than BAND_WARN_PCT. Returns them and why none fits (None where one does)."""
    from xo_fit.errors import XoFitError

    out, why = [], None
    for kind in (("vented", "ts-lossy") if _peaks(z) >= 2 else ("ts-lossy", "vented")):
        try:
            out.append(_fit(kind, f, z, band))
        except XoFitError as e:
            why = why or e.message
        if out and min(c[3][0] for c in out) <= BAND_WARN_PCT:
            break
    return sorted(out, key=lambda c: c[3][0]), (None if out else why)


def _driver_subckt(spec, data, system) -> tuple[list[str], str, list[str]]:
    """The subcircuit lines of driver ``spec``, a one-line note on how it is modelled, and warnings."""
    name = f"DRV_{spec.name}"
    imp = spec.impedance
    out = [f".subckt {name} pos neg"]
    warnings: list[str] = []
    f = system.frequencies
    band = band_mask(f, system.job.target.band)
    if isinstance(imp, ThieleSmall) and imp.le_exponent == 1.0:
        out += [f"* Thiele-Small equivalent: {_describe(imp)}", *_rlc(imp)]
        note = f"{spec.name}: its Thiele-Small equivalent circuit"
    elif isinstance(imp, Resistive):
        out += ["* resistive stand-in", f"RD pos neg {_n(imp.resistance)}"]
        note = f"{spec.name}: a resistor"
    elif isinstance(imp, ModelImpedance):
        from xo_fit.model.drivers import driver_model
        from xo_fit.physics.box import circuit

        m = driver_model(system.job, spec)
        assert m is not None, "impedance = model needs a [driver.NAME.ts] table (the reader checks)"
        kind = {"none": "an infinite baffle", "closed": "a closed box", "vented": "a vented box"}[m.box.kind]
        out += [comment(f"driver '{spec.name}': its [driver.{spec.name}.ts] model in {kind} (Small 1972, 1973)"),
                *_box_lines(circuit(m.ts, m.box))]
        note = f"{spec.name}: its Thiele-Small equivalent circuit in {kind}"
    else:
        what = (f"the power-law voice coil (le_exponent {imp.le_exponent:g})" if isinstance(imp, ThieleSmall)
                else f"the measured impedance ({imp.path})")
        fits, why = _fits(f, data.impedance, band)
        if fits:
            label, fit, lines, (b_rms, b_max, b_hz), described = fits[0]
            err = (f"fit error {fit.rms_error_pct:.2f} % rms of |Z|, at most {fit.max_error_pct:.2f} % "
                   f"(at {fit.max_error_hz:.0f} Hz), over {f[0]:g}-{f[-1]:g} Hz")
            lo, hi = f[band][0], f[band][-1]
            inband = f"in the band {lo:.0f}-{hi:.0f} Hz {b_rms:.2f} % rms, at most {b_max:.2f} % at {b_hz:.0f} Hz"
            out += [comment(f"driver '{spec.name}': {label} fitted to {what}"), f"* {err}", f"* {inband}"]
            if b_rms > BAND_WARN_PCT:
                warnings.append(f"{spec.name}: no model fits {what} within {BAND_WARN_PCT:g} % rms of |Z| in the band "
                                f"{lo:.0f}-{hi:.0f} Hz; the closest, {label}, misses by {b_rms:.1f} % rms and "
                                f"{b_max:.0f} % at {b_hz:.0f} Hz: the deck's currents and voltages are that far off")
                out.append(comment("WARNING: " + warnings[-1]))
            out += [f"* fitted: {described}", *lines]
            note = f"{spec.name}: {label} fitted to {what}, {err}; {inband}"
        else:
            zmin = float(np.min(np.abs(data.impedance[band])))
            out += [comment(f"PLACEHOLDER: driver '{spec.name}': no model fits {what}: {why}"),
                    "* a resistor of its lowest |Z| in the band stands in for it.",
                    "* Replace it with a model of the driver before trusting a simulation of this deck.",
                    f"RD pos neg {_n(zmin)}"]
            note = f"{spec.name}: a PLACEHOLDER resistor ({why}); replace it with a model of your own"
    out.append(f".ends {name}")
    return out, note, warnings


def _describe_vented(fit) -> str:
    return (f"Re {fit.re:.4g}, Le {fit.le:.4g}, fs {fit.fs:.4g}, Qms {fit.qms:.4g}, Qes {fit.qes:.4g}, "
            f"Vas/Vb {fit.alpha:.4g}, fb {fit.fb:.4g}, QL {fit.ql:.3g}"
            + (f", L2 {fit.l2:.4g}, R2 {fit.r2:.4g}" if fit.l2 > 0 else ""))


def export(system, values: np.ndarray, path: str | Path, title: str) -> Deck:
    """Write the deck atomically to ``path``; its control block writes ``<stem>.data``. Returns the deck."""
    path = Path(path)
    deck = build_deck(system, values, title, path.stem + ".data")
    write_text(path, deck.text)
    return deck
