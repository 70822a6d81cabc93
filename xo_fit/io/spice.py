"""SPICE netlist export of a design, so that any circuit simulator can check the values.

The netlist has the source (an AC voltage behind the job's source resistance),
every part (a coil's DCR and a capacitor's ESR as separate resistors in
series), and one subcircuit per driver:

* a driver given by Thiele-Small parameters becomes its electrical
  equivalent: Re in series with Le, then Res || Lces || Cmes with
  Res = Re Qms/Qes, Lces = Res/(Qms ws), Cmes = Qms/(Res ws) (R. H. Small,
  JAES 1972); a lossy voice coil (le_exponent < 1) has no RLC equivalent and
  is exported as the ideal Le with a comment;
* a resistive stand-in becomes that resistor;
* a measured driver becomes a placeholder subcircuit: a resistor equal to the
  lowest measured |Z| in the band, marked so that the user replaces it with a
  model of their own.

An ``.ac`` analysis over the job's grid closes the deck. Node names are the
job's; the driver subcircuits are named X<part>.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from .job import Resistive, ThieleSmall
from .results import write_text


def _n(x: float) -> str:
    return repr(float(x))


def comment(text: str) -> str:
    """One SPICE comment line holding ``text``: control characters (a newline above all) become spaces, so that
    no text a user wrote (a job name, a file path) can end the comment and reach the deck as a statement."""
    return "* " + re.sub(r"[\x00-\x1f\x7f\u2028\u2029\x85]", " ", str(text))


def spice_names(names: list[str], keep: tuple[str, ...] = ()) -> dict[str, str]:
    """SPICE names for node or part names: SPICE reads names without regard to case and stops at some
    characters, so a name is kept only when it is plain (letters, digits, _) and no other name equals it
    ignoring case; the others get a plain form and a number ("W1" beside "w1" becomes "W1_2")."""
    out: dict[str, str] = {n: n for n in keep}
    taken = {n.lower() for n in keep}
    unique = set(names)
    folded = [n.lower() for n in unique]
    for k, n in enumerate(sorted(unique - set(keep)), start=1):
        plain = re.sub(r"[^A-Za-z0-9_]", "_", n)
        if plain != n or plain.lower() in taken or folded.count(n.lower()) > 1:
            plain = f"{plain}_{k}"
            while plain.lower() in taken:
                plain += "x"
        out[n] = plain
        taken.add(plain.lower())
    return out


def netlist(system, values: np.ndarray, title: str) -> str:
    """The SPICE deck (text) of design ``values`` (P,) of ``system``."""
    job = system.job
    net = system.network
    nodes = sorted({n for p in job.parts for n in p.nodes})
    node = spice_names(nodes, keep=("0", "in"))
    part = spice_names([p.name for p in job.parts])
    lines = [comment(title), "* exported by xo_fit; values in SI units", "*"]
    lines += [comment(f"node {a} is {b} here") for a, b in node.items() if a != b]
    lines += [comment(f"part {a} is {b} here") for a, b in part.items() if a != b]
    lines.append(f"VSRC src 0 DC 0 AC {_n(job.source_voltage)}")
    lines.append(f"RSRC src in {_n(job.source_resistance)}" if job.source_resistance > 0 else "VAMP src in DC 0")
    r = net.series_resistance(np.asarray(values)[None])[0]
    subckts = []
    col = 0
    for p in job.parts:
        if p.type == "driver":
            drv = job.driver(p.driver)
            i = [d.name for d in job.drivers].index(p.driver)
            lines.append(f"X{part[p.name]} {node[p.nodes[0]]} {node[p.nodes[1]]} DRV_{drv.name}")
            subckts.append(_driver_subckt(drv, system.drivers[i], system))
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
    lines += ["", *sum(subckts, []), "", f".ac dec {per_decade} {_n(f[0])} {_n(f[-1])}", ".end"]
    return "\n".join(lines) + "\n"


def _driver_subckt(spec, data, system) -> list[str]:
    name = f"DRV_{spec.name}"
    imp = spec.impedance
    out = [f".subckt {name} pos neg"]
    if isinstance(imp, ThieleSmall):
        ws = 2 * math.pi * imp.fs
        res = imp.re * imp.qms / imp.qes
        if imp.le_exponent != 1.0:
            out.append(f"* lossy voice coil (le_exponent {imp.le_exponent:g}) exported as the ideal Le")
        out += [f"* Thiele-Small equivalent: Re {imp.re:g}, Le {imp.le:g}, fs {imp.fs:g}, Qms {imp.qms:g}, Qes {imp.qes:g}",
                f"RE pos n1 {_n(imp.re)}",
                f"LE n1 n2 {_n(imp.le)}" if imp.le > 0 else "VLE n1 n2 DC 0",
                f"RES n2 neg {_n(res)}", f"LCES n2 neg {_n(res / (imp.qms * ws))}",
                f"CMES n2 neg {_n(imp.qms / (res * ws))}"]
    elif isinstance(imp, Resistive):
        out += ["* resistive stand-in", f"RD pos neg {_n(imp.resistance)}"]
    else:
        from ..grid import band_mask

        band = band_mask(system.frequencies, system.job.target.band)
        zmin = float(np.min(np.abs(data.impedance[band])))
        out += [comment(f"PLACEHOLDER: driver '{spec.name}' was measured ({spec.impedance.path});"),
                "* a resistor of its lowest |Z| in the band stands in for it.",
                "* Replace it with a model of the driver before trusting a simulation of this deck.",
                f"RD pos neg {_n(zmin)}"]
    out.append(f".ends {name}")
    return out


def export(system, values: np.ndarray, path: str | Path, title: str) -> Path:
    """Write the deck atomically; returns the path."""
    write_text(path, netlist(system, values, title))
    return Path(path)
