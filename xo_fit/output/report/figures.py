"""The report's figures, one function each returning a matplotlib Figure, and :func:`figures` drawing them all.

Each result has a colour and a line style of its own, widest first, so that two results with one curve (a
snap and the spread of it) both stay visible; a target drawn per set of targets ("target" where every result
shares them); reference lines labelled, in the legend and beside the line. Legends only where something is
labelled (matplotlib warns and draws an empty box otherwise). The off-axis figures are in
:mod:`xo_fit.output.report.offaxis`; :func:`xo_fit.output.report.page.figures` draws them all.
"""

from __future__ import annotations

import numpy as np

from xo_fit.model.cost import phase_error_deg
from xo_fit.output.plots import crossover_pairs, finish_axes, legend, plain, set_ylim, spl_db_of
from xo_fit.output.report.results import ReportItem, reference_lines, target_groups

#: A colour per result, in the order given (none black: black is the target's).
RESULT_COLOURS = ("tab:blue", "tab:red", "tab:green", "tab:purple", "tab:brown", "tab:cyan")
#: A line style per result: solid, dashed, dotted, dash-dot, ...
RESULT_DASHES = ("-", (0, (6, 2.5)), (0, (1.5, 1.5)), (0, (6, 2, 1.5, 2)), (0, (3, 3)), (0, (10, 2, 2, 2, 2, 2)))
#: The targets' line style: long thin dashes.
TARGET_DASH = (0, (9, 4))
#: Reference lines on the impedance plot, one style each.
REFERENCE_STYLES = (("0.25", (0, (5, 2, 1, 2))), ("tab:orange", (0, (2, 1))), ("tab:olive", (0, (8, 2))))


def pyplot():
    """matplotlib.pyplot on the Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def result_style(k: int, n: int) -> dict:
    """Colour, line style and width of result ``k`` of ``n``: every pair differs in colour and style, and the
    widths fall from 2.6 to 1.2 so that a later curve drawn over an earlier one leaves it visible."""
    lw = 2.0 if n == 1 else 2.6 - 1.4 * k / (n - 1)
    return {"color": RESULT_COLOURS[k % len(RESULT_COLOURS)],
            "ls": RESULT_DASHES[(k + k // len(RESULT_COLOURS)) % len(RESULT_DASHES)], "lw": lw}


def _target_label(what: str, group: list[ReportItem], groups: int) -> str:
    return what if groups == 1 else f"{what}, {', '.join(it.label for it in group)}"


def sum_figure(items: list[ReportItem]):
    """The summed response (and a spread's p05-p95 band) against each set of targets; an off-axis job referred to
    its listening window shows that curve too."""
    plt = pyplot()
    base = items[0].design.system
    f = base.frequencies
    lw_ref = base.job.target.reference == "listening_window" and bool(base.positions)
    fig, ax = plt.subplots(figsize=(9, 4.2))
    for k, it in enumerate(items):
        st = result_style(k, len(items))
        s = it.design.scored
        if it.columns is not None:
            ax.fill_between(f, it.columns["sum_p05_db"], it.columns["sum_p95_db"], color=st["color"], alpha=0.16,
                            lw=0, label=f"p05-p95, {plain(it.label)}")
        ax.semilogx(f, spl_db_of(s.sim.total[0]), label=f"sum, {plain(it.label)}", **st)
        if lw_ref:
            ax.semilogx(f, it.design.system.reference_db(s.sim)[0], color=st["color"], lw=1.2,
                        ls=(0, (4, 1, 1, 1, 1, 1)), label=f"listening window, {plain(it.label)}")
    groups = target_groups(items)
    for g in groups:
        s = g[0].design.scored
        if s.targets is not None:
            colour = "k" if len(groups) == 1 else result_style(items.index(g[0]), len(items))["color"]
            ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(s.targets.system)), color=colour, ls=TARGET_DASH,
                        lw=1.0, label=plain(_target_label("target", g, len(groups))))
    title = ("Listening window (the target's curve) and on-axis sum against the target, spread bands of the "
             "listening window") if lw_ref else "Summed response against the target"
    finish_axes(ax, "SPL (dB)", title, f, top=_top(items))
    return fig


def _top(items: list[ReportItem]) -> float:
    return float(np.max(spl_db_of(items[0].design.scored.sim.total[0])))


def ways_figure(items: list[ReportItem]):
    """Each way (a colour per driver, the result's line style) against its way target (per set of targets)."""
    plt = pyplot()
    system = items[0].design.system
    f = system.frequencies
    names = [d.name for d in system.job.drivers]
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    fig, ax = plt.subplots(figsize=(9, 4.2))
    for k, it in enumerate(items):
        st = result_style(k, len(items))
        for i, n in enumerate(names):
            ax.semilogx(f, spl_db_of(it.design.scored.sim.pressure[0, i]), color=colors[i % len(colors)],
                        ls=st["ls"], lw=st["lw"] * 0.75, label=plain(f"{n}, {it.label}"))
    groups = target_groups(items)
    for g in groups:
        s = g[0].design.scored
        if s.targets is None:
            continue
        for i, n in enumerate(names):
            if s.targets.has_way[i]:
                ax.semilogx(f, s.level_db + 20 * np.log10(np.abs(s.targets.ways[i])), color=colors[i % len(colors)],
                            ls=TARGET_DASH, lw=0.9, alpha=0.8,
                            label=plain(_target_label(f"{n} target", g, len(groups))))
    finish_axes(ax, "SPL (dB)", "Each way against its way target", f, top=_top(items))
    return fig


def phase_figure(items: list[ReportItem]):
    """The phase error through each crossover of each result (against its own targets), and the reverse-polarity
    null; None where no result has a crossover."""
    pairs = [crossover_pairs(it.design.scored) for it in items]
    if not any(pairs):
        return None
    plt = pyplot()
    system = items[0].design.system
    f = system.frequencies
    names = [d.name for d in system.job.drivers]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 3.8))
    for k, (it, its_pairs) in enumerate(zip(items, pairs)):
        st = result_style(k, len(items))
        s = it.design.scored
        p = s.sim.pressure[0]
        for a, b, region in its_pairs:
            err = phase_error_deg(p[a] / p[b], np.rad2deg(np.angle(s.targets.ways[a] / s.targets.ways[b])))
            ax1.semilogx(f[region], err[region], label=plain(f"{names[a]}-{names[b]}, {it.label}"), **st)
            flipped = p.sum(axis=0) - 2 * p[b]
            ax2.semilogx(f, spl_db_of(flipped), label=plain(f"{names[b]} reversed, {it.label}"), **st)
    ax1.axhline(0, color="k", lw=0.7)
    ax1.set_ylim(-180, 180)  # the error is wrapped to +-180 deg: nothing is cut off
    ax1.set_yticks([-180, -90, -45, 0, 45, 90, 180])
    ax1.set_title("Phase error through the crossover (deg)", fontsize=10)
    ax1.grid(True, which="both", alpha=0.3)
    legend(ax1, fontsize=7)
    top = _top(items)
    set_ylim(ax2, top - 45, top + 6)
    ax2.set_title("Reverse-polarity null: deep and centred at the crossover", fontsize=10)
    ax2.grid(True, which="both", alpha=0.3)
    legend(ax2, fontsize=7)
    fig.tight_layout()
    return fig


def delay_figure(items: list[ReportItem]):
    """The group delay of each result's sum (ms)."""
    plt = pyplot()
    f = items[0].design.system.frequencies
    fig, ax = plt.subplots(figsize=(9, 3.2))
    for k, it in enumerate(items):
        ph = np.unwrap(np.angle(it.design.scored.sim.total[0]))
        ax.semilogx(f, -np.gradient(ph, 2 * np.pi * f) * 1e3, label=plain(it.label), **result_style(k, len(items)))
    finish_axes(ax, "group delay (ms)", "Group delay of the summed response", f)
    return fig


def impedance_figure(items: list[ReportItem]):
    """|Z| of each result (its phase dotted on a second axis) with the reference lines of
    :func:`~xo_fit.output.report.results.reference_lines`, each labelled in the legend and beside the line."""
    plt = pyplot()
    f = items[0].design.system.frequencies
    fig, ax = plt.subplots(figsize=(9, 3.8))
    ax2 = ax.twinx()
    for k, it in enumerate(items):
        st = result_style(k, len(items))
        z = it.design.scored.sim.impedance[0]
        ax.semilogx(f, np.abs(z), label=plain(f"|Z|, {it.label}"), **st)
        ax2.semilogx(f, np.rad2deg(np.angle(z)), color=st["color"], lw=0.8, ls=":")
    for (value, label), (colour, ls) in zip(reference_lines([it.job for it in items]), _cycle(REFERENCE_STYLES)):
        ax.axhline(value, color=colour, ls=ls, lw=1.1, label=plain(label))
        ax.annotate(plain(label), xy=(0.005, value), xycoords=("axes fraction", "data"), xytext=(2, -2),
                    textcoords="offset points", ha="left", va="top", fontsize=7, color=colour)  # under the line
    zmax = max(float(np.max(np.abs(it.design.scored.sim.impedance[0]))) for it in items)
    set_ylim(ax, 0, zmax * 1.15)
    ax2.set_ylim(-90, 90)
    ax2.set_ylabel("phase (deg, dotted)")
    finish_axes(ax, "|Z| (Ω)", "Impedance the amplifier sees", f)
    return fig


def _cycle(styles):
    while True:
        yield from styles


def prune_figure(items: list[ReportItem]):
    """The first prune's trade-off: cost and rms error against the number of parts; None without a prune."""
    pruned = [it.design for it in items if "prune" in it.design.sections]
    if not pruned:
        return None
    from xo_fit.output.plots import pruning_figure

    sec = pruned[0].sections["prune"]
    return pruning_figure(pyplot(), sec["steps"], sec["chosen_step"],
                          "Pruning: cost and rms error against the number of parts")
