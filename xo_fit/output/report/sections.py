"""The report's sections over every result: metrics, predicted preference, where the error lies, the tolerance
summary, values side by side, targets and curves. Each takes the :class:`~xo_fit.output.report.page.Report`
and returns its HTML (:class:`~xo_fit.output.report.markup.Markup`), "" where it has nothing to say."""

from __future__ import annotations

import numpy as np

from xo_fit.output.report.markup import Markup, bold, bullets, image, join, num, para, section, table
from xo_fit.output.report.results import reference_lines, target_groups
from xo_fit.units import format_value


def limits_section(rep) -> Markup:
    """The job's hard limits ([limits]) against the design to build: met or not, by how much (first on the
    page, as on the console); "" without [limits]."""
    from xo_fit.output.limits import limits_html
    from xo_fit.output.report.markup import esc

    return Markup(limits_html(rep.build.design.hard_limits, esc))


def metrics_section(rep) -> Markup:
    """Cost, errors, the lowest |Z| and EPDR of each result."""
    from xo_fit.model.stress import epdr

    rows = []
    for it in rep.items:
        s = it.design.scored
        m = s.metrics
        rows.append([it.label, num(s.cost, ".4g"), num(m.get("rms_error_db", float("nan")), ".2f", "nan"),
                     num(m.get("max_error_db"), ".2f", "nan"), num(m.get("phase_mismatch_deg"), ".1f", "nan"),
                     f"{m['impedance_min_ohm']:.2f} at {m['impedance_min_hz']:.0f} Hz",
                     f"{float(np.min(epdr(s.sim.impedance[0]))):.2f}"])
    return section("Metrics", table(["result", "cost", "rms error (dB)", "worst error (dB)", "phase mismatch (deg)",
                                     "|Z| minimum (Ω)", "EPDR minimum (Ω)"], rows))


def preference_section(rep) -> Markup:
    """Each result's predicted preference (Olive 2004): the score and its four parts, a null's reason below."""
    rows, notes = [], []
    for it in rep.items:
        p = it.design.scored.preference
        if p is None:
            continue
        lfx = "–" if p.get("lfx") is None else f"{p['lfx']:.3f} ({10 ** p['lfx']:.0f} Hz)"
        rows.append([it.label, bold(num(p.get("score"), ".2f", "–")), num(p.get("score_with_sub"), ".2f", "–"),
                     num(p.get("nbd_on"), ".3f", "–"), num(p.get("nbd_pir"), ".3f", "–"), lfx,
                     num(p.get("sm_pir"), ".3f", "–")])
        notes += [f"{it.label}, {k}: {v}" for k, v in p.get("reasons", {}).items()]
    if not rows:
        return Markup("")
    return section("Predicted preference", para(
        "S. E. Olive's model (AES convention papers 6113 and 6190, 2004): score = 12.69 − 2.49 NBD_ON − 2.99 "
        "NBD_PIR − 4.31 LFX + 2.32 SM_PIR, from the on-axis curve, the estimated in-room response (PIR) and the "
        "sound power against the listening window; the second score puts an ideal subwoofer (14.5 Hz) in place of "
        "the speaker's bass."),
        table(["result", "score", "with an ideal subwoofer", "NBD on axis (dB)", "NBD in room (dB)", "LFX (log10 Hz)",
               "SM in room (r²)"], rows), bullets(notes))


def breakdown_section(rep) -> Markup:
    """Where the error lies: each way over its passband and each crossover region, per result."""
    rows = []
    for it in rep.items:
        b = it.design.breakdown
        if b is None:
            continue
        for w in b["ways"]:
            rows.append([it.label, f"{w['way']} ({w['from_hz']:.0f}-{w['to_hz']:.0f} Hz)", f"{w['rms_db']:.2f}",
                         f"{w['worst_db']:+.2f} at {w['worst_hz']:.0f} Hz", ""])
        for c in b["crossovers"]:
            rows.append([it.label, f"crossover {c['ways']} ({c['from_hz']:.0f}-{c['to_hz']:.0f} Hz)",
                         f"{c['sum_rms_db']:.2f}", f"{c['sum_worst_db']:+.2f} at {c['sum_worst_hz']:.0f} Hz",
                         f"{c['phase_worst_deg']:+.1f} at {c['phase_worst_hz']:.0f} Hz"])
    if not rows:
        return Markup("")
    return section("Where the error lies", table(["result", "way or region", "rms error (dB)", "worst error (dB)",
                                                  "worst phase error (deg)"], rows))


def tolerance_section(rep) -> Markup:
    """Each spread's summary: the yields, the worst build and corner, left/right matching, the ranked
    sensitivity (as ``xo-fit spread`` prints it)."""
    parts = [_tolerance_of(it) for it in rep.items if it.spread is not None]
    if not parts:
        return Markup("")
    return section("Tolerance", *parts)


def _tolerance_of(it) -> Markup:
    sec = it.spread.section or {}
    y = sec.get("yield") or {}
    worst = sec.get("worst_draw") or {}
    corners = sec.get("corners") or {}
    pair = sec.get("pair_matching") or {}
    floor = y.get("impedance_min_ohm")
    limits = (f"rms error ≤ {num(y.get('rms_error_db'), 'g')} dB"
              + (f" and |Z| ≥ {num(floor, 'g')} Ω" if isinstance(floor, (int, float)) and floor > 0 else ""))
    signs = corners.get("signs") or {}
    rows = [
        ["within the band", f"{num(_pct(y.get('within_band')), '.1f')} % of the builds stay within "
                            f"±{num(y.get('band_db'), 'g')} dB of the nominal sum"],
        ["meeting the limits", f"{num(_pct(y.get('meeting_limits')), '.1f')} % meet {limits}"],
        ["worst build", f"{num(worst.get('deviation_db'), '.2f')} dB off at {num(worst.get('at_hz'), '.0f')} Hz"],
        ["worst corner", f"{num(corners.get('worst_deviation_db'), '.2f')} dB ({corners.get('method', '')})"
                         + (": " + ", ".join(f"{k} {v}" for k, v in signs.items()) if isinstance(signs, dict)
                            and signs else "")],
        ["pair matching", f"largest left/right difference p50 {num(pair.get('p50_db'), '.2f')} dB, "
                          f"p95 {num(pair.get('p95_db'), '.2f')} dB"],
    ]
    ranked = [[r.get("part", ""), num(r.get("db_per_pct"), "+.3f"), num(r.get("worst_at_hz"), ".0f"),
               num(r.get("tolerance_pct"), "g")] for r in sec.get("sensitivity") or [] if isinstance(r, dict)]
    how = f"{num(sec.get('samples'), 'd')} builds ({sec.get('distribution', '')}" \
          f"{', quasi-random' if sec.get('qmc') is True else ''})"
    return join(para(bold(it.label), f": {how}, each part drawn within its tolerance."),
                table(["figure", "value"], rows),
                para("Sensitivity, most sensitive part first (the level change of the sum per +1 % of the part's "
                     "value, at worst over the band):"),
                table(["part", "dB per +1 %", "worst at (Hz)", "tolerance (%)"], ranked))


def _pct(x):
    return x * 100 if isinstance(x, (int, float)) and not isinstance(x, bool) else x


def values_section(rep) -> Markup:
    """Part values side by side, one column per result, with each part's range; a value on a bound marked."""
    rows = []
    for p in rep.job.valued_parts:
        ranges: dict[str, list[str]] = {}  # range text -> the labels of the results with that range
        for it in rep.items:
            q = next((x for x in it.job.valued_parts if x.name == p.name), None)
            if q is not None:
                rng = f"{format_value(q.min, q.unit)} .. {format_value(q.max, q.unit)}" if q.free else "fixed"
                ranges.setdefault(rng, []).append(it.label)
        rng = (next(iter(ranges)) if len(ranges) == 1
               else "; ".join(f"{r} ({', '.join(x)})" for r, x in ranges.items()))
        cells = []
        for it in rep.items:
            v = it.design.values.get(p.name)
            at = it.design.limits.get(p.name)
            cells.append("removed" if v is None
                         else join(format_value(v, p.unit), " " if at else "", bold(f"(at its {at})") if at else ""))
        rows.append([p.name, p.type, rng, *cells])
    return section("Values", table(["part", "kind", "range", *(it.label for it in rep.items)], rows))


def targets_section(rep) -> Markup:
    """The targets of each set of results sharing them: ways, alignments, frequencies, polarities, band, level."""
    groups = target_groups(rep.items)
    parts = []
    for g in groups:
        if len(groups) > 1:
            parts.append(para(bold(", ".join(it.label for it in g)), ":"))
        parts.append(_targets_of(g[0].job))
    return section("Targets", *parts)


def _targets_of(job) -> Markup:
    from xo_fit.model.targets import polarities

    if not job.target.ways:
        return para("No way targets: metrics only.")
    pol = polarities(job.target.ways)
    rows = []
    for w in job.target.ways:
        where = (f"{format_value(w.fc_low, 'Hz')} to {format_value(w.fc_high, 'Hz')}" if w.type == "bandpass"
                 else (format_value(w.fc, "Hz") if w.fc else ""))
        shape = "" if w.type == "fullrange" else f"{w.alignment} order {w.order}"
        rows.append([w.driver, w.type, shape, where, "inverted" if pol[w.driver] < 0 else "normal"])
    band = job.target.band
    level = "automatic" if job.target.level == "auto" else f"{job.target.level:g} dB SPL"
    info = ((f"Band {format_value(band[0], 'Hz')} to {format_value(band[1], 'Hz')}" if band else "The whole grid")
            + f"; level {level}; shaping curve {job.target.curve}; impedance floor "
            + (f"{job.cost.impedance_min:g} Ω." if job.cost.impedance_min else "none."))
    return join(para(info), table(["way", "type", "alignment", "at", "polarity"], rows))


def curves_section(rep) -> Markup:
    """The figures inline, with the off-axis summary of the last result and what the reference lines are."""
    last = rep.items[-1]
    m = last.design.scored.metrics
    parts = []
    if "listening_window_rms_db" in m:
        di = (f"; the sound power DI runs from {m['sound_power_di_min_db']:.1f} to "
              f"{m['sound_power_di_max_db']:.1f} dB over the band (a range of {m['sound_power_di_range_db']:.1f} dB)"
              if "sound_power_di_min_db" in m else "")
        parts.append(para(f"Off axis ({last.label}): the listening window strays {m['listening_window_rms_db']:.2f} dB "
                          f"rms from the target{di}. The colour maps show each orbit's level against the axis: "
                          "lobing reads as dark bands."))
    lines = reference_lines([it.job for it in rep.items])
    if lines:
        parts.append(para("Reference lines on the impedance plot: " + "; ".join(label for _, label in lines)
                          + " (IEC 60268-5: |Z| should not fall below 80 % of the rated impedance)."))
    groups = target_groups(rep.items)
    if len(groups) > 1:
        parts.append(para("The results have different targets: each set is drawn in the colour of its first result."))
    parts += [image(name, png) for name, png in rep.figures.items()]
    return section("Curves", *parts)
