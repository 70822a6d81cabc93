"""SPICE netlist export of a design, so that any circuit simulator can check the values.

The netlist has the source (an AC voltage behind the job's source resistance,
then a zero-volt ammeter), every part (a coil's DCR and a capacitor's ESR as
separate resistors in series), and one subcircuit per driver:

* a driver given by Thiele-Small parameters becomes its electrical
  equivalent: Re in series with Le (and L2 || R2 when given), then
  Res || Lces || Cmes with Res = Re Qms/Qes, Lces = Res/(Qms ws),
  Cmes = Qms/(Res ws) (R. H. Small, JAES 1972);
* a lossy voice coil given as a power law (le_exponent < 1) has no RLC
  equivalent: the lossy-coil circuit (Le, L2 || R2) fitted to its impedance on
  the job's grid stands in for it, its fit error stated in a comment;
* a measured driver becomes the same fitted circuit, fitted to its measured
  impedance on the grid (:mod:`xo_fit.physics.impedance_fit`), with the fit error in a
  comment; where no model fits (no resonance peak on the grid), a resistor of
  its lowest |Z| in the band, marked as a placeholder;
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

from xo_fit.job.model import Resistive, ThieleSmall
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
                sub, note = _driver_subckt(drv, system.drivers[i], system)
                subckts += sub
                notes.append(note)
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
    return Deck("\n".join(lines) + "\n", data_file, tuple(notes))


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


def _driver_subckt(spec, data, system) -> tuple[list[str], str]:
    """The subcircuit lines of driver ``spec`` and a one-line note on how it is modelled."""
    from xo_fit.errors import XoFitError
    from xo_fit.physics.impedance_fit import fit_on_grid

    name = f"DRV_{spec.name}"
    imp = spec.impedance
    out = [f".subckt {name} pos neg"]
    f = system.frequencies
    if isinstance(imp, ThieleSmall) and imp.le_exponent == 1.0:
        out += [f"* Thiele-Small equivalent: {_describe(imp)}", *_rlc(imp)]
        note = f"{spec.name}: its Thiele-Small equivalent circuit"
    elif isinstance(imp, Resistive):
        out += ["* resistive stand-in", f"RD pos neg {_n(imp.resistance)}"]
        note = f"{spec.name}: a resistor"
    else:
        what = (f"the power-law voice coil (le_exponent {imp.le_exponent:g})" if isinstance(imp, ThieleSmall)
                else f"the measured impedance ({imp.path})")
        try:
            fit = fit_on_grid(f, data.impedance, "ts-lossy")
        except XoFitError as e:
            fit = None
            why = e.message
        if fit is not None:
            err = (f"fit error {fit.rms_error_pct:.2f} % rms of |Z|, at most {fit.max_error_pct:.2f} % "
                   f"(at {fit.max_error_hz:.0f} Hz), over {f[0]:g}-{f[-1]:g} Hz")
            out += [comment(f"driver '{spec.name}': a lossy-coil Thiele-Small circuit fitted to {what}"),
                    f"* {err}", f"* fitted: {_describe(fit.params)}", *_rlc(fit.params)]
            note = f"{spec.name}: a circuit fitted to {what}, {err}"
        else:
            band = band_mask(f, system.job.target.band)
            zmin = float(np.min(np.abs(data.impedance[band])))
            out += [comment(f"PLACEHOLDER: driver '{spec.name}': no model fits {what}: {why}"),
                    "* a resistor of its lowest |Z| in the band stands in for it.",
                    "* Replace it with a model of the driver before trusting a simulation of this deck.",
                    f"RD pos neg {_n(zmin)}"]
            note = f"{spec.name}: a PLACEHOLDER resistor ({why}); replace it with a model of your own"
    out.append(f".ends {name}")
    return out, note


def export(system, values: np.ndarray, path: str | Path, title: str) -> Deck:
    """Write the deck atomically to ``path``; its control block writes ``<stem>.data``. Returns the deck."""
    path = Path(path)
    deck = build_deck(system, values, title, path.stem + ".data")
    write_text(path, deck.text)
    return deck
