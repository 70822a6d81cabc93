"""The report's off-axis figures of the last result: the ANSI/CTA-2034-A curves with their directivity indices,
and each orbit's level against angle and frequency (lobing reads as dark bands)."""

from __future__ import annotations

import numpy as np

from xo_fit.output.plots import finish_axes, legend, plain, spl_db_of
from xo_fit.output.report.figures import pyplot
from xo_fit.output.report.results import ReportItem

#: The CTA-2034-A curves drawn, with their colour and width.
CURVE_STYLES = {"on_axis": ("k", 1.8), "listening_window": ("tab:blue", 1.6), "early_reflections": ("tab:green", 1.3),
                "sound_power": ("tab:red", 1.3), "estimated_in_room": ("tab:purple", 1.1)}


def directivity_figure(items: list[ReportItem]):
    """The last result's directivity curves and, where the listening window is there, the sound power and early
    reflections DIs on a second axis; None on axis."""
    from xo_fit.model.acoustics import power_db

    off = items[-1].design.off_axis()
    if off is None:
        return None
    plt = pyplot()
    f = items[-1].design.system.frequencies
    _, _, curves = off
    fig, ax = plt.subplots(figsize=(9, 4.6))
    ax2 = ax.twinx()
    for name, (c, lw) in CURVE_STYLES.items():
        if name in curves:
            ax.semilogx(f, power_db(curves[name]), color=c, lw=lw, label=name.replace("_", " "))
    if "listening_window" in curves:
        for other, c in (("sound_power", "tab:red"), ("early_reflections", "tab:green")):
            if other in curves:
                ax2.semilogx(f, power_db(curves["listening_window"]) - power_db(curves[other]), color=c, ls=":",
                             lw=1.2, label=f"{other.replace('_', ' ')} DI")
        ax2.set_ylim(-2, 20)
        ax2.set_ylabel("DI (dB, dotted)")
        legend(ax2, fontsize=7, loc="lower right")  # none where only the listening window is measured
    top = float(np.max(power_db(curves["on_axis"])))
    finish_axes(ax, "SPL (dB)", f"Directivity curves (ANSI/CTA-2034-A), {plain(items[-1].label)}", f, top=top)
    return fig


def angles_figure(items: list[ReportItem]):
    """Each orbit with more than two angles: the last result's level re on-axis against angle and frequency;
    None on axis or without such an orbit."""
    off = items[-1].design.off_axis()
    if off is None:
        return None
    positions, p, _ = off
    orbits = [(o, t) for o, t in (("h", "horizontal"), ("v", "vertical"))
              if sum(1 for q in positions if q[0] == o or q == ("h", 0)) > 2]
    if not orbits:
        return None
    plt = pyplot()
    f = items[-1].design.system.frequencies
    level = spl_db_of(p)  # (A, F)
    index = {q: i for i, q in enumerate(positions)}
    fig, axes = plt.subplots(1, len(orbits), figsize=(11 if len(orbits) > 1 else 7, 4.2), squeeze=False,
                             constrained_layout=True)
    mesh = None
    for ax, (o, title) in zip(axes[0], orbits):
        rows = sorted({q[1] for q in positions if q[0] == o or q in (("h", 0), ("h", 180))})
        grid = np.array([level[index[("h", a) if a in (0, 180) else (o, a)]] - level[0] for a in rows])
        mesh = ax.pcolormesh(f, rows, np.clip(grid, -30, 3), shading="nearest", cmap="viridis", vmin=-30, vmax=3)
        ax.set_xscale("log")
        ax.set_xlabel("frequency (Hz)")
        ax.set_ylabel("angle (deg)")
        ax.set_title(f"{title} orbit, level re on-axis (dB), {plain(items[-1].label)}", fontsize=10)
    fig.colorbar(mesh, ax=list(axes[0]), shrink=0.9, label="dB re on-axis")
    return fig
