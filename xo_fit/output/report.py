"""The designer's report: one self-contained HTML page (images inline) for designs, overlaid.

:func:`write_report` is handed loaded designs (:class:`~xo_fit.output.design.Design`
and :class:`~xo_fit.output.design.Spread`); it never reads a job or a result itself.
Figures: the summed response against the target (with the p05-p95 band of a
spread), each way against its way target, the phase error through each
crossover and the reverse-polarity null, the group delay, and the impedance
with the floor and 80 % of the rated impedance. Tables: metrics, the part list
(source, tolerance, combination, stress, range limits), findings and cautions.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from xo_fit.model.cost import phase_error_deg
from xo_fit.errors import XoFitError
from xo_fit.io.results import atomic_path
from xo_fit.output.plots import crossover_pairs, finish_axes, plain, png_bytes, set_ylim, spl_db_of


def _entries(items: list) -> list[tuple]:
    """(label, design, spread columns or None) of each item, labels made unique."""
    out = []
    for x in items:
        design = getattr(x, "design", x)
        columns = getattr(x, "columns", None) if design is not x else None
        out.append([plain(design.label or design.stage), design, columns])
    labels = [e[0] for e in out]
    for k, e in enumerate(out):
        if labels.count(e[0]) > 1:
            e[0] = f"{e[0]} {labels[:k + 1].count(e[0])}"
    return [tuple(e) for e in out]


def _check_alike(entries: list[tuple]) -> None:
    base = entries[0][1].system
    f = base.frequencies
    names = [d.name for d in base.job.drivers]
    for label, d, _ in entries[1:]:
        g = d.system.frequencies
        if g.shape != f.shape or not np.allclose(g, f) or [x.name for x in d.system.job.drivers] != names:
            raise XoFitError(f"designs overlaid in one report need the same grid and drivers; '{label}' differs "
                             f"from '{entries[0][0]}' (report them separately)")


def _figures(entries: list[tuple]) -> dict[str, bytes]:
    """The report's figures as PNG bytes, by name."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    base = entries[0][1].system
    f = base.frequencies
    names = [d.name for d in base.job.drivers]
    scored = [d.scored for _, d, _ in entries]
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    shades = ["k", "tab:red", "tab:blue", "tab:green", "tab:purple"]  # one distinct colour per result
    figs: dict[str, bytes] = {}
    top = float(np.max(spl_db_of(scored[0].sim.total[0])))

    # 1. summed response against the target (with the tolerance band of a spread); an off-axis job referred to
    # its listening window shows that curve too, the one the target and the spread judge
    lw_ref = base.job.target.reference == "listening_window" and bool(base.positions)
    fig, ax = plt.subplots(figsize=(9, 4.2))
    for k, ((label, _, spread), s) in enumerate(zip(entries, scored)):
        c = shades[k % len(shades)]
        if spread is not None:
            ax.fill_between(f, spread["sum_p05_db"], spread["sum_p95_db"], color=c, alpha=0.18, lw=0,
                            label=f"p05-p95, {label}")
        ax.semilogx(f, spl_db_of(s.sim.total[0]), color=c, lw=2.0 if k == 0 else 1.4, label=f"sum, {label}")
        if lw_ref:
            ax.semilogx(f, entries[k][1].system.reference_db(s.sim)[0], color=c, ls="-.", lw=1.4,
                        label=f"listening window, {label}")
    if scored[0].targets is not None:
        ax.semilogx(f, scored[0].level_db + 20 * np.log10(np.abs(scored[0].targets.system)), "k--", lw=1.0,
                    label="target")
    finish_axes(ax, "SPL (dB)", ("Listening window (the target's curve) and on-axis sum against the target, "
                                 "spread bands of the listening window") if lw_ref
                else "Summed response against the target", f, top=top)
    figs["sum"] = png_bytes(fig)

    # 2. each way against its way target
    fig, ax = plt.subplots(figsize=(9, 4.2))
    for k, s in enumerate(scored):
        for i, n in enumerate(names):
            ax.semilogx(f, spl_db_of(s.sim.pressure[0, i]), color=colors[i % len(colors)], lw=1.4 if k == 0 else 0.9,
                        alpha=1.0 if k == 0 else 0.5, label=f"{n}, {entries[k][0]}")
            if k == 0 and s.targets is not None and s.targets.has_way[i]:
                ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(s.targets.ways[i])), color=colors[i % len(colors)],
                            ls="--", lw=0.9, label=f"{n} target")
    finish_axes(ax, "SPL (dB)", "Each way against its way target", f, top=top)
    figs["ways"] = png_bytes(fig)

    # 3. phase error through the crossover, and 4. the reverse-polarity null
    pairs = crossover_pairs(scored[0])
    if pairs:
        fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 3.8))
        for k, s in enumerate(scored):
            p = s.sim.pressure[0]
            for a, b, region in pairs:
                err = phase_error_deg(p[a] / p[b], np.rad2deg(np.angle(s.targets.ways[a] / s.targets.ways[b])))
                ax1.semilogx(f[region], err[region], color=shades[k % len(shades)], lw=1.5,
                             label=f"{names[a]}-{names[b]}, {entries[k][0]}")
                flipped = p.sum(axis=0) - 2 * p[b]
                ax2.semilogx(f, spl_db_of(flipped), color=shades[k % len(shades)], lw=1.3,
                             label=f"{names[b]} reversed, {entries[k][0]}")
        ax1.axhline(0, color="k", lw=0.7)
        ax1.set_ylim(-180, 180)  # the error is wrapped to +-180 deg: nothing is cut off
        ax1.set_yticks([-180, -90, -45, 0, 45, 90, 180])
        ax1.set_title("Phase error through the crossover (deg)", fontsize=10)
        ax1.grid(True, which="both", alpha=0.3)
        ax1.legend(fontsize=7)
        set_ylim(ax2, top - 45, top + 6)
        ax2.set_title("Reverse-polarity null: deep and centred at the crossover", fontsize=10)
        ax2.grid(True, which="both", alpha=0.3)
        ax2.legend(fontsize=7)
        fig.tight_layout()
        figs["phase"] = png_bytes(fig)

    # 5. group delay of the sum
    fig, ax = plt.subplots(figsize=(9, 3.2))
    for k, s in enumerate(scored):
        ph = np.unwrap(np.angle(s.sim.total[0]))
        gd = -np.gradient(ph, 2 * np.pi * f) * 1e3
        ax.semilogx(f, gd, color=shades[k % len(shades)], lw=1.4, label=entries[k][0])
    finish_axes(ax, "group delay (ms)", "Group delay of the summed response", f)
    figs["delay"] = png_bytes(fig)

    # 6. impedance with the floor and the 80 % line of the rated impedance
    job = base.job
    rated = job.stress.rated_impedance
    fig, ax = plt.subplots(figsize=(9, 3.8))
    ax2 = ax.twinx()
    for k, s in enumerate(scored):
        z = s.sim.impedance[0]
        ax.semilogx(f, np.abs(z), color=shades[k % len(shades)], lw=1.6, label=f"|Z|, {entries[k][0]}")
        ax2.semilogx(f, np.rad2deg(np.angle(z)), color=shades[k % len(shades)], lw=0.8, ls=":")
    if job.cost.impedance_min > 0:
        ax.axhline(job.cost.impedance_min, color="tab:red", ls="--", lw=1.0, label=f"floor {job.cost.impedance_min:g} Ω")
    if rated:
        ax.axhline(0.8 * rated, color="tab:orange", ls="-.", lw=1.0, label=f"80 % of {rated:g} Ω rated")
    set_ylim(ax, 0, float(np.max(np.abs(scored[0].sim.impedance[0]))) * 1.15)
    ax2.set_ylim(-90, 90)
    ax2.set_ylabel("phase (deg, dotted)")
    finish_axes(ax, "|Z| (Ω)", "Impedance the amplifier sees", f)
    figs["impedance"] = png_bytes(fig)

    # 8. off axis: the ANSI/CTA-2034-A curves with the DIs, and level against angle and frequency per orbit
    off = entries[-1][1].off_axis() if base.positions else None
    if off is not None:
        from xo_fit.model.acoustics import power_db

        positions, p, curves = off
        label = entries[-1][0]
        fig, ax = plt.subplots(figsize=(9, 4.6))
        ax2 = ax.twinx()
        styles = {"on_axis": ("k", 1.8), "listening_window": ("tab:blue", 1.6), "early_reflections": ("tab:green", 1.3),
                  "sound_power": ("tab:red", 1.3), "estimated_in_room": ("tab:purple", 1.1)}
        for name, (c, lw) in styles.items():
            if name in curves:
                ax.semilogx(f, power_db(curves[name]), color=c, lw=lw, label=name.replace("_", " "))
        if "listening_window" in curves:
            for other, c in (("sound_power", "tab:red"), ("early_reflections", "tab:green")):
                if other in curves:
                    ax2.semilogx(f, power_db(curves["listening_window"]) - power_db(curves[other]), color=c, ls=":",
                                 lw=1.2, label=f"{other.replace('_', ' ')} DI")
            ax2.set_ylim(-2, 20)
            ax2.set_ylabel("DI (dB, dotted)")
            ax2.legend(fontsize=7, loc="lower right")
        top_off = float(np.max(power_db(curves["on_axis"])))
        finish_axes(ax, "SPL (dB)", f"Directivity curves (ANSI/CTA-2034-A), {label}", f, top=top_off)
        figs["directivity"] = png_bytes(fig)

        level = spl_db_of(p)  # (A, F)
        orbits = [(o, t) for o, t in (("h", "horizontal"), ("v", "vertical"))
                  if sum(1 for q in positions if q[0] == o or q == ("h", 0)) > 2]
        if orbits:
            fig, axes = plt.subplots(1, len(orbits), figsize=(11 if len(orbits) > 1 else 7, 4.2), squeeze=False,
                                     constrained_layout=True)
            mesh = None
            for ax, (o, title) in zip(axes[0], orbits):
                rows = sorted({(q[1] if q[0] == o else q[1]) for q in positions
                               if q[0] == o or q in (("h", 0), ("h", 180))})
                index = {q: i for i, q in enumerate(positions)}
                grid = np.array([level[index[("h", a) if a in (0, 180) else (o, a)]] - level[0] for a in rows])
                mesh = ax.pcolormesh(f, rows, np.clip(grid, -30, 3), shading="nearest", cmap="viridis",
                                     vmin=-30, vmax=3)
                ax.set_xscale("log")
                ax.set_xlabel("frequency (Hz)")
                ax.set_ylabel("angle (deg)")
                ax.set_title(f"{title} orbit, level re on-axis (dB), {label}", fontsize=10)
            fig.colorbar(mesh, ax=list(axes[0]), shrink=0.9, label="dB re on-axis")
            figs["angles"] = png_bytes(fig)

    # 7. the trade-off of a prune: cost against part count
    pruned = [d for _, d, _ in entries if "prune" in d.sections]
    if pruned:
        from xo_fit.output.plots import pruning_figure

        sec = pruned[0].sections["prune"]
        figs["prune"] = png_bytes(pruning_figure(plt, sec["steps"], sec["chosen_step"],
                                                 "Pruning: cost and rms error against the number of parts"))
    return figs


def _values_table(entries: list[tuple], esc) -> str:
    """Part values side by side, one column per result, with each part's range; a value on a bound marked."""
    job = entries[0][1].job
    heads = "".join(f"<th>{esc(label)}</th>" for label, _, _ in entries)
    rows = []
    from xo_fit.units import format_value

    for p in job.valued_parts:
        rng = f"{format_value(p.min, p.unit)} .. {format_value(p.max, p.unit)}" if p.free else "fixed"
        cells = []
        for _, d, _ in entries:
            v = d.values.get(p.name)
            if v is None:
                cells.append("<td>removed</td>")
                continue
            at = d.limits.get(p.name)
            cells.append(f"<td>{esc(format_value(v, p.unit))}{f' <b>(at its {at})</b>' if at else ''}</td>")
        rows.append(f"<tr><td>{esc(p.name)}</td><td>{p.type}</td><td>{esc(rng)}</td>{''.join(cells)}</tr>")
    return (f"<h2>Values</h2><table><tr><th>part</th><th>kind</th><th>range</th>{heads}</tr>{''.join(rows)}</table>")


def _targets_table(job, esc) -> str:
    from xo_fit.model.targets import polarities
    from xo_fit.units import format_value

    if not job.target.ways:
        return "<h2>Targets</h2><p>No way targets: metrics only.</p>"
    pol = polarities(job.target.ways)
    rows = []
    for w in job.target.ways:
        where = (f"{format_value(w.fc_low, 'Hz')} to {format_value(w.fc_high, 'Hz')}" if w.type == "bandpass"
                 else (format_value(w.fc, "Hz") if w.fc else ""))
        shape = "" if w.type == "fullrange" else f"{w.alignment} order {w.order}"
        rows.append(f"<tr><td>{esc(w.driver)}</td><td>{w.type}</td><td>{esc(shape)}</td><td>{esc(where)}</td>"
                    f"<td>{'inverted' if pol[w.driver] < 0 else 'normal'}</td></tr>")
    band = job.target.band
    level = "automatic" if job.target.level == "auto" else f"{job.target.level:g} dB SPL"
    info = (f"Band {format_value(band[0], 'Hz')} to {format_value(band[1], 'Hz')}" if band else "The whole grid") + \
        f"; level {level}; shaping curve {esc(job.target.curve)}; impedance floor " + \
        (f"{job.cost.impedance_min:g} Ω." if job.cost.impedance_min else "none.")
    return (f"<h2>Targets</h2><p>{info}</p><table><tr><th>way</th><th>type</th><th>alignment</th><th>at</th>"
            f"<th>polarity</th></tr>{''.join(rows)}</table>")


def _breakdown_table(entries: list[tuple], esc) -> str:
    rows = []
    for label, d, _ in entries:
        b = d.breakdown
        if b is None:
            continue
        for w in b["ways"]:
            rows.append(f"<tr><td>{esc(label)}</td><td>{esc(w['way'])} ({w['from_hz']:.0f}-{w['to_hz']:.0f} Hz)</td>"
                        f"<td>{w['rms_db']:.2f}</td><td>{w['worst_db']:+.2f} at {w['worst_hz']:.0f} Hz</td><td></td></tr>")
        for c in b["crossovers"]:
            rows.append(f"<tr><td>{esc(label)}</td><td>crossover {esc(c['ways'])} ({c['from_hz']:.0f}-"
                        f"{c['to_hz']:.0f} Hz)</td><td>{c['sum_rms_db']:.2f}</td><td>{c['sum_worst_db']:+.2f} at "
                        f"{c['sum_worst_hz']:.0f} Hz</td><td>{c['phase_worst_deg']:+.1f} at "
                        f"{c['phase_worst_hz']:.0f} Hz</td></tr>")
    if not rows:
        return ""
    return ("<h2>Where the error lies</h2><table><tr><th>result</th><th>way or region</th><th>rms error (dB)</th>"
            f"<th>worst error (dB)</th><th>worst phase error (deg)</th></tr>{''.join(rows)}</table>")


def _netlist_table(job, esc) -> str:
    rows = "".join(f"<tr><td>{esc(p.name)}</td><td>{p.type if p.type != 'driver' else 'driver ' + esc(p.driver)}</td>"
                   f"<td>{esc(p.nodes[0])}</td><td>{esc(p.nodes[1])}</td></tr>" for p in job.parts)
    return ("<h2>Network</h2><p>Node \"in\" is the amplifier's output, \"0\" its return; a driver's first node is "
            f"its positive terminal.</p><table><tr><th>part</th><th>kind</th><th>from node</th><th>to node</th></tr>"
            f"{rows}</table>")


def write_report(items: list, out: Path, command: list[str] | None = None) -> Path:
    """report.html (self-contained: images inline) and its PNGs for designs and spreads, overlaid in one page.

    ``command``: the command line that made it, shown with the version and date."""
    import base64
    import html

    from xo_fit.output.cautions import GENERAL, design_cautions, load_cautions
    from xo_fit.stages.snapping import combination_text
    from xo_fit.io.results import write_text
    from xo_fit.model.stress import epdr
    from xo_fit.units import format_value

    if not items:
        raise XoFitError("nothing to report: give at least one design")
    entries = _entries(items)
    _check_alike(entries)
    job = entries[0][1].system.job
    figs = _figures(entries)
    from xo_fit.io.results import make_folder

    out = make_folder(out)
    for name, data in figs.items():
        with atomic_path(out / f"{name}.png", suffix=".png") as tmp:
            tmp.write_bytes(data)

    def esc(x) -> str:
        return html.escape(str(x))

    metric_rows = []
    for label, d, _ in entries:
        s = d.scored
        m = s.metrics
        e = float(np.min(epdr(s.sim.impedance[0])))
        metric_rows.append(
            f"<tr><td>{esc(label)}</td><td>{'' if s.cost is None else f'{s.cost:.4g}'}</td>"
            f"<td>{m.get('rms_error_db', float('nan')):.2f}</td><td>{m.get('max_error_db', float('nan')):.2f}</td>"
            f"<td>{m.get('phase_mismatch_deg', float('nan')):.1f}</td><td>{m['impedance_min_ohm']:.2f} at "
            f"{m['impedance_min_hz']:.0f} Hz</td><td>{e:.2f}</td></tr>")
    last_label, last, _ = entries[-1]
    last_sys = last.system
    st = None
    if last_sys.job.stress.power:
        last.stress  # computes and keeps the stress report
        st = last.info["stress_report"]
    stress_by = {p.name: p for p in st.parts} if st else {}
    limits = last.limits
    part_rows = []
    for p, v in zip(last_sys.job.valued_parts, last.array):
        entry = last.part_info.get(p.name, {})
        source = entry.get("series") or entry.get("source") or ("fixed" if not p.free else "continuous")
        comb = entry.get("combination")
        comb_text = (f"{comb['connection']}: " + combination_text(comb["connection"], [x["text"] for x in comb["parts"]])
                     if comb else "")
        tol = p.tolerance if p.tolerance is not None else dict(last_sys.job.spread.tolerance).get(p.type)
        sp = stress_by.get(p.name)
        stress_text = ""
        if sp is not None:
            stress_text = f"{sp.sine_worst:.3g} {sp.unit} {sp.figure} at {sp.at_hz:.0f} Hz"
            if sp.programme is not None:
                stress_text += f"; programme {sp.programme:.3g} W"
            if sp.rating is not None:
                stress_text += f"; rated {sp.rating:g} {sp.unit}"
        value = format_value(float(v), p.unit) + (f" (at its {limits[p.name]})" if p.name in limits else "")
        part_rows.append(f"<tr><td>{esc(p.name)}</td><td>{p.type}</td><td>{esc(value)}</td>"
                         f"<td>{esc(source)}</td><td>{'' if tol is None else f'{tol * 100:g} %'}</td>"
                         f"<td>{esc(comb_text)}</td><td>{esc(stress_text)}</td></tr>")
    prune_table = ""
    pruned = [d for _, d, _ in entries if "prune" in d.sections]
    if pruned:
        sec = pruned[0].sections["prune"]
        def num(x, fmt: str) -> str:  # a step's figure, or "-" where the result holds none
            return format(x, fmt) if isinstance(x, (int, float)) and not isinstance(x, bool) else "-"

        rows_html = "".join(  # every cell escaped: the steps come from a result file, which may be edited
            f"<tr><td>{esc(r['step'])}</td><td>{esc(r['parts'])}</td><td>{esc(r['removed'])}</td><td>{esc(r['how'])}"
            f"</td><td>{num(r['cost'], '.4g')}</td><td>{num(r['rms_error_db'], '.2f')}</td>"
            f"<td>{num(r['max_error_db'], '.2f')}</td>"
            f"<td>{'chosen' if r['step'] == sec['chosen_step'] else ''}</td></tr>" for r in sec["steps"])
        prune_table = (f"<h2>Pruning</h2><p>Each step removes the part whose removal costs least (the rest refitted); "
                       f"the chosen design has the fewest parts within {sec['max_increase'] * 100:g} % of step 0's "
                       "cost.</p><table><tr><th>step</th><th>parts</th><th>removed</th><th>how</th><th>cost</th>"
                       f"<th>rms error (dB)</th><th>worst error (dB)</th><th></th></tr>{rows_html}</table>")
    findings = last.findings
    values_table = _values_table(entries, esc)
    targets_table = _targets_table(job, esc)
    breakdown_table = _breakdown_table(entries, esc)
    from xo_fit.output.schematic import draw

    drawing = draw(last.job, last.values)
    if drawing is not None:
        with atomic_path(out / "network.png", suffix=".png") as tmp:
            tmp.write_bytes(drawing)
        netlist_table = ("<h2>Network</h2><p>Each way as a ladder from \"in\"; values of the "
                         f"{esc(last_label)} design.</p><figure><img alt=\"network\" "
                         f"src=\"data:image/png;base64,{base64.b64encode(drawing).decode()}\"></figure>")
    else:
        netlist_table = _netlist_table(job, esc)
    from datetime import datetime, timezone

    from xo_fit import __version__

    made = (f"xo_fit {__version__}, {datetime.now(timezone.utc).strftime('%Y-%m-%d %H:%M UTC')}, from: "
            f"{' '.join(command) if command else 'the Python API'}")
    finding_rows = "".join(f"<li>{esc(x['text'])}</li>" for x in findings) or "<li>none</li>"
    cautions = load_cautions(last.scored.metrics["impedance_min_ohm"], job.cost.impedance_min)
    if st is not None:
        cautions = design_cautions(st, last_sys.job.stress.rated_impedance)
    elif not cautions:
        cautions = [GENERAL]
    drive = (f"Stresses at {st.drive_w:g} W into {st.rated_ohm:g} Ω ({st.source_v_rms:.2f} V RMS); programme figures "
             "assume pink noise over the band." if st else "No [stress] drive level in the job: no stress figures.")
    off_axis_text = ""
    m_last = last.scored.metrics
    if "listening_window_rms_db" in m_last:
        off_axis_text = (f"<p>Off axis ({esc(last_label)}): the listening window strays "
                         f"{m_last['listening_window_rms_db']:.2f} dB rms from the target"
                         + (f"; the sound power DI runs from {m_last['sound_power_di_min_db']:.1f} to "
                            f"{m_last['sound_power_di_max_db']:.1f} dB over the band (a range of "
                            f"{m_last['sound_power_di_range_db']:.1f} dB)" if "sound_power_di_min_db" in m_last else "")
                         + ". The colour maps show each orbit's level against the axis: lobing reads as dark "
                         "bands.</p>")
    imgs = "".join(f'<figure><img alt="{esc(k)}" src="data:image/png;base64,{base64.b64encode(v).decode()}"></figure>'
                   for k, v in figs.items())
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{esc(job.name)}: crossover report</title>
<meta name="viewport" content="width=device-width, initial-scale=1">
<style>
body {{ font-family: sans-serif; max-width: 1100px; margin: 1.5em auto; padding: 0 1em; color: #222; }}
h1 {{ font-size: 1.5em; }} h2 {{ font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #ccc; }}
table {{ border-collapse: collapse; width: 100%; font-size: 0.9em; }}
th, td {{ border: 1px solid #ccc; padding: 3px 6px; text-align: left; }} th {{ background: #f0f0f0; }}
figure {{ margin: 0.8em 0; }} img {{ max-width: 100%; height: auto; }}
.caution {{ background: #fff6e0; border-left: 4px solid #e0a000; padding: 6px 10px; margin: 6px 0; }}
@media print {{ figure {{ page-break-inside: avoid; }} body {{ max-width: none; }} }}
</style></head><body>
<h1>{esc(job.name)}: crossover report</h1>
<p>Results: {esc(', '.join(x[0] for x in entries))}. Made by xo_fit from simulations of the measured drivers in the network;
check the built speaker by measurement.</p>
<p class="made">{esc(made)}</p>
<h2>Metrics</h2>
<table><tr><th>result</th><th>cost</th><th>rms error (dB)</th><th>worst error (dB)</th><th>phase mismatch (deg)</th>
<th>|Z| minimum (Ω)</th><th>EPDR minimum (Ω)</th></tr>{''.join(metric_rows)}</table>
{breakdown_table}
{values_table}
{targets_table}
<h2>Curves</h2>{off_axis_text}{imgs}
<h2>Part list ({esc(last_label)})</h2>
<p>{esc(drive)}</p>
<table><tr><th>part</th><th>kind</th><th>value</th><th>source</th><th>tolerance</th><th>made of</th><th>stress</th></tr>
{''.join(part_rows)}</table>
{netlist_table}
{prune_table}
<h2>Findings ({esc(last_label)})</h2><ul>{finding_rows}</ul>
<h2>Cautions</h2>{''.join(f'<div class="caution">{esc(c)}</div>' for c in cautions)}
</body></html>
"""

    write_text(out / "report.html", page)
    return out / "report.html"


