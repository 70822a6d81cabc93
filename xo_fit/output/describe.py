"""What `xo-fit check` shows of a loaded job, as lines of text (pure: the command prints them)."""

from __future__ import annotations

import numpy as np


def extension_text(spec, what: str, lo: float, hi: float, f: np.ndarray) -> str:
    """How a driver's file is extended to the grid ``f`` (Hz): "" where it is not."""
    from xo_fit.units import format_value

    low, high = ((spec.extend_low, spec.extend_high) if what == "response"
                 else (spec.impedance_extend_low, spec.impedance_extend_high))
    out = []
    if low != "none" and f[0] < lo:
        out.append(f"extended below to {format_value(f[0], 'Hz')} ({low})")
    if high != "none" and f[-1] > hi:
        out.append(f"extended above to {format_value(f[-1], 'Hz')} ({high})")
    return ", ".join(out)


def describe_ideal(src) -> str:
    """One line describing a driver's modelled data: a flat response (level in dB SPL), a resistor
    (ohm), a Thiele-Small model (Re, Le, fs, Qms, Qes) or a model in its box."""
    from xo_fit.job.model import FlatResponse, ModelImpedance, Resistive, ThieleSmall
    from xo_fit.units import format_value

    if isinstance(src, FlatResponse):
        return f"ideal flat response, {src.level_db:g} dB SPL, zero phase"
    if isinstance(src, Resistive):
        return f"ideal resistor, {format_value(src.resistance, 'ohm')}, zero phase"
    if isinstance(src, ThieleSmall):
        return (f"Thiele-Small model: Re {format_value(src.re, 'ohm')}, Le {format_value(src.le, 'H')}, "
                f"fs {format_value(src.fs, 'Hz')}, "
                f"Qms {src.qms:g}, Qes {src.qes:g}")
    if isinstance(src, ModelImpedance):
        return "the Thiele-Small model (below) in its box"
    return str(src)


def placement_lines(system) -> list[str]:
    """Where the drivers are and how each one's geometry enters the sums (``check``): the listening distance,
    then one line per driver (:func:`~xo_fit.physics.geometry.placement_line`)."""
    import math

    from xo_fit.physics.geometry import placement_line
    from xo_fit.units import format_value

    d = system.job.distance
    field = ("far field (distance \"far\"): path differences only" if math.isinf(d) else
             f"listening distance {format_value(d, 'm')} from the reference point: exact paths, levels 1/r")
    return [f"placement {field}"] + [f"  {placement_line(p, d)}" for p in system.placements]


def baffle_lines(system) -> list[str]:
    """The job's baffle and which drivers' curves take its diffraction (``check``); none without a [baffle]."""
    from xo_fit.output.baffle import applies_to
    from xo_fit.units import format_value

    b = system.job.baffle
    if b is None:
        return []
    depth = (f"; depth {format_value(b.depth, 'm')} (not used: the model takes a thin baffle)"
             if b.depth is not None else "")
    out = [f"baffle   x {format_value(b.x[0], 'm')} to {format_value(b.x[1], 'm')}, y {format_value(b.y[0], 'm')} to "
           f"{format_value(b.y[1], 'm')} from the reference point ({format_value(b.x[1] - b.x[0], 'm')} wide){depth}"]
    for spec in system.job.drivers:
        radius = f", piston radius {format_value(spec.radius, 'm')}" if spec.radius is not None else ", a point source"
        out.append(f"  {spec.name:<10} diffraction {applies_to(spec)}{radius}")
    return out


def describe(system) -> list[str]:
    """What ``xo-fit check`` prints of a loaded system (:class:`~xo_fit.model.system.System`): the grid, each
    driver's data and how it is extended, the off-axis positions and curves, the parts, the target, the free
    values and the nodes; one line of text each."""
    from xo_fit.units import format_value

    j = system.job
    f = system.frequencies
    per_oct = (f.size - 1) / np.log2(f[-1] / f[0])
    out = [f"job      {j.name}  ({j.path})",
           f"grid     {f.size} points, {format_value(f[0], 'Hz')} to {format_value(f[-1], 'Hz')}, "
           f"log-spaced ({per_oct:.1f} per octave)",
           f"source   {format_value(j.source_voltage, 'V')} behind {format_value(j.source_resistance, 'ohm')}",
           "drivers"]
    for spec, d in zip(j.drivers, system.drivers):
        out += driver_lines(system, spec, d)
    out += placement_lines(system)
    out += baffle_lines(system)
    out += off_axis_lines(system)
    out += part_lines(j)
    out += target_lines(j)
    free = [p.name for p in j.free_parts]
    out.append(f"free     {len(free)}: {', '.join(free) if free else '(none: every value is fixed)'}")
    nodes = sorted({n for p in j.parts for n in p.nodes}, key=lambda n: ({"in": 0, "0": 1}.get(n, 2), n))
    out.append(f"nodes    {len(nodes)}: {', '.join(nodes)}")
    return out


def driver_lines(system, spec, d) -> list[str]:
    """One driver: its response and impedance (file, range, phase, extension or splice), reference and
    offset, its data-sheet model, its angle files."""
    from xo_fit.output.driver_text import model_lines
    from xo_fit.units import format_value

    j, f = system.job, system.frequencies
    out = [f"  {spec.name}"]
    for what, curve, phase in (("response", d.response_curve, d.response_phase),
                               ("impedance", d.impedance_curve, d.impedance_phase)):
        if curve is None:
            src = spec.response if what == "response" else spec.impedance
            out.append(f"    {what:<9} {describe_ideal(src)}")
            continue
        lo, hi = curve.f_range
        kind = {"measured": "phase measured", "minimum": "phase derived (minimum phase)"}[phase]
        if what == "response" and phase == "measured" and curve.phase_deg is None:
            kind = "no phase"
        if what == "response" and d.splice is not None:
            sp = spec.response
            out.append(f"    {what:<9} spliced at {format_value(sp.splice_hz, 'Hz')}: near field {sp.near} below, "
                       f"far field {sp.far} above; near field {d.splice.gain_db:+.2f} dB to match over the third "
                       f"of an octave there; {format_value(lo, 'Hz')} to {format_value(hi, 'Hz')}, {kind}")
        else:
            out.append(f"    {what:<9} {curve.path}  {len(curve.frequency)} points, "
                       f"measured {format_value(lo, 'Hz')} to {format_value(hi, 'Hz')}, {kind}")
        ext = extension_text(spec, what, lo, hi, f)
        if ext:
            out.append(f"    {'':<9} {ext}")
    out.append(f"    reference {format_value(spec.reference_voltage, 'V')}, offset {format_value(spec.offset, 'm')}")
    out += model_lines(j, spec)
    if spec.angles is not None:
        files = spec.angles.files()
        mirrored = sum(1 for pos, (_, a) in files.items() if a != pos[1])
        out.append(f"    angles    {len(files) + 1} positions with the axis ({sum(1 for p in files if p[0] == 'h')} "
                   f"horizontal, {sum(1 for p in files if p[0] == 'v')} vertical)"
                   + (f", {mirrored} mirrored" if mirrored else "")
                   + (f"; each a far field spliced with the near field at {format_value(d.splice.splice_hz, 'Hz')} "
                      f"({d.splice.gain_db:+.2f} dB, as on the axis)" if d.splice is not None else ""))
    return out


def off_axis_lines(system) -> list[str]:
    """The off-axis positions and the curves they allow (and what the others need)."""
    if not system.positions:
        return []
    from xo_fit.model.acoustics import curve_weights, missing_positions

    weights = curve_weights(system.positions)
    have = [k.replace("_", " ") for k, w in weights.items() if w is not None]
    lack = []
    for k in (k for k, w in weights.items() if w is None):
        miss = missing_positions(system.positions, k)
        lack.append(f"{k.replace('_', ' ')} (needs {', '.join(f'{o}{a}' for o, a in miss[:4])}"
                    f"{' ...' if len(miss) > 4 else ''})")
    return [f"off axis {len(system.positions)} positions; curves: on axis"
            + "".join(f", {x}" for x in have) + (f"; not available: {'; '.join(lack)}" if lack else "")]


def part_lines(j) -> list[str]:
    """The parts table: name, type, nodes, value, range and notes (free or fixed, coil DCR, ESR, tolerance)."""
    from xo_fit.units import format_value

    out = ["parts", f"  {'name':<10} {'type':<6} {'nodes':<14} {'value':<11} {'range':<24} {'notes'}"]
    for p in j.parts:
        nodes = f"{p.nodes[0]} -> {p.nodes[1]}"
        if p.type == "driver":
            out.append(f"  {p.name:<10} {p.type:<6} {nodes:<14} {'':<11} {'':<24} driver {p.driver}")
            continue
        value = format_value(p.value, p.unit) if p.value is not None else "-"
        rng = (f"{format_value(p.min, p.unit)} .. {format_value(p.max, p.unit)}" if p.min is not None else "")
        notes = ["free" if p.free else "fixed"]
        if p.type == "L" and p.dcr_wire:
            from xo_fit.physics.coils import coil_dcr
            at = p.value if p.value is not None else float(np.sqrt(p.min * p.max))
            notes.append(f"dcr from {p.dcr * 1e3:.3f} mm wire ({format_value(float(coil_dcr(at, p.dcr)), 'ohm')} "
                         f"at {format_value(at, 'H')})")
        elif p.type == "L" and p.dcr:
            notes.append(f"dcr {format_value(p.dcr, 'ohm')}")
        if p.type == "C" and p.esr:
            notes.append(f"esr {format_value(p.esr, 'ohm')}")
        if p.tolerance is not None:
            notes.append(f"tol {p.tolerance * 100:g}%")
        out.append(f"  {p.name:<10} {p.type:<6} {nodes:<14} {value:<11} {rng:<24} {', '.join(notes)}")
    return out


def target_lines(j) -> list[str]:
    """The target: band, level, curve, and each way's type, alignment, frequencies and polarity."""
    if not j.target.ways:
        return []
    from xo_fit.model.targets import polarities
    from xo_fit.units import format_value

    pol = polarities(j.target.ways)
    band = j.target.band
    level = "auto" if j.target.level == "auto" else f"{j.target.level:g} dB SPL"
    out = [f"target   band {format_value(band[0], 'Hz')} to {format_value(band[1], 'Hz')}" if band else
           "target   band: the whole grid",
           f"         level {level}, curve {j.target.curve}"
           + (", applied to the listening window" if j.target.reference == "listening_window" else "")]
    for w in j.target.ways:
        where = (f"{format_value(w.fc_low, 'Hz')} to {format_value(w.fc_high, 'Hz')}" if w.type == "bandpass"
                 else (f"at {format_value(w.fc, 'Hz')}" if w.fc else ""))
        shape = "" if w.type == "fullrange" else f" {w.alignment}{w.order}"
        out.append(f"  {w.driver:<10} {w.type}{shape}{' ' + where if where else ''}, "
                   f"{'inverted' if pol[w.driver] < 0 else 'normal'} polarity")
    return out
