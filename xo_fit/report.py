"""Plots of a design (matplotlib, imported only when a plot is drawn).

One figure shows what a designer checks first: each way's acoustic output
against its way target and the summed response against the system target
(dB SPL); the phase difference of adjacent ways through each crossover against
the difference their targets have; and the impedance the amplifier sees
(magnitude and phase) with the floor.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from . import acoustics
from .io.results import atomic_path


def plot_design(path: str | Path, system, s, *, title: str, compare: tuple | None = None) -> None:
    """Write a PNG for a scored design (xo_fit.fit.Scored); ``compare`` = (label, other Scored) overlays
    another design's sum, phase error and impedance in grey (continuous against snapped)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    f = system.frequencies
    names = tuple(d.name for d in system.job.drivers)
    pressure, total, z = s.sim.pressure[0], s.sim.total[0], s.sim.impedance[0]
    targets = s.targets
    pairs = _pairs(s)
    rows = 3 if pairs else 2
    fig, axes = plt.subplots(rows, 1, figsize=(9, 3.2 * rows + 1.2), sharex=True,
                             gridspec_kw={"height_ratios": [3] + [1.6] * (rows - 1)})
    ax = axes[0]
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for i, (name, p) in enumerate(zip(names, pressure)):
        c = colors[i % len(colors)]
        ax.semilogx(f, acoustics.spl_db(p), lw=1.3, color=c, label=name)
        if targets is not None and targets.has_way[i]:
            ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(targets.ways[i])), lw=0.9, ls="--", color=c,
                        label=f"{name} target")
    sum_db = acoustics.spl_db(total)
    if compare is not None:
        other = compare[1].sim
        for i, p in enumerate(other.pressure[0]):
            ax.semilogx(f, acoustics.spl_db(p), lw=0.9, color=colors[i % len(colors)], alpha=0.45)
        ax.semilogx(f, acoustics.spl_db(other.total[0]), color="0.55", lw=1.6, label=f"sum, {compare[0]}")
    ax.semilogx(f, sum_db, color="k", lw=2.0, label="sum")
    if targets is not None:
        ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(targets.system)), color="k", lw=1.0, ls="--",
                    label="target")
    top = float(np.nanmax(sum_db))
    ax.set_ylim(top - 50, top + 6)
    ax.set_ylabel("SPL (dB)")
    ax.set_title(title)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="lower center", ncol=4, fontsize=8)
    band = system.job.target.band
    if band is not None:
        for b in band:
            ax.axvline(b, color="0.6", lw=0.8, ls=":")
    k = 1
    if pairs:
        axp = axes[1]
        for a, b, region in pairs:
            diff = np.rad2deg(np.angle(pressure[a] / pressure[b]))
            want = np.rad2deg(np.angle(targets.ways[a] / targets.ways[b]))
            err = (diff - want + 180) % 360 - 180
            axp.semilogx(f[region], err[region], lw=1.5, label=f"{names[a]} - {names[b]}, against target")
        axp.axhline(0, color="k", lw=0.8)
        axp.set_ylabel("phase error (deg)")
        axp.set_ylim(-90, 90)
        axp.grid(True, which="both", alpha=0.3)
        axp.legend(loc="upper right", fontsize=8)
        k = 2
    ax2 = axes[k]
    zmag = np.abs(z)
    floor = system.job.cost.impedance_min
    if compare is not None:
        ax2.semilogx(f, np.abs(compare[1].sim.impedance[0]), color="0.6", lw=1.2, label=f"|Z|, {compare[0]}")
    ax2.semilogx(f, zmag, color="tab:purple", lw=1.5, label="|Z|")
    if floor > 0:
        ax2.axhline(floor, color="tab:red", lw=1.0, ls="--", label=f"floor {floor:g} Ω")
    ax2.set_ylabel("|Z| (Ω)")
    ax2.set_ylim(0, max(float(np.nanmax(zmag)) * 1.15, floor * 1.5, 1.0))
    ax2.grid(True, which="both", alpha=0.3)
    ax3 = ax2.twinx()
    ax3.semilogx(f, acoustics.phase_deg(z), color="tab:gray", lw=1.0, label="phase")
    ax3.set_ylim(-90, 90)
    ax3.set_ylabel("phase (deg)")
    h1, l1 = ax2.get_legend_handles_labels()
    h2, l2 = ax3.get_legend_handles_labels()
    ax2.legend(h1 + h2, l1 + l2, loc="upper right", fontsize=8)
    ax2.set_xlabel("frequency (Hz)")
    ax2.set_xlim(f[0], f[-1])
    fig.subplots_adjust(left=0.08, right=0.92, top=0.95, bottom=0.07, hspace=0.12)
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=100, format="png")
    plt.close(fig)


def _pairs(s) -> list:
    """Crossover regions on the full grid: (way a, way b, mask) for adjacent ways whose targets cross."""
    t = s.targets
    if t is None:
        return []
    from .cost import XO_REGION_DB, adjacent_ways, spl_db_unit

    db = spl_db_unit(np.where(t.has_way[:, None], t.ways, 1.0))
    out = []
    for a, b in adjacent_ways(db, t.has_way):
        near = np.abs(db[a] - db[b]) <= 2 * XO_REGION_DB  # wider than the cost's region: the plot shows the run-up
        if near.any():
            out.append((a, b, near))
    return out


def plot_spread(path: str | Path, system, s, r, *, title: str) -> None:
    """Nominal summed and driver levels inside their p05-p95 bands over the tolerance draws."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    f = system.frequencies
    names = ["sum"] + [d.name for d in system.job.drivers]
    fig, ax = plt.subplots(1, 1, figsize=(9, 5.2))
    colors = ["k"] + plt.rcParams["axes.prop_cycle"].by_key()["color"]
    for i, name in enumerate(names):
        c = colors[i % len(colors)]
        ax.fill_between(f, r.p05[i], r.p95[i], color=c, alpha=0.18 if i else 0.25, lw=0)
        ax.semilogx(f, r.nominal_db[i], color=c, lw=2.0 if i == 0 else 1.2, label=f"{name} (nominal, p05-p95)")
    top = float(np.nanmax(r.nominal_db[0]))
    ax.set_ylim(top - 40, top + 6)
    ax.set_xlim(f[0], f[-1])
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("SPL (dB)")
    ax.set_title(title)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="lower center", fontsize=8, ncol=3)
    fig.subplots_adjust(left=0.08, right=0.97, top=0.93, bottom=0.1)
    with atomic_path(path, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=100, format="png")
    plt.close(fig)


# ----------------------------------------------------------------------------- the HTML report


def _png(fig) -> bytes:
    import io

    buf = io.BytesIO()
    fig.savefig(buf, dpi=100, format="png")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return buf.getvalue()


def _load_result(path: Path, systems: dict):
    """(label, document, system, values, spread curves or None) of one result.json."""

    from .errors import DataError
    from .io.job import load_job
    from .io.results import read_result, result_values
    from .system import load_system

    doc = read_result(path)
    folder = path if path.is_dir() else path.parent
    src = (doc.get("source") or {}).get("job")
    if not src:
        raise DataError("the result does not name its job (source.job); make it with xo-fit", path=path)
    if src not in systems:
        systems[src] = load_system(load_job(src))
    system = systems[src]
    vals = result_values(doc, system.part_names, path)
    values = system.values(vals)
    spread = None
    if doc.get("stage") == "spread" and (folder / "spread.csv").exists():
        import csv

        with open(folder / "spread.csv", newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
        spread = {k: np.array([float(r[k]) for r in rows]) for k in rows[0]}
    label = f"{doc.get('stage', 'result')} ({folder.name})"
    return label, doc, system, values, spread


def write_report(results: list, out: Path) -> Path:
    """report.html (self-contained: images inline) and its PNGs for one or more result.json files."""
    import base64
    import html

    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .cautions import design_cautions, load_cautions
    from .fit import score
    from .stress import epdr, stresses
    from .units import format_value

    systems: dict = {}
    loaded = [_load_result(Path(p), systems) for p in results]
    base_system = loaded[0][2]
    f = base_system.frequencies
    for p, (_, _, sys_, _, _) in zip(results, loaded):
        if sys_.frequencies.shape != f.shape or not np.allclose(sys_.frequencies, f) or \
                [d.name for d in sys_.job.drivers] != [d.name for d in base_system.job.drivers]:
            from .errors import XoFitError

            raise XoFitError("results overlaid in one report need the same grid and drivers; this one's job differs "
                             f"from {results[0]}'s (report them separately)", path=p)
    names = [d.name for d in base_system.job.drivers]
    scored = [score(sys_, v) for _, _, sys_, v, _ in loaded]
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    shades = ["k", "0.45", "tab:brown", "tab:olive"]
    figs: dict[str, bytes] = {}

    # 1. summed response against the target (with the tolerance band of a spread result)
    fig, ax = plt.subplots(figsize=(9, 4.2))
    for k, ((label, doc, _, _, spread), s) in enumerate(zip(loaded, scored)):
        c = shades[k % len(shades)]
        if spread is not None:
            ax.fill_between(f, spread["sum_p05_db"], spread["sum_p95_db"], color=c, alpha=0.18, lw=0,
                            label=f"p05-p95, {label}")
        ax.semilogx(f, spl_db_of(s.sim.total[0]), color=c, lw=2.0 if k == 0 else 1.4, label=f"sum, {label}")
    if scored[0].targets is not None:
        ax.semilogx(f, scored[0].level_db + 20 * np.log10(np.abs(scored[0].targets.system)), "k--", lw=1.0,
                    label="target")
    _finish(ax, "SPL (dB)", "Summed response against the target", f, top=float(np.max(spl_db_of(scored[0].sim.total[0]))))
    figs["sum"] = _png(fig)

    # 2. each way against its way target
    fig, ax = plt.subplots(figsize=(9, 4.2))
    for k, s in enumerate(scored):
        for i, n in enumerate(names):
            ax.semilogx(f, spl_db_of(s.sim.pressure[0, i]), color=colors[i % len(colors)], lw=1.4 if k == 0 else 0.9,
                        alpha=1.0 if k == 0 else 0.5, label=f"{n}, {loaded[k][0]}")
            if k == 0 and s.targets is not None and s.targets.has_way[i]:
                ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(s.targets.ways[i])), color=colors[i % len(colors)],
                            ls="--", lw=0.9, label=f"{n} target")
    _finish(ax, "SPL (dB)", "Each way against its way target", f, top=float(np.max(spl_db_of(scored[0].sim.total[0]))))
    figs["ways"] = _png(fig)

    # 3. phase difference through the crossover, and 4. the reverse-polarity null
    pairs = _pairs(scored[0])
    if pairs:
        fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 3.8))
        for k, s in enumerate(scored):
            p = s.sim.pressure[0]
            for a, b, region in pairs:
                diff = np.rad2deg(np.angle(p[a] / p[b]))
                want = np.rad2deg(np.angle(s.targets.ways[a] / s.targets.ways[b]))
                err = (diff - want + 180) % 360 - 180
                ax1.semilogx(f[region], err[region], color=shades[k % len(shades)], lw=1.5,
                             label=f"{names[a]}-{names[b]}, {loaded[k][0]}")
                flipped = p.sum(axis=0) - 2 * p[b]
                ax2.semilogx(f, spl_db_of(flipped), color=shades[k % len(shades)], lw=1.3,
                             label=f"{names[b]} reversed, {loaded[k][0]}")
        ax1.axhline(0, color="k", lw=0.7)
        ax1.set_ylim(-90, 90)
        ax1.set_title("Phase error through the crossover (deg)", fontsize=10)
        ax1.grid(True, which="both", alpha=0.3)
        ax1.legend(fontsize=7)
        top = float(np.max(spl_db_of(scored[0].sim.total[0])))
        ax2.set_ylim(top - 45, top + 6)
        ax2.set_title("Reverse-polarity null: deep and centred at the crossover", fontsize=10)
        ax2.grid(True, which="both", alpha=0.3)
        ax2.legend(fontsize=7)
        fig.tight_layout()
        figs["phase"] = _png(fig)

    # 5. group delay of the sum
    fig, ax = plt.subplots(figsize=(9, 3.2))
    for k, s in enumerate(scored):
        ph = np.unwrap(np.angle(s.sim.total[0]))
        gd = -np.gradient(ph, 2 * np.pi * f) * 1e3
        ax.semilogx(f, gd, color=shades[k % len(shades)], lw=1.4, label=loaded[k][0])
    _finish(ax, "group delay (ms)", "Group delay of the summed response", f)
    figs["delay"] = _png(fig)

    # 6. impedance with the floor and the 80 % line of the rated impedance
    job = base_system.job
    rated = job.stress.rated_impedance
    fig, ax = plt.subplots(figsize=(9, 3.8))
    ax2 = ax.twinx()
    for k, s in enumerate(scored):
        z = s.sim.impedance[0]
        ax.semilogx(f, np.abs(z), color=shades[k % len(shades)], lw=1.6, label=f"|Z|, {loaded[k][0]}")
        ax2.semilogx(f, np.rad2deg(np.angle(z)), color=shades[k % len(shades)], lw=0.8, ls=":")
    if job.cost.impedance_min > 0:
        ax.axhline(job.cost.impedance_min, color="tab:red", ls="--", lw=1.0, label=f"floor {job.cost.impedance_min:g} Ω")
    if rated:
        ax.axhline(0.8 * rated, color="tab:orange", ls="-.", lw=1.0, label=f"80 % of {rated:g} Ω rated")
    ax.set_ylim(0, float(np.max(np.abs(scored[0].sim.impedance[0]))) * 1.15)
    ax2.set_ylim(-90, 90)
    ax2.set_ylabel("phase (deg, dotted)")
    _finish(ax, "|Z| (Ω)", "Impedance the amplifier sees", f)
    figs["impedance"] = _png(fig)

    out.mkdir(parents=True, exist_ok=True)
    for name, data in figs.items():
        with atomic_path(out / f"{name}.png", suffix=".png") as tmp:
            tmp.write_bytes(data)

    # tables
    def esc(x) -> str:
        return html.escape(str(x))

    metric_rows = []
    for (label, doc, sys_, values, _), s in zip(loaded, scored):
        m = s.metrics
        z = s.sim.impedance[0]
        e = float(np.min(epdr(z)))
        metric_rows.append(
            f"<tr><td>{esc(label)}</td><td>{'' if s.cost is None else f'{s.cost:.4g}'}</td>"
            f"<td>{m.get('rms_error_db', float('nan')):.2f}</td><td>{m.get('max_error_db', float('nan')):.2f}</td>"
            f"<td>{m.get('phase_mismatch_deg', float('nan')):.1f}</td><td>{m['impedance_min_ohm']:.2f} at "
            f"{m['impedance_min_hz']:.0f} Hz</td><td>{e:.2f}</td></tr>")
    last_label, last_doc, last_sys, last_values, _ = loaded[-1]
    st = None
    if last_sys.job.stress.power:
        st = stresses(last_sys, last_values, last_sys.job.stress.power, last_sys.job.stress.rated_impedance)
    stress_by = {p.name: p for p in st.parts} if st else {}
    part_rows = []
    for p, v in zip(last_sys.job.valued_parts, last_values):
        entry = last_doc["parts"].get(p.name, {})
        source = entry.get("series") or entry.get("source") or ("fixed" if not p.free else "continuous")
        comb = entry.get("combination")
        comb_text = (f"{comb['connection']}: " + " + ".join(x["text"] for x in comb["parts"])) if comb else ""
        tol = p.tolerance if p.tolerance is not None else dict(last_sys.job.spread.tolerance).get(p.type)
        sp = stress_by.get(p.name)
        stress_text = ""
        if sp is not None:
            stress_text = f"{sp.sine_worst:.3g} {sp.unit} {sp.figure} at {sp.at_hz:.0f} Hz"
            if sp.programme is not None:
                stress_text += f"; programme {sp.programme:.3g} W"
            if sp.rating is not None:
                stress_text += f"; rated {sp.rating:g} {sp.unit}"
        part_rows.append(f"<tr><td>{esc(p.name)}</td><td>{p.type}</td><td>{esc(format_value(float(v), p.unit))}</td>"
                         f"<td>{esc(source)}</td><td>{'' if tol is None else f'{tol * 100:g} %'}</td>"
                         f"<td>{esc(comb_text)}</td><td>{esc(stress_text)}</td></tr>")
    cautions = load_cautions(scored[-1].metrics["impedance_min_ohm"], job.cost.impedance_min)
    if st is not None:
        cautions = design_cautions(st, last_sys.job.stress.rated_impedance)
    elif not cautions:
        from .cautions import GENERAL

        cautions = [GENERAL]
    drive = (f"Stresses at {st.drive_w:g} W into {st.rated_ohm:g} Ω ({st.source_v_rms:.2f} V RMS); programme figures "
             "assume pink noise over the band." if st else "No [stress] drive level in the job: no stress figures.")
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
<p>Results: {esc(', '.join(x[0] for x in loaded))}. Made by xo_fit from simulations of the measured drivers in the network;
check the built speaker by measurement.</p>
<h2>Metrics</h2>
<table><tr><th>result</th><th>cost</th><th>rms error (dB)</th><th>worst error (dB)</th><th>phase mismatch (deg)</th>
<th>|Z| minimum (Ω)</th><th>EPDR minimum (Ω)</th></tr>{''.join(metric_rows)}</table>
<h2>Curves</h2>{imgs}
<h2>Part list ({esc(last_label)})</h2>
<p>{esc(drive)}</p>
<table><tr><th>part</th><th>kind</th><th>value</th><th>source</th><th>tolerance</th><th>made of</th><th>stress</th></tr>
{''.join(part_rows)}</table>
<h2>Cautions</h2>{''.join(f'<div class="caution">{esc(c)}</div>' for c in cautions)}
</body></html>
"""
    from .io.results import write_text

    write_text(out / "report.html", page)
    return out / "report.html"


def spl_db_of(p: np.ndarray) -> np.ndarray:
    return acoustics.spl_db(p)


def _finish(ax, ylabel: str, title: str, f: np.ndarray, top: float | None = None) -> None:
    if top is not None:
        ax.set_ylim(top - 50, top + 6)
    ax.set_xlim(f[0], f[-1])
    ax.set_ylabel(ylabel)
    ax.set_xlabel("frequency (Hz)")
    ax.set_title(title, fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    ax.figure.tight_layout()
